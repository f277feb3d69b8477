"""DC operating points per second: diag's batched solver against ngspice (prints a table).

For every case in cases/: diag's solve_dc on B = 1, 1000 and 10 000 healthy tolerance
draws (ensemble.draw_healthy), and, in the same run, ngspice on the same circuit
(diag.core.spice's netlist) scripted as a tolerance study: one ngspice process whose
.control loop alters every resistor and supply within its tolerance (`alter`, values
from ngspice's own sunif) and runs `op` each time. ngspice uses its default tolerances.

Rates are per CPU second of the process doing the work (process_time for diag, the
child's rusage for ngspice), best of --repeat runs, so that other load on the machine
disturbs them less; wall-clock seconds for 10 000 diag variants are shown too.

    python bench/solver_bench.py [--ops 2000] [--repeat 5] [--cases cases/*.yaml]

Targets (issue): at B = 10 000 at least 200 000 OP/s on every case; 10 000 variants of
the largest case in under 0.1 s. Not a test: nothing here asserts.
"""

from __future__ import annotations

import argparse
import glob
import os
import re
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from diag.core import ensemble, solver, spice  # noqa: E402
from diag.core.case import load_case  # noqa: E402
from diag.core.netlist import compile_case  # noqa: E402
from diag.core.rules import load_rules  # noqa: E402


def diag_rate(circuit, B: int, repeat: int) -> tuple[float, float, float]:
    """(OP/s per CPU second, best wall seconds, fraction ok) for B healthy draws."""
    params = ensemble.draw_healthy(circuit, B, np.random.default_rng(1))
    calls = max(1, 2000 // B) if B < 100 else 1
    solver.solve_dc(circuit, params)            # warm: plan, nominal point
    best_cpu = best_wall = float("inf")
    ok = 0.0
    for _ in range(repeat):
        c0, w0 = time.process_time(), time.perf_counter()
        for _ in range(calls):
            dc = solver.solve_dc(circuit, params)
        best_cpu = min(best_cpu, (time.process_time() - c0) / calls)
        best_wall = min(best_wall, (time.perf_counter() - w0) / calls)
        ok = float(dc.ok.mean())
    return B / best_cpu, best_wall, ok


def _tolerance_study(circuit, ops: int) -> str:
    """ngspice deck: the circuit plus a .control loop of `ops` altered operating points."""
    deck = spice.netlist(circuit)
    keep = [ln for ln in deck.splitlines()
            if not re.match(r"\s*\.(op|ac|end|options)\b", ln, re.I)]
    ctl = [".options temp=27 tnom=27", ".control", "set noaskquit", "let k = 0",
           "let acc = 0", f"while k < {ops}"]
    for part in circuit.parts:
        tag = re.sub(r"[^A-Za-z0-9_]", "_", part.ref).lower()
        if part.kind == "resistor":
            tol = part.tol if part.tol is not None else 0.05
            r = circuit.nominal[f"{part.ref}.r"]
            ctl += [f"  let x_{tag} = {r!r}*(1+{tol!r}*sunif(0))",
                    f"  alter r_{tag} = $&x_{tag}"]
        elif part.kind == "supply":
            tol = part.tol if part.tol is not None else 0.02
            v = circuit.nominal[f"{part.ref}.v"]
            ctl += [f"  let x_{tag} = {v!r}*(1+{tol!r}*sunif(0))",
                    f"  alter v_{tag} dc = $&x_{tag}"]
    node = spice.node_name(circuit.case, circuit.nodes[0])
    ctl += ["  op", f"  let const.acc = const.acc + v({node})", "  destroy all",
            "  let k = k + 1", "end", "print const.acc / k", ".endc", ".end"]
    return "\n".join(keep + ctl) + "\n"


def ngspice_rate(circuit, ops: int, repeat: int) -> float | None:
    """ngspice operating points per CPU second (startup and parsing subtracted), or None."""
    exe = shutil.which("ngspice")
    if exe is None:
        return None
    with tempfile.TemporaryDirectory(prefix="diag-bench-") as tmp:
        def cpu(n: int) -> float:
            path = os.path.join(tmp, f"deck{n}.cir")
            Path(path).write_text(_tolerance_study(circuit, n))
            best = float("inf")
            for _ in range(repeat):
                r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
                subprocess.run([exe, "-b", path], capture_output=True, timeout=600)
                r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
                best = min(best, (r1.ru_utime - r0.ru_utime) + (r1.ru_stime - r0.ru_stime))
            return best

        dt = cpu(ops) - cpu(0)
    return ops / dt if dt > 0 else None


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ops", type=int, default=2000, help="ngspice operating points per run")
    ap.add_argument("--repeat", type=int, default=5, help="runs per figure (best is kept)")
    ap.add_argument("--cases", nargs="*", default=sorted(glob.glob(str(ROOT / "cases/*.yaml"))))
    a = ap.parse_args(argv)
    rules = load_rules()
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs; "
          "rates in operating points per CPU second\n")
    head = (f"| {'case':<20} | {'unknowns':>8} | {'B=1':>9} | {'B=1000':>9} | {'B=10000':>9} "
            f"| {'10k wall s':>10} | {'ngspice':>8} | {'ratio':>6} |")
    print(head)
    print("|" + "|".join("-" * (len(c)) for c in head.split("|")[1:-1]) + "|")
    for path in a.cases:
        circuit = compile_case(load_case(path), rules)
        r1, _, _ = diag_rate(circuit, 1, a.repeat)
        r3, _, _ = diag_rate(circuit, 1000, a.repeat)
        r4, wall, ok = diag_rate(circuit, 10000, a.repeat)
        ng = ngspice_rate(circuit, a.ops, max(1, a.repeat // 2))
        ratio = f"{r4 / ng:6.0f}" if ng else "   n/a"
        ngs = f"{ng:8.0f}" if ng else "     n/a"
        flag = "" if ok == 1.0 else f"  ({100 * (1 - ok):.2f} % not converged)"
        print(f"| {Path(path).stem:<20} | {len(circuit.unknowns):>8} | {r1:>9.0f} | {r3:>9.0f} "
              f"| {r4:>9.0f} | {wall:>10.3f} | {ngs} | {ratio} |{flag}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
