"""Supplies and the signal source, each an ideal source behind its source resistance
(a Norton equivalent: no extra unknowns)."""

from __future__ import annotations

from diag.core.parts.base import PartKind, Spread, tol_or
from diag.core.parts.passive import _g

SUPPLY_R = 0.05      # ohms, source resistance of a supply without r_source (from memory:
                     # a regulated bench supply or a fresh battery at small loads)
SUPPLY_TOL = 0.02    # supply tolerance when none given (from memory: a set bench supply)
SIGNAL_R = 600.0     # ohms, signal generator output resistance without r_source (the
                     # audio 600 Ω output; use r_source: 50 for an RF function generator)
SIGNAL_HZ = 1000.0   # hertz, when the signal part gives no hz


class Supply(PartKind):
    """A DC supply of v volts behind r ohms; AC ground through r."""

    kinds = ("supply",)
    names = ("v", "r")

    def nominal(self, part, ctx):
        r = part.fields.get("r_source")
        return {"v": float(part.value), "r": float(r) if r is not None else SUPPLY_R}

    def spreads(self, part, nominal, ctx):
        t = tol_or(part, SUPPLY_TOL)
        return [Spread((f"{part.ref}.v",), "uniform", -t, t)]

    def dc_stamps(self, part, p, t):
        g = _g(p["r"])
        i = p["v"] * g
        return [(t["plus"], t["minus"], g)], [(t["plus"], i), (t["minus"], -i)]

    def ac_stamps(self, part, p, t, omega):
        return [(t["plus"], t["minus"], _g(p["r"]))], []


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
