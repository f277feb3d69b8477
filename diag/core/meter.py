"""The multimeter: what it reads (loading), how well (accuracy, resolution), what it shows.

A meter is a profile mapping from rules/meters.yaml (fields documented there): `r_in`
ohms and `c_in` farads of the input, `counts`, `v_ranges` / `a_ranges` (full-scale
volts / amperes of the autoranged ranges, ascending), and the accuracy figures
`dc_pct dc_counts`, `ac_pct ac_counts` (volts) and `a_pct a_counts` (DC amperes).

- `observe` gives the reading an ideal display would show with the meter connected:
  the node's voltage divided down by the meter's input (loading), meter error excluded.
- `accuracy` is the specified error bound ±(pct % of reading + counts × resolution), the
  resolution following the autoranged range.
- `display` is what the meter shows: the error drawn within that bound, then rounded to
  the display resolution. Its random draw is meter display noise only; the Generator is
  passed in by the caller (ensemble or drill code), so no module draws values on its own.
- `sigma` is the standard deviation the inference should assume for that error.

Arrays follow the project contract: a leading batch axis B, then observables M; volts
or amperes, float64. All functions here are pure.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

# The amperes kind uses the a_* figures and a_ranges; volts use dc_* / ac_* and v_ranges.
_FIGURES = {("dc", "V"): ("dc_pct", "dc_counts"), ("ac", "V"): ("ac_pct", "ac_counts"),
            ("dc", "A"): ("a_pct", "a_counts")}


def _figures(kind: str, unit: str) -> tuple[str, str]:
    try:
        return _FIGURES[(kind, unit)]
    except KeyError:
        raise ValueError(f"no meter accuracy for a {kind} reading in {unit}") from None


def _ranges(meter: Mapping[str, Any], unit: str) -> np.ndarray:
    return np.asarray(meter["a_ranges" if unit == "A" else "v_ranges"], dtype=float)


def range_index(values: Any, meter: Mapping[str, Any], unit: str) -> np.ndarray:
    """Index of the autoranged range for each |value| (the smallest range whose display,
    counts × resolution, holds the value once rounded: a 2000-count meter shows 1.999 V on
    its 2 V range and moves to 20 V for 2.000 V). -1 where even the top range overflows
    ("OL"); NaN values get the top range."""
    v = np.abs(np.asarray(values, dtype=float))
    ranges = _ranges(meter, unit)
    counts = float(meter["counts"])
    res = ranges / counts                                      # (R,)
    shown = np.rint(v[..., None] / res)                        # counts on each range
    fits = shown <= counts - 1
    idx = np.where(fits.any(axis=-1), np.argmax(fits, axis=-1), -1)
    return np.where(np.isnan(v), len(ranges) - 1, idx)


def resolution(values: Any, meter: Mapping[str, Any], unit: str) -> np.ndarray:
    """Display resolution (volts or amperes per count) of the autoranged range for each
    value; the top range's resolution where the value overflows."""
    ranges = _ranges(meter, unit)
    idx = range_index(values, meter, unit)
    return ranges[np.where(idx < 0, len(ranges) - 1, idx)] / float(meter["counts"])


def accuracy(values: Any, kind: str, meter: Mapping[str, Any], unit: str) -> np.ndarray:
    """Error bound ±(pct % of |reading| + counts × resolution), volts or amperes, same shape
    as `values`; +inf where the value is over range ("OL")."""
    pct_key, counts_key = _figures(kind, unit)
    v = np.asarray(values, dtype=float)
    bound = abs(float(meter[pct_key])) / 100.0 * np.abs(v) \
        + float(meter[counts_key]) * resolution(v, meter, unit)
    return np.where(range_index(v, meter, unit) < 0, np.inf, bound)


def sigma(values: Any, kind: str, meter: Mapping[str, Any], unit: str) -> np.ndarray:
    """Standard deviation (volts or amperes) of the displayed value about the true reading,
    for the inference: `display` draws the error uniformly within ±bound (standard
    deviation bound/√3) and then rounds to the resolution q (uniform ±q/2, standard
    deviation q/√12), so sigma = sqrt(bound²/3 + q²/12). Over range: +inf."""
    v = np.asarray(values, dtype=float)
    bound = accuracy(v, kind, meter, unit)
    q = resolution(v, meter, unit)
    return np.sqrt(bound**2 / 3.0 + q**2 / 12.0)


def display(values: Any, kind: str, meter: Mapping[str, Any], unit: str,
            rng: np.random.Generator) -> np.ndarray:
    """What the meter shows for true readings `values` (volts or amperes).

    The meter error is drawn uniformly within ±accuracy (a specification bound, not a
    Gaussian); the result is rounded to the display resolution of the range the meter
    autoranges to for the shown value. A reading over the top range shows "OL", returned
    as ±inf (sign of the value); an AC (rms) reading never shows below 0; NaN (a variant that did not solve) stays NaN. The random
    draw is meter display noise only; `rng` is the caller's seeded Generator.
    """
    v = np.asarray(values, dtype=float)
    bound = accuracy(v, kind, meter, unit)
    finite = np.isfinite(bound)
    u = rng.uniform(-1.0, 1.0, size=v.shape)
    noisy = np.where(finite, v + u * np.where(finite, bound, 0.0), v)
    q = resolution(noisy, meter, unit)
    shown = np.rint(noisy / q) * q
    if kind == "ac":            # an rms reading is a magnitude: it never shows below zero
        shown = np.maximum(shown, 0.0)
    over = (range_index(noisy, meter, unit) < 0) | ~finite
    return np.where(over & ~np.isnan(v), np.copysign(np.inf, v), shown)


def loaded(v_open: Any, z_source: Any, z_meter: Any) -> np.ndarray:
    """Divider formula: the voltage a meter of input impedance z_meter reads across a
    source of open-circuit voltage v_open and Thevenin impedance z_source,
    v_open · z_meter / (z_meter + z_source). Complex inputs give complex phasors."""
    z_meter = np.asarray(z_meter)
    return np.asarray(v_open) * z_meter / (z_meter + np.asarray(z_source))


def input_impedance(meter: Mapping[str, Any], hz: float | None = None) -> complex | float:
    """Meter input: r_in ohms at DC; r_in ∥ c_in (complex ohms) at `hz` for AC."""
    r = float(meter["r_in"])
    if hz is None:
        return r
    c = float(meter.get("c_in", 0.0) or 0.0)
    return r / (1.0 + 1j * 2.0 * np.pi * hz * r * c)


def observe(circuit: Any, params: Mapping[str, Any], dc: Any, ac: Any,
            observables: Sequence[Any], meter: Mapping[str, Any]) -> np.ndarray:
    """Meter readings (B, M) float64 at `observables` (Case.observables order), loading
    included, meter error excluded.

    Voltage points: the open-circuit DC voltage node - minus (dc.v, volts) divided by
    r_in against the DC Thevenin resistance there (solver.thevenin); AC points: the rms
    magnitude of the phasor difference (ac.v) divided by r_in ∥ c_in against the AC
    Thevenin impedance at the signal frequency. Supply points: the DC current drawn from
    that supply (dc.i_supply, amperes); the ammeter's burden (`a_burden`) is not applied.
    Variants that did not converge (dc.ok False) read NaN. `ac` may be None when no
    observable is an ac reading.
    """
    from diag.core import solver

    case = circuit.case
    B = dc.v.shape[0]
    out = np.full((B, len(observables)), np.nan)
    dc_cols: list[tuple[int, tuple[str, str]]] = []
    ac_cols: list[tuple[int, tuple[str, str]]] = []
    for m, ob in enumerate(observables):
        pt = case.point(ob.point)
        if pt.supply is not None:
            if ob.kind != "dc":
                raise ValueError(f"point {pt.id}: a supply point has a dc reading only")
            s = list(circuit.supplies).index(pt.supply)
            out[:, m] = dc.i_supply[:, s]
            continue
        pair = (pt.node, pt.minus or case.ground)
        (dc_cols if ob.kind == "dc" else ac_cols).append((m, pair))

    def volts(v: np.ndarray, node: str) -> np.ndarray:
        if node == case.ground:
            return np.zeros(v.shape[0], dtype=v.dtype)
        return v[:, circuit.node_index[node]]

    if dc_cols:
        pairs = [p for _, p in dc_cols]
        rth = np.asarray(solver.thevenin(circuit, params, dc, pairs), dtype=float)
        for j, (m, (a, b)) in enumerate(dc_cols):
            out[:, m] = loaded(volts(dc.v, a) - volts(dc.v, b), rth[:, j],
                               input_impedance(meter))
    if ac_cols:
        if ac is None:
            raise ValueError("ac readings asked for but no AC solution was given")
        pairs = [p for _, p in ac_cols]
        zth = np.asarray(solver.thevenin(circuit, params, dc, pairs, ac=ac))
        zin = input_impedance(meter, float(circuit.hz))
        for j, (m, (a, b)) in enumerate(ac_cols):
            out[:, m] = np.abs(loaded(volts(ac.v, a) - volts(ac.v, b), zth[:, j], zin))
    ok = np.asarray(getattr(dc, "ok", np.ones(B, bool)), dtype=bool)
    out[~ok, :] = np.nan
    return out
