"""ngspice netlist of a compiled Circuit, for outside checks only (tests, eval/).

API: netlist(circuit or case, params=None, *, rules, copies, extra, node_shunts) -> str;
node_name(case, node, variant) and source_name(ref, variant) give the ngspice names to
read results by (tests/ngspice_util.py runs ngspice and parses its output).

`netlist(circuit, params)` writes the same parts, values and model parameters that diag's
solver uses: every value comes from `circuit.nominal` (keys "<ref>.<name>", SI units, the
DEVELOPERS.md parameter table), overridden by `params`. A params value may be a number or
a (B,) array; with B > 1 the netlist holds B independent copies of the circuit (variant b
has every node and element name suffixed `__v<b>`), so that one ngspice run (one `.op`,
one `.ac`) solves a whole batch. Node names are the case's own, lower-cased (ngspice folds
case); the case ground is node 0.

How each part and fault hook maps (element names are <letter>_<ref>[_<role>]):

- resistor, fuse, link: one resistor `r`. pot: `r_a` from a to an inner tap node, `r_b`
  from the tap to b, `r_w` from the tap to the wiper.
- capacitor, electrolytic: capacitor `c` in series with `esr` (omitted when 0), and the
  DC leakage resistance `leak` across the two terminals.
- inductor: inductor `l` in series with its DC resistance `r`.
- speaker: measures `r` at DC and `z` (resistive) at the signal frequency. With z >= r:
  `r` in series with `z - r` that is shunted by a 1 MH inductor (the error of the trick
  is (z - r) / (2 pi f 1 MH), below 1e-8 of z at 20 Hz and up); with z < r (a shorted
  coil drawn with its own r and z): `r` in parallel with r z / (r - z) behind a 1 MF
  capacitor (its reactance, under 1e-8 ohm at 20 Hz, is left out).
- supply: DC source `v` behind its source resistance `r` (with a current limit `ilim`,
  a B-source of `limit_expr` in place of `r`); signal: 0 V DC, AC `vac`
  (volts rms, so ngspice's AC phasors are rms too) behind `r`.
- diode, led, zener: ngspice diode with IS N RS BV IBV. `k = 0` (open) opens the anode
  lead with a 1e12 ohm resistor; `g_sh` > 0 adds a resistor 1/g_sh across the terminals.
- npn, pnp: ngspice Gummel-Poon with IS BF BR NF NR VAF IKF ISE NE RB RC RE VAR IKR ISC NC
  NKF IRB RBM (VAF, VAR, IKF, IKR, IRB infinite or 0 = left out, SPICE's "infinite"; a
  card's CARD_ONLY names are not written, as diag does not use them; RBM is RB unless the
  model gives it). diag's k_be / k_bc scale the emitter /
  collector lead conductance (parts/bjt.py): with k = 1 the model's own RE / RC is that
  lead; otherwise the lead is written out as a resistor max(R, 1 µΩ) / k to an inner
  node (`R_<ref>_elead`, `R_<ref>_clead`) with RE / RC = 0 in the model, and for k = 0
  (a lifted lead) there is no lead and the inner node gets diag's GSHUNT to ground
  (`R_<ref>_eopen`, `R_<ref>_copen`), as in diag. `g_be`, `g_bc`, `g_ce` > 0 add
  resistors 1/g between the external terminals (outside the leads). (A model with RC or
  RE = 0 has a 1 µΩ lead in diag and none in ngspice.)
  Each junction's breakdown (bvebo across b and e, bvcbo across b and c, as
  parts/bjt.py `Breakdown`) is a diode `D_<ref>_ebbd` / `D_<ref>_cbbd` between the
  external leads with IS = BD_IS, N = BD_N and BV, IBV = BD_TEST_AMPS (no BV when
  infinite) and RS = the part's `rbv` (none when 0), left out when that lead is lifted
  (k = 0).

diag's solver also holds every node to ground with solver.GSHUNT siemens; the netlist adds
that as a resistor at every case node (node_shunts=True), so both solve the same network.

The netlist holds `.op` and, when the case has a signal part, `.ac lin 1 f f` at the
signal frequency `circuit.hz`. Analysis at 27 °C (TEMP = TNOM), reltol 1e-6 (the
default 1e-3 is too coarse for the 0.2 % agreement checks).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from diag.core.parts import bjt, diode

OPEN_LEAD_OHMS = 1e12  # a lifted diode lead (k = 0)
SPEAKER_L_HENRIES = 1e6  # shunts the AC-only part of a speaker at DC
SPEAKER_C_FARADS = 1e6   # passes the AC-only branch of a speaker whose z is below its r

_BJT_PARAMS = tuple(k.lower() for k in bjt.MODEL_NAMES if k not in ("BVEBO", "BVCBO", "RBV"))
_DIODE_PARAMS = tuple(k.lower() for k in diode.SPICE_DEFAULTS)
_INFINITE_WHEN_ZERO = {"bv", *bjt.INFINITE_WHEN_ZERO}


def limit_expr(v: str, ilim: float, r: float, n: int | None = None) -> str:
    """ngspice B-source current (amperes) of a current-limited supply (parts/sources.py
    limit_curve) with `v` the voltage across its source resistance r and limit ilim:
    ilim s / (1 + s^n)^(1/n) for s = v / (ilim r) > 0, written in 1/s above s = 1 so
    that no power can overflow, and s ilim below 0 (n is LIMIT_KNEE unless given)."""
    from diag.core.parts.sources import LIMIT_KNEE, R_FLOOR

    n = LIMIT_KNEE if n is None else n
    s = f"({v}/{_fmt(ilim * max(r, R_FLOOR))})"
    up = f"pow(1+pow(1/{s},{n}),{_fmt(-1.0 / n)})"
    mid = f"{s}/pow(1+pow({s},{n}),{_fmt(1.0 / n)})"
    return f"{{{_fmt(ilim)}*({s}>1 ? {up} : ({s}>0 ? {mid} : {s}))}}"


def _fmt(x: float) -> str:
    return f"{float(x):.12g}"


def _sanitize(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_]", "_", str(name)).lower()


def _case_of(circuit: Any):
    case = getattr(circuit, "case", None)
    if case is None:
        raise TypeError("netlist() needs a compiled Circuit (with .case) or a Case")
    return case


def _compile(source: Any, rules: Any = None):
    """Return a compiled Circuit for a Circuit or a Case."""
    from diag.core.case import Case

    if isinstance(source, Case):
        from diag.core.netlist import compile_case
        from diag.core.rules import load_rules

        return compile_case(source, rules if rules is not None else load_rules())
    return source


def node_name(case: Any, node: str, variant: int | None = None) -> str:
    """ngspice name of a case node ('0' for the ground); `variant` as in a batch netlist."""
    if node == case.ground:
        return "0"
    base = _sanitize(node)
    if base == "0":
        base = "n0"
    return base if variant is None else f"{base}__v{variant}"


def source_name(ref: str, variant: int | None = None) -> str:
    """ngspice name of the voltage source of supply or signal `ref` (its branch current
    i(<name>) is the current into its plus node, i.e. minus the current drawn)."""
    base = f"v_{_sanitize(ref)}"
    return base if variant is None else f"{base}__v{variant}"


def batch_size(params: Mapping[str, Any] | None) -> int:
    """Number of variants B in a params dict (scalars count as 1)."""
    b = 1
    for v in (params or {}).values():
        n = np.size(v)
        if n != 1:
            if b not in (1, n):
                raise ValueError(f"params arrays disagree in length ({b} and {n})")
            b = n
    return b


def netlist(source: Any, params: Mapping[str, Any] | None = None, *, rules: Any = None,
            copies: int | None = None, extra: Sequence[str] = (),
            node_shunts: bool = True, title: str | None = None) -> str:
    """ngspice netlist text of `source` (a compiled Circuit, or a Case compiled with `rules`).

    params: dict "<ref>.<name>" -> float or (B,) array (SI units); missing keys take
    `circuit.nominal`. B > 1 gives B suffixed copies (see module docstring); `copies`
    asks for that many suffixed copies (even one) when params has no arrays. `extra`
    lines (e.g. a meter resistance across a point, named with node_name) go in before
    the analyses. `node_shunts` adds diag's solver.GSHUNT from every case node to ground
    as a resistor (ngspice's own gshunt option does not act in .op).
    """
    circuit = _compile(source, rules)
    case = _case_of(circuit)
    nominal: Mapping[str, float] = circuit.nominal
    params = dict(params or {})
    B = batch_size(params)
    if copies is not None:
        if B not in (1, copies):
            raise ValueError(f"copies={copies} but params arrays have length {B}")
        B = copies
    suffixed = B > 1 or copies is not None
    names = [node_name(case, n) for n in case.nodes]
    if len(set(names)) != len(names) or "0" in names:
        raise ValueError("case node names collide once lower-cased for ngspice: "
                         + ", ".join(case.nodes))

    lines = [f"* {title or case.title} -- written by diag.core.spice from {case.path}",
             "* values and models are diag's own (circuit.nominal overridden by params)"]
    from diag.core.solver import GSHUNT as gshunt

    for b in range(B):
        def val(key: str, default: float | None = None, _b: int = b) -> float:
            if key in params:
                v = np.asarray(params[key], dtype=float).reshape(-1)
                return float(v[_b] if v.size > 1 else v[0])
            if key in nominal:
                return float(nominal[key])
            if default is not None:
                return default
            raise KeyError(f"no value for {key} in circuit.nominal or params")

        var = b if suffixed else None
        if suffixed:
            lines.append(f"* ---- variant {b}")
        for part in case.parts:
            lines.extend(_part_lines(case, part, val, var))
        if node_shunts and gshunt > 0:
            lines.append(f"* diag's node shunts (solver.GSHUNT = {gshunt:g} S)")
            for node in case.nodes:
                nn = node_name(case, node, var)
                lines.append(f"R_gshunt_{nn} {nn} 0 {_fmt(1.0 / gshunt)}")
    lines.extend(extra)
    lines.append(".options temp=27 tnom=27 reltol=1e-6 itl1=500")
    lines.append(".op")
    if case.signal is not None:
        hz = _fmt(circuit.hz)
        lines.append(f".ac lin 1 {hz} {hz}")
    lines.append(".end")
    return "\n".join(lines) + "\n"


def _part_lines(case, part, val, var) -> list[str]:
    ref = part.ref
    sfx = "" if var is None else f"__v{var}"
    tag = _sanitize(ref)

    def n(node: str) -> str:
        return node_name(case, node, var)

    def inner(role: str) -> str:
        return f"{tag}_{role}{sfx}"

    def el(letter: str, role: str = "") -> str:
        return f"{letter}_{tag}{'_' + role if role else ''}{sfx}"

    def res(name: str, a: str, b: str, ohms: float) -> str:
        if not (ohms > 0 and math.isfinite(ohms)):
            raise ValueError(f"{ref}: resistance {ohms!r} cannot go into an ngspice netlist")
        return f"{name} {a} {b} {_fmt(ohms)}"

    k, nodes = part.kind, part.nodes
    out = [f"* {ref} ({k})"]
    if k in ("resistor", "fuse", "link"):
        out.append(res(el("R"), n(nodes[0]), n(nodes[1]), val(f"{ref}.r")))
    elif k == "pot":
        a, w, b = (n(x) for x in nodes)
        t = inner("tap")
        out += [res(el("R", "a"), a, t, val(f"{ref}.r_a")),
                res(el("R", "b"), t, b, val(f"{ref}.r_b")),
                res(el("R", "w"), t, w, val(f"{ref}.r_w"))]
    elif k in ("capacitor", "electrolytic"):
        a, b = n(nodes[0]), n(nodes[1])
        esr = val(f"{ref}.esr", 0.0)
        if esr > 0:
            x = inner("esr")
            out += [f"{el('C')} {a} {x} {_fmt(val(f'{ref}.c'))}", res(el("R", "esr"), x, b, esr)]
        else:
            out.append(f"{el('C')} {a} {b} {_fmt(val(f'{ref}.c'))}")
        out.append(res(el("R", "leak"), a, b, val(f"{ref}.leak")))
    elif k == "inductor":
        a, b = n(nodes[0]), n(nodes[1])
        x = inner("r")
        out += [f"{el('L')} {a} {x} {_fmt(val(f'{ref}.l'))}", res(el("R"), x, b, val(f"{ref}.r"))]
    elif k == "speaker":
        a, b = n(nodes[0]), n(nodes[1])
        r = val(f"{ref}.r")
        z = val(f"{ref}.z")
        x = inner("z")
        if z == r:
            out.append(res(el("R"), a, b, r))
        elif z > r:
            out += [res(el("R"), a, x, r),
                    f"{el('R', 'ac')} {x} {b} {_fmt(z - r)}",
                    f"{el('L', 'ac')} {x} {b} {_fmt(SPEAKER_L_HENRIES)}"]
        else:
            out += [res(el("R"), a, b, r),
                    res(el("R", "ac"), a, x, r * z / (r - z)),
                    f"{el('C', 'ac')} {x} {b} {_fmt(SPEAKER_C_FARADS)}"]
    elif k in ("supply", "signal"):
        plus, minus = n(nodes[0]), n(nodes[1])
        r = val(f"{ref}.r", 0.0)
        src = source_name(ref, var)
        if k == "supply":
            wave = f"dc {_fmt(val(f'{ref}.v'))} ac 0"
        else:
            wave = f"dc 0 ac {_fmt(val(f'{ref}.vac'))}"
        ilim = val(f"{ref}.ilim", math.inf) if k == "supply" else math.inf
        if math.isfinite(ilim):
            x = inner("src")
            out += [f"{src} {x} {minus} {wave}",
                    f"{el('B', 'lim')} {x} {plus} I={limit_expr(f'v({x},{plus})', ilim, r)}"]
        elif r > 0:
            x = inner("src")
            out += [f"{src} {x} {minus} {wave}", res(el("R", "src"), x, plus, r)]
        else:
            out.append(f"{src} {plus} {minus} {wave}")
    elif k in ("diode", "led", "zener"):
        an, ca = n(nodes[0]), n(nodes[1])
        model = f"dm_{tag}{sfx}"
        a_eff = an
        if val(f"{ref}.k", 1.0) == 0:
            a_eff = inner("a")
            out.append(res(el("R", "open"), an, a_eff, OPEN_LEAD_OHMS))
        out.append(f"{el('D')} {a_eff} {ca} {model}")
        g = val(f"{ref}.g_sh", 0.0)
        if g > 0:
            out.append(res(el("R", "sh"), an, ca, 1.0 / g))
        out.append(f".model {model} D({_model_fields(ref, _DIODE_PARAMS, val)})")
    elif k in ("npn", "pnp"):
        from diag.core.parts.bjt import BD_IS, BD_N, BD_TEST_AMPS, LEAD_MIN_OHMS
        from diag.core.solver import GSHUNT

        c, b, e = (n(x) for x in nodes)
        model = f"qm_{tag}{sfx}"
        eff = {"c": c, "e": e}
        own = set()            # leads written out here (the model then has 0 for them)
        for x, hook in (("c", "k_bc"), ("e", "k_be")):
            kk = val(f"{ref}.{hook}", 1.0)
            if kk == 1:
                continue       # the model's own RC / RE: the same lead
            own.add(f"r{x}")
            eff[x] = inner(x)
            if kk > 0:
                r = max(val(f"{ref}.r{x}"), LEAD_MIN_OHMS) / kk
                out.append(res(el("R", f"{x}lead"), n(nodes[0 if x == "c" else 2]), eff[x], r))
            else:              # lifted: no lead; diag's node shunt holds the inner node
                out.append(res(el("R", f"{x}open"), eff[x], "0", 1.0 / GSHUNT))
        out.append(f"{el('Q')} {eff['c']} {b} {eff['e']} {model}")
        for name, x, y in (("g_be", b, e), ("g_bc", b, c), ("g_ce", c, e)):
            g = val(f"{ref}.{name}", 0.0)
            if g > 0:
                out.append(res(el("R", name[2:]), x, y, 1.0 / g))

        def mval(key: str) -> float:
            return 0.0 if key.rsplit(".", 1)[1] in own else val(key)

        out.append(f".model {model} {k.upper()}({_model_fields(ref, _BJT_PARAMS, mval)})")
        for name, other, hook in (("bvebo", e, "k_be"), ("bvcbo", c, "k_bc")):
            if val(f"{ref}.{hook}", 1.0) == 0:
                continue       # a lifted lead takes its junction with it
            an, ca = (b, other) if k == "npn" else (other, b)
            dm = f"dbd_{tag}_{name[2:4]}{sfx}"
            bv = val(f"{ref}.{name}", math.inf)
            rs = val(f"{ref}.rbv", 0.0)
            fields = f"IS={_fmt(BD_IS)} N={_fmt(BD_N)}" + (
                f" BV={_fmt(bv)} IBV={_fmt(BD_TEST_AMPS)}" if math.isfinite(bv) else "") + (
                f" RS={_fmt(rs)}" if rs > 0 else "")
            out += [f"{el('D', name[2:4] + 'bd')} {an} {ca} {dm}", f".model {dm} D({fields})"]
    else:
        raise ValueError(f"{ref}: kind {k!r} has no ngspice mapping in diag.core.spice")
    return out


def _model_fields(ref: str, names: tuple[str, ...], val) -> str:
    fields = []
    for p in names:
        try:
            x = val(f"{ref}.{p}")
        except KeyError:
            continue
        if p in _INFINITE_WHEN_ZERO and (x == 0 or not math.isfinite(x)):
            continue  # SPICE leaves these out for "infinite"
        if not math.isfinite(x):
            raise ValueError(f"{ref}: model parameter {p} = {x!r} is not finite")
        fields.append(f"{p.upper()}={_fmt(x)}")
    return " ".join(fields)
