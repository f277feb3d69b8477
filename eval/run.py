"""Generate units with ngspice and score the engine on them; print the Markdown tables.

    python -m eval.run [--out DIR] [--seed N] [--per-fault N] [--healthy N] [--blunder N]
                       [--unmodelled N] [--guided-per-fault N] [--draws K] [--case CASE ...]
                       [--hindsight]

Without --out the units go to a temporary folder that is removed afterwards.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

from eval import generate, score


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m eval.run", description=__doc__.split(
        "\n\n")[0])
    ap.add_argument("--out", help="keep the generated batches in this folder")
    ap.add_argument("--case", action="append")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--per-fault", type=int, default=2)
    ap.add_argument("--healthy", type=int, default=20)
    ap.add_argument("--blunder", type=int, default=20)
    ap.add_argument("--unmodelled", type=int, default=30)
    ap.add_argument("--draws", type=int, default=128)
    ap.add_argument("--guided-per-fault", type=int, default=1,
                    help="units per fault given the guided runs (0: none)")
    ap.add_argument("--failures", type=int, default=40)
    ap.add_argument("--hindsight", action="store_true",
                    help="also find each guided run's fewest readings chosen in hindsight "
                         "(a subset search: minutes)")
    a = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="diag-eval-") as tmp:
        out = Path(a.out or tmp)
        gen = ["--out", str(out), "--seed", str(a.seed), "--per-fault", str(a.per_fault),
               "--healthy", str(a.healthy), "--blunder", str(a.blunder),
               "--unmodelled", str(a.unmodelled)]
        for c in a.case or []:
            gen += ["--case", c]
        t0 = time.perf_counter()
        rc = generate.main(gen)
        if rc:
            return rc
        t1 = time.perf_counter()
        scores = score.score_dir(out, guided_per_fault=a.guided_per_fault, draws=a.draws,
                                 log=lambda m: print(m, file=sys.stderr),
                                 with_hindsight=a.hindsight)
        t2 = time.perf_counter()
    print(f"Seed {a.seed}; {a.per_fault} unit(s) per modelled fault, {a.healthy} healthy, "
          f"{a.blunder} blunder, {a.unmodelled} unmodelled per case; engine K = {a.draws}; "
          f"guided runs on {a.guided_per_fault} unit(s) per fault. "
          f"Generation {t1 - t0:.0f} s, scoring {t2 - t1:.0f} s.\n")
    print(score.markdown(scores))
    print(score.failures(scores, a.failures))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
