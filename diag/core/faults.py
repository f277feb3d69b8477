"""Fault hypotheses of one case: single faults, linked faults and pairs, from the rules.

A fault is a set of parameter changes on the shared topology (DEVELOPERS.md table), so
every hypothesis runs on the one compiled Circuit. This module only describes them
(which parameter, which range); ensemble.py draws the values.

    specs = hypotheses(case, rules)           # healthy first, then singles, then linked
    spec = parse_fault_id(case, rules, "Q3:ce-short+R9:open")
    pair_specs(case, rules, [spec_a, spec_b, ...])   # pairs among leading suspects

`FaultSpec.weight` is an unnormalised prior (part-class rate x mode share, times the link
probability for linked faults); `priors()` turns weights into probabilities given the
prior of `healthy`.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import combinations
from typing import Any

from diag.core.case import TERMINALS, Case, Part
from diag.core.errors import DiagError
from diag.core.values import format_value

_UNITS = {"resistor": "ohm", "pot": "ohm", "fuse": "ohm", "link": "ohm", "speaker": "ohm",
          "capacitor": "F", "electrolytic": "F", "inductor": "H", "supply": "V",
          "signal": "V"}
_LOW_R_KINDS = ("link", "fuse", "inductor", "speaker")


@dataclass(frozen=True)
class Change:
    """One parameter change. `key` is "<ref>.<name>"; `how` is "set" (value lo), "abs"
    (drawn in [lo, hi]), "times" (the healthy drawn value times a factor in [lo, hi]) or
    "like" (the healthy drawn value of the same part's parameter `src`, times a factor in
    [lo, hi]: a transistor fitted with collector and emitter swapped works with its
    reverse parameters); `log` draws log-uniformly, else uniformly."""

    key: str
    how: str
    lo: float
    hi: float
    log: bool = True
    src: str | None = None


@dataclass(frozen=True)
class FaultSpec:
    """One hypothesis: id per SPEC section 3, member parts, parameter changes, weight
    (unnormalised prior), sentence and bench confirmation. `origin` is "healthy",
    "single", "linked" or "pair"."""

    id: str
    parts: tuple[str, ...]
    changes: tuple[Change, ...]
    weight: float
    text: str
    confirm: str
    origin: str
    modes: tuple[str, ...] = ()


def ref_key(ref: str) -> tuple:
    """Natural sort key of a reference designator: R9 before R10."""
    return tuple(int(t) if t.isdigit() else t for t in re.findall(r"\d+|\D+", ref))


def _rules_error(rules, msg: str, where: str | None = None, hint: str | None = None):
    return DiagError(msg, file=rules.file("faults"), where=where, hint=hint)


def _kind_rules(rules, kind: str) -> dict | None:
    return (rules["faults"].get("kinds") or {}).get(kind)


def _fields(part: Part, case: Case) -> dict[str, str]:
    out: dict[str, Any] = {"ref": part.ref, "kind": part.kind}
    unit = _UNITS.get(part.kind)
    out["value"] = format_value(part.value, unit) if part.value is not None else ""
    out["model"] = (part.model or {}).get("name", part.kind) if part.model else part.kind
    for term, node in zip(TERMINALS[part.kind], part.nodes, strict=True):
        out[term] = node
    out["from"] = part.nodes[0]
    out["to"] = part.nodes[1] if len(part.nodes) > 1 else ""
    return out


def _fmt(rules, template: str, fields: dict, where: str) -> str:
    try:
        return template.format(**fields)
    except (KeyError, IndexError, ValueError) as exc:
        raise _rules_error(rules, f"template {template!r} uses an unknown field {exc}",
                           where=where, hint="use {ref} {value} {model} {kind} {from} {to} "
                           "or a terminal name of the kind") from None


def _changes(rules, part: Part, mode: str, spec: dict) -> tuple[Change, ...]:
    where = f"{part.kind}.{mode}"
    out = []
    for name, how in (spec.get("set") or {}).items():
        key = f"{part.ref}.{name}"
        if isinstance(how, (int, float)) and not isinstance(how, bool):
            out.append(Change(key, "set", float(how), float(how), False))
            continue
        like = how.get("like") if isinstance(how, dict) else None
        if like is not None:
            if not isinstance(like, str) or "abs" in how:
                raise _rules_error(rules, f"parameter {name!r}: `like` names another "
                                   "parameter of the same part", where=where,
                                   hint="e.g. bf: {like: br, times: [0.5, 2]}")
            how = {"times": [1.0, 1.0], **{k: v for k, v in how.items() if k != "like"}}
        if not isinstance(how, dict) or len(set(how) & {"abs", "times"}) != 1:
            raise _rules_error(rules, f"parameter {name!r}: give a number, "
                               "{abs: [lo, hi]}, {times: [lo, hi]} or {like: other}",
                               where=where)
        kind = "abs" if "abs" in how else "times"
        lo, hi = (float(x) for x in how[kind])
        dist = how.get("dist", "log")
        if dist not in ("log", "uniform") or lo > hi or (dist == "log" and lo <= 0):
            raise _rules_error(rules, f"parameter {name!r}: bad range {how[kind]} or dist "
                               f"{dist!r}", where=where,
                               hint="lo <= hi, both > 0 for log; dist is log or uniform")
        if like is not None:
            out.append(Change(key, "like", lo, hi, dist == "log", f"{part.ref}.{like}"))
        else:
            out.append(Change(key, kind, lo, hi, dist == "log"))
    if not out:
        raise _rules_error(rules, "a mode must change at least one parameter", where=where)
    return tuple(out)


def single(case: Case, rules, part: Part, mode: str) -> FaultSpec:
    """The single-fault hypothesis `part.ref:mode`. Raises DiagError for an unknown mode."""
    kr = _kind_rules(rules, part.kind)
    modes = (kr or {}).get("modes") or {}
    if mode not in modes:
        raise DiagError(f"{part.kind} {part.ref} has no fault mode {mode!r}",
                        where=f"{part.ref}:{mode}",
                        hint="modes: " + (", ".join(modes) or "none for this kind"))
    m = modes[mode]
    fields = _fields(part, case)
    fields["part"] = _fmt(rules, kr.get("part", "{ref}"), fields, part.kind)
    text = _fmt(rules, m.get("text", "{part} " + mode), fields, f"{part.kind}.{mode}")
    confirm = _fmt(rules, m.get("confirm", ""), fields, f"{part.kind}.{mode}")
    weight = float(kr.get("rate", 1.0)) * float(m.get("share", 1.0))
    return FaultSpec(f"{part.ref}:{mode}", (part.ref,), _changes(rules, part, mode, m),
                     weight, text, confirm, "single", (mode,))


def healthy_spec() -> FaultSpec:
    return FaultSpec("healthy", (), (), 0.0, "no fault: every part inside its tolerance",
                     "", "healthy")


def combine(specs: Sequence[FaultSpec], weight: float, origin: str,
            why: str = "") -> FaultSpec:
    """A multiple fault from single ones (members in reference order)."""
    members = sorted(specs, key=lambda s: ref_key(s.parts[0]))
    fid = spec_id(*members)
    text = "; and ".join(s.text for s in members) + (f" ({why})" if why else "")
    confirm = " Then: ".join(s.confirm for s in members if s.confirm)
    return FaultSpec(fid, tuple(p for s in members for p in s.parts),
                     tuple(c for s in members for c in s.changes), weight, text, confirm,
                     origin, tuple(m for s in members for m in s.modes))


def singles(case: Case, rules) -> list[FaultSpec]:
    """Every single fault of every part, in case order, modes in rules order."""
    out = []
    for part in case.parts:
        kr = _kind_rules(rules, part.kind)
        for mode in (kr or {}).get("modes") or {}:
            out.append(single(case, rules, part, mode))
    return out


def _supply_nodes(case: Case) -> set[str]:
    nodes = {case.ground}
    for p in case.parts:
        if p.kind == "supply":
            nodes.update(p.nodes)
    return nodes


def _rails(case: Case) -> set[str]:
    """Supply terminals, ground, and nodes joined to them by fuses and links only."""
    rails = _supply_nodes(case)
    grown = True
    while grown:
        grown = False
        for p in case.parts:
            if p.kind in ("fuse", "link") and (set(p.nodes) & rails) and not set(p.nodes) <= rails:
                rails.update(p.nodes)
                grown = True
    return rails


def _low_r(part: Part, ohms: float) -> bool:
    if part.kind in _LOW_R_KINDS:
        return True
    return part.kind == "resistor" and part.value is not None and part.value <= ohms


def _series_parts(case: Case, start: set[str], ohms: float) -> set[str]:
    """Parts on low-resistance paths from `start` nodes to a supply terminal or ground."""
    targets = _supply_nodes(case)
    edges = [p for p in case.parts if len(p.nodes) == 2 and _low_r(p, ohms)]
    found: set[str] = set()
    frontier = [(n, ()) for n in start]
    seen = set(start)
    while frontier:
        nxt = []
        for node, path in frontier:
            if node in targets:
                found.update(path)
                continue
            for p in edges:
                if node in p.nodes:
                    other = p.nodes[1] if p.nodes[0] == node else p.nodes[0]
                    if other not in seen:
                        seen.add(other)
                        nxt.append((other, path + (p.ref,)))
        frontier = nxt
    return found


def _effect_parts(case: Case, cause: Part, via: dict) -> list[Part]:
    rails = _rails(case)
    if via.get("next_base"):
        # a coupling part between stages: one node on a transistor's base, the other on
        # another transistor's collector or emitter (the previous stage)
        out = []
        for p in case.parts:
            if p.kind not in ("npn", "pnp") or p.terminal("b") not in cause.nodes:
                continue
            other = set(cause.nodes) - {p.terminal("b")}
            if any(q.kind in ("npn", "pnp") and q.ref != p.ref
                   and {q.terminal("c"), q.terminal("e")} & other for q in case.parts):
                out.append(p)
        return out
    terms = via.get("terminals") or list(TERMINALS[cause.kind])
    start = {cause.terminal(t) for t in terms if t in TERMINALS[cause.kind]}
    if "series_path" in via:
        refs = _series_parts(case, start, float(via["series_path"]))
        return [p for p in case.parts if p.ref in refs]
    start -= rails
    return [p for p in case.parts if p.ref != cause.ref and set(p.nodes) & start]


def can_overheat(case: Case, part: Part, default_watts: float) -> bool:
    """Whether a resistor could dissipate more than its rating (`watts`, else
    default_watts) in this circuit under any fault: the whole supply span across it,
    span² / R in watts. A part of another kind: True (no rating to go by). The bound
    that decides which pairs are worth simulating (`stress_candidates`)."""
    if part.kind != "resistor" or not part.value:
        return True
    return case.supply_span ** 2 / float(part.value) > rating(part, default_watts)


def _resistor_watts(rules) -> float:
    """The rating of a resistor that gives no `watts` (rules/collateral.yaml), in W."""
    return float(rules["collateral"].get("resistor_watts", 0.25))


def rating(part: Part, default_watts: float) -> float:
    """A resistor's power rating in watts: its `watts`, else default_watts."""
    return float(part.fields.get("watts") or default_watts)


def _link_rules(rules):
    """(index, rule, cause kinds/modes, effect kinds/modes, p, via) of collateral.yaml."""
    for i, rule in enumerate(rules["collateral"].get("links") or []):
        try:
            yield i, rule, rule["cause"], rule["effect"], float(rule["p"]), \
                rule.get("via") or {}
        except (KeyError, TypeError, ValueError):
            raise DiagError(f"link {i + 1}: needs cause, effect, p", file=rules.file(
                "collateral"), hint="see the header of collateral.yaml") from None


def _effects(case: Case, rules, cause: Part, effect_k: dict, via: dict) -> list[Part]:
    """Parts a rule may take with `cause`: by topology; for `overheats` only resistors
    that `can_overheat` at all; for `overcurrent` every fuse with a rating (`amps`); for
    `unrated` only fuses without one."""
    default_watts = _resistor_watts(rules)
    if via.get("overcurrent"):
        found = [p for p in case.parts if p.kind == "fuse" and p.fields.get("amps")]
    else:
        found = _effect_parts(case, cause, via)
    return [e for e in found
            if e.kind in effect_k["kinds"] and e.ref != cause.ref
            and (not via.get("overheats") or can_overheat(case, e, default_watts))
            and not (via.get("unrated") and e.fields.get("amps"))]


def _limit(rules, via: dict, part: Part) -> float | None:
    """What a part of a stress-checked rule must exceed with the cause in place: the
    resistor's rating in watts (`overheats`), the fuse's blowing current in amperes
    (`overcurrent`: `fuse_blows_at` times its `amps`); None when the rule checks none."""
    col = rules["collateral"]
    if via.get("overheats") and part.kind == "resistor":
        return rating(part, _resistor_watts(rules))
    if via.get("overcurrent") and part.kind == "fuse":
        return float(col.get("fuse_blows_at", 2.1)) * float(part.fields["amps"])
    return None


def _stress_words(rules, via: dict, part: Part, x: float | None) -> str:
    """The `{stress}` of a linked fault's sentence: what the solved cause puts on the
    part against its limit (": up to 1.6 A through a fuse rated 0.5 A"), or nothing."""
    limit = _limit(rules, via, part)
    if x is None or not x == x or limit is None:  # nothing solved, or NaN
        return ""
    if part.kind == "fuse":
        return (f": up to {format_value(x, 'A')} through a fuse rated "
                f"{format_value(float(part.fields['amps']), 'A')}")
    return f": up to {format_value(x, 'W')} in a part rated {format_value(limit, 'W')}"


def spec_id(*specs: FaultSpec) -> str:
    """The id `combine` gives these members (reference order, SPEC section 3)."""
    return "+".join(s.id for s in sorted(specs, key=lambda s: ref_key(s.parts[0])))


def stress_candidates(case: Case, rules, singles_: Sequence[FaultSpec]
                      ) -> dict[str, tuple[str, ...]]:
    """Cause fault id -> parts that an `overheats` or `overcurrent` rule would take with
    it by topology and the bounds: the pairs whose cause must be solved to see whether
    the part is really overloaded (diag/core/stress.py)."""
    ids = {s.id for s in singles_}
    out: dict[str, set[str]] = {}
    for _i, _rule, cause_k, effect_k, _p, via in _link_rules(rules):
        if not (via.get("overheats") or via.get("overcurrent")):
            continue
        for cause in case.parts:
            if cause.kind not in cause_k["kinds"]:
                continue
            refs = {e.ref for e in _effects(case, rules, cause, effect_k, via)
                    if _limit(rules, via, e) is not None}
            for cmode in cause_k["modes"]:
                cid = f"{cause.ref}:{cmode}"
                if refs and cid in ids:
                    out.setdefault(cid, set()).update(refs)
    return {k: tuple(sorted(v, key=ref_key)) for k, v in out.items()}


def linked(case: Case, rules, singles_: Sequence[FaultSpec],
           stress: dict[str, dict[str, float]] | None = None) -> list[FaultSpec]:
    """Linked faults from rules/collateral.yaml, found by topology. For a rule with
    `overheats` or `overcurrent`, the effect part must be overloaded: with `stress`
    (cause id -> part -> the most watts or amperes with that fault, stress.py), beyond
    its `_limit` in the faulted circuit; without it (or for a part `stress` does not
    give), by the bounds alone."""
    by_id = {s.id: s for s in singles_}
    out: dict[str, FaultSpec] = {}

    def overloaded(cid: str, e: Part, via: dict) -> bool:
        limit = _limit(rules, via, e)
        x = (stress or {}).get(cid, {}).get(e.ref)
        return limit is None or x is None or not x <= limit  # NaN (not solved): kept

    for _i, rule, cause_k, effect_k, p_link, via in _link_rules(rules):
        for cause in case.parts:
            if cause.kind not in cause_k["kinds"]:
                continue
            effects = _effects(case, rules, cause, effect_k, via)
            for cmode in cause_k["modes"]:
                c = by_id.get(f"{cause.ref}:{cmode}")
                if c is None:
                    continue
                emodes = [(e, m) for e in effects for m in effect_k["modes"]
                          if f"{e.ref}:{m}" in by_id and overloaded(c.id, e, via)]
                total = sum(by_id[f"{e.ref}:{m}"].weight for e, m in emodes)
                for e, m in emodes:
                    eff = by_id[f"{e.ref}:{m}"]
                    w = c.weight * p_link * eff.weight / total
                    why = rule.get("why", "").replace(
                        "{stress}", _stress_words(rules, via, e, (stress or {}).get(
                            c.id, {}).get(e.ref)))
                    if spec_id(c, eff) in out:
                        w += out[spec_id(c, eff)].weight
                    out[spec_id(c, eff)] = combine([c, eff], w, "linked", why)
    return list(out.values())


def hypotheses(case: Case, rules, stress: dict[str, dict[str, float]] | None = None,
               singles_: Sequence[FaultSpec] | None = None) -> list[FaultSpec]:
    """healthy, every single fault, every linked fault (in that order); `stress` as in
    `linked`; `singles_` the case's single faults when already formed."""
    s = list(singles(case, rules) if singles_ is None else singles_)
    return [healthy_spec(), *s, *linked(case, rules, s, stress)]


def pair_weight_scale(rules, singles_: Sequence[FaultSpec]) -> float:
    """Factor f such that an unrelated pair (a, b) weighs f * w_a * w_b: pairs as a whole
    take the `double_fault` share of the fault weight (over all pairs of distinct parts)."""
    total = sum(s.weight for s in singles_)
    per_part: dict[str, float] = {}
    for s in singles_:
        per_part[s.parts[0]] = per_part.get(s.parts[0], 0.0) + s.weight
    z = (total ** 2 - sum(w * w for w in per_part.values())) / 2.0
    share = float(inference(rules)["double_fault"])
    return share * total / z if z > 0 else 0.0


def pair_specs(rules, leaders: Sequence[FaultSpec], scale: float) -> list[FaultSpec]:
    """Unrelated pairs among leading single faults (distinct parts)."""
    out = []
    for a, b in combinations([s for s in leaders if s.origin == "single"], 2):
        if a.parts[0] != b.parts[0]:
            out.append(combine([a, b], scale * a.weight * b.weight, "pair"))
    return out


def parse_fault_id(case: Case, rules, fault_id: str) -> FaultSpec:
    """A FaultSpec from an id such as `R2:open`, `Q3:ce-short+R9:open` or `healthy`."""
    fault_id = fault_id.strip()
    if fault_id == "healthy":
        return healthy_spec()
    members = []
    for item in fault_id.split("+"):
        ref, sep, mode = item.partition(":")
        if not sep:
            raise DiagError(f"fault {item!r} is not PART:MODE", where=fault_id,
                            hint="e.g. R2:open or Q1:ce-short; `diag faults CASE` lists them")
        try:
            part = case.part(ref.strip())
        except KeyError:
            raise DiagError(f"no part {ref!r} in the case", where=fault_id,
                            hint="use a reference from the case's parts") from None
        members.append(single(case, rules, part, mode.strip()))
    if len(members) == 1:
        return members[0]
    if len({m.parts[0] for m in members}) != len(members):
        raise DiagError("a multiple fault names one part twice", where=fault_id)
    return combine(members, 0.0, "pair")


def inference(rules) -> dict:
    """The `inference` settings of faults.yaml (DiagError if missing)."""
    inf = rules["faults"].get("inference")
    if not inf:
        raise _rules_error(rules, "no `inference` section", hint="restore faults.yaml")
    return inf


def priors(specs: Sequence[FaultSpec], healthy_prior: float) -> list[float]:
    """Prior probabilities: `healthy` gets healthy_prior; single and linked faults share
    1 - healthy_prior by weight; unrelated pairs (tried only when no single fault fits)
    carry their own weight on the same scale (their weights hold the `double_fault`
    share), so a set with pairs sums to slightly more than 1 until normalised."""
    base = sum(s.weight for s in specs if s.origin in ("single", "linked"))
    scale = (1.0 - healthy_prior) / base if base > 0 else 0.0
    out = []
    for s in specs:
        if s.origin == "healthy":
            out.append(healthy_prior)
        elif s.origin == "pair":
            out.append(scale * s.weight)
        else:
            out.append(scale * s.weight)
    return out
