"""Supplies and the signal source, each an ideal source behind its source resistance
(a Norton equivalent: no extra unknowns). A supply with a current limit (`limit:`, a
bench supply's constant-current setting) is instead a nonlinear two-terminal Device whose
current is its source-resistance current held below the limit (LimitDevice)."""

from __future__ import annotations

import numpy as np

from diag.core.parts.base import PartKind, Spread, tol_or
from diag.core.parts.passive import R_FLOOR, _g

SUPPLY_R = 0.05      # ohms, source resistance of a supply without r_source (from memory:
                     # a regulated bench supply or a fresh battery at small loads)
SUPPLY_TOL = 0.02    # supply tolerance when none given (from memory: a set bench supply)
SIGNAL_R = 600.0     # ohms, signal generator output resistance without r_source (the
                     # audio 600 Ω output; use r_source: 50 for an RF function generator)
SIGNAL_HZ = 1000.0   # hertz, when the signal part gives no hz
LIMIT_TOL = 0.05     # spread of a current limit about its setting (from memory: set by
                     # the knob against the supply's own 3-digit display)
LIMIT_KNEE = 8       # sharpness n of the limit's knee, i = I_lim s / (1 + s^n)^(1/n):
                     # within 0.1 % of the straight line up to half the limit (at s = 1/2
                     # the current is 0.9995 of s I_lim), 0.917 I_lim at s = 1


class Supply(PartKind):
    """A DC supply of v volts behind r ohms; AC ground through r. With a current limit
    ilim (amperes; inf without one) the supply is a LimitDevice instead: the same below
    about half the limit, a current source of ilim once a load would draw more."""

    kinds = ("supply",)
    names = ("v", "r", "ilim")

    def nominal(self, part, ctx):
        r = part.fields.get("r_source")
        lim = part.fields.get("limit")
        return {"v": float(part.value), "r": float(r) if r is not None else SUPPLY_R,
                "ilim": float(lim) if lim else np.inf}

    def spreads(self, part, nominal, ctx):
        t = tol_or(part, SUPPLY_TOL)
        out = [Spread((f"{part.ref}.v",), "uniform", -t, t)]
        if np.isfinite(nominal["ilim"]):
            out.append(Spread((f"{part.ref}.ilim",), "uniform", -LIMIT_TOL, LIMIT_TOL,
                              stream=1))
        return out

    def dc_stamps(self, part, p, t):
        if limited(part):
            return [], []
        g = _g(p["r"])
        i = p["v"] * g
        return [(t["plus"], t["minus"], g)], [(t["plus"], i), (t["minus"], -i)]

    def ac_stamps(self, part, p, t, omega):
        if limited(part):
            return [], []   # the device's slope at the operating point (solver)
        return [(t["plus"], t["minus"], _g(p["r"]))], []

    def device(self, part, t):
        return LimitDevice((t["plus"], t["minus"])) if limited(part) else None


def limited(part) -> bool:
    """True when the supply part has a current limit (`limit:` in the case)."""
    return bool(part.fields.get("limit"))


def limit_curve(s, n: int = LIMIT_KNEE):
    """(f, df/ds) of the limit's knee: f = s / (1 + s^n)^(1/n) for s > 0 (the current as
    a fraction of the limit, s the source-resistance current as one), f = s below 0 (a
    current pushed back into the supply meets its source resistance alone). Written in
    t = min(s, 1/s), so that no power can overflow: with q = 1 + t^n, f = s q^(-1/n) and
    f' = q^(-1-1/n) up to s = 1, f = q^(-1/n) and f' = t^(n+1) q^(-1-1/n) above."""
    s = np.asarray(s, dtype=float)
    high = s > 1.0
    with np.errstate(divide="ignore"):
        t = np.where(high, 1.0 / np.where(high, s, 1.0), np.maximum(s, 0.0))
    tn = t ** n
    root = (1.0 + tn) ** (-1.0 / n)          # q^(-1/n)
    slope = root / (1.0 + tn)                 # q^(-1-1/n)
    f = np.where(high, root, s * root)
    d = np.where(high, tn * t * slope, slope)
    neg = s <= 0.0
    return np.where(neg, s, f), np.where(neg, 1.0, d)


class LimitDevice:
    """A current-limited supply between (plus, minus) unknowns: it drives
    i = ilim f((v - v_pm) / (ilim r)) into plus (limit_curve), v volts behind r ohms
    below the limit."""

    keys = ("v", "r", "ilim")

    def __init__(self, nodes):
        self.nodes = tuple(nodes)

    @staticmethod
    def prepare(p):
        return {"_ir": p["ilim"] * np.maximum(p["r"], R_FLOOR)}

    @staticmethod
    def junctions(v):
        return (v[0] - v[1],)

    @staticmethod
    def start(p, pn, v):
        """Terminal voltage to evaluate first, from the nominal solution v (parameters
        pn): the one passing the nominal current with this variant's volts and source
        resistance (the nominal terminal voltage itself would put a supply set a few per
        cent higher deep into its limit for the first step)."""
        drop = (pn["v"] - (v[0] - v[1])) * np.maximum(p["r"], R_FLOOR) \
            / np.maximum(pn["r"], R_FLOOR)
        return (p["v"] - drop,)

    def eval(self, p, v, state, limit=True, init=False):
        """Companion model at terminal voltages v (2, B), as DiodeDevice.eval: the
        currents leaving plus and minus into the device, I ~= Ieq + J @ v."""
        vpm = v[0] - v[1]
        if init:
            vpm = np.broadcast_to(state[0], np.shape(vpm))
        f, d = limit_curve((p["v"] - vpm) / p["_ir"])
        i = p["ilim"] * f                        # amperes out of the supply at plus
        g = d / np.maximum(p["r"], R_FLOOR)      # siemens, -di/dv_pm
        ieq = -i - g * vpm                       # leaving plus: -i = ieq + g v_pm
        return ((g, -g), (-g, g)), (ieq, -ieq), (vpm,), np.zeros(np.shape(vpm), dtype=bool)


class Signal(PartKind):
    """A signal generator: 0 V DC behind r ohms (vdc volts in a DC variant of the
    quasi-static large-signal pass, largesignal.py); AC vac volts rms behind r."""

    kinds = ("signal",)
    names = ("vac", "r", "vdc")

    def nominal(self, part, ctx):
        r = part.fields.get("r_source")
        return {"vac": float(part.value), "r": float(r) if r is not None else SIGNAL_R,
                "vdc": 0.0}

    def dc_stamps(self, part, p, t):
        g = _g(p["r"])
        i = p["vdc"] * g
        return [(t["plus"], t["minus"], g)], [(t["plus"], i), (t["minus"], -i)]

    def ac_stamps(self, part, p, t, omega):
        g = _g(p["r"])
        i = p["vac"] * g
        return [(t["plus"], t["minus"], g)], [(t["plus"], i + 0j), (t["minus"], -i + 0j)]
