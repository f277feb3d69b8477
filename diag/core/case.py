"""Case files (SPEC section 1): the frozen Case, Part and Point, and the loader.

Only this module reads case files. `load_case(path)` returns a Case or raises CaseErrors
listing every problem found, each with file, line, part or node, and a hint.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

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
        for p in self.parts:
            if p.ref == ref:
                return p
        raise KeyError(ref)

    def point(self, pid: str) -> Point:
        for p in self.points:
            if p.id == pid:
                return p
        raise KeyError(pid)

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

    def parts_at(self, node: str) -> tuple[tuple[Part, str], ...]:
        """Parts touching `node`, each with the terminal name that touches it."""
        out = []
        for p in self.parts:
            for term, n in zip(TERMINALS[p.kind], p.nodes):
                if n == node:
                    out.append((p, term))
        return tuple(out)


def load_case(path: str) -> Case:
    """Read, validate and freeze one case file. Raises CaseErrors."""
    raise NotImplementedError
