"""What every part kind provides, and the shared constants of the device equations.

A kind turns a Part into nominal parameters (SI units, names per DEVELOPERS.md), their
healthy spreads, and stamps. Stamps are returned as plain lists; only the solver
assembles and factors matrices.

Stamp conventions (batched arrays of shape (B,) or scalars):
  conductances  [(i, j, g)]: a branch of g siemens between unknowns i and j (-1 = ground)
  injections    [(i, c)]:    c amperes driven INTO unknown i from outside the network
Nonlinear kinds also give a Device whose `eval` returns the companion model at the present
guess: terminal currents (leaving each node into the device) I ~= Ieq + J @ V.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

# Boltzmann constant and elementary charge: exact by definition in the SI since 2019
# (CODATA 2018); written out so importing the core does not import scipy (about 0.4 s).
# tests/test_parts.py checks them against scipy.constants.
BOLTZMANN = 1.380649e-23                            # joules per kelvin
ELEMENTARY_CHARGE = 1.602176634e-19                 # coulombs
T_KELVIN = 300.15                                   # 27 °C, the SPICE default temperature
VT = BOLTZMANN * T_KELVIN / ELEMENTARY_CHARGE       # thermal voltage, volts (about 25.86 mV)
GMIN = 1e-12                                        # siemens across every junction (SPICE gmin)
EXP_LIMIT = 100.0                                   # exp() argument above which it is linear


@dataclass(frozen=True)
class Spread:
    """One healthy-tolerance draw, applied as one factor to every key in `keys`.

    dist "uniform":    factor = 1 + U(a, b)                 (a = -tol, b = +tol)
    dist "loguniform": first key's value = exp(U(ln a, ln b)); the others scale with it
    dist "lognormal":  factor = exp(N(0, a))                (a = natural-log sigma)

    `stream` 0 draws from the ensemble's main random stream; another number from a side
    stream of that number (ensemble.draw_healthy), so that a spread added to the model
    later leaves every draw that was there before as it was.
    """

    keys: tuple[str, ...]
    dist: str
    a: float
    b: float = 0.0
    stream: int = 0


@dataclass(frozen=True)
class Context:
    """What a kind may need beyond its Part: the models rules section and the largest
    supply voltage of the case (volts; the working voltage of capacitors without a rating)."""

    models: Mapping[str, Any]
    supply_v: float


def wright_omega(z):
    """The Wright omega function of real z: the y > 0 with y + ln y = z (that is
    W(exp z), W the Lambert function), without overflow for large z. Newton's method on
    t = ln y, where e^t + t - z is convex and increasing, from t = z (z < 1, where y is
    below 1) or ln(z - ln z) (its asymptote): six steps give full precision."""
    z = np.asarray(z, dtype=float)
    t = np.where(z < 1.0, z, np.log(np.maximum(z - np.log(np.maximum(z, 1.0)), 1e-300)))
    t = np.minimum(t, z)                 # y <= e^z, so t <= z
    for _ in range(6):
        e = np.exp(np.minimum(t, 700.0))
        t = t - (e + t - z) / (e + 1.0)
    return np.exp(t)


def safe_exp(x):
    """exp(x) continued linearly above EXP_LIMIT (keeps Newton steps finite); returns
    (value, derivative)."""
    x = np.asarray(x, dtype=float)
    if not (x > EXP_LIMIT).any():
        e = np.exp(x)
        return e, e
    xc = np.minimum(x, EXP_LIMIT)
    e = np.exp(xc)
    return e * (1.0 + (x - xc)), e


def pnjlim(vnew, vold, vt, vcrit):
    """SPICE junction-voltage limiting (pnjlim) of a Newton step; returns (v, limited).
    A rise above vcrit by more than 2 vt is compressed logarithmically; a fall below
    -1 V is held to -vold - 1 (vold > 0) or 2 vold - 1 (ngspice's negative limit)."""
    vnew = np.asarray(vnew, dtype=float)
    vold = np.broadcast_to(np.asarray(vold, dtype=float), vnew.shape)
    big = (vnew > vcrit) & (np.abs(vnew - vold) > 2.0 * vt)
    low = vnew < -1.0
    any_big, any_low = big.any(), low.any()
    if not (any_big or any_low):
        return vnew, big
    out = vnew
    if any_low:
        floor = np.where(vold > 0, -vold - 1.0, 2.0 * vold - 1.0)
        neg = vnew < floor
        if neg.any():
            out = np.where(neg, floor, out)
            big = big | neg
    if any_big:
        with np.errstate(invalid="ignore", divide="ignore"):
            arg = 1.0 + (vnew - vold) / vt
            up = np.where(arg > 0, vold + vt * np.log(np.where(arg > 0, arg, 1.0)), vcrit)
            fresh = vt * np.log(np.where(vnew > 0, vnew / vt, 1.0))
        out = np.where(big & (vnew > vcrit), np.where(vold > 0, up, fresh), out)
    return out, big


class PartKind:
    """Base of every kind. Subclasses set `kinds` and override what applies."""

    kinds: tuple[str, ...] = ()
    #: parameter names of the kind (DEVELOPERS.md table), in a fixed order
    names: tuple[str, ...] = ()

    def internal(self, part, nominal: Mapping[str, float]) -> tuple[str, ...]:
        """Names of internal nodes the part needs (e.g. a transistor's b' behind RB)."""
        return ()

    def nominal(self, part, ctx: Context) -> dict[str, float]:
        raise NotImplementedError

    def spreads(self, part, nominal: Mapping[str, float], ctx: Context) -> list[Spread]:
        return []

    def dc_stamps(self, part, p: Mapping[str, Any], t: Mapping[str, int]):
        """(conductances, injections) of the linear part of the DC model."""
        return [], []

    def ac_stamps(self, part, p: Mapping[str, Any], t: Mapping[str, int], omega: float):
        """(admittances, injections) of the linear part at angular frequency omega (rad/s);
        complex siemens and amperes rms."""
        g, _ = self.dc_stamps(part, p, t)
        return g, []

    def device(self, part, t: Mapping[str, int]):
        """The nonlinear Device of the part, a tuple of them, or None."""
        return None


def tol_or(part, default: float) -> float:
    """The part's tolerance fraction, or `default` when the case gave none."""
    return float(part.tol) if part.tol is not None else default
