"""Run ngspice decks in batch mode (several at once) and collect their `@@ i value` lines."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import tempfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

_LINE = re.compile(r"^@@ (\d+) (\S+)\s*$")


def ngspice_path() -> str | None:
    """The ngspice executable on PATH, or None."""
    return shutil.which("ngspice")


def run_deck(deck: str, n: int, timeout: float = 60.0) -> list[float]:
    """Run one deck; return its `n` echoed values in index order (NaN where ngspice gave
    none, e.g. an operating point that did not converge)."""
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
    vals = [float("nan")] * n
    for line in text.splitlines():
        m = _LINE.match(line.strip())
        if m:
            i = int(m.group(1))
            try:
                vals[i] = float(m.group(2))
            except ValueError:
                pass
    return vals


def run_decks(decks: list[str], n: list[int], jobs: int | None = None) -> list[list[float]]:
    """Run many decks on `jobs` processes (default: CPU count); results in input order."""
    jobs = jobs or os.cpu_count() or 1
    with ThreadPoolExecutor(max_workers=jobs) as pool:
        return list(pool.map(run_deck, decks, n))
