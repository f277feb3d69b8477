"""Case files (SPEC section 1): the frozen Case, Part and Point, and the loader.

Only this module reads case files. `load_case(path, rules=None)` returns a Case or raises
CaseErrors listing every problem found, each with file, line, part, node or point, and a
hint. The checks: YAML syntax and duplicate keys (named as duplicate reference designators
or test point ids); the format version; per part its kind, terminals (TERMINALS), fields
(PRINCIPAL, FIELDS, REQUIRED), values (diag.core.values: SI prefixes, IEC 60062 code,
units, signs), tol in (0, 1), pot set in 0..1, hfe [min, max], the model (a name in
rules/models.yaml of the part's kind, or an inline mapping of SPICE parameter names); the
circuit: the ground is used, no node is used once only, every node has a DC path to the
ground (capacitors and electrolytics pass no DC, every other part does), one signal part
at most; per point node/minus/supply, where, reads (ac needs a signal part) and cost; the
meter (a profile of rules/meters.yaml, or an inline mapping over handheld-3.5).
"""

from __future__ import annotations

import functools
import hashlib
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

import yaml

from diag.core.errors import CaseErrors, DiagError
from diag.core.modelcard import is_model_line, parse_model_line
from diag.core.parts import CARD_HINT, card_names
from diag.core.parts.bjt import early_problem
from diag.core.paths import cases_dir, user_cases_dir
from diag.core.rules import Rules, load_rules
from diag.core.values import SYMBOLS, canonical_unit, format_value, parse_tol, parse_value
from diag.core.yamlio import LineMap, load_yaml_text

# Terminal names per kind, in the order Part.nodes holds them.
TERMINALS: Mapping[str, tuple[str, ...]] = MappingProxyType({
    "resistor": ("a", "b"), "capacitor": ("a", "b"), "inductor": ("a", "b"),
    "speaker": ("a", "b"), "fuse": ("a", "b"), "link": ("a", "b"),
    "electrolytic": ("plus", "minus"), "supply": ("plus", "minus"), "signal": ("plus", "minus"),
    "diode": ("anode", "cathode"), "led": ("anode", "cathode"), "zener": ("anode", "cathode"),
    "npn": ("c", "b", "e"), "pnp": ("c", "b", "e"),
    "pot": ("a", "wiper", "b"),
})

SEMICONDUCTORS = frozenset({"diode", "led", "zener", "npn", "pnp"})


@dataclass(frozen=True)
class Part:
    """One fitted part. Values are SI floats (ohms, farads, henries, volts, hertz).

    `value` is the principal value of the kind (resistor/pot/fuse/link/speaker: ohms,
    capacitor/electrolytic: farads, inductor: henries, supply: volts, signal: volts rms),
    None where the kind has none (semiconductors). `tol` is a fraction (0.05) or None
    when the case gave none. `fields` holds every other field of the part, parsed
    (numbers as floats, `hfe` as a (min, max) tuple, `reads`-like lists as tuples).
    `model` is the resolved model mapping (uppercase SPICE names, SI units) for
    semiconductors, with the name under key "name"; None otherwise.
    """

    ref: str
    kind: str
    nodes: tuple[str, ...]
    value: float | None = None
    tol: float | None = None
    fields: Mapping[str, Any] = field(default_factory=lambda: MappingProxyType({}))
    model: Mapping[str, Any] | None = None
    line: int = 0

    def terminal(self, name: str) -> str:
        """Node at terminal `name` (e.g. 'b' of a transistor)."""
        return self.nodes[TERMINALS[self.kind].index(name)]


@dataclass(frozen=True)
class Point:
    """A test point: `node` measured against `minus` (the ground unless given), or the
    current drawn from `supply` (a supply's reference) in amperes."""

    id: str
    node: str | None
    minus: str | None
    supply: str | None
    where: str
    reads: tuple[str, ...] = ("dc",)
    cost: float = 1.0
    line: int = 0


@dataclass(frozen=True)
class Observable:
    """One reading that can be taken: a point and a kind ('dc' or 'ac').
    `unit` is 'V' or 'A' (supply points)."""

    point: str
    kind: str
    cost: float
    unit: str


@dataclass(frozen=True)
class Case:
    """A circuit as built on the bench (immutable). `nodes` lists every node except the
    ground, in order of first appearance. `hash` is the sha256 (hex, 16 chars) of the
    file's bytes; caches are keyed by it with the rules hash."""

    path: str
    version: int
    title: str
    about: str
    ground: str
    parts: tuple[Part, ...]
    nodes: tuple[str, ...]
    points: tuple[Point, ...]
    meter: Mapping[str, Any]
    hash: str

    def part(self, ref: str) -> Part:
        return self._by_ref[ref]

    def point(self, pid: str) -> Point:
        return self._by_id[pid]

    @functools.cached_property
    def _by_ref(self) -> dict[str, Part]:
        return {p.ref: p for p in self.parts}

    @functools.cached_property
    def _by_id(self) -> dict[str, Point]:
        return {p.id: p for p in self.points}

    @property
    def observables(self) -> tuple[Observable, ...]:
        """Every offered (point, kind), in case order: each point's kinds as listed."""
        out = []
        for p in self.points:
            for k in p.reads:
                out.append(Observable(p.id, k, p.cost, "A" if p.supply else "V"))
        return tuple(out)

    @property
    def signal(self) -> Part | None:
        """The signal source, if the case has one."""
        for p in self.parts:
            if p.kind == "signal":
                return p
        return None

    @property
    def supply_span(self) -> float:
        """Volts between the highest and the lowest supply rail (ground included), every
        supply at the top of its tolerance: rails found from the ground through the
        supplies' terminals, so ±9 V supplies span 18 V and 12 V and 5 V ones 12 V."""
        pot = {self.ground: 0.0}
        sup = [p for p in self.parts if p.kind == "supply"]
        for _ in range(len(sup)):  # enough passes for any chain of stacked supplies
            for p in sup:
                v = (p.value or 0.0) * (1 + (p.tol or 0.0))
                plus, minus = p.nodes
                if minus in pot and plus not in pot:
                    pot[plus] = pot[minus] + v
                elif plus in pot and minus not in pot:
                    pot[minus] = pot[plus] - v
        return max(pot.values()) - min(pot.values())

    @property
    def nothing_below_ground(self) -> bool:
        """True when every supply is positive and returned to ground: then no node of
        the circuit sits below ground in DC (a negative DC reading to ground is the
        probes' doing)."""
        return all((p.value or 0) >= 0 and p.nodes[1] == self.ground
                   for p in self.parts if p.kind == "supply")

    @property
    def nothing_above_ground(self) -> bool:
        """True when every supply has its positive terminal on ground (a positive-ground
        set, its rails below the chassis): the mirror image of `nothing_below_ground`."""
        rails = [p for p in self.parts if p.kind == "supply"]
        return bool(rails) and all((p.value or 0) >= 0 and p.nodes[0] == self.ground
                                   for p in rails)

    def parts_at(self, node: str) -> tuple[tuple[Part, str], ...]:
        """Parts touching `node`, each with the terminal name that touches it."""
        out = []
        for p in self.parts:
            for term, n in zip(TERMINALS[p.kind], p.nodes, strict=True):
                if n == node:
                    out.append((p, term))
        return tuple(out)


# ---------------------------------------------------------------------------------------
# The loader. Every check appends to one list of DiagError so that a file with several
# mistakes shows them all at once (CaseErrors).

CASE_VERSIONS = (1,)
TOP_FIELDS = ("case", "title", "about", "ground", "parts", "points", "meter")
POINT_FIELDS = ("node", "minus", "supply", "where", "reads", "cost", "note")
READ_KINDS = ("dc", "ac")
TWO_TERMINAL = frozenset({"resistor", "capacitor", "inductor", "speaker", "fuse", "link"})
# Kinds whose part is not a DC path between its terminals.
NO_DC_PATH = frozenset({"capacitor", "electrolytic"})

# Principal value field per kind and its unit; semiconductors have none.
PRINCIPAL: Mapping[str, tuple[str, str]] = MappingProxyType({
    "resistor": ("ohms", "ohm"), "pot": ("ohms", "ohm"), "speaker": ("ohms", "ohm"),
    "fuse": ("ohms", "ohm"), "link": ("ohms", "ohm"),
    "capacitor": ("farads", "F"), "electrolytic": ("farads", "F"),
    "inductor": ("henries", "H"), "supply": ("volts", "V"), "signal": ("vrms", "V"),
})
# Kinds whose principal value may be left out (fuse and link: cold resistance).
OPTIONAL_VALUE = frozenset({"fuse", "link"})

# Further fields per kind (besides terminals, the principal value and `note`).
FIELDS: Mapping[str, tuple[str, ...]] = MappingProxyType({
    "resistor": ("tol", "watts"),
    "capacitor": ("tol", "volts_rated", "esr", "leak"),
    "electrolytic": ("tol", "volts_rated", "esr", "leak"),
    "inductor": ("r_dc", "tol"),
    "speaker": ("r_dc", "watts"),
    "fuse": ("amps",),
    "link": (),
    "supply": ("tol", "r_source", "amps", "limit"),
    "signal": ("hz", "r_source"),
    "pot": ("tol", "set"),
    "npn": ("model", "hfe"), "pnp": ("model", "hfe"),
    "diode": ("model", "bv"), "led": ("model", "bv"), "zener": ("model", "bv"),
})
# Fields that must be given, per kind, besides the principal value.
REQUIRED: Mapping[str, tuple[str, ...]] = MappingProxyType({"pot": ("set",), "signal": ("hz",)})

# Field -> (unit, lowest allowed, lowest included?). The principal values use these too.
_FIELD_UNITS: Mapping[str, tuple[str, float | None, bool]] = MappingProxyType({
    "ohms": ("ohm", 0.0, False), "farads": ("F", 0.0, False), "henries": ("H", 0.0, False),
    "volts": ("V", None, False), "vrms": ("V", 0.0, False), "hz": ("Hz", 0.0, False),
    "watts": ("W", 0.0, False), "amps": ("A", 0.0, False), "limit": ("A", 0.0, False),
    "volts_rated": ("V", 0.0, False),
    "esr": ("ohm", 0.0, True), "leak": ("ohm", 0.0, False), "r_dc": ("ohm", 0.0, True),
    "r_source": ("ohm", 0.0, True), "bv": ("V", 0.0, False),
})

# Generic model used when a semiconductor names none.
DEFAULT_MODEL: Mapping[str, str] = MappingProxyType({
    "npn": "npn-small", "pnp": "pnp-small", "diode": "si-diode", "led": "led-red",
    "zener": "zener",
})
# Model parameters that must be strictly positive (the others may be 0).
_POSITIVE_PARAMS = frozenset({"IS", "BF", "NF", "NR", "N", "NE", "NC"})

DEFAULT_METER = "handheld-3.5"
# An example value per unit, for hints.
_EXAMPLES = {"ohm": "4k7", "F": "100n", "H": "10m", "V": "12", "Hz": "1k", "W": "0.25",
             "A": "0.5"}

_REF = re.compile(r"[A-Za-z][A-Za-z0-9_]*")
_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]*")


def _line(mapping: Any, key: Any = None, default: int = 0) -> int:
    if isinstance(mapping, LineMap):
        return mapping.line_of(key) if key is not None else mapping.line
    return default


def _a(kind: str) -> str:
    """'a resistor', 'an npn'."""
    return ("an " if kind[:1] in "aeiou" or kind in ("npn", "led") else "a ") + kind


def _names(items: Any) -> str:
    return ", ".join(str(x) for x in items) if items else "(none)"


class _Loader:
    """One run of the checks over one parsed file; `errors` collects every problem."""

    def __init__(self, file: str, rules: Rules):
        self.file = file
        self.rules = rules
        self.errors: list[DiagError] = []

    def err(self, message: str, line: int | None, where: str | None = None,
            hint: str | None = None) -> None:
        self.errors.append(DiagError(message, file=self.file, line=line or None,
                                     where=where, hint=hint))

    # -- values --------------------------------------------------------------------------

    def value(self, raw: Any, unit: str | None, line: int, where: str, name: str,
              low: float | None = None, low_ok: bool = False,
              fix: str | None = None) -> float | None:
        """Parse one value field; record an error and return None when it is bad. `fix`
        is the hint for a value below `low` (default: give the fitted part's value)."""
        try:
            x = parse_value(raw, unit)
        except ValueError as exc:
            takes = f"{SYMBOLS[canonical_unit(unit)]}" if unit else "a plain number"
            self.err(f"{name}: {exc}", line, where,
                     hint=f"{name} takes {takes}, e.g. {name}: {_EXAMPLES.get(unit or '', '1')}")
            return None
        if low is not None and (x < low or (x == low and not low_ok)):
            bound = "zero or more" if low_ok else "more than zero"
            shown = format_value(x, unit) if unit else f"{x:g}"
            self.err(f"{name} is {shown}: it must be {bound}", line, where,
                     hint=fix or f"give the fitted part's {name}, e.g. "
                     f"{_EXAMPLES.get(unit, '1')}")
            return None
        return x

    def node_name(self, raw: Any, line: int, where: str, term: str) -> str | None:
        if isinstance(raw, bool) or not isinstance(raw, (str, int)) or str(raw).strip() == "":
            self.err(f"terminal {term}: {raw!r} is not a node name", line, where,
                     hint="write a name such as vcc or base (quote yes/no/on/off)")
            return None
        return str(raw).strip()

    # -- parts ---------------------------------------------------------------------------

    def part(self, ref: Any, body: Any, line: int) -> Part | None:
        if not isinstance(ref, str) or not _REF.fullmatch(ref):
            self.err(f"{ref!r} is not a reference designator", line, str(ref),
                     hint="use a letter then letters, digits or _, e.g. R1, Q2, C10")
            return None
        if not isinstance(body, dict):
            self.err("a part is a mapping of fields", line, ref,
                     hint="e.g. R1: {kind: resistor, nodes: [vcc, base], ohms: 68k}")
            return None
        kind = body.get("kind")
        if not isinstance(kind, str) or kind not in TERMINALS:
            self.err(f"unknown kind {kind!r}" if "kind" in body else "no kind given",
                     _line(body, "kind", line), ref,
                     hint=f"kind is one of {_names(TERMINALS)}")
            return None
        terms = TERMINALS[kind]
        ok = True
        nodes: list[str | None] = []
        if kind in TWO_TERMINAL:
            named = ("nodes",)
            raw = body.get("nodes")
            if not isinstance(raw, list) or len(raw) != 2:
                self.err("needs nodes: [a, b] (two node names)" if raw is None else
                         f"nodes must list two node names, not {raw!r}",
                         _line(body, "nodes", line), ref,
                         hint=f"e.g. {ref}: {{kind: {kind}, nodes: [vcc, base], ...}}")
                ok = False
            else:
                nodes = [self.node_name(n, _line(body, "nodes", line), ref, t)
                         for n, t in zip(raw, terms, strict=True)]
        else:
            named = terms
            for t in terms:
                if t not in body:
                    self.err(f"terminal {t} is not connected", line, ref,
                             hint=f"{_a(kind)} has terminals {_names(terms)}; give each a node")
                    ok = False
                else:
                    nodes.append(self.node_name(body[t], _line(body, t, line), ref, t))
        if any(n is None for n in nodes):
            ok = False
        principal = PRINCIPAL.get(kind)
        allowed = set(FIELDS[kind]) | {"kind", "note", *named}
        if principal:
            allowed.add(principal[0])
        for key in body:
            if key not in allowed:
                extra = sorted(allowed - {"kind", "nodes", *terms})
                self.err(f"unknown terminal or field {key!r} on {kind}",
                         _line(body, key, line), ref,
                         hint=f"{_a(kind)} has terminals {_names(terms)}"
                              f"{' (as nodes: [a, b])' if kind in TWO_TERMINAL else ''}"
                              f" and fields {_names(extra)}")
                ok = False
        value = None
        if principal:
            name, unit = principal
            if name in body:
                _, low, low_ok = _FIELD_UNITS[name]
                value = self.value(body[name], unit, _line(body, name, line), ref, name,
                                   low, low_ok)
                ok = ok and value is not None
            elif kind not in OPTIONAL_VALUE:
                self.err(f"missing value: {_a(kind)} needs {name}", line, ref,
                         hint=f"add e.g. {name}: {_EXAMPLES[unit]}")
                ok = False
        for name in REQUIRED.get(kind, ()):
            if name not in body:
                self.err(f"missing value: {_a(kind)} needs {name}", line, ref,
                         hint="add e.g. set: 0.5 (wiper position from a, 0..1)"
                         if name == "set" else "add e.g. hz: 1k")
                ok = False
        tol = None
        fields: dict[str, Any] = {}
        for name in FIELDS[kind]:
            if name not in body:
                continue
            raw, fl = body[name], _line(body, name, line)
            if name == "tol":
                try:
                    tol = parse_tol(raw)
                except ValueError as exc:
                    self.err(f"tol: {exc}", fl, ref, hint="e.g. tol: 5%")
                    ok = False
            elif name == "set":
                x = self.fraction(raw, fl, ref)
                ok = ok and x is not None
                fields[name] = x
            elif name == "hfe":
                h = self.hfe(raw, fl, ref)
                ok = ok and h is not None
                fields[name] = h
            elif name == "model":
                continue
            else:
                unit, low, low_ok = _FIELD_UNITS[name]
                x = self.value(raw, unit, fl, ref, name, low, low_ok)
                ok = ok and x is not None
                fields[name] = x
        if "note" in body:
            if not isinstance(body["note"], str):
                self.err("note must be text", _line(body, "note", line), ref,
                         hint='quote it: note: "..."')
                ok = False
            fields["note"] = body["note"]
        model = None
        if kind in SEMICONDUCTORS:
            model = self.model(kind, body.get("model", DEFAULT_MODEL[kind]),
                               _line(body, "model", line), ref)
            ok = ok and model is not None
        if not ok:
            return None
        return Part(ref=ref, kind=kind, nodes=tuple(nodes), value=value, tol=tol,
                    fields=MappingProxyType(fields), model=model, line=line)

    def fraction(self, raw: Any, line: int, ref: str) -> float | None:
        """A pot's `set`: 0..1, or a percentage."""
        text = raw.strip() if isinstance(raw, str) else raw
        pct = isinstance(text, str) and text.endswith("%")
        x = self.value(text[:-1] if pct else text, None, line, ref, "set")
        if x is None:
            return None
        if pct:
            x /= 100.0
        if not 0.0 <= x <= 1.0:
            self.err(f"set is {x:g}: the wiper position runs from 0 (at a) to 1 (at b)",
                     line, ref, hint="e.g. set: 0.5 for mid-travel")
            return None
        return x

    def hfe(self, raw: Any, line: int, ref: str) -> tuple[float, float] | None:
        pair = raw if isinstance(raw, list) else [raw, raw]
        if len(pair) != 2:
            self.err(f"hfe must be [min, max], not {raw!r}", line, ref,
                     hint="e.g. hfe: [150, 450]")
            return None
        lo = self.value(pair[0], None, line, ref, "hfe", 0.0)
        hi = self.value(pair[1], None, line, ref, "hfe", 0.0)
        if lo is None or hi is None:
            return None
        if lo > hi:
            self.err(f"hfe min {lo:g} is above max {hi:g}", line, ref,
                     hint="write hfe: [min, max], e.g. [150, 450]")
            return None
        return (lo, hi)

    def model(self, kind: str, raw: Any, line: int, ref: str) -> Mapping[str, Any] | None:
        known = self.rules["models"]
        if not isinstance(known, dict):
            known = {}
        if isinstance(raw, dict):
            return self.inline_model(kind, raw, line, ref)
        if is_model_line(raw):
            return self.model_line(kind, raw, line, ref)
        if not isinstance(raw, str) or raw not in known:
            fits = [n for n, m in known.items() if isinstance(m, dict) and m.get("kind") == kind]
            self.err(f"unknown model {raw!r}", line, ref,
                     hint=f"known {kind} models: {_names(fits or list(known))}; "
                          "or give an inline mapping: "
                          + CARD_HINT.format(' '.join(card_names(kind, used_only=True))))
            return None
        entry = known[raw]
        mfile = self.rules.file("models")
        if not isinstance(entry, dict):
            self.err(f"model {raw!r} in {mfile} is not a mapping", line, ref,
                     hint="fix the rules file")
            return None
        if entry.get("kind") != kind:
            self.err(f"model {raw!r} is for {entry.get('kind')} parts, but {ref} is {_a(kind)}",
                     line, ref, hint=f"use {_a(kind)} model, e.g. {DEFAULT_MODEL[kind]}")
            return None
        params = entry.get("params", {})
        out: dict[str, Any] = {"name": raw}
        if not isinstance(params, dict):
            self.err(f"model {raw!r} in {mfile}: params is not a mapping", line, ref,
                     hint="fix the rules file")
            return None
        for k, v in params.items():
            try:
                out[str(k).upper()] = parse_value(v)
            except ValueError as exc:
                self.err(f"model {raw!r} in {mfile}: {k}: {exc}", line, ref,
                         hint="fix the rules file")
                return None
        return MappingProxyType(out)

    def model_line(self, kind: str, raw: str, line: int, ref: str) -> Mapping | None:
        """A `.model` line pasted from a simulator library (diag.core.modelcard), checked
        as an inline card; the card keeps its own name."""
        try:
            name, dev, params = parse_model_line(raw)
        except ValueError as exc:
            self.err(str(exc), line, ref, hint="paste the card's .model line as it is, "
                     "e.g. model: \".model QX NPN(IS=7f BF=300 VAF=75)\"")
            return None
        want = {"npn": "NPN", "pnp": "PNP"}.get(kind, "D")
        if dev != want:
            self.err(f".model {name} is a {dev} card, and {ref} is {_a(kind)}", line, ref,
                     hint=f"use a {want} card for {_a(kind)}")
            return None
        card = self.inline_model(kind, params, line, ref)
        return None if card is None else MappingProxyType({**card, "name": name})

    def inline_model(self, kind: str, raw: dict, line: int, ref: str) -> Mapping | None:
        names = card_names(kind)
        out: dict[str, Any] = {"name": "inline"}
        if "params" in raw:  # the layout of an entry of rules/models.yaml, not a card
            self.err("an inline model is the card's parameters themselves, not a "
                     "models.yaml entry", line, ref,
                     hint=f"write model: {{{', '.join(f'{n}: ...' for n in names[:3])}}}; "
                          + CARD_HINT.format(' '.join(card_names(kind, used_only=True)))
                          + "; or add the entry to rules/models.yaml and name it")
            return None
        ok = True
        for k, v in raw.items():
            key = str(k).upper()
            kl = _line(raw, k, line)
            if key not in names:
                self.err(f"unknown model parameter {k!r} for {_a(kind)}", kl, ref,
                         hint=CARD_HINT.format(' '.join(card_names(kind, used_only=True))))
                ok = False
                continue
            if key in out:
                self.err(f"model parameter {key} given twice", kl, ref)
                ok = False
                continue
            x = self.value(v, None, kl, ref, f"model {key}", 0.0, key not in _POSITIVE_PARAMS)
            why = early_problem(key, x) if x is not None else None
            if why:
                self.err(f"model {why[0]}", kl, ref, hint=why[1])
                x = None
            ok = ok and x is not None
            out[key] = x
        return MappingProxyType(out) if ok else None

    # -- points --------------------------------------------------------------------------

    def point(self, pid: Any, body: Any, line: int, nodes: set[str],
              parts: dict[str, Any], has_signal: bool) -> Point | None:
        where = str(pid)
        if isinstance(pid, bool) or not isinstance(pid, (str, int)) \
                or not _ID.fullmatch(str(pid)):
            self.err(f"{pid!r} is not a test point id", line, where,
                     hint="use letters and digits, e.g. TP1")
            return None
        pid = str(pid)
        if not isinstance(body, dict):
            self.err("a point is a mapping", line, pid,
                     hint='e.g. TP1: {node: vcc, where: "supply pin"}')
            return None
        ok = True
        for key in body:
            if key not in POINT_FIELDS:
                self.err(f"unknown field {key!r} on a point", _line(body, key, line), pid,
                         hint=f"a point has {_names(POINT_FIELDS)}")
                ok = False
        node = minus = supply = None
        if ("node" in body) == ("supply" in body):
            self.err("a point needs either node: or supply: (one of them)", line, pid,
                     hint="e.g. {node: vcc, where: ...} or {supply: V1, where: ...}")
            ok = False
        elif "node" in body:
            node = self.point_node(body, "node", line, pid, nodes)
            if "minus" in body:
                minus = self.point_node(body, "minus", line, pid, nodes)
                if minus is not None and minus == node:
                    self.err(f"node and minus are both {node!r}", _line(body, "minus", line),
                             pid, hint="the black probe goes on another node")
                    minus = None
                ok = ok and minus is not None
            ok = ok and node is not None
        else:
            if "minus" in body:
                self.err("minus: does not apply to a supply point", _line(body, "minus", line),
                         pid, hint="remove it; the supply's own current is read")
                ok = False
            supply = body["supply"]
            sl = _line(body, "supply", line)
            if not isinstance(supply, str) or supply not in parts:
                supplies = [r for r, k in parts.items() if k == "supply"]
                self.err(f"supply: {supply!r} is not a part of this case", sl, pid,
                         hint=f"name a supply part: {_names(supplies)}")
                ok = False
            elif parts[supply] != "supply":
                supplies = [r for r, k in parts.items() if k == "supply"]
                self.err(f"supply: {supply} is a {parts[supply]}, not a supply", sl, pid,
                         hint=f"name a supply part: {_names(supplies)}")
                ok = False
        # where: is what the screen and the report say the probe touches; a case
        # written in a hurry may leave it out, and the node names stand in for it
        text = body.get("where")
        if "where" not in body:
            text = (f"supply {supply}'s current" if supply is not None
                    else f"node {node}" + (f" against {minus}" if minus else ""))
        elif not isinstance(text, str) or not text.strip():
            self.err("where: must be text", _line(body, "where", line), pid,
                     hint='say where the probe goes, e.g. where: "Q1 collector, middle leg"')
            ok = False
        reads = self.reads(body.get("reads", ["dc"]), _line(body, "reads", line), pid,
                           has_signal, supply is not None)
        ok = ok and reads is not None
        cost = 1.0
        if "cost" in body:
            c = self.value(body["cost"], None, _line(body, "cost", line), pid, "cost", 0.0,
                           fix="cost is the effort of taking the reading, relative to an "
                           "easy one at 1: e.g. cost: 2 for a point under a board or "
                           "one that needs the signal generator")
            ok = ok and c is not None
            cost = c if c is not None else cost
        if not ok:
            return None
        return Point(id=pid, node=node, minus=minus, supply=supply, where=text.strip(),
                     reads=reads, cost=cost, line=line)

    def point_node(self, body: dict, key: str, line: int, pid: str,
                   nodes: set[str]) -> str | None:
        raw = body[key]
        kl = _line(body, key, line)
        name = self.node_name(raw, kl, pid, key)
        if name is None:
            return None
        if name not in nodes:
            self.err(f"{key}: {name!r} is not a node of this circuit", kl, pid,
                     hint=f"nodes are {_names(sorted(nodes))}")
            return None
        return name

    def reads(self, raw: Any, line: int, pid: str, has_signal: bool,
              supply: bool) -> tuple[str, ...] | None:
        items = [raw] if isinstance(raw, str) else raw
        if not isinstance(items, list) or not items:
            self.err(f"reads must list reading kinds, not {raw!r}", line, pid,
                     hint="e.g. reads: [dc, ac]")
            return None
        out: list[str] = []
        for k in items:
            if k not in READ_KINDS:
                self.err(f"unknown read kind {k!r}", line, pid,
                         hint=f"reading kinds are {_names(READ_KINDS)}")
                return None
            if k in out:
                self.err(f"reads lists {k} twice", line, pid, hint="list each kind once")
                return None
            if k == "ac" and supply:
                self.err("a supply point reads dc (the current drawn) only", line, pid,
                         hint="remove ac from reads")
                return None
            if k == "ac" and not has_signal:
                self.err("reads ac, but the case has no signal part", line, pid,
                         hint="add a signal part (kind: signal, plus, minus, vrms, hz) "
                              "or read dc only")
                return None
            out.append(k)
        return tuple(out)

    # -- meter ---------------------------------------------------------------------------

    def meter(self, raw: Any, line: int) -> Mapping[str, Any]:
        profiles = self.rules["meters"]
        if not isinstance(profiles, dict):
            profiles = {}
        mfile = self.rules.file("meters")
        if isinstance(raw, dict):
            base = profiles.get(DEFAULT_METER)
            if not isinstance(base, dict):
                self.err(f"the default meter {DEFAULT_METER} is missing from {mfile}", line,
                         "meter", hint="restore the rules file")
                return MappingProxyType({})
            out = self.meter_fields(DEFAULT_METER, base, mfile, line)
            known = set(base) | {"name"}
            for k, v in raw.items():
                kl = _line(raw, k, line)
                if k not in known:
                    self.err(f"unknown meter field {k!r}", kl, "meter",
                             hint=f"meter fields are {_names(sorted(known))}")
                    continue
                parsed = self.meter_value(k, v, kl)
                if parsed is not None:
                    out[k] = parsed
            out["name"] = raw["name"] if isinstance(raw.get("name"), str) else "inline"
            return MappingProxyType(out)
        if not isinstance(raw, str) or raw not in profiles:
            self.err(f"unknown meter profile {raw!r}", line, "meter",
                     hint=f"known profiles: {_names(profiles)}; or give an inline mapping")
            return MappingProxyType({})
        prof = profiles[raw]
        if not isinstance(prof, dict):
            self.err(f"meter profile {raw!r} in {mfile} is not a mapping", line, "meter",
                     hint="fix the rules file")
            return MappingProxyType({})
        out = self.meter_fields(raw, prof, mfile, line)
        out["name"] = raw
        return MappingProxyType(out)

    def meter_fields(self, name: str, prof: dict, mfile: str, line: int) -> dict:
        out: dict[str, Any] = {}
        for k, v in prof.items():
            parsed = self.meter_value(k, v, line, f"profile {name} in {mfile}: ")
            if parsed is not None:
                out[k] = parsed
        return out

    def meter_value(self, key: Any, raw: Any, line: int, ctx: str = "") -> Any:
        if key in ("about", "name"):
            if not isinstance(raw, str):
                self.err(f"{ctx}{key} must be text", line, "meter")
                return None
            return raw
        try:
            if isinstance(raw, list):
                if not raw:
                    raise ValueError("the list is empty: give at least one value")
                vals = tuple(parse_value(x) for x in raw)
                if any(x <= 0 for x in vals):
                    raise ValueError("ranges must be more than zero")
                return vals
            x = parse_value(raw)
        except ValueError as exc:
            self.err(f"{ctx}meter {key}: {exc}", line, "meter")
            return None
        if x < 0:
            self.err(f"{ctx}meter {key} is {x:g}: it must not be negative", line, "meter")
            return None
        return x

    # -- the circuit as a whole ----------------------------------------------------------

    def topology(self, wiring: list[tuple[str, str | None, tuple[str, ...], int]],
                 ground: str, ground_line: int) -> None:
        """Dangling nodes and DC paths to ground. `wiring` holds (ref, kind, nodes, line) of
        every part; a part that failed its own checks comes with kind None and the nodes it
        names, and counts as a DC path (so its mistake is not reported twice)."""
        uses: dict[str, int] = {}
        first: dict[str, tuple[str, int]] = {}
        for ref, _kind, nodes, line in wiring:
            for n in nodes:
                uses[n] = uses.get(n, 0) + 1
                first.setdefault(n, (ref, line))
        if ground not in uses:
            self.err(f"the ground node {ground!r} is not connected to any part",
                     ground_line, ground,
                     hint="connect the supply's minus to it, or set ground: to the "
                          "reference node's name")
            return
        for n, count in uses.items():
            if count == 1:
                ref, line = first[n]
                self.err(f"node {n!r} is used once only (dangling): only {ref} touches it",
                         line, n, hint="a node joins two or more terminals; check the "
                                       "spelling, or add the missing part")
        # DC paths: union of every part except capacitors (open at DC).
        parent = {n: n for n in uses}

        def root(n: str) -> str:
            while parent[n] != n:
                parent[n] = parent[parent[n]]
                n = parent[n]
            return n

        for _ref, kind, nodes, _line in wiring:
            if kind in NO_DC_PATH or not nodes:
                continue
            for n in nodes[1:]:
                parent[root(n)] = root(nodes[0])
        g = root(ground)
        for n in uses:
            if root(n) != g and uses[n] > 1:
                ref, line = first[n]
                self.err(f"node {n!r} has no DC path to ground (capacitors pass no DC)",
                         line, n,
                         hint="add the part that sets its DC level (a bias resistor, a "
                              "winding, a link to ground); check the node names")


def _raw_nodes(body: Any) -> tuple[str, ...]:
    """Node names a part's mapping mentions, whatever else is wrong with it."""
    if not isinstance(body, dict):
        return ()
    raw: list[Any] = []
    kind = body.get("kind")
    every = ("plus", "minus", "anode", "cathode", "c", "b", "e", "a", "wiper")
    terms = TERMINALS.get(kind, every) if isinstance(kind, str) else every
    if isinstance(body.get("nodes"), list):
        raw.extend(body["nodes"])
    raw.extend(body[t] for t in terms if t in body)
    return tuple(str(n).strip() for n in raw
                 if isinstance(n, (str, int)) and not isinstance(n, bool) and str(n).strip())


def _read(path: str) -> tuple[bytes, str]:
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise CaseErrors([DiagError(
            "file not found", file=path,
            hint="check the path; bundled cases are listed by `diag`")]) from None
    except OSError as exc:
        raise CaseErrors([DiagError(f"cannot read the file: {exc.strerror or exc}",
                                    file=path, hint="check the path and permissions")]) from None
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise CaseErrors([DiagError(f"not UTF-8 text (byte {exc.start})", file=path,
                                    hint="save the file as UTF-8")]) from None
    return data, text


def _duplicates(text: str, file: str) -> list[DiagError]:
    """Every duplicate key in the document, named by where it stands (parts, points)."""
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except (yaml.YAMLError, RecursionError):
        return []
    out: list[DiagError] = []
    seen: set[int] = set()

    def walk(node: Any, section: str | None, depth: int) -> None:
        if id(node) in seen or depth > 64:
            return
        seen.add(id(node))
        if isinstance(node, yaml.MappingNode):
            keys: dict[Any, int] = {}
            for k, v in node.value:
                key = k.value if isinstance(k, yaml.ScalarNode) else None
                kline = k.start_mark.line + 1
                if key is not None and key in keys:
                    if section == "parts":
                        msg, hint = (f"duplicate reference designator {key!r} (first on "
                                     f"line {keys[key]})", "give each part its own reference")
                    elif section == "points":
                        msg, hint = (f"duplicate test point id {key!r} (first on line "
                                     f"{keys[key]})", "give each point its own id")
                    else:
                        msg, hint = (f"duplicate key {key!r} (first on line {keys[key]})",
                                     "each key may appear once in a mapping; remove one")
                    out.append(DiagError(msg, file=file, line=kline, where=key, hint=hint))
                elif key is not None:
                    keys[key] = kline
                child = key if depth == 0 and key in ("parts", "points") else None
                walk(v, child, depth + 1)
        elif isinstance(node, yaml.SequenceNode):
            for v in node.value:
                walk(v, None, depth + 1)

    walk(root, None, 0)
    return out


def find_case(name: str | Path) -> Path:
    """The case file meant by `name`: the path itself when it is a file, else
    `<name>` or `<name>.yaml` in the user's cases folder, then in the bundled one.
    Returns `name` unchanged when none exists (the loader then says so)."""
    p = Path(name)
    if p.is_file():
        return p
    if p.parent == Path("."):
        for folder in (user_cases_dir(), cases_dir()):
            for cand in (folder / p.name, folder / f"{p.name}.yaml"):
                if cand.is_file():
                    return cand
    return p


def load_case(path: str | Path, rules: Rules | None = None) -> Case:
    """Read, validate and freeze one case file (SPEC section 1). Raises CaseErrors listing
    every problem found (file, line, part/node/point, hint). A bare name such as
    `sounder-driver` that is not a file here names a bundled or user case."""
    file = str(find_case(path))
    data, text = _read(file)
    try:
        doc = load_yaml_text(text, file=file)
    except DiagError as exc:
        dups = _duplicates(text, file) if exc.message.startswith("duplicate key") else []
        raise CaseErrors(dups or [exc]) from None
    except yaml.reader.ReaderError as exc:
        # raised before yamlio's own handler is reached (a control character in the text)
        line = text[:exc.position].count("\n") + 1
        raise CaseErrors([DiagError(f"YAML: character #x{exc.character:04x} is not allowed",
                                    file=file, line=line,
                                    hint="remove the control character; save the file as "
                                         "plain UTF-8 text")]) from None
    except yaml.YAMLError as exc:
        raise CaseErrors([DiagError(f"YAML syntax: {exc}", file=file,
                                    hint="check indentation, colons and quotes")]) from None
    except RecursionError:
        raise CaseErrors([DiagError("the YAML is nested too deeply", file=file,
                                    hint="a case is a flat mapping of parts and points")]
                         ) from None
    if rules is None:
        rules = load_rules()
    ld = _Loader(file, rules)
    if not isinstance(doc, dict):
        raise CaseErrors([DiagError("a case file is a mapping (case:, title:, parts:, ...)",
                                    file=file, line=1,
                                    hint="start from a bundled case in cases/")])
    for key in doc:
        if key not in TOP_FIELDS:
            ld.err(f"unknown field {key!r}", _line(doc, key), None,
                   hint=f"a case has {_names(TOP_FIELDS)}")
    version = doc.get("case")
    if isinstance(version, bool) or version not in CASE_VERSIONS:
        ld.err(f"unsupported case: version {version!r}" if "case" in doc
               else "no case: version given", _line(doc, "case", 1), None,
               hint=f"this diag reads case: {_names(CASE_VERSIONS)}")
    title = doc.get("title", Path(file).stem)
    about = doc.get("about", "")
    for name, val in (("title", title), ("about", about)):
        if not isinstance(val, str):
            ld.err(f"{name} must be text", _line(doc, name, 1), None,
                   hint=f'quote it: {name}: "..."')
    ground = doc.get("ground", "gnd")
    if isinstance(ground, bool) or not isinstance(ground, (str, int)) or not str(ground):
        ld.err(f"ground: {ground!r} is not a node name", _line(doc, "ground", 1), None,
               hint="e.g. ground: gnd")
        ground = "gnd"
    ground = str(ground).strip()

    raw_parts = doc.get("parts")
    parts: list[Part] = []
    kinds: dict[str, str] = {}
    if not isinstance(raw_parts, dict) or not raw_parts:
        ld.err("no parts: given" if raw_parts is None else "parts: must be a mapping of "
               "reference designators to parts", _line(doc, "parts", 1), None,
               hint="e.g. parts:\n  R1: {kind: resistor, nodes: [vcc, gnd], ohms: 4k7}")
        raw_parts = {}
    for ref, body in raw_parts.items():
        if isinstance(body, dict) and isinstance(ref, str):
            kinds[ref] = str(body.get("kind"))
        p = ld.part(ref, body, _line(raw_parts, ref))
        if p is not None:
            parts.append(p)
    signals = [p for p in parts if p.kind == "signal"]
    for extra in signals[1:]:
        ld.err(f"a second signal part (the first is {signals[0].ref})", extra.line, extra.ref,
               hint="a case drives one signal source; remove or change one")
    has_signal = any(k == "signal" for k in kinds.values())
    good = {p.ref: p for p in parts}
    wiring = []
    for ref, body in raw_parts.items():
        p = good.get(ref) if isinstance(ref, str) else None
        if p is not None:
            wiring.append((p.ref, p.kind, p.nodes, p.line))
            if len(set(p.nodes)) == 1:
                ld.err(f"every terminal is on node {p.nodes[0]!r}", p.line, p.ref,
                       hint="a part with all its terminals on one node does nothing; "
                            "check the node names")
        else:
            wiring.append((str(ref), None, _raw_nodes(body), _line(raw_parts, ref)))
    if wiring:
        ld.topology(wiring, ground, _line(doc, "ground", 1))
    # Nodes named by parts that failed their own checks count as known too, so that one
    # bad part does not also make every point on its nodes an error.
    known_nodes = {n for _r, _k, nodes, _l in wiring for n in nodes} | {ground}

    raw_points = doc.get("points", {})
    points: list[Point] = []
    if raw_points is None:
        raw_points = {}
    if not isinstance(raw_points, dict):
        ld.err("points: must be a mapping of test point ids to points",
               _line(doc, "points", 1), None,
               hint='e.g. points:\n  TP1: {node: vcc, where: "supply pin"}')
        raw_points = {}
    for pid, body in raw_points.items():
        pt = ld.point(pid, body, _line(raw_points, pid), known_nodes, kinds, has_signal)
        if pt is not None:
            points.append(pt)
    if not raw_points:
        ld.err("no test points given", _line(doc, "points", 1), None,
               hint='add points:, e.g.\n  TP1: {node: vcc, where: "supply pin"}')

    meter = ld.meter(doc.get("meter", DEFAULT_METER), _line(doc, "meter", 1))
    if ld.errors:
        ld.errors.sort(key=lambda e: e.line or 0)
        raise CaseErrors(ld.errors)

    nodes: list[str] = []
    for p in parts:
        for n in p.nodes:
            if n != ground and n not in nodes:
                nodes.append(n)
    return Case(path=file, version=int(version), title=title.strip(), about=about,
                ground=ground, parts=tuple(parts), nodes=tuple(nodes), points=tuple(points),
                meter=meter, hash=hashlib.sha256(data).hexdigest()[:16])
