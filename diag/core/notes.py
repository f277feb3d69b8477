"""Bench notes: plain-language findings from the readings alone (rules/checks.yaml).

A note needs DC readings at both nodes a check looks across (a terminal on the ground node
reads 0 V). Nothing here consults the model: these are what a technician would say
looking at the meter.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from diag.core.case import TERMINALS, Case
from diag.core.errors import DiagError
from diag.core.values import format_value


def node_volts(case: Case, readings: Sequence) -> dict[str, float]:
    """Node -> DC volts to ground from the readings (points measured to ground)."""
    out = {case.ground: 0.0}
    for r in readings:
        if r.kind != "dc":
            continue
        try:
            pt = case.point(r.point)
        except KeyError:
            continue
        if pt.node and pt.minus in (None, case.ground):
            out[pt.node] = float(r.value)
    return out


def bench_notes(case: Case, rules, readings: Sequence, meter_accuracy=None) -> list[str]:
    """Notes for these readings, in case part order then checks order.

    `meter_accuracy(volts) -> volts` is the meter's accuracy bound: the near-supply
    check's tolerance (without it 1 % of the reading is used), and the ± shown beside
    a voltage worked out as the difference of two readings (the sum of their bounds)."""
    return bench_notes_many(case, rules, [readings], meter_accuracy)[0]


def bench_notes_many(case: Case, rules, units: Sequence[Sequence], meter_accuracy=None
                     ) -> list[list[str]]:
    """`bench_notes` of each unit's readings (a batch): the checks that apply to the
    case's parts are worked out once, then each unit's readings are read against them."""
    checks = _applicable(case, rules)
    rails = [p for p in case.parts if p.kind == "supply"]
    fixed = {case.ground, *(n for p in rails for n in p.nodes)}
    return [_notes(checks, rails, fixed, node_volts(case, rs), meter_accuracy, case.ground)
            for rs in units]


def _applicable(case: Case, rules) -> list[tuple]:
    """(part, check, node at t1, node at t2) for every check that applies to a part, in
    case part order then checks order."""
    checks = rules["checks"].get("checks") or []
    out = []
    for part in case.parts:
        for chk in checks:
            if part.kind not in chk.get("kinds", ()):
                continue
            try:
                t1, t2 = chk["across"]
                n1, n2 = part.terminal(t1), part.terminal(t2)
            except (KeyError, ValueError, TypeError):
                raise DiagError(f"check {chk.get('id')!r}: `across` must name two terminals "
                                f"of {part.kind} ({', '.join(TERMINALS[part.kind])})",
                                file=rules.file("checks")) from None
            out.append((part, chk, n1, n2))
    return out


def _notes(checks, rails, fixed, v: dict[str, float], meter_accuracy, ground: str
           ) -> list[str]:
    """The notes of one unit's node volts `v` (see `bench_notes`). `{rail}` in a
    near-supply text names the rail the collector sits at: the supply's node for an NPN,
    ground for a PNP (whose load returns there)."""
    out = []
    for part, chk, n1, n2 in checks:
        if n1 not in v or n2 not in v:
            continue
        flip = -1.0 if (chk.get("pnp_flip") and part.kind == "pnp") else 1.0
        val = flip * (v[n1] - v[n2])
        if chk.get("near_supply"):
            if n1 in fixed:  # wired straight to a rail: says nothing
                continue
            hit, rail_name = False, ""
            for sp in rails:
                rail = v.get(sp.nodes[0], sp.value or 0.0)
                target = rail if part.kind != "pnp" else 0.0
                tol = (meter_accuracy(abs(target)) if meter_accuracy
                       else 0.01 * abs(target)) + 0.02 * abs(rail)
                if rail > 0.5 and abs(v[n1] - target) <= tol:
                    hit = True
                    rail_name = sp.nodes[0] if part.kind != "pnp" else ground
            if not hit:
                continue
            shown = v[n1]
        else:
            lo, hi = chk["range"]
            if not lo <= val <= hi:
                continue
            shown, rail_name = val, ""
        text = format_value(shown, "V")
        if meter_accuracy and not chk.get("near_supply") and ground not in (n1, n2):
            # the difference of two readings: each carries the meter's error
            err = meter_accuracy(abs(v[n1])) + meter_accuracy(abs(v[n2]))
            if err > 0:  # rounded up to two significant figures
                step = 10.0 ** (math.floor(math.log10(err)) - 1)
                err = math.ceil(err / step - 1e-9) * step
            text += f" (± {format_value(err, 'V')}, from two readings)"
        out.append(chk["text"].format(ref=part.ref, kind=part.kind, rail=rail_name,
                                      v=text))
    return out
