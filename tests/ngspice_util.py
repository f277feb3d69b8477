"""Run ngspice in batch mode and read its results (tests and eval/ scripts use this).

API (small on purpose):

    have_ngspice() -> bool                     # is `ngspice` on PATH
    NGSPICE_MISSING                            # skip reason text for tests
    run_ngspice(text, timeout=120) -> SpiceRun # one `ngspice -b` process
    SpiceRun.op:  dict[str, float]             # operating point: 'v(node)' volts,
                                               # 'i(source)' amperes (SPICE sign)
    SpiceRun.ac:  dict[str, complex]           # AC phasors at the one frequency, same names
    SpiceRun.v(node) / .i(source) / .vac(node) # lookups by ngspice name; node '0' -> 0

The netlist must hold its analyses (`.op`, optionally one `.ac` point), as
diag.core.spice.netlist writes them. Results are read from an ASCII raw file
(SPICE_ASCIIRAWFILE=1, `-r`), so the figures carry ngspice's full precision rather than
the 6 digits of its printed tables. Names are lower case, as ngspice folds them.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

NGSPICE_MISSING = "ngspice is not on PATH (install ngspice to run the reference-simulator checks)"


def have_ngspice() -> bool:
    """True when an `ngspice` executable is on PATH."""
    return shutil.which("ngspice") is not None


@dataclass
class SpiceRun:
    """Results of one ngspice run; see the module docstring. `log` is ngspice's output."""

    op: dict[str, float] = field(default_factory=dict)
    ac: dict[str, complex] = field(default_factory=dict)
    log: str = ""

    def v(self, node: str) -> float:
        """Operating-point voltage of ngspice node `node` (volts to node 0)."""
        return 0.0 if node == "0" else self.op[f"v({node.lower()})"]

    def i(self, source: str) -> float:
        """Operating-point branch current of voltage source `source` (amperes, flowing
        into its plus node from the circuit: a source that delivers power reads < 0)."""
        return self.op[f"i({source.lower()})"]

    def vac(self, node: str) -> complex:
        """AC phasor of node `node` (same units as the AC source amplitude)."""
        return 0j if node == "0" else self.ac[f"v({node.lower()})"]


def _parse_raw(text: str) -> dict[str, tuple[str, list]]:
    """ASCII raw file -> {plotname: (flags, [(name, value), ...])} for one-point plots."""
    plots: dict[str, tuple[str, list]] = {}
    lines = text.splitlines()
    i = 0
    while i < len(lines):
        if not lines[i].startswith("Title:"):
            i += 1
            continue
        head: dict[str, str] = {}
        i += 1
        while i < len(lines) and not lines[i].startswith("Variables:"):
            key, _, value = lines[i].partition(":")
            head[key.strip()] = value.strip()
            i += 1
        nvars = int(head["No. Variables"])
        if int(head["No. Points"]) != 1:
            raise ValueError("ngspice_util reads one-point analyses only (.op, .ac lin 1)")
        names = []
        for j in range(nvars):
            parts = lines[i + 1 + j].split()
            names.append(parts[1].lower())
        i += 1 + nvars
        assert lines[i].startswith("Values:"), lines[i]
        values = []
        for j in range(nvars):
            tok = lines[i + 1 + j].split()[-1]
            values.append(tok)
        i += 1 + nvars
        complex_ = "complex" in head.get("Flags", "")
        out = []
        for name, tok in zip(names, values, strict=True):
            if complex_:
                re_, im = tok.split(",")
                out.append((name, complex(float(re_), float(im))))
            else:
                out.append((name, float(tok)))
        plots[head["Plotname"]] = (head.get("Flags", ""), out)
    return plots


def run_ngspice(text: str, timeout: float = 120) -> SpiceRun:
    """Run one netlist in `ngspice -b`; raise RuntimeError with ngspice's log on failure."""
    with tempfile.TemporaryDirectory(prefix="diag-ngspice-") as tmp:
        cir, raw = Path(tmp) / "deck.cir", Path(tmp) / "out.raw"
        cir.write_text(text, encoding="utf-8")
        env = dict(os.environ, SPICE_ASCIIRAWFILE="1")
        proc = subprocess.run(["ngspice", "-b", "-r", str(raw), str(cir)], cwd=tmp, env=env,
                              capture_output=True, text=True, timeout=timeout)
        log = proc.stdout + proc.stderr
        if proc.returncode != 0 or not raw.exists():
            raise RuntimeError(f"ngspice failed (exit {proc.returncode}):\n{log[-4000:]}")
        bad = [ln for ln in log.splitlines()
               if ln.lower().startswith(("error", "warning: singular", "doanalyses"))
               or "timestep too small" in ln.lower() or "no convergence" in ln.lower()]
        if bad:
            raise RuntimeError("ngspice reported problems:\n" + "\n".join(bad[:20]))
        plots = _parse_raw(raw.read_text(encoding="utf-8", errors="replace"))
    run = SpiceRun(log=log)
    for name, (_, values) in plots.items():
        target = run.ac if name.lower().startswith("ac") else run.op
        for var, x in values:
            if var != "frequency":
                target[var] = x
    if not run.op:
        raise RuntimeError("ngspice wrote no operating point:\n" + log[-4000:])
    return run
