"""Running independent blocks of work side by side: forked worker processes where that is
safe, threads elsewhere.

The solver spends much of its time in short numpy operations with Python between them,
so two threads hold the interpreter lock in turn and overlap little (mic-preamp's
ensemble: 0.93 s on one thread, 0.88 s on two). Two forked processes each run a block on
their own interpreter (0.55 s). A fork copies only the calling thread, so it is used only
where this process runs no other thread (another's lock, held at the fork, would stay
held in the child), on Linux (where fork is the platform's own way of starting a process;
macOS and Windows start a fresh interpreter, whose imports would cost more than the
fork saves), and not inside a daemonic worker (which may not have children). The
command line runs single-threaded and forks; the interface builds in a worker thread and
so uses threads. Results do not depend on which is used. `start` forks at once and lets
the caller go on (and start threads of its own) while the workers solve.
"""

from __future__ import annotations

import multiprocessing
import sys
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

from diag.core.errors import DiagError

_JOB: Callable[[int], Any] | None = None   # what a forked worker runs (set before the fork)


def _call(i: int) -> Any:
    return _JOB(i)


def _linux_parent() -> bool:
    """On Linux and not inside a daemonic worker (module docstring)."""
    return sys.platform.startswith("linux") and not multiprocessing.current_process().daemon


def forkable() -> bool:
    """Whether worker processes may be forked from here (module docstring)."""
    return _linux_parent() and threading.active_count() == 1


def fork_in_child() -> bool:
    """Whether a fresh process started from here could fork worker processes where this
    one may not (on Linux, from a process that runs other threads)."""
    return _linux_parent() and threading.active_count() > 1


class Later:
    """A result being worked out: `get()` waits for it (once), `cancel()` drops it."""

    def __init__(self, get: Callable[[], Any], cancel: Callable[[], None] = lambda: None):
        self._get, self.cancel = get, cancel

    def get(self) -> Any:
        return self._get()

    def then(self, f: Callable[[Any], Any]) -> Later:
        """The result f(this one's), cancelled with this one."""
        return Later(lambda: f(self.get()), self.cancel)


def start(job: Callable[[int], Any], n: int, workers: int,
          processes: bool | None = None) -> Later:
    """`run` begun now: its list from the `Later` returned. Where the blocks go to
    forked processes (`processes` None: where `forkable`), they are forked here and
    work while the caller goes on, which may then start threads of its own: the fork
    is behind it. Elsewhere `get()` runs them all."""
    workers = max(1, min(workers, n))
    if processes is None:
        processes = forkable()
    if not processes or workers == 1:
        return Later(lambda: run(job, n, workers, processes=processes))
    global _JOB
    _JOB = job
    try:
        pool = multiprocessing.get_context("fork").Pool(workers)  # forks the workers now
    finally:
        _JOB = None  # each worker holds its own copy from the fork
    pending = pool.map_async(_call, range(n), chunksize=1)

    def stop() -> None:
        pool.terminate()
        pool.join()

    def get() -> list[Any]:
        try:
            return list(pending.get())
        finally:
            stop()

    return Later(get, stop)


def run(job: Callable[[int], Any], n: int, workers: int,
        progress: Callable[[int], None] | None = None,
        cancelled: Callable[[], bool] | None = None, processes: bool | None = None
        ) -> list[Any]:
    """[job(0), ..., job(n - 1)] worked out on up to `workers` processes (`processes`
    None: where `forkable`) or threads; progress(i) after block i is back (in order);
    DiagError when cancelled() turns true. An exception in a block is raised here."""
    workers = max(1, min(workers, n))
    if processes is None:
        processes = forkable()
    out: list[Any] = []

    def done(r: Any) -> None:
        out.append(r)
        if progress is not None:
            progress(len(out) - 1)

    def check() -> None:
        if cancelled is not None and cancelled():
            raise DiagError("ensemble build cancelled")

    if workers == 1:
        for i in range(n):
            check()
            done(job(i))
        return out
    if processes:
        global _JOB
        _JOB = job
        try:
            with multiprocessing.get_context("fork").Pool(workers) as pool:
                for r in pool.imap(_call, range(n)):
                    check()
                    done(r)
        finally:
            _JOB = None
        return out

    def guarded(i: int) -> Any:
        check()
        return job(i)

    with ThreadPoolExecutor(max_workers=workers) as pool:
        futures = [pool.submit(guarded, i) for i in range(n)]
        try:
            for f in futures:
                done(f.result())
        except BaseException:
            for f in futures:
                f.cancel()
            raise
    return out
