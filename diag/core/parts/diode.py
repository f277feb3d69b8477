"""Junction diodes, LEDs and zeners: Shockley equation with emission coefficient N,
series resistance RS and SPICE-style reverse breakdown (BV at IBV), as ngspice's diode
model without capacitances at 27 °C. Fault hooks: k (1 healthy, 0 open: no junction
current at all) and g_sh (siemens, a shunt between the external leads)."""

from __future__ import annotations

import math

import numpy as np

from diag.core.errors import DiagError
from diag.core.parts.base import GMIN, VT, PartKind, Spread, pnjlim, safe_exp

DEFAULT_MODEL = {"diode": "si-diode", "led": "led-red", "zener": "zener"}
# SPICE defaults of the diode card for names a model leaves out
SPICE_DEFAULTS = {"IS": 1e-14, "N": 1.0, "RS": 0.0, "BV": math.inf, "IBV": 1e-3}
# SPICE diode card names accepted and not used, so that a card carries over as it is:
# junction capacitance, transit time, noise and temperature (the ambient moves every
# junction by the rules' figure, ensemble.apply_ambient).
CARD_ONLY = ("CJO", "CJ0", "VJ", "M", "TT", "FC", "KF", "AF", "EG", "XTI", "TNOM")


def model_of(part, ctx, default_name: str) -> tuple[str, dict]:
    """(model name, uppercase SPICE parameters) of a semiconductor part."""
    m = part.model
    if m is None:
        if ctx is None or default_name not in ctx.models:
            raise DiagError(f"no model for {part.kind} and none named {default_name!r}",
                            where=part.ref, hint="add `model:` to the part")
        entry = ctx.models[default_name]
        return default_name, dict(entry.get("params", {}))
    return str(m.get("name", "inline")), {k: v for k, v in m.items() if k != "name"}


def model_spread(ctx, name: str, kind: str | None = None) -> tuple[dict, bool]:
    """(the healthy part-to-part spread of model `name` from rules/models.yaml, True when
    it is borrowed). A card of the case's own (inline, or a pasted `.model` line) is one
    part's figures, so given `kind` it borrows the spread of that kind's generic model
    (DEFAULT_MODEL here and in parts/bjt.py): the fitted part is as uncertain as any."""
    if ctx is None:
        return {}, False
    entry = ctx.models.get(name)
    if entry is None and kind is not None:
        from diag.core.parts.bjt import DEFAULT_MODEL as BJT_DEFAULT

        entry = ctx.models.get({**DEFAULT_MODEL, **BJT_DEFAULT}.get(kind, ""))
        return dict((entry or {}).get("spread") or {}), True
    return dict((entry or {}).get("spread") or {}), False


def breakdown_knee(bv, ibv, is_, nvt):
    """ngspice's adjusted breakdown voltage (volts): the current at -BV equals IBV."""
    bv = np.asarray(bv, dtype=float)
    finite = np.isfinite(bv)
    bvf = np.where(finite, bv, 0.0)
    cbv = np.maximum(ibv, is_ * bvf / VT)
    small = ibv < is_ * bvf / VT
    if np.all(small | ~finite):
        return np.where(finite, bvf, np.inf)
    xbv = bvf - nvt * np.log1p(cbv / is_)
    for _ in range(25):                      # ngspice iterates up to 25 times
        new = bvf - nvt * np.log(np.maximum(cbv / is_ + 1.0 - xbv / VT, 1e-300))
        done = np.all(np.abs(new - xbv) <= 1e-12 * np.maximum(np.abs(bvf), 1.0))
        xbv = new
        if done:
            break
    xbv = np.where(small, bvf, xbv)
    return np.where(finite, xbv, np.inf)


class Diode(PartKind):
    kinds = ("diode", "led", "zener")
    names = ("is", "n", "rs", "bv", "ibv", "k", "g_sh")

    def internal(self, part, nominal):
        return ("j",) if nominal["rs"] > 0 else ()

    def nominal(self, part, ctx):
        name, m = model_of(part, ctx, DEFAULT_MODEL[part.kind])
        q = {**SPICE_DEFAULTS, **{k.upper(): v for k, v in m.items()}}
        bv = part.fields.get("bv")
        return {"is": float(q["IS"]), "n": float(q["N"]), "rs": float(q["RS"]),
                "bv": float(bv) if bv is not None else float(q["BV"]),
                "ibv": float(q["IBV"]), "k": 1.0, "g_sh": 0.0}

    def spreads(self, part, nominal, ctx):
        name = part.model.get("name") if part.model else DEFAULT_MODEL[part.kind]
        s, _ = model_spread(ctx, name, part.kind)
        out = []
        if s.get("is_sigma"):
            out.append(Spread((f"{part.ref}.is",), "lognormal", float(s["is_sigma"])))
        if s.get("bv_tol") and math.isfinite(nominal["bv"]):
            t = float(s["bv_tol"])
            out.append(Spread((f"{part.ref}.bv",), "uniform", -t, t))
        return out

    def dc_stamps(self, part, p, t):
        g = [(t["anode"], t["cathode"], p["g_sh"])]
        if "j" in t:
            g.append((t["anode"], t["j"], 1.0 / np.maximum(p["rs"], 1e-6)))
        return g, []

    def device(self, part, t):
        return DiodeDevice((t.get("j", t["anode"]), t["cathode"]))


class DiodeDevice:
    """The intrinsic junction between (anode side, cathode) unknowns."""

    def __init__(self, nodes):
        self.nodes = tuple(nodes)

    @staticmethod
    def prepare(p):
        """Per-variant constants, computed once per solve."""
        vte = p["n"] * VT
        return {"_vte": vte, "_vcrit": vte * np.log(vte / (math.sqrt(2.0) * p["is"])),
                "_xbv": breakdown_knee(p["bv"], p["ibv"], p["is"], vte)}

    @staticmethod
    def junctions(v):
        return (v[0] - v[1],)

    @staticmethod
    def start(p, pn, v):
        """Junction voltage to evaluate first, from the nominal solution v (parameters
        pn): the one carrying the nominal current with this variant's IS, N or BV."""
        vd = v[0] - v[1]
        brk = np.isfinite(pn["_xbv"]) & (vd < -pn["_xbv"] + 10.0 * pn["_vte"])
        with np.errstate(invalid="ignore"):
            fwd = p["_vte"] * (vd / pn["_vte"] + np.log(pn["is"] / p["is"]))
            rev = vd + pn["_xbv"] - p["_xbv"]
        return (np.where(brk, rev, np.where(vd > 0, fwd, vd)),)

    def eval(self, p, v, state, limit=True, init=False):
        """Companion model at terminal voltages v (2, B): (J, Ieq, state, limited (B,)
        bool); J[a][b] and Ieq[a] are (B,) arrays (nested tuples, 2 x 2 and 2). With
        `init` the junction is evaluated at the state voltage (SPICE's first iteration)."""
        vd = v[0] - v[1]
        vte, xbv = p["_vte"], p["_xbv"]
        limited = np.zeros(vd.shape, dtype=bool)
        if init:
            vd = np.broadcast_to(state[0], vd.shape)
        elif limit:
            vold = state[0]
            with np.errstate(invalid="ignore"):
                brk = np.isfinite(xbv) & (vd < np.minimum(0.0, -xbv + 10.0 * vte))
            vf, limited = pnjlim(vd, vold, vte, p["_vcrit"])
            if brk.any():                      # in breakdown: limit the reflected voltage
                with np.errstate(invalid="ignore"):
                    vr, lr = pnjlim(-(vd + xbv), -(vold + xbv), vte, p["_vcrit"])
                vf = np.where(brk, -(vr + xbv), vf)
                limited = np.where(brk, lr, limited)
            vd = vf
            limited = limited & (p["k"] > 0)   # an open junction carries nothing
        cd, gd = diode_iv(vd, p["is"], vte, xbv)
        k = p["k"]
        cd = k * (cd + GMIN * vd)
        gd = k * (gd + GMIN)
        ieq = cd - gd * vd
        ng = -gd
        return ((gd, ng), (ng, gd)), (ieq, -ieq), (vd,), limited


def diode_iv(vd, is_, vte, xbv):
    """ngspice diode current (A) and conductance (S) at junction voltage vd (volts):
    forward above -3 N vt, the cubic reverse law below, breakdown beyond -BV."""
    e, de = safe_exp(vd / vte)
    cd = is_ * (e - 1.0)
    gd = is_ * de / vte
    rev = vd < -3.0 * vte
    if rev.any():
        r = np.flatnonzero(rev) if np.ndim(rev) else None
        v = vd[r] if r is not None else vd

        def at(a):
            return a[r] if r is not None and np.ndim(a) else a

        i_s, vt_, xb = at(np.broadcast_to(is_, np.shape(vd))), at(
            np.broadcast_to(vte, np.shape(vd))), at(np.broadcast_to(xbv, np.shape(vd)))
        arg = (3.0 * vt_ / (v * math.e)) ** 3
        c_r, g_r = -i_s * (1.0 + arg), i_s * 3.0 * arg / v
        brk = np.isfinite(xb) & (v < -xb)
        if np.any(brk):
            with np.errstate(invalid="ignore", over="ignore"):
                er, der = safe_exp(np.where(brk, -(xb + v) / vt_, 0.0))
            c_r = np.where(brk, -i_s * er, c_r)
            g_r = np.where(brk, i_s * der / vt_, g_r)
        if r is None:
            return c_r, g_r
        cd = np.array(cd, dtype=float)
        gd = np.array(gd, dtype=float)
        cd[r], gd[r] = c_r, g_r
    return cd, gd
