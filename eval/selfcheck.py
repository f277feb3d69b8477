"""Self-consistency of the engine: units drawn by diag's own model, scored by diag.

    python -m eval.selfcheck [--case CASE ...] [--per-fault N] [--draws K] [--seed N]
                             [--units-seed N]

For every single-fault hypothesis (pairs left out) and `healthy`, N units are drawn with
`Engine.simulate` (tolerances, fault values, meter error and display) and diagnosed with
every point read. No ngspice and no model mismatch: what goes wrong here is the engine's
own estimate (K drawn units per hypothesis, a kernel over them), not the physics. A
mode that does worse here than in `python -m eval.run` points at sampling, not at the
model. Prints a Markdown table per fault mode: group-aware top-1, `fits` false (a
calibrated test at alpha should give about alpha or less) and wrong at p >= 0.9.
"""

from __future__ import annotations

import argparse
import sys
from collections import defaultdict
from pathlib import Path

import numpy as np

from diag.core.case import load_case
from diag.core.engine import Engine
from diag.core.paths import cases_dir
from eval.score import CONFIDENT, groups_of


def mode_of(fault: str) -> str:
    """The mode of a single-fault id ("R3:open" -> "open"); "healthy" stays."""
    return fault.split(":", 1)[1] if ":" in fault else fault


def check_case(eng: Engine, per_fault: int, seed: int) -> list[tuple[str, bool, bool, bool]]:
    """(fault, truth's group ranked first, fits false, wrong at p >= CONFIDENT) for
    `per_fault` engine-drawn units of every single-fault hypothesis and healthy."""
    out = []
    for h in eng.specs:
        if "+" in h.id:
            continue
        for k in range(per_fault):
            rng = np.random.default_rng([seed, k])
            d = eng.diagnose(list(eng.simulate(h.id, rng)), advise=False)
            gid, gp, _ = groups_of(d)
            top = max(gp, key=gp.get)
            hit = gid[h.id] == top
            out.append((h.id, hit, not d.fits, (not hit) and gp[top] >= CONFIDENT))
    return out


def table(rows: list[tuple[str, bool, bool, bool]]) -> str:
    """Markdown table per mode, and all."""
    by: dict[str, list] = defaultdict(list)
    for r in rows:
        by[mode_of(r[0])].append(r)
    lines = ["| mode | units | top-1 (group) | fits false | wrong, p ≥ 0.9 |",
             "|---|---|---|---|---|"]

    def row(name, rs):
        n = len(rs)
        lines.append(f"| {name} | {n} | {100 * sum(r[1] for r in rs) / n:.1f} % | "
                     f"{100 * sum(r[2] for r in rs) / n:.1f} % | "
                     f"{100 * sum(r[3] for r in rs) / n:.1f} % |")

    for m in sorted(by):
        row(m, by[m])
    if rows:
        row("**all**", rows)
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m eval.selfcheck",
                                 description=__doc__.split("\n\n")[1].split("\n")[0])
    ap.add_argument("--case", action="append", help="a case file (default: every bundled)")
    ap.add_argument("--per-fault", type=int, default=20, help="units per hypothesis")
    ap.add_argument("--draws", type=int, default=128, help="the engine's K")
    ap.add_argument("--seed", type=int, default=0, help="the engine's ensemble seed")
    ap.add_argument("--units-seed", type=int, default=5000, help="seed of the units")
    a = ap.parse_args(argv)
    files = [Path(c) for c in a.case] if a.case else sorted(cases_dir().glob("*.yaml"))
    rows = []
    for f in files:
        eng = Engine(load_case(f), K=a.draws, seed=a.seed)
        got = check_case(eng, a.per_fault, a.units_seed)
        rows += got
        worst = sorted({r[0] for r in got if r[3]})
        print(f"{f.stem}: {len(got)} units; wrong at p >= 0.9 on "
              f"{', '.join(worst) if worst else 'none'}", file=sys.stderr)
    print(f"Engine-drawn units, {a.per_fault} per hypothesis, K = {a.draws}, "
          f"ensemble seed {a.seed}, units seed {a.units_seed}.\n")
    print(table(rows))
    return 0


if __name__ == "__main__":
    sys.exit(main())
