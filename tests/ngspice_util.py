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


def tran_ac_rms(text: str, source: str, vpk: float, hz: float, nodes: list[str],
                settle_cycles: int = 400, window_cycles: int = 20,
                timeout: float = 300) -> dict[str, tuple[float, float]]:
    """AC rms of `nodes` (ngspice names) in the steady state of a transient run.

    `text` is a netlist as diag.core.spice.netlist writes it (its `.op`/`.ac` analyses
    are dropped); the signal `source` gets a sine of peak `vpk` volts at `hz`. The run
    starts from the operating point and lasts settle_cycles + window_cycles periods;
    each node's AC rms is sqrt(rms² - mean²) of its change from the operating point over
    the last window, and over the window before it, returned as (last, previous) so a
    caller can check that it had settled."""
    import re

    per = 1.0 / hz
    body = [ln for ln in text.splitlines() if not ln.lower().startswith((".op", ".ac", ".end"))]
    pat = re.compile(rf"^({re.escape(source)}\s+\S+\s+\S+\s+dc 0 ac \S+)", re.IGNORECASE)
    hits = 0
    for i, ln in enumerate(body):
        if pat.match(ln):
            body[i] = f"{ln} sin(0 {vpk:.9g} {hz:.9g})"
            hits += 1
    if hits != 1:
        raise ValueError(f"signal source {source} not found once in the netlist")
    t_end = (settle_cycles + window_cycles) * per
    body.append(f".tran {per / 100:.6g} {t_end:.6g} 0 {per / 100:.6g}")
    spans = {"a": (t_end - window_cycles * per, t_end),
             "b": (t_end - 2 * window_cycles * per, t_end - window_cycles * per)}
    for n in nodes:
        # measured through a blocking capacitor charged at the operating point (1 µF into
        # 1e12 ohm: no load, no settling), so that the printed six digits carry the AC and
        # not the node's DC level
        body += [f"C_acm_{n} {n} acm_{n} 1u", f"R_acm_{n} acm_{n} 0 1e12"]
        for w, (t0, t1) in spans.items():
            body.append(f".meas tran r{w}_{n} rms v(acm_{n}) from={t0:.9g} to={t1:.9g}")
            body.append(f".meas tran m{w}_{n} avg v(acm_{n}) from={t0:.9g} to={t1:.9g}")
    got, log = _measured(body, timeout)
    out = {}
    for n in nodes:
        vals = []
        for w in spans:
            r, m = got.get(f"r{w}_{n}".lower()), got.get(f"m{w}_{n}".lower())
            if r is None or m is None:
                raise RuntimeError(f"ngspice measured no {n}:\n{log[-3000:]}")
            vals.append((max(r * r - m * m, 0.0)) ** 0.5)
        out[n] = (vals[0], vals[1])
    return out


def tran_from(text: str, start: dict[str, float], node_farads: float, t_end: float,
              nodes: list[str], timeout: float = 120,
              extra: tuple[str, ...] = ()) -> dict[str, float]:
    """Node voltages (ngspice names) at t_end of a transient run that starts from `start`
    (node -> volts, `uic`: no operating point is solved first) with `node_farads` from
    every node in `start` to ground standing for the parts' own capacitance. `text` is a
    netlist as diag.core.spice.netlist writes it (its analyses are dropped); `extra`
    element lines are added (e.g. a trigger pulse)."""
    body = [ln for ln in text.splitlines() if not ln.lower().startswith((".op", ".ac", ".end"))]
    body += list(extra)
    for n in start:
        body.append(f"C_par_{n} {n} 0 {node_farads:.6g}")
    body.append(".ic " + " ".join(f"v({n})={v:.9g}" for n, v in start.items()))
    body.append(f".tran {t_end / 1000:.6g} {t_end:.6g} uic")
    body += [f".meas tran fin_{n} find v({n}) at={t_end:.9g}" for n in nodes]
    got, log = _measured(body, timeout)
    missing = [n for n in nodes if f"fin_{n}".lower() not in got]
    if missing:
        raise RuntimeError(f"ngspice measured no {missing}:\n{log[-3000:]}")
    return {n: got[f"fin_{n}".lower()] for n in nodes}


def _measured(body: list[str], timeout: float) -> tuple[dict[str, float], str]:
    """Run the netlist lines `body` (`.end` added) in one `ngspice -b` process; returns
    its `.meas` results (lower-case name -> value) and its output."""
    import re

    with tempfile.TemporaryDirectory(prefix="diag-ngspice-") as tmp:
        cir = Path(tmp) / "deck.cir"
        cir.write_text("\n".join([*body, ".end"]) + "\n", encoding="utf-8")
        proc = subprocess.run(["ngspice", "-b", str(cir)], cwd=tmp, capture_output=True,
                              text=True, timeout=timeout)
    log = proc.stdout + proc.stderr
    return ({k.lower(): float(v) for k, v in
             re.findall(r"^\s*(\w+)\s*=\s*([-+0-9.eE]+)", log, flags=re.MULTILINE)}, log)
