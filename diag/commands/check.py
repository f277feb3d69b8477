"""`diag check CASE [--json] [--draws N] [--seed N]`: validate a case and print the healthy
reading band at every point (SPEC section 4; JSON per SPEC section 6).

Formatting only: the numbers come from diag.core.bands.healthy_bands.
"""

from __future__ import annotations

import argparse
import json
import sys
import textwrap

import numpy as np

from diag.commands import count
from diag.core.errors import DiagError


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("case", metavar="CASE", help="case file (YAML, SPEC section 1)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--draws", type=count, default=400, metavar="N",
                   help="healthy units drawn within tolerance for the bands (default 400)")
    p.add_argument("--seed", type=count, default=0, metavar="N",
                   help="seed of the tolerance draws (default 0)")


def _prefix(magnitude: float, unit: str) -> tuple[str, float]:
    """SI prefix for a table row: volts down to mV, amperes down to µA."""
    if magnitude >= 1.0 or magnitude == 0.0:
        return "", 1.0
    if magnitude >= 1e-3 or unit == "V":
        return "m", 1e-3
    return "µ", 1e-6


def _decimals(magnitude: float) -> int:
    """Decimals that give about four significant figures at `magnitude` (as a 3½-digit
    display shows), at most four."""
    if not magnitude > 0:
        return 3
    return int(min(4, max(0, 3 - np.floor(np.log10(magnitude)))))


def _meter_decimals(magnitude: float, scale: float, meter, unit: str) -> int:
    """Decimals the meter itself shows at `magnitude` (its autoranged resolution, in
    units of `scale`): a band never claims digits the display does not have."""
    from diag.core.meter import resolution

    res = float(resolution(np.array([magnitude]), meter, unit)[0]) / scale
    return int(max(0, np.ceil(-np.log10(res) - 1e-9))) if res > 0 else 4


def _num(x: float, scale: float, decimals: int) -> str:
    if not np.isfinite(x):
        return "n/a"
    return f"{x / scale:.{decimals}f}"


def _ambient_words(rules) -> str:
    """'at 20 to 40 °C, ' from the rules' ambient range (empty when none is set)."""
    from diag.core.faults import inference

    amb = inference(rules).get("ambient")
    if not amb:
        return ""
    lo, hi = (float(x) for x in amb["celsius"])
    return f"at {lo:g} to {hi:g} °C, "


def format_text(result, case_path: str, rules) -> str:
    """People's view of a CheckResult: header, nodes, aligned band table, regions,
    failed draws and cautions."""
    case = result.case
    out = [f"{case.title}", f"  case: {case_path}   meter: {case.meter.get('name', 'inline')}",
           f"  band: about the 1st to 99th percentile of {result.K} healthy units drawn "
           f"within tolerance (seed {result.seed}),",
           f"        {_ambient_words(rules)}as the meter reads them (its loading "
           "included, its error not)", ""]
    nodes = ", ".join(f"{n} {v:.3f} V" for n, v in result.nodes.items())
    out.append("Nodes, nominal values, no meter attached:")
    line = " "
    for item in nodes.split(", "):
        if len(line) + len(item) > 90:
            out.append(line.rstrip(", "))
            line = " "
        line += " " + item + ","
    out.append(line.rstrip(","))
    out.append("")

    header = ("point", "where", "kind", "nominal", "band", "unit")
    rows = []
    for pb in result.points:
        pt = case.point(pb.point)
        finite = [abs(x) for x in (pb.nominal, pb.low, pb.high) if np.isfinite(x)]
        mag = max(finite, default=0.0)
        pre, scale = _prefix(mag, pb.unit)
        # never more digits than the meter shows at the smallest of the three values
        d = min(_decimals(mag / scale), _meter_decimals(min(finite, default=0.0), scale,
                                                        case.meter, pb.unit))
        unit = pre + pb.unit + (" rms" if pb.kind == "ac" else "")
        band = f"{_num(pb.low, scale, d)} .. {_num(pb.high, scale, d)}"
        rows.append((pb.point, pt.where, pb.kind, _num(pb.nominal, scale, d), band, unit))
    widths = [max(len(r[i]) for r in rows + [header]) for i in range(len(header))]
    right = {3, 4}

    def fmt(row):
        cells = [c.rjust(w) if i in right else c.ljust(w)
                 for i, (c, w) in enumerate(zip(row, widths, strict=True))]
        return "  ".join(cells).rstrip()

    out.append(fmt(header))
    out.append("  ".join("-" * w for w in widths))
    out.extend(fmt(r) for r in rows)
    out.append("")
    if result.regions:
        out.append("Transistors (nominal): "
                   + ", ".join(f"{ref} {reg}" for ref, reg in result.regions.items()))
    if result.failed:
        k, why = result.failed[0]
        out.append(f"{len(result.failed)} of {result.K} draws did not converge and are left "
                   f"out of the bands (first: draw {k}: {why})")
    for text in (result.stability_text(), result.signal_text(), result.generic_text(),
                 result.unused_model_text(),
                 result.current_limit_text(), result.supply_limit_text()):
        if text:
            out.append(textwrap.fill(text, width=92, break_on_hyphens=False))
    if result.cautions:
        cautions = rules["cautions"] or {}
        titles = [str((cautions.get(c) or {}).get("title", c)) for c in result.cautions]
        out.append("Cautions: " + "; ".join(titles)
                   + " (full text in the interface's help; local codes and licensed "
                     "practice come first)")
    return "\n".join(out).rstrip() + "\n"


def run(args: argparse.Namespace) -> int:
    from diag.core.bands import healthy_bands
    from diag.core.case import load_case
    from diag.core.rules import load_rules

    rules = load_rules()
    case = load_case(args.case, rules)
    result = healthy_bands(case, rules, K=args.draws, seed=args.seed)
    if not result.nominal_ok:
        raise DiagError(f"the circuit does not solve with nominal values: "
                        f"{result.nominal_why or 'did not converge'}", file=args.case,
                        hint="check the part values and connections near that node")
    if args.json:
        json.dump(result.to_json(args.case), sys.stdout, indent=2, ensure_ascii=False)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(format_text(result, args.case, rules))
    return 0
