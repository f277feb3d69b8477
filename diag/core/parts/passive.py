"""Linear two- and three-terminal parts: resistor, pot, capacitors, inductor, speaker,
fuse and link. DC: conductances; AC: complex admittances. Defaults are documented at each
constant (figures recalled are marked "from memory")."""

from __future__ import annotations

import numpy as np

from diag.core.parts.base import PartKind, Spread, tol_or

R_FLOOR = 1e-6            # ohms; a resistance below this is taken as this (keeps 1/r finite)
POT_END = 0.005           # fraction of the track left at either end stop (from memory)
POT_WIPER = 1.0           # ohms, wiper contact resistance (from memory)
POT_TOL = 0.20            # track tolerance when none given (from memory: carbon pots ±20 %)
CAP_TOL = 0.10            # film/ceramic tolerance when none given
ELCO_TOL = 0.20           # electrolytic tolerance when none given (-20/+20 %)
CAP_LEAK = 1e10           # ohms, film/ceramic insulation resistance (from memory: > 10 GΩ)
CAP_ESR = 0.05            # ohms, film/ceramic ESR (from memory)
ELCO_TAN_D = 0.08         # loss factor at 120 Hz for the default electrolytic ESR (from memory)
ELCO_ESR_RANGE = (0.02, 20.0)  # ohms, clip of that default
ELCO_LEAK_FRACTION = 1 / 20    # healthy nominal leakage as a fraction of the limit
ELCO_LEAK_SPAN = 100.0         # healthy leakage spread: limit/100 .. limit (log-uniform)
IND_TOL = 0.10
IND_R = 1.0               # ohms, DC resistance of an inductor without r_dc (from memory)
IND_R_TOL = 0.10          # copper resistance spread (from memory)
SPK_RDC = 0.8             # speaker DC resistance / rated impedance (IEC 60268-5: not below 80 %)
SPK_R_TOL = 0.05
FUSE_R = 0.05             # ohms, cold resistance of a fuse without `ohms` (from memory)
LINK_R = 0.005            # ohms, wire link, connector or joint (from memory)


def _g(r):
    return 1.0 / np.maximum(r, R_FLOOR)


def electrolytic_leak_limit(c_farads: float, volts: float) -> float:
    """Leakage current limit in amperes: I = 0.01·C[µF]·V µA or 3 µA, whichever is
    larger (common practice, no source)."""
    return max(0.01 * c_farads * 1e6 * volts, 3.0) * 1e-6


class Resistor(PartKind):
    kinds = ("resistor",)
    names = ("r",)

    def nominal(self, part, ctx):
        return {"r": float(part.value)}

    def spreads(self, part, nominal, ctx):
        t = tol_or(part, 0.05)
        return [Spread((f"{part.ref}.r",), "uniform", -t, t)]

    def dc_stamps(self, part, p, t):
        return [(t["a"], t["b"], _g(p["r"]))], []


class Pot(PartKind):
    """Track a—tap (r_a), tap—b (r_b), wiper contact tap—wiper (r_w)."""

    kinds = ("pot",)
    names = ("r_a", "r_b", "r_w")

    def internal(self, part, nominal):
        return ("tap",)

    def nominal(self, part, ctx):
        r = float(part.value)
        s = float(part.fields.get("set", 0.5))
        return {"r_a": r * max(s, POT_END), "r_b": r * max(1.0 - s, POT_END), "r_w": POT_WIPER}

    def spreads(self, part, nominal, ctx):
        t = tol_or(part, POT_TOL)
        return [Spread((f"{part.ref}.r_a", f"{part.ref}.r_b"), "uniform", -t, t)]

    def dc_stamps(self, part, p, t):
        return [(t["a"], t["tap"], _g(p["r_a"])), (t["tap"], t["b"], _g(p["r_b"])),
                (t["tap"], t["wiper"], _g(p["r_w"]))], []


class Capacitor(PartKind):
    """Open in DC but for its leakage resistance; AC: leak ∥ (esr + 1/jωC). For the
    quasi-static large-signal pass (largesignal.py) a DC variant may hold it at hold_v
    volts through hold_g siemens (both 0 otherwise)."""

    kinds = ("capacitor", "electrolytic")
    names = ("c", "leak", "esr", "hold_g", "hold_v")

    @staticmethod
    def _ends(part):
        return ("plus", "minus") if part.kind == "electrolytic" else ("a", "b")

    @staticmethod
    def _volts(part, ctx):
        v = part.fields.get("volts_rated")
        return float(v) if v else max(ctx.supply_v, 1.0)

    def nominal(self, part, ctx):
        c = float(part.value)
        f = part.fields
        if part.kind == "electrolytic":
            v = self._volts(part, ctx)
            leak = v / (electrolytic_leak_limit(c, v) * ELCO_LEAK_FRACTION)
            esr = float(np.clip(ELCO_TAN_D / (2 * np.pi * 120.0 * c), *ELCO_ESR_RANGE))
        else:
            leak, esr = CAP_LEAK, CAP_ESR
        return {"c": c, "leak": float(f["leak"]) if f.get("leak") is not None else leak,
                "esr": float(f["esr"]) if f.get("esr") is not None else esr,
                "hold_g": 0.0, "hold_v": 0.0}

    def spreads(self, part, nominal, ctx):
        elco = part.kind == "electrolytic"
        t = tol_or(part, ELCO_TOL if elco else CAP_TOL)
        out = [Spread((f"{part.ref}.c",), "uniform", -t, t)]
        if elco and part.fields.get("leak") is None:
            v = self._volts(part, ctx)
            lim = electrolytic_leak_limit(float(part.value), v)
            out.append(Spread((f"{part.ref}.leak",), "loguniform", v / lim,
                              v / (lim / ELCO_LEAK_SPAN)))
        return out

    def dc_stamps(self, part, p, t):
        a, b = self._ends(part)
        i = p["hold_g"] * p["hold_v"]
        return [(t[a], t[b], _g(p["leak"]) + p["hold_g"])], [(t[a], i), (t[b], -i)]

    def ac_stamps(self, part, p, t, omega):
        a, b = self._ends(part)
        y = _g(p["leak"]) + 1.0 / (p["esr"] + 1.0 / (1j * omega * p["c"]))
        return [(t[a], t[b], y)], []


class Inductor(PartKind):
    kinds = ("inductor",)
    names = ("l", "r")

    def nominal(self, part, ctx):
        r = part.fields.get("r_dc")
        return {"l": float(part.value), "r": float(r) if r is not None else IND_R}

    def spreads(self, part, nominal, ctx):
        t = tol_or(part, IND_TOL)
        return [Spread((f"{part.ref}.l",), "uniform", -t, t),
                Spread((f"{part.ref}.r",), "uniform", -IND_R_TOL, IND_R_TOL)]

    def dc_stamps(self, part, p, t):
        return [(t["a"], t["b"], _g(p["r"]))], []

    def ac_stamps(self, part, p, t, omega):
        return [(t["a"], t["b"], 1.0 / (np.maximum(p["r"], R_FLOOR) + 1j * omega * p["l"]))], []


class Speaker(PartKind):
    """DC: voice-coil resistance r (default 0.8 × rated); AC: resistive z (default rated).
    One tolerance factor moves both (a coil wound long reads high on both); a fault sets
    each of them (rules/faults.yaml: open and short set r and z)."""

    kinds = ("speaker",)
    names = ("r", "z")

    def nominal(self, part, ctx):
        z = float(part.value)
        r = part.fields.get("r_dc")
        return {"r": float(r) if r is not None else SPK_RDC * z, "z": z}

    def spreads(self, part, nominal, ctx):
        return [Spread((f"{part.ref}.r", f"{part.ref}.z"), "uniform", -SPK_R_TOL, SPK_R_TOL)]

    def dc_stamps(self, part, p, t):
        return [(t["a"], t["b"], _g(p["r"]))], []

    def ac_stamps(self, part, p, t, omega):
        return [(t["a"], t["b"], _g(p["z"]))], []


class FuseLink(PartKind):
    kinds = ("fuse", "link")
    names = ("r",)

    def nominal(self, part, ctx):
        if part.value is not None:
            return {"r": float(part.value)}
        return {"r": FUSE_R if part.kind == "fuse" else LINK_R}

    def dc_stamps(self, part, p, t):
        return [(t["a"], t["b"], _g(p["r"]))], []
