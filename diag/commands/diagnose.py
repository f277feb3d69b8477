"""`diag diagnose CASE READINGS`: rank suspects for one unit, say whether any fits, and
propose the next readings (SPEC sections 4 and 5)."""

from __future__ import annotations

import json
import sys

from diag.commands import count


def add_arguments(p) -> None:
    p.add_argument("case", metavar="CASE", help="case file (cases/*.yaml)")
    p.add_argument("readings", metavar="READINGS", help="readings CSV (SPEC section 2)")
    p.add_argument("--json", action="store_true", help="print the SPEC section 5 JSON")
    p.add_argument("--top", type=int, default=None, metavar="N",
                   help="list only the N most likely suspects (default: 10 in text, all in JSON)")
    p.add_argument("--healthy-prior", type=float, default=None, metavar="P",
                   help="prior probability that the unit is healthy (default 0.02)")
    p.add_argument("--draws", type=int, default=128, metavar="K",
                   help="drawn units per hypothesis (default 128)")
    p.add_argument("--seed", type=count, default=0, metavar="N", help="random seed (default 0)")


def _usage_checks(args) -> str | None:
    if args.top is not None and args.top < 1:
        return "--top must be at least 1"
    if args.healthy_prior is not None and not 0.0 <= args.healthy_prior < 1.0:
        return "--healthy-prior must lie in [0, 1)"
    if args.draws < 8:
        return "--draws must be at least 8"
    return None


def run(args) -> int:
    from diag.core import readings
    from diag.core.case import load_case
    from diag.core.engine import Engine
    from diag.core.rules import load_rules

    bad = _usage_checks(args)
    if bad:
        print(f"diag diagnose: {bad}", file=sys.stderr)
        return 2
    rules = load_rules()
    case = load_case(args.case, rules)
    rf = readings.parse_file(args.readings, case, rules)
    unit = rf.single()
    for err in rf.errors:
        print(f"diag: {err}", file=sys.stderr)
    eng = Engine(case, rules, K=args.draws, seed=args.seed)
    d = eng.diagnose(unit, healthy_prior=args.healthy_prior)
    if args.json:
        out = d.to_json(args.case, top=args.top)
        out["rejected"] = list(rf.rejected) + out["rejected"]
        print(json.dumps(out, indent=2, ensure_ascii=False))
    else:
        print(format_text(case, d, args.top or 10, rf.rejected))
    return 1 if rf.errors else 0


def format_text(case, d, top: int, rejected=()) -> str:
    """The diagnosis for people: fit verdict, ranked suspects, next readings, notes."""
    from diag.core.advise import SHOWN_BITS, format_bits

    lines = [f"{case.title}  ({case.path})", f"Readings used: {d.readings_used}", ""]
    if not d.fits and d.extra.get("unit_slips"):
        lines += ["*** AS TYPED, NO MODELLED FAULT FITS: ONE READING LOOKS MIS-TAKEN ***",
                  d.fit_text, ""]
    elif not d.fits:
        lines += ["*** NO MODELLED FAULT FITS THESE READINGS ***", d.fit_text, ""]
    else:
        lines += [d.fit_text, ""]
    if d.healthy_alike():
        lines += [d.healthy_alike(), ""]
    lines.append(f"{'p':>6}  {'grp':>3}  {'fault':<24} description")
    for s in d.suspects[:top]:
        lines.append(f"{s.p:6.1%}  {s.group:>3}  {s.fault:<24} {s.text}")
    rest = len(d.suspects) - top
    if rest > 0:
        lines.append(f"        ... and {rest} less likely (use --top N)")
    shown = [s.group for s in d.suspects[:top]]
    if len(set(shown)) < len(shown):
        lines.append("grp: suspects with one number are ones the offered readings cannot "
                     "tell apart, judged around these readings (`diag faults` lists the "
                     "case's groups before any reading)")
    checks = d.bench_checks()
    if len(checks) == 1:
        lines += ["", f"To confirm {checks[0][0]}: {checks[0][1]}"]
    elif checks:
        lines += ["", "Close so far; the next reading below may tell them apart, or check "
                  "each at the bench:" if d.next else
                  "No reading left to take tells these apart; check each at the bench:"]
        lines += [f"  {f}: {c}" for f, c in checks]
    lines += ["", "Next readings (by expected information per unit of effort):"]
    if not d.next:
        lines.append("  nothing left to learn from the offered readings")
    for n in d.next[:5]:
        lines.append(f"  {n.point:<6} {n.kind:<3} {format_bits(n.bits):>15}   {n.why}")
    if d.next and all(n.bits < SHOWN_BITS for n in d.next):
        lines.append("  (each of these would barely tell the suspects apart: check the "
                     "leaders at the bench)")
    if d.notes:
        lines += ["", "Bench notes:"] + [f"  - {t}" for t in d.notes]
    rej = list(rejected) + list(d.rejected)
    if rej:
        lines += ["", "Not used:"] + [f"  - {t}" for t in rej]
    return "\n".join(lines)

