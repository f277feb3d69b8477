"""Triage speed and memory: N units of a bundled case, triaged after the ensemble is cached.

    python bench/triage_bench.py [--case cases/mic-preamp.yaml] [--units 10000] [--seed 1]
    python bench/triage_bench.py --units 1000 --doubles --check 0   # two faults a unit

Units are drawn like Engine.simulate, one batch per fault (faults by the priors, 10 %
healthy, one unit in twenty with a reading left out); drawing them is not timed. Prints
a Markdown table: build from cache, triage time, units per second, peak resident
memory. Targets (issue 5): 10 000 units in < 10 s after the ensemble is cached, memory
< 1 GiB.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from diag.core.case import load_case  # noqa: E402
from diag.core.drill import pick_fault  # noqa: E402
from diag.core.engine import Engine, Reading  # noqa: E402
from diag.core.errors import DiagError  # noqa: E402
from diag.core.rules import load_rules  # noqa: E402
from diag.core.triage import triage  # noqa: E402


def peak_rss_mib() -> float:
    """Peak resident set size of this process, MiB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def make_doubles(eng: Engine, n: int, seed: int) -> dict[str, list]:
    """n units each with two faults of different parts, drawn uniformly (the batch of
    odd returns: many fit no single fault, and pairs of faults are tried for them)."""
    rng = np.random.default_rng(seed)
    ids = [s.id for s in eng.specs if s.id != "healthy" and "+" not in s.id]
    units: dict[str, list] = {}
    while len(units) < n:
        a, b = rng.choice(len(ids), 2, replace=False)
        if ids[a].split(":")[0] == ids[b].split(":")[0]:
            continue
        try:
            units[f"D{len(units):05d}"] = list(eng.simulate(f"{ids[a]}+{ids[b]}", rng))
        except DiagError:  # a pair whose units do not solve: draw another
            continue
    return units


def make_units(eng: Engine, n: int, seed: int) -> dict[str, list]:
    """n units: faults drawn by the priors (10 % healthy), each fault's units drawn and
    solved in one batch (ensemble.draw_unit, the solver, the meter, as Engine.simulate
    does one at a time); units that did not solve are left out and drawn again."""
    from diag.core import ensemble, meter, solver
    from diag.core.drill import _spec

    rng = np.random.default_rng(seed)
    circ, obs, m = eng.circuit, eng.case.observables, eng.case.meter
    units: dict[str, list] = {}
    while len(units) < n:
        want = n - len(units)
        faults = ["healthy" if rng.random() < 0.1 else pick_fault(eng, rng)
                  for _ in range(want)]
        for fault in sorted(set(faults)):
            k = faults.count(fault)
            params = ensemble.draw_unit(circ, _spec(eng, fault), k, rng)
            dc = solver.solve_dc(circ, params)
            ac = solver.solve_ac(circ, params, dc) if any(o.kind == "ac" for o in obs) \
                else None
            x = meter.observe(circ, params, dc, ac, obs, m)
            shown = np.stack([meter.display(x[:, j], o.kind, m, o.unit, rng)
                              for j, o in enumerate(obs)], axis=1)
            for row, ok in zip(shown, np.all(np.isfinite(x), axis=1), strict=True):
                if not ok or len(units) >= n:
                    continue
                rs = [Reading(o.point, o.kind, float(v)) for o, v in zip(obs, row,
                                                                        strict=True)]
                if rng.random() < 0.05:
                    rs.pop(int(rng.integers(len(rs))))
                units[f"U{len(units):05d}"] = rs
    order = rng.permutation(len(units))
    names = list(units)
    return {names[i]: units[names[i]] for i in order}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--case", default=str(ROOT / "cases" / "mic-preamp.yaml"))
    ap.add_argument("--units", type=int, default=10000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--threads", type=int, default=None,
                    help="worker threads of the batch (default: CPUs, at most 4)")
    ap.add_argument("--doubles", action="store_true",
                    help="every unit with two faults of different parts (make_doubles)")
    ap.add_argument("--check", type=int, default=200,
                    help="units compared against Engine.diagnose one at a time")
    args = ap.parse_args()

    load = os.getloadavg()
    rules = load_rules()
    case = load_case(args.case)
    Engine(case, rules).build()                      # make sure the cache exists
    t0 = time.perf_counter()
    eng = Engine(case, rules)
    eng.build()
    t_cached = time.perf_counter() - t0

    t0 = time.perf_counter()
    units = (make_doubles if args.doubles else make_units)(eng, args.units, args.seed)
    t_make = time.perf_counter() - t0

    t0, c0 = time.perf_counter(), time.process_time()
    res = triage(eng, units, threads=args.threads)
    t_triage, c_triage = time.perf_counter() - t0, time.process_time() - c0
    rss = peak_rss_mib()

    names = list(units)[: args.check]
    t0 = time.perf_counter()
    one = [eng.diagnose(units[n]) for n in names]
    t_one = (time.perf_counter() - t0) / max(len(names), 1)
    worst = 0.0
    for n, d in zip(names, one, strict=True):
        got = {s.fault: s.p for s in res.unit(n).diagnosis.suspects}
        worst = max(worst, max(abs(got[s.fault] - s.p) for s in d.suspects))

    print(f"case `{Path(args.case).name}`, {len(case.observables)} observables, "
          f"{len(eng.ensemble.hypotheses)} hypotheses, K = {eng.ensemble.samples.shape[1]}; "
          f"{os.cpu_count()} CPUs, load average {load[0]:.1f} at the start, "
          f"{os.getloadavg()[0]:.1f} at the end\n")
    print("| measure | value | target |")
    print("|---|---:|---|")
    print(f"| ensemble from cache | {t_cached:.3f} s | |")
    print(f"| drawing {args.units} units (not timed in triage) | {t_make:.1f} s | |")
    print(f"| triage of {args.units} units | {t_triage:.2f} s | < 10 s |")
    print(f"| CPU time of the triage (all threads; wall time on an idle machine is about "
          f"this over the threads that ran in parallel) | {c_triage:.2f} s | |")
    print(f"| units per second | {args.units / t_triage:,.0f} | |")
    print(f"| diagnose one unit at a time (mean of {len(names)}) | {1e3 * t_one:.1f} ms | |")
    print(f"| max abs p difference, batch vs one at a time | {worst:.2e} | ~0 |")
    print(f"| peak resident memory | {rss:.0f} MiB | < 1024 MiB |")
    s = res.summary
    print(f"\nsummary: {s['faulty']} faulty, {len(s['healthy'])} healthy, "
          f"{len(s['undecided'])} undecided, "
          f"{len(s['no_fit'])} no fit, {len(s['incomplete'])} incomplete; "
          f"top faults: {', '.join(r['fault'] + ' ' + str(r['units']) for r in s['by_fault'][:5])}")


if __name__ == "__main__":
    main()
