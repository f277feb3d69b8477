"""`diag faults CASE`: every hypothesis, its prior, and the groups that no offered reading
can tell apart, with the kind of reading that would split each (SPEC section 4)."""

from __future__ import annotations

import json

from diag.commands import count


def add_arguments(p) -> None:
    p.add_argument("case", metavar="CASE", help="case file (cases/*.yaml)")
    p.add_argument("--json", action="store_true", help="print JSON")
    p.add_argument("--draws", type=int, default=128, metavar="K",
                   help="drawn units per hypothesis (default 128)")
    p.add_argument("--seed", type=count, default=0, metavar="N", help="random seed (default 0)")


def run(args) -> int:
    from diag.core.case import load_case
    from diag.core.engine import Engine
    from diag.core.rules import load_rules

    rules = load_rules()
    case = load_case(args.case, rules)
    eng = Engine(case, rules, K=args.draws, seed=args.seed)
    ens = eng.ensemble
    split = eng.splitters()
    hyps = sorted(range(len(ens.hypotheses)), key=lambda h: -ens.hypotheses[h].prior)
    if args.json:
        groups = {}
        for h in hyps:
            groups.setdefault(int(ens.group[h]), []).append(ens.hypotheses[h].id)
        out = {
            "case": args.case,
            "hypotheses": [{"fault": ens.hypotheses[h].id,
                            "prior": round(ens.hypotheses[h].prior, 6),
                            "group": int(ens.group[h]), "origin": ens.hypotheses[h].origin,
                            "text": ens.hypotheses[h].text,
                            "confirm": ens.hypotheses[h].confirm} for h in hyps],
            "groups": [{"group": g, "members": m, "split_by": split.get(g)}
                       for g, m in sorted(groups.items()) if len(m) > 1],
        }
        print(json.dumps(out, indent=2, ensure_ascii=False))
        return 0
    print(f"{case.title}  ({case.path})")
    print(f"{len(ens.hypotheses)} hypotheses; priors from part-class failure rates "
          "(healthy prior as for a unit known to be faulty)\n")
    print(f"{'prior':>7}  {'grp':>3}  {'fault':<24} description")
    for h in hyps:
        hy = ens.hypotheses[h]
        print(f"{hy.prior:7.2%}  {int(ens.group[h]):>3}  {hy.id:<24} {hy.text}")
    multi = [(g, [ens.hypotheses[h].id for h in hyps if ens.group[h] == g]) for g in split]
    if multi:
        print("\nGroups the offered readings cannot split:")
        for g, m in multi:
            print(f"  group {g}: {', '.join(m)}")
            print(f"    would split with {split[g]}")
    return 0
