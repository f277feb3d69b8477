"""diag.core.workers: blocks of work on forked processes or threads, the same answers
either way (common practice, no source: the checks are of the mechanism itself)."""

from __future__ import annotations

import threading

import pytest

from diag.core import workers
from diag.core.errors import DiagError

needs_fork = pytest.mark.skipif(not workers.forkable(),
                                reason="worker processes are forked on Linux only, "
                                       "from a process running one thread")


def _square(i: int) -> int:
    return i * i


@pytest.mark.parametrize("processes", [False, pytest.param(True, marks=needs_fork)])
@pytest.mark.parametrize("n_workers", [1, 2, 3])
def test_results_come_back_in_order_with_progress(processes, n_workers):
    seen = []
    got = workers.run(_square, 7, n_workers, seen.append, processes=processes)
    assert got == [i * i for i in range(7)]
    assert seen == list(range(7))


@pytest.mark.parametrize("processes", [False, pytest.param(True, marks=needs_fork)])
def test_a_block_s_error_arrives_whole(processes):
    def bad(i):
        if i == 1:
            raise DiagError("no solution", where="R3", hint="check R3's value")
        return i

    with pytest.raises(DiagError) as err:
        workers.run(bad, 3, 2, processes=processes)
    assert (err.value.where, err.value.hint) == ("R3", "check R3's value")
    assert str(err.value) == "R3: no solution (check R3's value)"


@pytest.mark.parametrize("processes", [False, pytest.param(True, marks=needs_fork)])
def test_cancelled_stops_the_run(processes):
    with pytest.raises(DiagError, match="cancelled"):
        workers.run(_square, 4, 2, cancelled=lambda: True, processes=processes)


@needs_fork
def test_no_fork_while_another_thread_runs():
    """A fork copies only the calling thread: with another thread alive (the interface
    builds in one), blocks run on threads."""
    stop = threading.Event()
    t = threading.Thread(target=stop.wait)
    t.start()
    try:
        assert not workers.forkable()
    finally:
        stop.set()
        t.join()
    assert workers.forkable()


@pytest.mark.parametrize("processes", [False, pytest.param(True, marks=needs_fork)])
def test_started_blocks_give_run_s_list_while_the_caller_starts_threads(processes):
    """workers.start forks its workers at once; the caller may then start threads of its
    own (triage fills its tables meanwhile) and collects run's list later."""
    later = workers.start(_square, 7, 2, processes=processes)
    other = threading.Thread(target=lambda: None)
    other.start()
    other.join()
    assert later.then(sum).get() == sum(i * i for i in range(7))


@needs_fork
def test_a_started_run_cancelled_leaves_no_worker_behind():
    import multiprocessing
    import time

    def slow(i):
        time.sleep(5)
        return i

    later = workers.start(slow, 4, 2, processes=True)
    assert len(multiprocessing.active_children()) == 2
    later.cancel()
    assert multiprocessing.active_children() == []
