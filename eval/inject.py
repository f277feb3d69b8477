"""Faults made physical on a bench unit: every SPEC section 3 mode of every part as a
lifted lead, an added resistor or a changed value; and faults outside diag's model (two
unrelated faults, a solder bridge, a transistor fitted with collector and emitter
swapped). Ranges come from eval/bench.yaml `faults` and `unmodelled`."""

from __future__ import annotations

import itertools
import re

import numpy as np

from diag.core.case import TERMINALS, Case, Part
from eval.unit import BenchUnit, bench, uni

# SPEC section 3: modes per kind (the contract; diag may model more).
MODES: dict[str, tuple[str, ...]] = {
    "resistor": ("open", "short", "high", "low"),
    "pot": ("open", "wiper-open"),
    "capacitor": ("open", "short", "leaky"),
    "electrolytic": ("open", "short", "leaky", "reversed"),
    "inductor": ("open", "short"),
    "speaker": ("open", "short"),
    "fuse": ("open",),
    "link": ("open",),
    "diode": ("open", "short"),
    "led": ("open", "short"),
    "zener": ("open", "short"),
    "npn": ("be-open", "be-short", "bc-open", "bc-short", "ce-short", "low-beta"),
    "pnp": ("be-open", "be-short", "bc-open", "bc-short", "ce-short", "low-beta"),
    "supply": ("low", "dead"),
}


def single_faults(case: Case) -> list[str]:
    """Every modelled single fault id of the case, in part order."""
    return [f"{p.ref}:{m}" for p in case.parts for m in MODES.get(p.kind, ())]


def ref_key(ref: str) -> tuple:
    """Reference order: letters, then the number (R2 before R10)."""
    m = re.match(r"([A-Za-z]+)(\d*)(.*)", ref)
    if not m:
        return (ref, 0, "")
    return (m.group(1), int(m.group(2) or 0), m.group(3))


def apply_fault(u: BenchUnit, fault: str, rng: np.random.Generator) -> str:
    """Inject `fault` (`PART:MODE`, or several joined by `+`) into `u` in place; return a
    short description of the physical change (for the truth file)."""
    notes = []
    for one in fault.split("+"):
        ref, mode = one.split(":", 1)
        notes.append(_apply_one(u, u.case.part(ref), mode, rng))
    return "; ".join(notes)


def _apply_one(u: BenchUnit, p: Part, mode: str, rng: np.random.Generator) -> str:
    f = bench()["faults"]
    terms = TERMINALS[p.kind]
    a, b = p.nodes[0], p.nodes[-1]
    if p.kind in ("npn", "pnp"):
        nb, nc, ne = p.terminal("b"), p.terminal("c"), p.terminal("e")
        pairs = {"be-short": (nb, ne), "bc-short": (nb, nc), "ce-short": (nc, ne)}
        if mode in pairs:
            ohms = uni(rng, f["short_ohms"], log=True)
            u.extra.append((*pairs[mode], ohms))
            return f"{p.ref} {mode[:2]} bridged internally, {ohms:.3g} ohm"
        if mode == "be-open":
            u.lifted.add((p.ref, "e"))
            return f"{p.ref} emitter lead disconnected"
        if mode == "bc-open":
            u.lifted.add((p.ref, "c"))
            return f"{p.ref} collector lead disconnected"
        if mode == "low-beta":
            bf = uni(rng, f["low_beta_bf"])
            u.cards[p.ref]["BF"] = bf
            return f"{p.ref} BF {bf:.3g}"
    elif p.kind == "supply":
        if mode == "low":
            k = uni(rng, f["supply_low"])
            u.values[p.ref]["v"] *= k
            return f"{p.ref} at {k:.2f} x its nominal volts"
        if mode == "dead":
            u.values[p.ref]["v"] = 0.0
            return f"{p.ref} output 0 V"
    elif p.kind == "pot":
        if mode == "open":
            u.lifted.add((p.ref, "a"))
            return f"{p.ref} track open at the a end"
        if mode == "wiper-open":
            u.lifted.add((p.ref, "wiper"))
            return f"{p.ref} wiper lifted"
    else:
        if mode == "open":
            u.lifted.add((p.ref, terms[0]))
            return f"{p.ref} {terms[0]} lead lifted"
        if mode == "short":
            ohms = uni(rng, f["short_ohms"], log=True)
            u.extra.append((a, b, ohms))
            return f"{p.ref} shorted, {ohms:.3g} ohm"
        if mode in ("high", "low") and p.kind == "resistor":
            k = uni(rng, f[f"{mode}_factor"], log=True)
            u.values[p.ref]["r"] *= k
            return f"{p.ref} at {k:.3g} x its value"
        if mode in ("leaky", "reversed") and p.kind in ("capacitor", "electrolytic"):
            ohms = uni(rng, f[f"{mode}_ohms"], log=True)
            u.extra.append((a, b, ohms))
            return f"{p.ref} {mode}: conducts, {ohms:.3g} ohm"
    raise ValueError(f"{u.case.path}: {p.ref}: no physical model for mode {mode!r} of a "
                     f"{p.kind}")


# ---------------------------------------------------------------- outside the model

def _part_nodes(p: Part, ground: str) -> set[str]:
    return {n for n in p.nodes if n != ground}


def unrelated_pairs(case: Case) -> list[tuple[str, str]]:
    """Fault pairs on two parts that share no node other than ground. Supplies are left
    out: a dead or low supply masks or mimics whatever else is wrong."""
    faults = [f for f in single_faults(case)
              if case.part(f.split(":")[0]).kind != "supply"]
    out = []
    for f1, f2 in itertools.combinations(faults, 2):
        p1, p2 = case.part(f1.split(":")[0]), case.part(f2.split(":")[0])
        if p1.ref == p2.ref or _part_nodes(p1, case.ground) & _part_nodes(p2, case.ground):
            continue
        out.append(tuple(sorted((f1, f2), key=lambda s: ref_key(s.split(":")[0]))))
    return out


def bridge_pairs(case: Case) -> list[tuple[str, str]]:
    """Node pairs a solder bridge could join without being a modelled fault: no single
    part connects them (that would be a part short), but they are two steps apart (one
    node between them), as pads of neighbouring parts are on a small board."""
    direct: set[frozenset] = set()
    adj: dict[str, set[str]] = {n: set() for n in (*case.nodes, case.ground)}
    for p in case.parts:
        for x, y in itertools.combinations(set(p.nodes), 2):
            direct.add(frozenset((x, y)))
            adj[x].add(y)
            adj[y].add(x)
    nodes = [*case.nodes, case.ground]
    out = []
    for x, y in itertools.combinations(nodes, 2):
        if frozenset((x, y)) in direct:
            continue
        if adj[x] & adj[y]:
            out.append((x, y))
    return out


def transistors(case: Case) -> list[str]:
    return [p.ref for p in case.parts if p.kind in ("npn", "pnp")]


def double(u: BenchUnit, f1: str, f2: str, rng: np.random.Generator
           ) -> tuple[str, str, list[tuple[str, BenchUnit]]]:
    """Inject faults f1 and f2 into `u`; return (label, description, alone), `alone`
    holding each fault on its own on a copy of the unit with the same fault values."""
    seeds = [int(x) for x in rng.integers(2**62, size=2)]
    base = u.copy()
    notes, alone = [], []
    for f, sd in zip((f1, f2), seeds, strict=True):
        notes.append(apply_fault(u, f, np.random.default_rng(sd)))
        v = base.copy()
        apply_fault(v, f, np.random.default_rng(sd))
        alone.append((f, v))
    return f"{f1}+{f2}", "; ".join(notes), alone


def apply_unmodelled(u: BenchUnit, kind: str, rng: np.random.Generator
                     ) -> tuple[str, str, list[tuple[str, BenchUnit]]]:
    """Inject one fault outside the model; return (label, description, alone). For two
    unrelated faults `alone` holds each member fault on its own on the same unit with
    the same fault values (to tell whether one fault hides the other); else empty."""
    case = u.case
    if kind == "double":
        pairs = unrelated_pairs(case)
        f1, f2 = pairs[rng.integers(len(pairs))]
        return double(u, f1, f2, rng)
    if kind == "bridge":
        pairs = bridge_pairs(case)
        x, y = pairs[rng.integers(len(pairs))]
        ohms = uni(rng, bench()["unmodelled"]["bridge_ohms"], log=True)
        u.extra.append((x, y, ohms))
        return f"bridge:{x}-{y}", f"solder bridge {x} to {y}, {ohms:.3g} ohm", []
    if kind == "swapped":
        qs = transistors(case)
        q = qs[rng.integers(len(qs))]
        u.swapped_ce.add(q)
        return f"{q}:ce-swapped", f"{q} fitted with collector and emitter swapped", []
    raise ValueError(f"unknown unmodelled kind {kind!r}")


def unmodelled_kinds(case: Case) -> list[str]:
    """The outside-the-model kinds this case allows."""
    out = []
    if unrelated_pairs(case):
        out.append("double")
    if bridge_pairs(case):
        out.append("bridge")
    if transistors(case):
        out.append("swapped")
    return out
