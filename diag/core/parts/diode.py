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


def model_spread(ctx, name: str) -> dict:
    if ctx is None:
        return {}
    entry = ctx.models.get(name) or {}
    return dict(entry.get("spread") or {})


def breakdown_knee(bv, ibv, is_, nvt):
    """ngspice's adjusted breakdown voltage (volts): the current at -BV equals IBV."""
    bv = np.asarray(bv, dtype=float)
    finite = np.isfinite(bv)
    bvf = np.where(finite, bv, 0.0)
    cbv = np.maximum(ibv, is_ * bvf / VT)
    xbv = bvf - nvt * np.log1p(cbv / is_)
    for _ in range(25):
        xbv = bvf - nvt * np.log(np.maximum(cbv / is_ + 1.0 - xbv / VT, 1e-300))
    small = ibv < is_ * bvf / VT
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
        s = model_spread(ctx, name)
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

    def eval(self, p, v, state, limit=True):
        """Companion model at terminal voltages v (2, B): (J (2,2,B), Ieq (2,B), state,
        limited (B,) bool)."""
        vd = v[0] - v[1]
        vte, xbv = p["_vte"], p["_xbv"]
        limited = np.zeros(vd.shape, dtype=bool)
        if limit:
            vold = state[0]
            brk = np.isfinite(xbv) & (vd < np.minimum(0.0, -xbv + 10.0 * vte))
            with np.errstate(invalid="ignore"):
                vr, lr = pnjlim(-(vd + xbv), -(vold + xbv), vte, p["_vcrit"])
            vf, lf = pnjlim(vd, vold, vte, p["_vcrit"])
            vd = np.where(brk, -(vr + xbv), vf)
            limited = np.where(brk, lr, lf)
        cd, gd = diode_iv(vd, p["is"], vte, xbv)
        k = p["k"]
        cd = k * (cd + GMIN * vd)
        gd = k * (gd + GMIN)
        ieq = cd - gd * vd
        J = np.stack([np.stack([gd, -gd]), np.stack([-gd, gd])])
        return J, np.stack([ieq, -ieq]), (vd,), limited


def diode_iv(vd, is_, vte, xbv):
    """ngspice diode current (A) and conductance (S) at junction voltage vd (volts)."""
    e, de = safe_exp(vd / vte)
    fwd = vd >= -3.0 * vte
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        vneg = np.where(fwd, -1.0, vd)
        arg = (3.0 * vte / (vneg * math.e)) ** 3
        er, der = safe_exp(-(xbv + vd) / vte)
    brk = ~fwd & np.isfinite(xbv) & (vd < -xbv)
    cd = np.where(fwd, is_ * (e - 1.0), np.where(brk, -is_ * er, -is_ * (1.0 + arg)))
    gd = np.where(fwd, is_ * de / vte, np.where(brk, is_ * der / vte, is_ * 3.0 * arg / vneg))
    return cd, gd
