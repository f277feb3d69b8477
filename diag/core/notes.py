"""Bench notes: plain-language findings from the readings alone (rules/checks.yaml).

A note needs the voltage a check looks across: a DC reading taken straight across those
two nodes (a point with `minus:`), or DC readings of both to ground (a terminal on the
ground node reads 0 V). With the meter's accuracy given, a finding is stated only when
the whole band the reading could be in (value ± the meter's bound, summed over the
readings used) lies inside the check's range; a difference of two readings too coarse
for that says so, and names the reading that would settle it. In a circuit with nothing
below ground, a DC reading below 0 V by more than the meter's bound is named first.
Nothing here consults the simulation: these are what a technician would say looking at
the meter, knowing what each part is (a check may apply to one junction material only;
`material` tells a transistor's from its card).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from diag.core.case import TERMINALS, Case
from diag.core.errors import DiagError
from diag.core.values import format_value


def _dc_points(case: Case, readings: Sequence):
    """(point, volts) of each DC reading at a point of the case."""
    for r in readings:
        if r.kind != "dc":
            continue
        try:
            yield case.point(r.point), float(r.value)
        except KeyError:
            continue


def node_volts(case: Case, readings: Sequence) -> dict[str, float]:
    """Node -> DC volts to ground from the readings (points measured to ground)."""
    out = {case.ground: 0.0}
    for pt, x in _dc_points(case, readings):
        if pt.node and pt.minus in (None, case.ground):
            out[pt.node] = x
    return out


def direct_volts(case: Case, readings: Sequence) -> dict[tuple[str, str], float]:
    """(node, minus node) -> DC volts from points measured straight across two nodes."""
    return {(pt.node, pt.minus): x for pt, x in _dc_points(case, readings)
            if pt.node and pt.minus not in (None, case.ground)}


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
    fixed = _wired(case, {case.ground, *(n for p in rails for n in p.nodes)},
                   rules["checks"].get("wires") or ())
    across = {frozenset((pt.node, pt.minus)): pt.id for pt in case.points
              if pt.node and pt.minus not in (None, case.ground) and "dc" in pt.reads}
    ctx = (rules["checks"].get("terminal_names") or {},
           rules["checks"].get("uncertain") or "", across)
    below = rules["checks"].get("below_ground") if case.nothing_below_ground else None
    mirrored = case.nothing_above_ground
    limit = rules["checks"].get("at_limit")
    return [_at_limit(case, rs, meter_accuracy, limit)
            + _below_ground(case, rs, meter_accuracy, below)
            + _notes(checks, rails, fixed, node_volts(case, rs), meter_accuracy,
                     case.ground, direct_volts(case, rs), ctx, mirrored)
            for rs in units]


def _below_ground(case: Case, readings: Sequence, meter_accuracy, text: str | None
                  ) -> list[str]:
    """A note for each DC reading to ground below 0 V by more than the meter's bound, in
    a circuit with no node below ground (Case.nothing_below_ground): the reading is
    used as typed, and the note asks for it again the right way round."""
    if not text or meter_accuracy is None:
        return []
    out = []
    for pt, x in _dc_points(case, readings):
        if pt.node and pt.minus in (None, case.ground):
            err = meter_accuracy(abs(x))
            if x < -err:
                out.append(text.format(point=pt.id, v=format_value(x, "V"),
                                       err=format_value(_round_up(err), "V")))
    return out


def _at_limit(case: Case, readings: Sequence, meter_accuracy, text: str | None) -> list[str]:
    """A note for each supply-point reading at that supply's current limit: at or above
    the limit less its spread (parts.sources.LIMIT_TOL) and the meter's bound (1 % of
    the reading without one)."""
    from diag.core.parts.sources import LIMIT_TOL

    if not text:
        return []
    out = []
    for pt, x in _dc_points(case, readings):
        lim = case.part(pt.supply).fields.get("limit") if pt.supply else None
        if not lim:
            continue
        err = meter_accuracy(abs(x)) if meter_accuracy else 0.01 * abs(x)
        if x + err >= float(lim) * (1.0 - LIMIT_TOL):
            out.append(text.format(point=pt.id, i=format_value(x, "A"), ref=pt.supply,
                                   limit=format_value(float(lim), "A")))
    return out


def material(part, materials: dict) -> str | None:
    """The junction material (a key of `materials`, name -> volts at 1 mA) whose
    base-emitter drop at 1 mA is nearest the drop of the transistor's card, by the
    Shockley diode law V = NF VT ln(1 + 1 mA / IS) at 27 °C; None for other kinds or
    without materials."""
    from diag.core.parts.base import VT
    from diag.core.parts.bjt import card

    if part.kind not in ("npn", "pnp") or not materials or not part.model:
        return None
    q = card(part.model)
    drop = float(q["NF"]) * VT * math.log1p(1e-3 / float(q["IS"]))
    return min(materials, key=lambda m: abs(float(materials[m]) - drop))


def _applicable(case: Case, rules) -> list[tuple]:
    """(part, check, node at t1, node at t2) for every check that applies to a part, in
    case part order then checks order."""
    checks = rules["checks"].get("checks") or []
    materials = rules["checks"].get("materials") or {}
    out = []
    for part in case.parts:
        model = (part.model or {}).get("name")  # the card's name in rules/models.yaml
        mat = material(part, materials)
        for chk in checks:
            if part.kind not in chk.get("kinds", ()):
                continue
            if "material" in chk and chk["material"] != mat:
                continue
            if "models" in chk and model not in chk["models"]:
                continue
            if model in (chk.get("not_models") or ()):
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


def _wired(case: Case, nodes: set[str], kinds) -> set[str]:
    """`nodes` and every node joined to one of them through parts of `kinds` (a fuse or
    a link, a wire at DC), transitively."""
    out, grew = set(nodes), True
    wires = [p.nodes for p in case.parts if p.kind in kinds]
    while grew:
        grew = False
        for a, b in wires:
            if (a in out) != (b in out):
                out |= {a, b}
                grew = True
    return out


def _across(v: dict[str, float], direct: dict[tuple[str, str], float], n1: str, n2: str,
            acc, ground: str) -> tuple[float, float, int] | None:
    """V(n1) - V(n2), its meter bound (0 without `acc`) and how many readings it takes:
    a reading straight across the two nodes first, else the two readings to ground."""
    a = acc or (lambda x: 0.0)
    if (n1, n2) in direct:
        x = direct[(n1, n2)]
        return x, a(abs(x)), 1
    if (n2, n1) in direct:
        x = -direct[(n2, n1)]
        return x, a(abs(x)), 1
    if n1 not in v or n2 not in v:
        return None
    used = [n for n in (n1, n2) if n != ground]
    return v[n1] - v[n2], sum(a(abs(v[n])) for n in used), len(used)


def _least_rail(rails, v: dict[str, float]) -> float:
    """The smallest voltage across any supply (volts, magnitude): read across its two
    terminals where both nodes are read (ground reads 0 V), else its setting."""
    out = math.inf
    for sp in rails:
        a, b = (v.get(n) for n in sp.nodes[:2])
        out = min(out, abs(a - b) if a is not None and b is not None else abs(sp.value or 0))
    return out


def _round_up(err: float) -> float:
    """A meter bound rounded up to two significant figures."""
    if err <= 0:
        return err
    step = 10.0 ** (math.floor(math.log10(err)) - 1)
    return math.ceil(err / step - 1e-9) * step


def _notes(checks, rails, fixed, v: dict[str, float], meter_accuracy, ground: str,
           direct: dict[tuple[str, str], float] | None = None, ctx=({}, "", {}),
           mirrored: bool = False) -> list[str]:
    """The notes of one unit's node volts `v` and direct readings `direct` (see
    `bench_notes`). `{rail}` in a near-supply text names the rail the collector sits at:
    the supply's node for an NPN, ground for a PNP (whose load returns there); in a
    `mirrored` circuit (Case.nothing_above_ground: every rail below ground) the other
    way round, an NPN's load returning to ground and a PNP's to the rail."""
    names, uncertain, across = ctx
    direct = direct or {}
    out, doubtful = [], {}
    for part, chk, n1, n2 in checks:
        if chk.get("near_supply"):
            if n1 not in v or n2 not in v or n1 in fixed:  # wired to a rail: says nothing
                continue
            hit, rail_name = False, ""
            to_rail = (part.kind == "pnp") == mirrored   # the load returns to the rail
            for sp in rails:
                live = sp.nodes[1] if mirrored else sp.nodes[0]   # the terminal off ground
                rail = v.get(live, -(sp.value or 0.0) if mirrored else sp.value or 0.0)
                target = rail if to_rail else 0.0
                tol = (meter_accuracy(abs(target)) if meter_accuracy
                       else 0.01 * abs(target)) + 0.02 * abs(rail)
                if abs(rail) > 0.5 and (rail < 0) == mirrored and abs(v[n1] - target) <= tol:
                    hit = True
                    rail_name = live if to_rail else ground
            if not hit:
                continue
            out.append(chk["text"].format(ref=part.ref, kind=part.kind, rail=rail_name,
                                          v=format_value(v[n1], "V")))
            continue
        if chk.get("live_rail") is not None and _least_rail(rails, v) < chk["live_rail"]:
            continue
        got = _across(v, direct, n1, n2, meter_accuracy, ground)
        if got is None:
            continue
        flip = -1.0 if (chk.get("pnp_flip") and part.kind == "pnp") else 1.0
        val, err, used = flip * got[0], got[1], got[2]
        lo, hi = chk["range"]
        if not lo <= val <= hi:
            continue
        text = format_value(val, "V")
        if used == 2:  # the difference of two readings: each carries the meter's error
            text += f" (± {format_value(_round_up(err), 'V')}, from two readings)"
        if not lo <= val - err <= val + err <= hi:  # the band reaches past the range
            if used == 2 and uncertain:
                t1, t2 = chk["across"][::-1] if flip < 0 else chk["across"]
                pid = across.get(frozenset((n1, n2)))
                doubtful.setdefault((part.ref, t1, t2), uncertain.format(
                    ref=part.ref, v=text, across=f"{names.get(t1, t1)}-{names.get(t2, t2)}",
                    t1=names.get(t1, t1), t2=names.get(t2, t2),
                    point=f" (the case's {pid})" if pid else ""))
            continue
        out.append(chk["text"].format(ref=part.ref, kind=part.kind, rail="", v=text))
    return out + list(doubtful.values())
