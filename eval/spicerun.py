"""Run ngspice decks in batch mode (several at once) and collect their `@@ i value` lines
(and other tagged lines, `@<tag> i value`, that some decks echo besides)."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import tempfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

_LINE = re.compile(r"^(@\S*) (\d+) (\S+)\s*$")


def ngspice_path() -> str | None:
    """The ngspice executable on PATH, or None."""
    return shutil.which("ngspice")


def run_deck(deck: str, n: int, timeout: float = 60.0) -> list[float]:
    """Run one deck; return its `n` echoed `@@` values in index order (NaN where ngspice
    gave none, e.g. an operating point that did not converge)."""
    return run_deck_tags(deck, n, timeout)["@@"]


def run_deck_tags(deck: str, n: int, timeout: float = 60.0) -> dict[str, list[float]]:
    """Run one deck; return {tag: its `n` values in index order} for every tag it echoed
    (`@@` always; NaN where ngspice gave none)."""
    exe = ngspice_path()
    if exe is None:
        raise RuntimeError("ngspice is not on PATH: install it (e.g. apt-get install ngspice)")
    with tempfile.TemporaryDirectory(prefix="diag-eval-") as tmp:
        path = Path(tmp) / "unit.cir"
        path.write_text(deck, encoding="utf-8")
        try:
            proc = subprocess.run([exe, "-b", str(path)], capture_output=True, text=True,
                                  timeout=timeout, cwd=tmp)
            text = proc.stdout
        except subprocess.TimeoutExpired:
            text = ""
    vals = {"@@": [float("nan")] * n}
    for line in text.splitlines():
        m = _LINE.match(line.strip())
        if m:
            row = vals.setdefault(m.group(1), [float("nan")] * n)
            try:
                row[int(m.group(2))] = float(m.group(3))
            except ValueError:
                pass
    return vals


def run_decks(decks: list[str], n: list[int], jobs: int | None = None) -> list[list[float]]:
    """Run many decks on `jobs` processes (default: CPU count); `@@` values in input
    order."""
    return [r["@@"] for r in run_decks_tags(decks, n, jobs)]


def run_decks_tags(decks: list[str], n: list[int], jobs: int | None = None,
                   timeout: float = 60.0) -> list[dict[str, list[float]]]:
    """`run_deck_tags` over many decks on `jobs` processes; results in input order."""
    jobs = jobs or os.cpu_count() or 1
    with ThreadPoolExecutor(max_workers=jobs) as pool:
        return list(pool.map(lambda d, k: run_deck_tags(d, k, timeout), decks, n))
