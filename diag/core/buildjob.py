"""Build one case's ensemble into the disk cache in a process of its own.

A process that runs other threads (the interface) may not fork worker processes
(diag.core.workers) and so solves on threads, which take the interpreter lock in turn: a
cold build there took about twice as long as from the command line. `Engine.build`
then starts this module instead, a fresh single-threaded process that forks its own
workers, and reads the ensemble from the cache when it is done. It prints one line
`progress F` (F from 0 to 1) per block solved, and stops at the next block should the
process that started it end first.

    python -m diag.core.buildjob CASE RULES_FOLDER K SEED
"""

from __future__ import annotations

import os
import sys


def main(argv: list[str]) -> int:
    from diag.core.case import load_case
    from diag.core.engine import Engine
    from diag.core.rules import load_rules

    case_path, rules_folder, K, seed = argv
    parent = os.getppid()
    rules = load_rules(rules_folder)
    eng = Engine(load_case(case_path, rules), rules, K=int(K), seed=int(seed))
    eng.build(progress=lambda f: print(f"progress {f:.4f}", flush=True),
              cancelled=lambda: os.getppid() != parent, in_child=False)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
