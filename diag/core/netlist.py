"""Compile a Case into a Circuit: unknown indices, nominal parameter table, spreads.

A Circuit is one topology shared by every variant (tolerance draws, faults): the solver
takes it with a params dict of (B,) arrays keyed "<ref>.<name>" (DEVELOPERS.md table);
a missing key means the nominal value. Circuits are cached per (case.hash, rules.hash).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

from diag.core import overdrive
from diag.core.case import TERMINALS, Case, Part
from diag.core.errors import DiagError
from diag.core.parts import SIGNAL_HZ, Context, PartKind, Spread, check_models, kind_of


@dataclass(frozen=True, eq=False)
class Circuit:
    """One compiled topology (immutable).

    nodes       case nodes, ground excluded, in case order (the v axis of results)
    node_index  node name -> index into `nodes`
    unknowns    nodes, then internal nodes named "<ref>.<name>" (e.g. "Q1.bi")
    supplies    references of the supply parts, in case order (the i_supply axis)
    nominal     "<ref>.<name>" -> nominal value, SI units
    spreads     healthy tolerance draws (see parts.base.Spread), for ensemble.draw_healthy
    hz          signal frequency, hertz (the signal part's hz, default 1 kHz)
    parts, kinds, terms   per part: the Part, its PartKind, terminal -> unknown index
                          (-1 = ground), internal names included
    """

    case: Case
    nodes: tuple[str, ...]
    node_index: Mapping[str, int]
    unknowns: tuple[str, ...]
    supplies: tuple[str, ...]
    nominal: Mapping[str, float]
    spreads: tuple[Spread, ...]
    hz: float
    parts: tuple[Part, ...]
    kinds: tuple[PartKind, ...]
    terms: tuple[Mapping[str, int], ...]
    ground: str
    rules_hash: str = ""
    cache: dict = field(default_factory=dict, repr=False)

    @property
    def n_nodes(self) -> int:
        return len(self.nodes)

    def index(self, node: str) -> int:
        """Unknown index of a case node; -1 for the ground."""
        if node == self.ground:
            return -1
        try:
            return self.node_index[node]
        except KeyError:
            raise DiagError(f"unknown node {node!r}", file=self.case.path,
                            hint="nodes: " + ", ".join(self.nodes)) from None

    def part_nominal(self, ref: str) -> dict[str, float]:
        """Nominal parameters of one part, short names."""
        pre = ref + "."
        return {k[len(pre):]: v for k, v in self.nominal.items() if k.startswith(pre)}


_CACHE: dict[tuple[str, str], Circuit] = {}
_CHECKED: set[str] = set()


def compile_case(case: Case, rules=None) -> Circuit:
    """Compile `case` with the models in `rules` (default: the bundled rules)."""
    if rules is None:
        from diag.core.rules import load_rules

        rules = load_rules()
    models = rules["models"]
    if rules.hash not in _CHECKED:
        check_models(models, rules.file("models"))
        _CHECKED.add(rules.hash)
    key = (case.hash, rules.hash)
    hit = _CACHE.get(key) if case.hash else None
    if hit is not None and hit.case == case:
        return hit
    circuit = _compile(case, models, rules.hash)
    if case.hash:
        if len(_CACHE) > 64:
            _CACHE.clear()
        _CACHE[key] = circuit
    return circuit


def _compile(case: Case, models: Mapping[str, Any], rules_hash: str) -> Circuit:
    supplies = [p for p in case.parts if p.kind == "supply"]
    supply_v = max((abs(float(p.value or 0.0)) for p in supplies), default=0.0)
    ctx = Context(models=models, supply_v=supply_v)
    nodes = tuple(n for n in case.nodes if n != case.ground)
    node_index = {n: i for i, n in enumerate(nodes)}
    unknowns = list(nodes)
    nominal: dict[str, float] = {}
    spreads: list[Spread] = []
    kinds, terms = [], []
    for part in case.parts:
        kind = kind_of(part.kind)
        try:
            nom = kind.nominal(part, ctx)
        except (TypeError, ValueError, KeyError) as exc:
            raise DiagError(f"cannot take the {part.kind} values: {exc}", file=case.path,
                            line=part.line or None, where=part.ref,
                            hint="check the part's value fields") from None
        t: dict[str, int] = {}
        for name, node in zip(TERMINALS[part.kind], part.nodes, strict=True):
            if node == case.ground:
                t[name] = -1
            elif node in node_index:
                t[name] = node_index[node]
            else:
                raise DiagError(f"terminal {name} on unknown node {node!r}", file=case.path,
                                line=part.line or None, where=part.ref)
        for name in kind.internal(part, nom):
            t[name] = len(unknowns)
            unknowns.append(f"{part.ref}.{name}")
        for k, v in nom.items():
            nominal[f"{part.ref}.{k}"] = float(v)
        spreads.extend(kind.spreads(part, nom, ctx))
        kinds.append(kind)
        terms.append(MappingProxyType(t))
    sig = case.signal
    hz = float(sig.fields.get("hz") or SIGNAL_HZ) if sig is not None else SIGNAL_HZ
    for pt in case.points:  # each unit's draw for an overdriven AC reading (overdrive.py,
        if "ac" in pt.reads:  # drawn by ensemble.draw_unit after everything else)
            nominal[overdrive.key(pt.id)] = 0.5
    return Circuit(case=case, nodes=nodes, node_index=MappingProxyType(node_index),
                   unknowns=tuple(unknowns), supplies=tuple(p.ref for p in supplies),
                   nominal=MappingProxyType(nominal), spreads=tuple(spreads), hz=hz,
                   parts=tuple(case.parts), kinds=tuple(kinds), terms=tuple(terms),
                   ground=case.ground, rules_hash=rules_hash)
