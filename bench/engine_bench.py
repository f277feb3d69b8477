"""Engine speed on the largest bundled case (most hypotheses); prints a table.

    python bench/engine_bench.py [--draws 128] [--repeat 20]

Targets (issue 3): all hypotheses at K=128, DC and AC, built < 1 s cold and < 0.1 s from
the cache; one posterior update < 10 ms; ranking every next reading < 50 ms; the whole
`diag diagnose` process < 1 s warm. Not part of the test run.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def _time(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=128)
    ap.add_argument("--repeat", type=int, default=20)
    args = ap.parse_args()
    home = tempfile.mkdtemp(prefix="diag-bench-")
    os.environ["DIAG_HOME"] = home

    from diag.core import faults
    from diag.core.case import load_case
    from diag.core.engine import Engine
    from diag.core.paths import cases_dir
    from diag.core.rules import load_rules

    rules = load_rules()
    cases = [load_case(p, rules) for p in sorted(cases_dir().glob("*.yaml"))]
    # most single faults (the linked pairs depend on a stress solve, which the cold row
    # below must time, so they do not choose)
    case = max(cases, key=lambda c: len(faults.singles(c, rules)))
    t = time.perf_counter()
    eng = Engine(case, rules, K=args.draws)  # compiles, solves the linked faults' causes
    t_init = time.perf_counter() - t
    t = time.perf_counter()
    ens = eng.build()
    cold = time.perf_counter() - t
    H, K, M = ens.samples.shape

    def cached():
        e = Engine(case, rules, K=args.draws)
        assert e.build().from_cache

    warm = _time(cached, 5)
    unit = eng.simulate("R2:open" if any(h.id == "R2:open" for h in ens.hypotheses)
                        else ens.hypotheses[1].id, np.random.default_rng(1))
    half = unit[: max(1, len(unit) // 2)]
    idx, vals, _ = eng._match(half)
    u = eng._noise_obj.u(vals, idx)
    # the leading suspects' further units, solved the first time they lead (Engine._refine)
    t = time.perf_counter()
    eng._score(eng._U, eng.specs, idx, u, 0.02)
    first = time.perf_counter() - t
    post = _time(lambda: eng._score(eng._U, eng.specs, idx, u, 0.02), args.repeat)
    sc, _ = eng._score(eng._U, eng.specs, idx, u, 0.02)
    order = np.argsort(-sc.posterior)
    rank = _time(lambda: eng._advise(eng._U, eng.specs, sc, idx, order, ens.group, u),
                 args.repeat)
    fit = _time(lambda: eng._fit(eng._U, sc, idx, u), args.repeat)
    whole = _time(lambda: eng.diagnose(half), args.repeat)

    csv = Path(home) / "unit.csv"
    csv.write_text("point,kind,value\n" + "".join(f"{r.point},{r.kind},{r.value}\n"
                                                  for r in half))
    cmd = [sys.executable, "-m", "diag", "diagnose", case.path, str(csv), "--json"]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    subprocess.run(cmd, env=env, capture_output=True, check=False)  # warm the cache

    def proc():
        subprocess.run(cmd, env=env, capture_output=True, check=False)

    wall = _time(proc, 3)
    for f in Path(home).rglob("*-more.npz"):  # the leaders' further units not cached yet
        f.unlink()
    t = time.perf_counter()
    proc()
    wall_more = time.perf_counter() - t
    rows = [
        ("hypotheses, cold (compile, stress solve)", t_init, None),
        ("ensemble build, cold (solve all)", cold, 1.0),
        ("ensemble build, from cache", warm, 0.1),
        ("first update: leaders' further units", first, None),
        ("posterior update", post, 0.010),
        ("rank every next reading", rank, 0.050),
        ("goodness-of-fit test", fit, None),
        ("Engine.diagnose (all of it)", whole, None),
        ("`diag diagnose` process, warm", wall, 1.0),
        ("  the same, further units not cached", wall_more, None),
    ]
    print(f"case {case.path}: H={H} hypotheses, K={K} units, M={M} observables, "
          f"{H * K} variants, {len(half)} readings taken")
    print(f"{'step':<36} {'seconds':>10} {'target':>8}  ok")
    for name, sec, target in rows:
        tgt = f"{target:g}" if target else "-"
        ok = "" if target is None else ("yes" if sec < target else "NO")
        print(f"{name:<36} {sec:10.4f} {tgt:>8}  {ok}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
