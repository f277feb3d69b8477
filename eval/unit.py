"""One bench unit as the evaluation sees it: every fitted part's physical values, drawn
inside tolerance, plus the physical changes a fault made (lifted leads, added resistors,
swapped transistor leads), written out as an ngspice netlist.

Independent of diag's ensemble and solver: the draws come from `eval/bench.yaml` and the
device cards are richer than diag's (junction capacitances, ISC/NC, VAR, IKR, RB with
IRB/RBM, beta temperature exponent, ambient temperature 25-40 degC). Values are SI (ohms,
farads, henries, volts, amperes).
"""

from __future__ import annotations

import copy
import math
import re
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

import numpy as np
import yaml

from diag.core.case import Case, Observable, Part, Point

HERE = Path(__file__).resolve().parent


@lru_cache(maxsize=1)
def bench() -> dict:
    """The evaluation's bench assumptions (eval/bench.yaml)."""
    return yaml.safe_load((HERE / "bench.yaml").read_text(encoding="utf-8"))


def uni(rng: np.random.Generator, lo_hi, log: bool = False) -> float:
    """One draw uniform in [lo, hi] (log-uniform when `log`)."""
    lo, hi = float(lo_hi[0]), float(lo_hi[1])
    if log:
        return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))
    return float(rng.uniform(lo, hi))


@dataclass
class BenchUnit:
    """A unit on the bench. `values[ref]` holds the part's element values (keys per kind,
    see `draw_unit`), `cards[ref]` a semiconductor's full model card (SPICE names).
    `lifted` holds (ref, terminal) leads that are not soldered (1e12 ohm to the pad),
    `extra` resistors added between nodes (shorts, leaks, bridges: (node, node, ohms)),
    `swapped_ce` transistors fitted with collector and emitter exchanged."""

    case: Case
    temp_c: float
    values: dict[str, dict[str, float]]
    cards: dict[str, dict[str, float]]
    lifted: set[tuple[str, str]] = field(default_factory=set)
    extra: list[tuple[str, str, float]] = field(default_factory=list)
    swapped_ce: set[str] = field(default_factory=set)
    nodeset: dict[str, float] = field(default_factory=dict)

    def copy(self) -> BenchUnit:
        """An independent copy (the frozen case is shared)."""
        return BenchUnit(case=self.case, temp_c=self.temp_c,
                         values=copy.deepcopy(self.values), cards=copy.deepcopy(self.cards),
                         lifted=set(self.lifted), extra=list(self.extra),
                         swapped_ce=set(self.swapped_ce), nodeset=dict(self.nodeset))


def _tol(part: Part) -> float:
    t = part.tol
    return float(t) if t is not None else float(bench()["tolerance"].get(part.kind, 0.05))


def _supply_max(case: Case) -> float:
    vs = [abs(p.value or 0.0) for p in case.parts if p.kind == "supply"]
    return max(vs) if vs else 10.0


def _bipolar_size(part: Part) -> str:
    """"power" for a card with IKF at or above bipolar.power_ikf or a power model's name,
    "small" otherwise."""
    m = part.model or {}
    ikf = float(m["IKF"]) if _isnum(m.get("IKF")) else 0.0
    power = ikf >= bench()["bipolar"]["power_ikf"] or "power" in str(m.get("name", ""))
    return "power" if power else "small"


def _draw_bipolar(part: Part, rng: np.random.Generator) -> dict[str, float]:
    b = bench()["bipolar"]
    m = {k: float(v) for k, v in (part.model or {}).items() if k != "name" and _isnum(v)}
    card = {k: v for k, v in m.items() if k not in ("BVEBO", "BVCBO", "RBV")}  # not ngspice's
    hfe = part.fields.get("hfe") or _catalogue_hfe(part)
    bf = float(m.get("BF", 100.0))
    card["BF"] = uni(rng, hfe) if hfe else bf * uni(rng, b["bf_spread"])
    card["IS"] = float(m.get("IS", 1e-14)) * math.exp(
        float(np.clip(rng.normal(0, b["is_sigma_ln"]), -2 * b["is_sigma_ln"],
                      2 * b["is_sigma_ln"])))
    if "ISE" in m:
        card["ISE"] = m["ISE"] * math.exp(float(np.clip(rng.normal(0, b["ise_sigma_ln"]),
                                                         -2 * b["ise_sigma_ln"],
                                                         2 * b["ise_sigma_ln"])))
    if "VAF" in m:
        card["VAF"] = m["VAF"] * uni(rng, b["vaf_spread"])
    ikf = m.get("IKF")
    if ikf:
        card["IKF"] = ikf * uni(rng, b["ikf_spread"])
    for k in ("RC", "RE"):
        if k in m:
            card[k] = m[k] * uni(rng, b["r_spread"])
    rb = m.get("RB") or float(b["rb_default"])
    card["RB"] = rb * uni(rng, b["r_spread"])
    card["RBM"] = card["RB"] * uni(rng, b["rbm_of_rb"])
    card["IRB"] = uni(rng, b["irb"], log=True)
    card["NF"] = float(m.get("NF", 1.0)) * uni(rng, b["nf"])
    card.setdefault("VAR", uni(rng, b["var"]))
    if ikf:
        card.setdefault("IKR", card["IKF"] * uni(rng, b["ikr_of_ikf"]))
    ise = card.get("ISE", card["IS"] * 10)
    card.setdefault("ISC", ise * uni(rng, b["isc_of_ise"]))
    card.setdefault("NC", uni(rng, b["nc"]))
    card["XTB"] = uni(rng, b["xtb"])
    for k, rng_ in b[_bipolar_size(part)].items():
        card.setdefault(k.upper(), uni(rng, rng_, log=True))
    return card


def _catalogue_hfe(part: Part):
    """The hFE range catalogued for the part's model in rules/models.yaml, if any."""
    from diag.core.rules import load_rules

    name = str((part.model or {}).get("name", ""))
    entry = load_rules()["models"].get(name) or {}
    return (entry.get("spread") or {}).get("hfe")


def _draw_diode(part: Part, rng: np.random.Generator) -> dict[str, float]:
    d = bench()["diode"]
    m = {k: float(v) for k, v in (part.model or {}).items() if k != "name" and _isnum(v)}
    card = dict(m)
    card["IS"] = float(m.get("IS", 1e-14)) * math.exp(
        float(np.clip(rng.normal(0, d["is_sigma_ln"]), -2 * d["is_sigma_ln"],
                      2 * d["is_sigma_ln"])))
    card["N"] = float(m.get("N", 1.0)) * uni(rng, d["n_factor"])
    if "RS" in m:
        card["RS"] = m["RS"] * uni(rng, d["rs_spread"])
    bv = part.fields.get("bv") if part.kind == "zener" else None
    bv = float(bv) if bv is not None else m.get("BV")
    if bv is not None:
        spread = d["bv_tol"] if part.kind == "zener" else 0.0
        card["BV"] = float(bv) * (1 + rng.uniform(-spread, spread))
    card.setdefault("CJO", uni(rng, d["cjo"], log=True))
    card.setdefault("TT", uni(rng, d["tt"], log=True))
    return card


def _isnum(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def draw_unit(case: Case, rng: np.random.Generator) -> BenchUnit:
    """Draw one healthy unit: every part inside its tolerance (uniform), semiconductor
    cards spread and enriched, an ambient temperature. Keys of `values` per kind:
    resistor/fuse/link `r`; pot `r_a r_b r_w`; capacitor/electrolytic `c leak esr`;
    inductor `l r`; speaker `r z`; supply `v r`; signal `vac r hz`."""
    bb = bench()
    vals: dict[str, dict[str, float]] = {}
    cards: dict[str, dict[str, float]] = {}
    vmax = _supply_max(case)
    # the emitter-base breakdown (added after the first evaluations) draws from its own
    # stream, seeded from `rng`'s state without advancing it: every other draw of a unit
    # is what it was before, so figures before and after compare on the same units
    side = np.random.default_rng(rng.bit_generator.state["state"]["state"])
    # a supply's current limit likewise (giving a case a limit leaves every other draw)
    lim = np.random.default_rng([rng.bit_generator.state["state"]["state"], 1])
    for p in case.parts:
        f = p.fields
        t = _tol(p)
        k = p.kind
        if k == "resistor":
            vals[p.ref] = {"r": p.value * (1 + rng.uniform(-t, t))}
        elif k == "pot":
            r = p.value * (1 + rng.uniform(-t, t))
            s = float(f.get("set", 0.5))
            vals[p.ref] = {"r_a": max(r * s, 1e-3), "r_b": max(r * (1 - s), 1e-3),
                           "r_w": uni(rng, bb["pot_wiper_ohms"])}
        elif k in ("capacitor", "electrolytic"):
            c = p.value * (1 + rng.uniform(-t, t))
            if f.get("leak") is not None:
                leak = float(f["leak"])
            elif k == "capacitor":
                leak = uni(rng, bb["capacitor"]["leak_ohms"], log=True)
            else:
                vr = float(f.get("volts_rated") or vmax)
                limit = max(0.01 * p.value * 1e6 * vr * 1e-6, 3e-6)
                leak = vr / (limit * uni(rng, bb["electrolytic"]["leak_fraction"], log=True))
            if f.get("esr") is not None:
                esr = float(f["esr"])
            elif k == "capacitor":
                esr = uni(rng, bb["capacitor"]["esr_ohms"], log=True)
            else:
                esr = uni(rng, bb["electrolytic"]["tan_delta"]) / (2 * math.pi * 120 * c)
            vals[p.ref] = {"c": c, "leak": leak, "esr": esr}
        elif k == "inductor":
            r = float(f.get("r_dc") or 1.0)
            vals[p.ref] = {"l": p.value * (1 + rng.uniform(-t, t)),
                           "r": r * (1 + rng.uniform(-t, t))}
        elif k == "speaker":
            sp = bb["speaker"]
            if f.get("r_dc") is not None:
                r = float(f["r_dc"]) * (1 + rng.uniform(-sp["r_dc_tol"], sp["r_dc_tol"]))
            else:
                r = p.value * uni(rng, sp["r_dc_of_rated"])
            vals[p.ref] = {"r": r, "z": max(p.value * uni(rng, sp["z_of_rated"]), r * 1.01)}
        elif k in ("fuse", "link"):
            r = p.value if p.value else uni(rng, bb[f"{k}_ohms"], log=True)
            vals[p.ref] = {"r": r}
        elif k == "supply":
            vals[p.ref] = {"v": p.value * (1 + rng.uniform(-t, t)),
                           "r": float(f.get("r_source") or bb["supply_r_source"])}
            if f.get("limit"):  # from a stream of its own, as `side` below
                lt = bb["supply_limit_tol"]
                vals[p.ref]["ilim"] = float(f["limit"]) * (1 + lim.uniform(-lt, lt))
        elif k == "signal":
            e = bb["signal_vrms_tol"]
            vals[p.ref] = {"vac": p.value * (1 + rng.uniform(-e, e)),
                           "r": float(f.get("r_source") or bb["signal_r_source"]),
                           "hz": float(f.get("hz") or 1000.0)}
        elif k in ("npn", "pnp"):
            cards[p.ref] = _draw_bipolar(p, rng)
            b = bb["bipolar"]
            vals[p.ref] = {"bvebo": uni(side, b[f"bvebo_{_bipolar_size(p)}"]),
                           "bvebo_rs": uni(side, b["bvebo_rs"], log=True)}
        elif k in ("diode", "led", "zener"):
            cards[p.ref] = _draw_diode(p, rng)
        else:
            raise ValueError(f"{case.path}: {p.ref}: kind {k!r} has no bench model in eval")
    return BenchUnit(case=case, temp_c=uni(rng, bb["ambient_c"]), values=vals, cards=cards)


# ---------------------------------------------------------------- netlist

def _ident(s: str) -> str:
    return re.sub(r"[^A-Za-z0-9_]", "_", s)


def spice_node(case: Case, name: str) -> str:
    """ngspice name of a case node (the ground is 0)."""
    return "0" if name == case.ground else "n_" + _ident(name)


def _fmt(x: float) -> str:
    return f"{x:.9g}"


def netlist_lines(u: BenchUnit) -> list[str]:
    """Element and model lines of the unit (no analysis, no meter)."""
    case = u.case
    bb = bench()
    out: list[str] = [f".options temp={_fmt(u.temp_c)}"]
    open_r = float(bb["faults"]["open_ohms"])
    tc = float(bb["copper_tc1"])

    def node(p: Part, term: str) -> str:
        t = term
        if p.ref in u.swapped_ce and term in ("c", "e"):
            t = "e" if term == "c" else "c"
        n = spice_node(case, p.terminal(t))
        if (p.ref, term) in u.lifted:
            lifted = f"l_{_ident(p.ref)}_{term}"
            out.append(f"R_lift_{_ident(p.ref)}_{term} {lifted} {n} {_fmt(open_r)}")
            return lifted
        return n

    for p in case.parts:
        r = _ident(p.ref)
        v = u.values.get(p.ref, {})
        k = p.kind
        if k in ("resistor", "fuse", "link"):
            out.append(f"R_{r} {node(p, 'a')} {node(p, 'b')} {_fmt(v['r'])}")
        elif k == "pot":
            a, w, b = node(p, "a"), node(p, "wiper"), node(p, "b")
            out.append(f"R_{r}_a {a} t_{r} {_fmt(v['r_a'])}")
            out.append(f"R_{r}_b t_{r} {b} {_fmt(v['r_b'])}")
            out.append(f"R_{r}_w t_{r} {w} {_fmt(v['r_w'])}")
        elif k in ("capacitor", "electrolytic"):
            t1, t2 = ("a", "b") if k == "capacitor" else ("plus", "minus")
            a, b = node(p, t1), node(p, t2)
            out.append(f"C_{r} {a} m_{r} {_fmt(v['c'])}")
            out.append(f"R_{r}_esr m_{r} {b} {_fmt(v['esr'])}")
            out.append(f"R_{r}_leak {a} {b} {_fmt(v['leak'])}")
        elif k == "inductor":
            a, b = node(p, "a"), node(p, "b")
            out.append(f"R_{r}_dc {a} m_{r} {_fmt(v['r'])} tc1={tc}")
            out.append(f"L_{r} m_{r} {b} {_fmt(v['l'])}")
        elif k == "speaker":
            a, b = node(p, "a"), node(p, "b")
            rx = v["z"] - v["r"]
            hz = _signal_hz(u)
            lx = 10 * rx / (2 * math.pi * hz)
            out.append(f"R_{r}_dc {a} m_{r} {_fmt(v['r'])} tc1={tc}")
            out.append(f"R_{r}_x m_{r} {b} {_fmt(rx)}")
            out.append(f"L_{r}_x m_{r} {b} {_fmt(lx)}")
        elif k == "supply":
            plus, minus = node(p, "plus"), node(p, "minus")
            out.append(f"V_{r} s_{r} {minus} DC {_fmt(v['v'])}")
            if "ilim" in v:
                out.append(f"B_{r}_lim s_{r} a_{r} I={_limit_expr(f'v(s_{r},a_{r})', v)}")
            else:
                out.append(f"R_{r}_src s_{r} a_{r} {_fmt(v['r'])}")
            out.append(f"R_{r}_amm a_{r} {plus} {_fmt(bb['meter']['burden_idle_ohms'])}")
        elif k == "signal":
            plus, minus = node(p, "plus"), node(p, "minus")
            # DC 0 for the operating point, AC for the small-signal pass, SIN (peak =
            # rms x sqrt 2, zero phase at t = 0) for the transient one
            out.append(f"V_{r} s_{r} {minus} DC 0 AC {_fmt(v['vac'])} "
                       f"SIN(0 {_fmt(v['vac'] * math.sqrt(2))} {_fmt(v['hz'])})")
            out.append(f"R_{r}_src s_{r} {plus} {_fmt(v['r'])}")
        elif k in ("diode", "led", "zener"):
            out.append(f"D_{r} {node(p, 'anode')} {node(p, 'cathode')} M_{r}")
            out.append(_model_line(f"M_{r}", "D", u.cards[p.ref]))
        elif k in ("npn", "pnp"):
            c, b, e = node(p, "c"), node(p, "b"), node(p, "e")   # physical pins
            out.append(f"Q_{r} {c} {b} {e} M_{r}")
            out.append(_model_line(f"M_{r}", k.upper(), u.cards[p.ref]))
            if "bvebo" in v:   # the emitter-base junction's breakdown
                an, ca = (b, e) if k == "npn" else (e, b)
                out.append(f"D_{r}_eb {an} {ca} MB_{r}")
                out.append(_model_line(f"MB_{r}", "D", {
                    **bb["bipolar"]["bvebo_diode"], "BV": v["bvebo"], "RS": v["bvebo_rs"]}))
    for i, (a, b, ohms) in enumerate(u.extra):
        out.append(f"R_extra_{i} {spice_node(case, a)} {spice_node(case, b)} {_fmt(ohms)}")
    return out


def _limit_expr(v: str, vals: dict) -> str:
    """Current (amperes) through a current-limited bench supply's output, `v` the voltage
    across its source resistance: v / r up to the limit ilim, then ilim, joined by a
    knee of sharpness bench.yaml `supply_limit_knee` (n): ilim s / (1 + s^n)^(1/n),
    s = v / (ilim r), written in 1/s above s = 1 (no overflow); v / r below zero."""
    n = int(bench()["supply_limit_knee"])
    ilim, r = vals["ilim"], vals["r"]
    s = f"({v}/{_fmt(ilim * r)})"
    up = f"pow(1+pow(1/{s},{n}),{_fmt(-1.0 / n)})"
    mid = f"{s}/pow(1+pow({s},{n}),{_fmt(1.0 / n)})"
    return f"{{{_fmt(ilim)}*({s}>1 ? {up} : ({s}>0 ? {mid} : {s}))}}"


def _signal_hz(u: BenchUnit) -> float:
    for p in u.case.parts:
        if p.kind == "signal":
            return u.values[p.ref]["hz"]
    return 1000.0


def _model_line(name: str, typ: str, card: dict[str, float]) -> str:
    body = " ".join(f"{k}={_fmt(v)}" for k, v in sorted(card.items()))
    return f".model {name} {typ} ({body})"


def _deck_head(u: BenchUnit) -> list[str]:
    """The unit's netlist with one idle meter (open_ohms, and 1e-18 F where the point
    reads ac) across every voltage point."""
    case = u.case
    bb = bench()["meter"]
    lines = [f"* diag eval unit of {Path(case.path).name}"] + netlist_lines(u)
    if u.nodeset:   # the state the unit powered up in (power_up_deck)
        lines.append(".nodeset " + " ".join(f"v({n})={_fmt(v)}" for n, v in u.nodeset.items()))
    for p in case.points:
        if p.node is None:
            continue
        pid = _ident(p.id)
        plus = spice_node(case, p.node)
        minus = spice_node(case, p.minus or case.ground)
        lines.append(f"R_meter_{pid} {plus} {minus} {_fmt(bb['open_ohms'])}")
        if "ac" in p.reads:
            lines.append(f"C_meter_{pid} {plus} {minus} 1e-18")
    return lines


def power_up_deck(u: BenchUnit) -> tuple[str, list[str]]:
    """ngspice deck (and the node names it reports, `@p <index> <volts>`) that finds the
    state the unit is in once powered: a transient run from its operating point, with
    `power_up.node_farads` from every case node to ground and a current kick of
    `power_up.kick_amps` into each, of a sign drawn from the unit's own ambient draw. A
    circuit with one stable point comes back to it; one the operating point left at the
    balance point between two switched states (a latch: SPICE's Newton finds whichever
    solution is nearest its start) ends in one of them, as a real unit does at power-up.
    The end point becomes the unit's `.nodeset` for every later operating point."""
    case = u.case
    pu = bench()["power_up"]
    nodes = [spice_node(case, n) for n in case.nodes if spice_node(case, n) != "0"]
    rng = np.random.default_rng(int(abs(u.temp_c) * 1e9) % (2 ** 32))
    lines = _deck_head(u)
    t_end = float(pu["seconds"])
    for i, n in enumerate(nodes):
        amp = float(pu["kick_amps"]) * (1.0 if rng.random() < 0.5 else -1.0)
        lines += [f"C_pu_{i} {n} 0 {_fmt(float(pu['node_farads']))}",
                  f"I_pu_{i} 0 {n} PULSE(0 {_fmt(amp)} 0 1e-9 1e-9 {_fmt(t_end / 1000)} "
                  f"{_fmt(10 * t_end)})"]
    ctl = [".control", "set noaskquit", f"tran {_fmt(t_end / 2000)} {_fmt(t_end)}"]
    for i, n in enumerate(nodes):
        ctl += [f"meas tran f{i} find v({n}) at={_fmt(t_end)}", f"echo \"@p {i} $&f{i}\""]
    ctl += ["quit", ".endc", ".end"]
    return "\n".join(lines + ctl) + "\n", nodes


def _probe(case: Case, point: Point) -> str:
    """ngspice expression of a voltage point's reading (node, or node minus node)."""
    plus = spice_node(case, point.node)
    minus = spice_node(case, point.minus or case.ground)
    return f"v({plus})" + (f"-v({minus})" if minus != "0" else "")


def measure_script(u: BenchUnit, observables: tuple[Observable, ...],
                   check: tuple[int, ...] = ()) -> str:
    """Full ngspice deck: the unit, one idle meter per voltage point, and a .control
    block that connects the meter (input resistance, and capacitance for ac) to one
    point at a time, solves, and echoes `@@ <index> <value>` per observable. Supply
    points read the supply's current with the ammeter's burden in series. AC readings
    here are small-signal (`ac` at the signal frequency, volts rms): exact while every
    stage is linear, wrong where one is not (a stage that clips reads too high; see
    `transient_script`). With `check` (periods, ascending) and ac observables, the deck
    then also echoes, every meter idle, the small-signal AC readings as `@~ <index>
    <volts rms>` and the transient ones of `tran_lines` with windows ending at `check`
    as `@c<k> <index> <volts rms>`: for a linear unit the two agree."""
    case = u.case
    meter = case.meter
    bb = bench()["meter"]
    lines = _deck_head(u)
    pts = {p.id: p for p in case.points}
    hz = _signal_hz(u)
    ctl = [".control", "set noaskquit"]
    for i, ob in enumerate(observables):
        p = pts[ob.point]
        pid = _ident(p.id)
        ctl.append("destroy all")
        if p.supply:
            s = _ident(p.supply)
            ctl.append(f"alter R_{s}_amm = {_fmt(float(meter['a_burden']))}")
            ctl += ["op", f"let x = -i(V_{s})", f"echo \"@@ {i} $&x\"",
                    f"alter R_{s}_amm = {_fmt(bb['burden_idle_ohms'])}"]
            continue
        expr = _probe(case, p)
        ctl.append(f"alter R_meter_{pid} = {_fmt(float(meter['r_in']))}")
        if ob.kind == "ac":
            ctl.append(f"alter C_meter_{pid} = {_fmt(float(meter['c_in']))}")
            ctl += ["op", f"ac lin 1 {_fmt(hz)} {_fmt(hz)}", f"let x = mag({expr})",
                    f"echo \"@@ {i} $&x\"", f"alter C_meter_{pid} = 1e-18"]
        else:
            ctl += ["op", f"let x = {expr}", f"echo \"@@ {i} $&x\""]
        ctl.append(f"alter R_meter_{pid} = {_fmt(bb['open_ohms'])}")
    ac = [i for i, ob in enumerate(observables) if ob.kind == "ac"]
    if check and ac:
        ctl += ["destroy all", "op", f"ac lin 1 {_fmt(hz)} {_fmt(hz)}"]
        for i in ac:
            ctl += [f"let s{i} = mag({_probe(case, pts[observables[i].point])})",
                    f"echo \"@~ {i} $&s{i}\""]
        ctl += ["destroy all"] + tran_lines(u, observables, ac, check, "@c")
    ctl += ["quit", ".endc", ".end"]
    return "\n".join(lines + ctl) + "\n"


def tran_lines(u: BenchUnit, observables: tuple[Observable, ...], which: list[int],
               ends: tuple[int, ...], tag: str) -> list[str]:
    """Control lines of one transient run from the DC operating point, the signal source
    a sine of its rms x sqrt 2 at its frequency, the maximum step a
    `transient.steps_per_period`th of a period (eval/bench.yaml), that echo for each ac
    observable in `which` the AC-coupled rms sqrt(mean((v - mean v)^2)) of its point's
    voltage over `window_periods` whole periods ending at each of `ends` (periods since
    the tone started, ascending), as `<tag><k> <index> <volts rms>` for the k-th end."""
    case = u.case
    tr = bench()["transient"]
    pts = {p.id: p for p in case.points}
    period = 1.0 / _signal_hz(u)
    step = _fmt(period / int(tr["steps_per_period"]))
    win = int(tr["window_periods"])
    out = [f"tran {step} {_fmt(ends[-1] * period)} {_fmt((ends[0] - win) * period)} {step}"]
    for i in which:
        assert observables[i].kind == "ac", observables[i]
        out.append(f"let x{i} = {_probe(case, pts[observables[i].point])}")
        for k, end in enumerate(ends):
            lo, hi = _fmt((end - win) * period), _fmt(end * period)
            out += [f"meas tran m{i}_{k} AVG x{i} from={lo} to={hi}",
                    f"let y{i}_{k} = x{i} - m{i}_{k}",
                    f"meas tran r{i}_{k} RMS y{i}_{k} from={lo} to={hi}",
                    f"echo \"{tag}{k} {i} $&r{i}_{k}\""]
    return out


def transient_script(u: BenchUnit, observables: tuple[Observable, ...],
                     which: list[int], ends: tuple[int, ...]) -> str:
    """ngspice deck reading the ac observables `which` (indices into `observables`) as a
    meter does: for each, the meter (r_in parallel c_in) connected across its point as
    `measure_script` connects it, and one transient run (`tran_lines`) with windows
    ending at `ends`, echoed `@t<k> <index> <volts rms>`."""
    case = u.case
    mtr = case.meter
    pts = {p.id: p for p in case.points}
    ctl = [".control", "set noaskquit"]
    for i in which:
        pid = _ident(pts[observables[i].point].id)
        ctl += ["destroy all", f"alter R_meter_{pid} = {_fmt(float(mtr['r_in']))}",
                f"alter C_meter_{pid} = {_fmt(float(mtr['c_in']))}"]
        ctl += tran_lines(u, observables, [i], ends, "@t")
        ctl += [f"alter C_meter_{pid} = 1e-18",
                f"alter R_meter_{pid} = {_fmt(bench()['meter']['open_ohms'])}"]
    ctl += ["quit", ".endc", ".end"]
    return "\n".join(_deck_head(u) + ctl) + "\n"
