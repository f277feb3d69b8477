"""`diag simulate CASE --fault ID`: the readings of one randomly drawn unit with that
fault, as the case's meter would show them (CSV point,kind,value; SPEC section 4)."""

from __future__ import annotations

import numpy as np

from diag.commands import count


def add_arguments(p) -> None:
    p.add_argument("case", metavar="CASE", help="case file (cases/*.yaml)")
    p.add_argument("--fault", required=True, metavar="ID",
                   help="fault id such as R2:open, Q3:ce-short+R9:open, or healthy")
    p.add_argument("--seed", type=count, default=None, metavar="N",
                   help="random seed (default: a fresh unit each run)")


def run(args) -> int:
    from diag.core.case import load_case
    from diag.core.engine import Engine
    from diag.core.meter import display_number
    from diag.core.rules import load_rules

    rules = load_rules()
    case = load_case(args.case, rules)
    eng = Engine(case, rules)
    rng = np.random.default_rng(args.seed)
    units = {(o.point, o.kind): o.unit for o in case.observables}
    rows = ["point,kind,value"]
    for r in eng.simulate(args.fault, rng):
        value = display_number(r.value, case.meter, units[(r.point, r.kind)])
        rows.append(f"{r.point},{r.kind},{value}")
    print("\n".join(rows))
    return 0
