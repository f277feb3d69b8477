"""Bipolar transistors: the Gummel-Poon DC model (IS BF BR NF NR VAF VAR IKF IKR NKF ISE NE
ISC NC RB RC RE, and optionally IRB RBM), SPICE meaning of every parameter, so the same
card in ngspice gives the same operating point. With VAF, VAR, IKF, IKR infinite and ISE,
ISC 0 it is the Ebers-Moll transport model. Base charge as in SPICE:
qb = q1 (1 + (1 + 4 q2)^NKF) / 2, q1 = 1 / (1 - vbc/VAF - vbe/VAR),
q2 = Ibe1/IKF + Ibc1/IKR.

A card's charge-storage, noise and temperature parameters (CARD_ONLY) are accepted, so
that a card carries over from a simulator as it is, and not used: diag's AC analysis is
low-frequency (no junction capacitance or transit time), and the ambient temperature
moves every junction by the rules' figure (ensemble.apply_ambient), except that a card's
XTB sets its own part's beta temperature exponent.

Base-resistance modulation (SPICE): the base resistance is RBM + (RB - RBM) / qb, or,
with IRB given, RBM + 3 (RB - RBM) (tan z - z) / (z tan² z) with
z = (-1 + sqrt(1 + 144 ib / (π² IRB))) / (24 / π² · sqrt(ib / IRB)), ib the intrinsic
base current. RBM defaults to RB and IRB to infinite (0 = not given), as in SPICE, so
the generic models keep a constant RB. Only a model that gives IRB or an RBM below RB
gets the modulated resistance, evaluated as SPICE does (a conductance updated every
Newton iteration, its dependence on ib left out of the Jacobian, so the small-signal
Thevenin resistance at the base leaves that dependence out too).

Internal nodes: the collector and emitter always have one (ci, ei) behind the lead
resistance RC / RE, taken as max(R, 1 µΩ) when the model has 0 (so a fault can always
lift those leads); the base has bi only when RB > 0.

Junction breakdown: BVEBO (the card's emitter-base breakdown voltage; infinite when not
given, and ngspice's Gummel-Poon has none) sits as a breakdown-only junction between the
external base and emitter leads (`bvebo`), and one between base and collector (`bvcbo`,
infinite unless the card gives BVCBO): an ngspice diode with IS = BD_IS, N = BD_N (no
forward conduction to speak of), BV and IBV = BD_TEST_AMPS (the data-sheet test
current), so the netlist (diag.core.spice) holds the same element. Both follow their lead's hook
(k_be, k_bc = 0: a lifted lead takes the junction with it). The ce-swapped fault
exchanges the two, so a part fitted the wrong way round meets the collector voltage with
its emitter-base junction, which breaks down above BVEBO.

Fault hooks: k_be, k_bc (1 healthy, 0 = open) scale the conductance of the EMITTER /
COLLECTOR LEAD (k / max(RE, 1 µΩ) between e and ei, k / max(RC, 1 µΩ) between c and
ci), as a lifted lead: the junction equations are untouched, so with the collector
lifted the die saturates inside with Ic = 0 and the base-emitter path carries the base
current. Shunts g_be, g_bc, g_ce (siemens) sit between the external leads.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from diag.core.parts.base import GMIN, VT, PartKind, Spread, pnjlim, safe_exp, wright_omega
from diag.core.parts.diode import DiodeDevice, model_of, model_spread

DEFAULT_MODEL = {"npn": "npn-small", "pnp": "pnp-small"}
SPICE_DEFAULTS = {"IS": 1e-16, "BF": 100.0, "BR": 1.0, "NF": 1.0, "NR": 1.0,
                  "VAF": math.inf, "IKF": math.inf, "ISE": 0.0, "NE": 1.5,
                  "RB": 0.0, "RC": 0.0, "RE": 0.0,
                  "VAR": math.inf, "IKR": math.inf, "ISC": 0.0, "NC": 2.0, "NKF": 0.5,
                  "IRB": math.inf, "RBM": 0.0,     # RBM: when not given, RB (below)
                  "BVEBO": math.inf, "BVCBO": math.inf,   # junction breakdown (volts)
                  "RBV": 0.0}   # ohms in series with a breakdown junction (0: none)
MODEL_NAMES = tuple(SPICE_DEFAULTS)
# SPICE bipolar card names accepted and not used (see the module docstring): junction and
# substrate capacitance, transit time, noise, and temperature (XTB is read by
# ensemble.apply_ambient).
CARD_ONLY = ("CJE", "VJE", "MJE", "TF", "XTF", "VTF", "ITF", "PTF", "CJC", "VJC", "MJC",
             "XCJC", "TR", "CJS", "VJS", "MJS", "FC", "KF", "AF", "EG", "XTI", "XTB", "TNOM")
ON_CURRENT = 1e-6   # amperes of junction current above which a junction counts as on
LEAD_MIN_OHMS = 1e-6   # ohms, the lead resistance used where the model has RC / RE = 0
SAT_VCE = 0.3       # volts; an on transistor below this collector-emitter voltage is saturated
BD_IS = 1e-27       # amperes, and BD_N: the breakdown-only junctions' saturation current and
BD_N = 2.0          # emission coefficient: under 1e-10 A forward up to 2 V (ngspice takes an
                    # IS below 1e-28 as 1e-28); a soft knee, 50 mV a decade, in breakdown
BD_TEST_AMPS = 1e-5  # amperes at which BVEBO is specified (10 µA; from memory, data sheets)
BD_QUIET_FORWARD = 1.5  # volts: below this forward, BD_IS exp(v / (BD_N vt)) < 1e-14 A


# a generic model's spread of these card values over its class, as factors of the card's
# value (rules/models.yaml `spread`); a case's own card is one part type and has none
CLASS_SPREAD = ("is", "vaf", "ikf", "ise")
INFINITE_WHEN_ZERO = ("vaf", "var", "ikf", "ikr", "irb", "bvebo", "bvcbo")
# volts: the least Early voltage (VAF, VAR) a card may give (0 = none). The base charge's
# q1 = 1 / (1 - vbc/VAF - vbe/VAR) must stay positive with a junction forward, up to
# about 1 V; real cards give 5 to 200 V (from memory).
EARLY_MIN_VOLTS = 1.0


def early_problem(key: str, value: float) -> tuple[str, str] | None:
    """(what is wrong, what to do) with a card's VAF or VAR of `value` volts, or None."""
    if key in ("VAF", "VAR") and 0.0 < value < EARLY_MIN_VOLTS:
        return (f"{key} {value:g} V is below a forward junction's voltage",
                f"SPICE's q1 = 1 / (1 - vbc/VAF - vbe/VAR) would turn negative; give "
                f"{EARLY_MIN_VOLTS:g} V or more (cards give 5 to 200 V), or 0 for none")
    return None


def _is(value, const: float) -> bool:
    """True when a parameter is the plain number `const` (not a per-variant array)."""
    return isinstance(value, float) and value == const


def card(model: Mapping[str, Any]) -> dict[str, Any]:
    """A bipolar model mapping (its "name" aside) with upper-case SPICE names over
    SPICE_DEFAULTS: every name a card leaves out has SPICE's value."""
    return {**SPICE_DEFAULTS,
            **{str(k).upper(): v for k, v in model.items() if k != "name"}}


class BJT(PartKind):
    kinds = ("npn", "pnp")
    names = tuple(k.lower() for k in MODEL_NAMES) + ("k_be", "k_bc", "g_be", "g_bc", "g_ce")

    def internal(self, part, nominal):
        return tuple(f"{x}i" for x in ("c", "b", "e") if x != "b" or nominal["rb"] > 0)

    def nominal(self, part, ctx):
        _, m = model_of(part, ctx, DEFAULT_MODEL[part.kind])
        q = card(m)
        if "RBM" not in {k.upper() for k in m}:
            q["RBM"] = q["RB"]
        out = {k.lower(): float(q[k]) for k in MODEL_NAMES}
        for k in INFINITE_WHEN_ZERO:   # SPICE: 0 means infinite
            if out[k] == 0.0:
                out[k] = math.inf
        hfe = part.fields.get("hfe")
        if hfe:
            out["bf"] = math.sqrt(float(hfe[0]) * float(hfe[1]))
        out.update(k_be=1.0, k_bc=1.0, g_be=0.0, g_bc=0.0, g_ce=0.0)
        return out

    def spreads(self, part, nominal, ctx):
        name = part.model.get("name") if part.model else DEFAULT_MODEL[part.kind]
        s, borrowed = model_spread(ctx, name, part.kind)
        if borrowed:
            # a card of the case's own: the generic gain spread (its hi/lo ratio) around
            # the card's BF; its BVEBO as given
            if s.get("hfe"):
                lo, hi = (float(x) for x in s["hfe"])
                mid = math.sqrt(lo * hi)
                s["hfe"] = (nominal["bf"] * lo / mid, nominal["bf"] * hi / mid)
            for key in ("bvebo", "rbv") + CLASS_SPREAD:
                s.pop(key, None)
        hfe = part.fields.get("hfe") or s.get("hfe")
        out = []
        if hfe:
            out.append(Spread((f"{part.ref}.bf",), "loguniform", float(hfe[0]), float(hfe[1])))
        if s.get("is_sigma") and not s.get("is"):
            out.append(Spread((f"{part.ref}.is",), "lognormal", float(s["is_sigma"])))
        if s.get("ise_sigma") and nominal["ise"] > 0 and not s.get("ise"):
            out.append(Spread((f"{part.ref}.ise",), "lognormal", float(s["ise_sigma"])))
        if s.get("bvebo") and math.isfinite(nominal["bvebo"]):
            lo, hi = (float(x) for x in s["bvebo"])
            out.append(Spread((f"{part.ref}.bvebo",), "loguniform", lo, hi))
        if s.get("rbv") and nominal["rbv"] > 0:
            lo, hi = (float(x) for x in s["rbv"])
            out.append(Spread((f"{part.ref}.rbv",), "loguniform", lo, hi, stream=2))
        for key in CLASS_SPREAD:
            if s.get(key) and 0.0 < nominal[key] < math.inf:
                lo, hi = (float(x) for x in s[key])
                out.append(Spread((f"{part.ref}.{key}",), "loguniform",
                                  nominal[key] * lo, nominal[key] * hi, stream=3))
        return out

    def dc_stamps(self, part, p, t):
        # the breakdown junctions' GMIN (their diode's in ngspice) is linear: it sits here,
        # so that `Breakdown` can skip a junction that carries nothing else
        g = [(t["b"], t["e"], p["g_be"] + p["k_be"] * GMIN),
             (t["b"], t["c"], p["g_bc"] + p["k_bc"] * GMIN),
             (t["c"], t["e"], p["g_ce"])]
        for x, k in (("c", p["k_bc"]), ("b", 1.0), ("e", p["k_be"])):
            if x == "b" and modulated(part):
                continue                       # the device carries the base resistance
            if f"{x}i" in t:
                g.append((t[x], t[f"{x}i"], k / np.maximum(p[f"r{x}"], LEAD_MIN_OHMS)))
        return g, []

    def device(self, part, t):
        nodes = tuple(t.get(f"{x}i", t[x]) for x in ("c", "b", "e"))
        if modulated(part):
            nodes += (t["b"],)
        npn = part.kind == "npn"
        return (BJTDevice(nodes, 1.0 if npn else -1.0),
                Breakdown((t["b"], t["e"]) if npn else (t["e"], t["b"]), "bvebo", "k_be"),
                Breakdown((t["b"], t["c"]) if npn else (t["c"], t["b"]), "bvcbo", "k_bc"))


class Breakdown(DiodeDevice):
    """A transistor junction's reverse breakdown between two external leads (anode side,
    cathode side: base and emitter or collector of an NPN, the other way round for a PNP):
    an ngspice diode with IS = BD_IS, N = BD_N, BV = the part's `bv` parameter,
    IBV = BD_TEST_AMPS and RS = the part's `rbv` (the resistance in series with the
    junction, which at tens of milliamperes adds volts to BVEBO), its current scaled by
    the lead's hook `k` (0: lifted). Past the knee the series resistance is solved in
    closed form (`_past_knee`), so the device keeps two terminals and no inner node."""

    def __init__(self, nodes, bv: str, k: str):
        super().__init__(nodes)
        self.bv, self.k = bv, k
        self.keys = (bv, k, "rbv")   # the part parameters it reads (solver._prepared)

    def prepare(self, p):
        q = {"is": BD_IS, "n": BD_N, "bv": p[self.bv], "ibv": BD_TEST_AMPS, "k": p[self.k],
             "rbv": p["rbv"]}
        q.update(DiodeDevice.prepare(q))
        q["_quiet"] = -q["_xbv"] + 20.0 * q["_vte"]   # volts: above this, short of the knee
        q["_quiet_max"] = float(np.max(q["_quiet"]))  # the same for every variant at once
        return q

    @staticmethod
    def quiet(p, v) -> bool:
        """True when every variant at terminal voltages v (2, B) is quiet (see `eval`) by
        a test on the whole batch: the solver then skips the element without slicing
        its parameters."""
        vd = v[0] - v[1]
        return bool(vd.max() < BD_QUIET_FORWARD and vd.min() > p["_quiet_max"])

    def eval(self, p, v, state, limit=True, init=False):
        """DiodeDevice.eval less its GMIN (BJT.dc_stamps holds that), and nothing at all
        for a variant whose junction sits below BD_QUIET_FORWARD volts forward and more
        than 20 N vt short of the breakdown knee, where the diode carries under 1e-14 A.
        Most transistors sit there most of the time: when every variant does, J is None
        and the solver skips the element; per variant, so a variant's result does not
        depend on the batch it is solved in."""
        vd = np.broadcast_to(state[0], np.shape(v[0])) if init else v[0] - v[1]
        live = np.flatnonzero(~((vd < BD_QUIET_FORWARD) & (vd > p["_quiet"])))
        if live.size == 0:
            return None, None, (np.array(vd, dtype=float),), np.zeros(vd.shape, bool)
        B = vd.shape[0]

        def sub(a):
            return a[live] if isinstance(a, np.ndarray) and a.ndim else a

        ps = {k: sub(a) for k, a in p.items()}   # the live variants alone
        st = None if state is None else tuple(sub(np.broadcast_to(a, (B,))) for a in state)
        J, ieq, new, lim = DiodeDevice.eval(self, ps, np.asarray(v)[:, live], st,
                                            limit=limit, init=init)
        gd, cur, vn, lm = np.zeros(B), np.zeros(B), np.array(vd, dtype=float), np.zeros(B, bool)
        gd[live] = J[0][0] - ps["k"] * GMIN   # ieq carries no GMIN
        cur[live], vn[live], lm[live] = ieq[0], new[0], lim
        r = np.broadcast_to(np.asarray(ps["rbv"], dtype=float), live.shape)
        if np.any(r > 0):
            self._past_knee(ps, vd[live], None if st is None else st[0], limit, init,
                            live, r, gd, cur, vn, lm)
        return ((gd, -gd), (-gd, gd)), (cur, -cur), (vn,), lm

    @staticmethod
    def _past_knee(ps, vd, vold, limit, init, live, r, gd, cur, vn, lm) -> None:
        """The junction with its series resistance r (ohms) for the live variants past
        the breakdown knee (or coming from past it), written into gd, cur, vn, lm (B,)
        at `live`. With u = -(vd + XBV) the terminal voltage beyond the knee and w the
        junction's own, u = w + r IS exp(w / (N vt)) and the current is -IS exp(w / (N vt))
        (ngspice's breakdown branch); so y = r IS exp(w / (N vt)) / (N vt) solves
        y + ln y = ln(r IS / (N vt)) + u / (N vt): the Wright omega function (the
        diode-resistor series circuit in closed form, by the Lambert W function; checked
        against a root-finder in tests/test_parts.py). SPICE's junction limiting acts on w,
        where the exponential is, not on u; di/dvd = y / (r (1 + y))."""
        xbv, vte = np.broadcast_to(ps["_xbv"], vd.shape), np.broadcast_to(ps["_vte"], vd.shape)
        u = -(vd + xbv)
        uo = u if (init or vold is None) else -(np.broadcast_to(vold, vd.shape) + xbv)
        on = (r > 0) & np.isfinite(xbv) & ((u > 0) | (limit & (uo > 0)))
        if not on.any():
            return
        i = np.flatnonzero(on)
        r, xbv, vte, u, uo = r[i], xbv[i], vte[i], u[i], uo[i]
        is_ = np.broadcast_to(ps["is"], vd.shape)[i]
        la = np.log(r * is_ / vte)

        def w_of(x):
            return x - vte * wright_omega(la + x / vte)

        w = w_of(u)
        limited = np.zeros(len(i), dtype=bool)
        if limit and not init:
            vcrit = np.broadcast_to(ps["_vcrit"], vd.shape)[i]
            w, limited = pnjlim(w, w_of(uo), vte, vcrit)
        e, _ = safe_exp(w / vte)
        y = r * is_ * e / vte
        k = np.broadcast_to(ps["k"], vd.shape)[i]
        v_at = -(w + vte * y + xbv)                 # the terminal voltage evaluated
        g = k * y / (r * (1.0 + y))
        j = live[i]
        gd[j] = g
        cur[j] = k * (-is_ * e) - g * v_at
        vn[j] = v_at
        lm[j] = limited & (k > 0)


def modulated(part) -> bool:
    """True when the part's model gives base-resistance modulation (RB > 0 and IRB given
    or RBM below RB); decided from the model at compile time."""
    m = {k.upper(): v for k, v in (part.model or {}).items() if k != "name"}
    rb = float(m.get("RB", 0.0) or 0.0)
    irb = float(m.get("IRB", 0.0) or 0.0)
    rbm = float(m.get("RBM", rb))
    return rb > 0 and (0 < irb < math.inf or rbm < rb)


class BJTDevice:
    """The intrinsic transistor between (c', b', e') unknowns; with a fourth node (the
    external base b) it also carries the modulated base resistance between b and b'."""

    def __init__(self, nodes, polarity):
        self.nodes = tuple(nodes)
        self.pol = polarity
        self.rbb = len(self.nodes) == 4

    @staticmethod
    def base_resistance(p, ib, qb):
        """SPICE's modulated base resistance (ohms) at intrinsic base current ib (A,
        npn sense) and base charge qb."""
        rb, rbm = p["rb"], p["rbm"]
        irb = p["irb"]
        if _is(irb, math.inf):
            return rbm + (rb - rbm) / qb
        arg1 = np.maximum(ib / irb, 1e-9)
        z = (-1.0 + np.sqrt(1.0 + 14.59025 * arg1)) / 2.4317 / np.sqrt(arg1)
        tz = np.tan(z)
        rbb = rbm + 3.0 * (rb - rbm) * (tz - z) / z / tz / tz
        if isinstance(irb, np.ndarray):   # a variant without IRB: the qb form
            rbb = np.where(np.isfinite(irb), rbb, rbm + (rb - rbm) / qb)
        return rbb

    @staticmethod
    def qb(p, vbe, vbc):
        """Normalised base charge qb (SPICE Gummel-Poon), as in `currents`."""
        return BJTDevice.base_charge(p, vbe, vbc, *BJTDevice._ideal(p, vbe, vbc))[0]

    @staticmethod
    def _ideal(p, vbe, vbc):
        """The ideal diode currents Ibe1, Ibc1 (A) and their conductances (S)."""
        is_, vtf, vtr = p["is"], p["_vtf"], p["_vtr"]
        e1, d1 = safe_exp(vbe / vtf)
        e2, d2 = safe_exp(vbc / vtr)
        return is_ * (e1 - 1.0), (is_ / vtf) * d1, is_ * (e2 - 1.0), (is_ / vtr) * d2

    @staticmethod
    def base_charge(p, vbe, vbc, cbe, gbe, cbc, gbc):
        """(qb, dqb/dvbe, dqb/dvbc), SPICE's Gummel-Poon base charge from the ideal
        currents cbe, cbc (A) and their conductances gbe, gbc (S):
        qb = q1 (1 + arg^NKF) / 2, arg = 1 + 4 (cbe/IKF + cbc/IKR) (at least 0),
        q1 = 1 / (1 - vbc/VAF - vbe/VAR)."""
        inv_vaf, inv_var = 1.0 / p["vaf"], 1.0 / p["var"]
        inv_ikf, inv_ikr = 1.0 / p["ikf"], 1.0 / p["ikr"]
        if _is(inv_vaf, 0.0) and _is(inv_var, 0.0):
            q1 = 1.0
        else:
            q1 = 1.0 / (1.0 - inv_vaf * vbc - inv_var * vbe)
        if _is(inv_ikf, 0.0) and _is(inv_ikr, 0.0):
            qb = q1 * np.ones(np.shape(vbe))
            return qb, q1 * qb * inv_var, q1 * qb * inv_vaf
        arg = np.maximum(1.0 + 4.0 * (inv_ikf * cbe + inv_ikr * cbc), 1e-12)
        nkf = p["nkf"]
        sq = np.sqrt(arg) if _is(nkf, 0.5) else arg ** nkf
        qb = 0.5 * q1 * (1.0 + sq)
        dsq = 2.0 * nkf * sq / arg          # d(arg^NKF)/d(q2) / 2
        return (qb, q1 * (qb * inv_var + inv_ikf * gbe * dsq),
                q1 * (qb * inv_vaf + inv_ikr * gbc * dsq))

    @staticmethod
    def prepare(p):
        vtf, vtr = p["nf"] * VT, p["nr"] * VT
        return {"_vtf": vtf, "_vtr": vtr,
                "_vcf": vtf * np.log(vtf / (math.sqrt(2.0) * p["is"])),
                "_vcr": vtr * np.log(vtr / (math.sqrt(2.0) * p["is"]))}

    def junctions(self, v):
        """(vbe, vbc) polarity-corrected, volts."""
        s = self.pol
        return s * (v[1] - v[2]), s * (v[1] - v[0])

    def currents(self, p, vbe, vbc):
        """Intrinsic (ic, ib) flowing into c and b (npn sense) and their derivatives
        d/dvbe, d/dvbc (SPICE Gummel-Poon, `base_charge`; the non-ideal base currents
        ISE (NE) and ISC (NC))."""
        cbe, gbe, cbc, gbc = self._ideal(p, vbe, vbc)
        cben, gben = self._leak(p["ise"], p["ne"], vbe)
        cbcn, gbcn = self._leak(p["isc"], p["nc"], vbc)
        qb, dqb_be, dqb_bc = self.base_charge(p, vbe, vbc, cbe, gbe, cbc, gbc)
        iqb = 1.0 / qb
        it = (cbe - cbc) * iqb
        dit_be = (gbe - it * dqb_be) * iqb
        dit_bc = (-gbc - it * dqb_bc) * iqb
        ibe = cbe / p["bf"] + cben
        gibe = gbe / p["bf"] + gben
        ibc = cbc / p["br"] + cbcn
        gibc = gbc / p["br"] + gbcn
        return it - ibc, ibe + ibc, (dit_be, dit_bc - gibc), (gibe, gibc)

    @staticmethod
    def _leak(isx, n, v):
        """A junction's non-ideal (recombination) current isx (exp(v / (n VT)) - 1) plus
        GMIN v, and its conductance (A, S)."""
        if _is(isx, 0.0):
            return GMIN * v, GMIN
        vt = n * VT
        e, d = safe_exp(v / vt)
        return isx * (e - 1.0) + GMIN * v, (isx / vt) * d + GMIN

    def start(self, p, pn, v):
        """(vbe, vbc) to evaluate first, from the nominal solution v (parameters pn):
        the forward junctions carry the nominal currents with this variant's IS, NF, NR."""
        vbe, vbc = self.junctions(v)
        with np.errstate(invalid="ignore"):
            lr = np.log(pn["is"] / p["is"])
            be = np.where(vbe > 0, p["_vtf"] * (vbe / pn["_vtf"] + lr), vbe)
            bc = np.where(vbc > 0, p["_vtr"] * (vbc / pn["_vtr"] + lr), vbc)
        return be, bc

    def eval(self, p, v, state, limit=True, init=False):
        """Companion model at terminal voltages v (3, B) ordered (c, b, e):
        (J, Ieq, state, limited (B,) bool); J[a][b] and Ieq[a] are (B,) arrays (nested
        tuples, 3 x 3 and 3). With `init` the junctions are evaluated at the state
        voltages (SPICE's first iteration)."""
        vbe, vbc = self.junctions(v)
        limited = np.zeros(np.shape(vbe), dtype=bool)
        if init:
            vbe = np.broadcast_to(state[0], np.shape(vbe))
            vbc = np.broadcast_to(state[1], np.shape(vbc))
        elif limit:
            vbe, l1 = pnjlim(vbe, state[0], p["_vtf"], p["_vcf"])
            vbc, l2 = pnjlim(vbc, state[1], p["_vtr"], p["_vcr"])
            limited = l1 | l2
        ic, ib, (gc_be, gc_bc), (gb_be, gb_bc) = self.currents(p, vbe, vbc)
        s = self.pol
        # terminal currents into the device (leaving the node): c, b, e
        Ic, Ib = s * ic, s * ib
        Ie = -(Ic + Ib)
        # d/dV with vbe = s(Vb - Ve), vbc = s(Vb - Vc): dI_term/dV = s*s*(...) = (...)
        jc = (-gc_bc, gc_be + gc_bc, -gc_be)
        jb = (-gb_bc, gb_be + gb_bc, -gb_be)
        je = tuple(-(a + b) for a, b in zip(jc, jb, strict=True))
        J = (jc, jb, je)
        # consistent terminal voltages for the (limited) junction voltages, emitter at 0
        vb_ = s * vbe
        vc_ = vb_ - s * vbc
        ieq = (Ic - (jc[0] * vc_ + jc[1] * vb_),
               Ib - (jb[0] * vc_ + jb[1] * vb_),
               Ie - (je[0] * vc_ + je[1] * vb_))
        if self.rbb:   # gx between b (index 3) and b' (index 1), SPICE's update
            gx = 1.0 / self.base_resistance(p, ib, self.qb(p, vbe, vbc))
            z = np.zeros(np.shape(gx))
            J = ((jc[0], jc[1], jc[2], z),
                 (jb[0], jb[1] + gx, jb[2], -gx),
                 (je[0], je[1], je[2], z),
                 (z, -gx, z, gx))
            ieq = ieq + (z,)
        return J, ieq, (vbe, vbc), limited

    def region(self, p, v):
        """Operating region per variant: 'off', 'active', 'saturated' or 'reverse'."""
        vbe, vbc = self.junctions(v)
        is_ = p["is"]
        be_on = is_ * np.expm1(np.minimum(vbe / p["_vtf"], 700)) > ON_CURRENT
        bc_on = is_ * np.expm1(np.minimum(vbc / p["_vtr"], 700)) > ON_CURRENT
        vce = vbe - vbc
        return np.where(~be_on & ~bc_on, "off",
                        np.where(be_on & (vce >= SAT_VCE), "active",
                                 np.where(be_on, "saturated", "reverse")))
