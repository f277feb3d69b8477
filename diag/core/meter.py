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

import math
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


def shown(values: Any, meter: Mapping[str, Any], unit: str) -> np.ndarray:
    """Values rounded to the display resolution of the range each autoranges to (what the
    display shows, no meter error drawn; overflow not marked)."""
    v = np.asarray(values, dtype=float)
    q = resolution(v, meter, unit)
    return np.rint(v / q) * q


def display_number(value: float, meter: Mapping[str, Any], unit: str) -> str:
    """A displayed reading as a plain number in volts or amperes with the digits of the
    autoranged range's resolution ("0.0455", "1.483", "12.6"), "OL" over range: how
    `diag simulate` writes a readings file."""
    if math.isinf(value):
        return ("-" if value < 0 else "") + "OL"
    q = float(resolution(np.array([value]), meter, unit)[0])
    digits = max(0, -math.floor(math.log10(q) + 1e-9))
    text = f"{value:.{digits}f}"
    return text.lstrip("-") if float(text) == 0.0 else text  # no "-0.000" in a file


def display_text(value: float, kind: str, unit: str, meter: Mapping[str, Any]) -> str:
    """A displayed reading written as the meter shows it: the digits of the autoranged
    range's resolution, in the range's own prefix ("45.5 mV" on a 200 mV range, "1.483 V"
    on 2 V, "12.31 mA" on 20 mA), "OL" over range, " rms" after an AC reading. `value` is
    volts or amperes as `display` returns it (already rounded to the resolution)."""
    if math.isnan(value):
        return "—"
    if math.isinf(value):
        text = ("-" if value < 0 else "") + "OL"
    else:
        q = float(resolution(np.array([value]), meter, unit)[0])
        full = q * float(meter["counts"])
        scale, prefix = next(((f, pre) for f, pre in ((1.0, ""), (1e-3, "m"), (1e-6, "µ"))
                              if full >= f), (1e-6, "µ"))
        digits = max(0, -math.floor(math.log10(q / scale) + 1e-9))
        text = f"{value / scale:.{digits}f} {prefix}{unit}"
    return text + (" rms" if kind == "ac" else "")


def shown_band(low: Any, high: Any, meter: Mapping[str, Any], unit: str
               ) -> tuple[np.ndarray, np.ndarray]:
    """A band of true readings as the meter shows its edges (`shown`). Rounding is
    monotone, so every reading inside the band shows inside the shown band (a few
    microvolts show as 0.0 mV)."""
    return shown(low, meter, unit), shown(high, meter, unit)


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
    for the inference: `display` draws the error within ±bound (its percentage and
    counts parts each uniformly, so a standard deviation of at most bound/√3, taken as
    that) and then rounds to the resolution q (uniform ±q/2, standard deviation q/√12),
    so sigma = sqrt(bound²/3 + q²/12). Over range: +inf."""
    v = np.asarray(values, dtype=float)
    bound = accuracy(v, kind, meter, unit)
    q = resolution(v, meter, unit)
    return np.sqrt(bound**2 / 3.0 + q**2 / 12.0)


def display(values: Any, kind: str, meter: Mapping[str, Any], unit: str,
            rng: np.random.Generator, gain: float | None = None) -> np.ndarray:
    """What the meter shows for true readings `values` (volts or amperes).

    The meter error is drawn within ±accuracy (a specification bound, not a Gaussian):
    its percentage part as `gain` × pct % of the reading (`gain` in [-1, 1], one draw for
    every reading a meter takes, see `display_unit`; drawn here per value when None) and
    its counts part uniformly per value; the result is rounded to the display resolution
    of the range the meter autoranges to for the shown value. A reading over the top
    range shows "OL", returned as ±inf (sign of the value); an AC (rms) reading never
    shows below 0; NaN (a variant that did not solve) stays NaN. The random draw is
    meter display noise only; `rng` is the caller's seeded Generator.
    """
    v = np.asarray(values, dtype=float)
    pct_key, counts_key = _figures(kind, unit)
    finite = np.isfinite(accuracy(v, kind, meter, unit))
    g = rng.uniform(-1.0, 1.0, size=v.shape) if gain is None else gain
    c = rng.uniform(-1.0, 1.0, size=v.shape)
    err = (g * abs(float(meter[pct_key])) / 100.0 * np.abs(v)
           + c * float(meter[counts_key]) * resolution(v, meter, unit))
    noisy = np.where(finite, v + np.where(finite, err, 0.0), v)
    out = shown(noisy, meter, unit)
    if kind == "ac":            # an rms reading is a magnitude: it never shows below zero
        out = np.maximum(out, 0.0)
    over = (range_index(noisy, meter, unit) < 0) | ~finite
    return np.where(over & ~np.isnan(v), np.copysign(np.inf, v), out)


def display_unit(values: Any, observables: Sequence[Any], meter: Mapping[str, Any],
                 rng: np.random.Generator) -> np.ndarray:
    """What one meter shows for one unit's true readings `values` (M,), one per
    observable (`.kind`, `.unit`): each function of the meter (DC volts, AC volts,
    amperes) has one calibration error for all its readings, drawn once within its
    percentage figure, as the same meter takes every reading of a unit; the counts part
    is drawn per reading. Two points on one node then read alike, as at the bench."""
    v = np.asarray(values, dtype=float)
    gains: dict[tuple[str, str], float] = {}
    out = np.empty(len(v))
    for j, o in enumerate(observables):
        key = (o.kind, o.unit)
        if key not in gains:
            gains[key] = float(rng.uniform(-1.0, 1.0))
        out[j] = display(v[j:j + 1], o.kind, meter, o.unit, rng, gains[key])[0]
    return out


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


LOAD_EXACT = 1e-3   # divider correction (Rth / (Rth + r_in), or the burden's share of the
                    # supply's loop resistance) up to which the linearised formula is kept:
                    # its error is second order in that fraction, far below the 0.2 %
                    # agreement target (common practice, no source)


LINEAR_START = 0.05  # up to this divider correction Newton starts from the linearised
                     # loaded state, beyond it from the unloaded one (far from linear, the
                     # extrapolation overshoots and junction limiting crawls back)
METER_BIAS = 0.1     # divider correction past which the meter's current is a sizeable
                     # part of the node's bias (a starved emitter: about 1), so that a
                     # large-signal pass for the reading is run with the meter connected
                     # (overdrive._metered); below it the bias moves by under a tenth,
                     # well inside the pass's own spread (overdrive.SPREAD)


def observe(circuit: Any, params: Mapping[str, Any], dc: Any, ac: Any,
            observables: Sequence[Any], meter: Mapping[str, Any], *,
            large_signal: bool = True) -> np.ndarray:
    """Meter readings (B, M) float64 at `observables` (Case.observables order), loading
    included, meter error excluded.

    Voltage points: the open-circuit DC voltage node - minus (dc.v, volts) divided by
    r_in against the DC Thevenin resistance there (solver.thevenin), which is exact for a
    linear network. Where that correction is not small (Rth / (Rth + r_in) > LOAD_EXACT)
    the meter's own current may move the operating point (a node fed through a nearly
    off junction), so those variants are solved again with r_in connected between the
    point's nodes (Newton from the unloaded solution) and the loaded voltage is read.
    AC points: the rms magnitude of the phasor difference (ac.v) divided by r_in ∥ c_in
    against the AC Thevenin impedance at the signal frequency; for the variants solved
    again, the small-signal system about the loaded operating point with r_in ∥ c_in in it,
    then (`large_signal`) limited where the unit is overdriven (overdrive.limit_observed: no
    stage swings past its rails; a reading solved again with the meter gets its
    large-signal pass with the meter connected too; False gives the small-signal
    readings). Supply points: the
    DC current drawn from that supply (dc.i_supply, amperes), with the ammeter's burden
    (`a_burden` ohms, in series with the supply while it is read) applied by a solve with
    the supply's source resistance raised by it where the burden is more than LOAD_EXACT of
    the loop resistance. Variants that did not converge (dc.ok False) read NaN.
    `ac` may be None when no observable is an ac reading.
    """
    from diag.core import solver

    case = circuit.case
    B = dc.v.shape[0]
    out = np.full((B, len(observables)), np.nan)
    ok = np.asarray(getattr(dc, "ok", np.ones(B, bool)), dtype=bool)
    params = params or {}
    volt_cols: dict[tuple[str, str], list[tuple[int, str]]] = {}
    supply_cols: dict[str, list[int]] = {}
    for m, ob in enumerate(observables):
        pt = case.point(ob.point)
        if pt.supply is not None:
            if ob.kind != "dc":
                raise ValueError(f"point {pt.id}: a supply point has a dc reading only")
            s = list(circuit.supplies).index(pt.supply)
            out[:, m] = dc.i_supply[:, s]
            supply_cols.setdefault(pt.supply, []).append(m)
            continue
        if ob.kind == "ac" and ac is None:
            raise ValueError("ac readings asked for but no AC solution was given")
        volt_cols.setdefault((pt.node, pt.minus or case.ground), []).append((m, ob.kind))

    def volts(v: np.ndarray, node: str) -> np.ndarray:
        return solver.node_v(circuit, v, node)

    r_in = float(input_impedance(meter))
    pairs = list(volt_cols)
    again = []
    biased = {}   # pair -> variants whose bias the meter moves (METER_BIAS)
    if pairs:
        rth, resp = solver.thevenin(circuit, params, dc, pairs, columns=True)
        ac_pairs = [p for p in pairs if any(k == "ac" for _, k in volt_cols[p])]
        zth = (np.asarray(solver.thevenin(circuit, params, dc, ac_pairs, ac=ac))
               if ac_pairs else None)
        zin = input_impedance(meter, float(circuit.hz)) if ac_pairs else None
        for j, pair in enumerate(pairs):
            a, b = pair
            for m, kind in volt_cols[pair]:
                if kind == "dc":
                    out[:, m] = loaded(volts(dc.v, a) - volts(dc.v, b), rth[:, j], r_in)
                else:
                    out[:, m] = np.abs(loaded(volts(ac.v, a) - volts(ac.v, b),
                                              zth[:, ac_pairs.index(pair)], zin))
            with np.errstate(invalid="ignore"):
                frac = np.abs(rth[:, j]) / (np.abs(rth[:, j]) + r_in)
            idx = np.flatnonzero(ok & ~(frac <= LOAD_EXACT))
            if idx.size:
                # Newton starts from the linearised loaded state (the unloaded solution
                # moved by the meter's current, divider reading / r_in, times the
                # transfer resistances; exact where the circuit is linear), or from the
                # unloaded solution where the correction is large
                v_open = (volts(dc.v, a) - volts(dc.v, b))[idx]
                i_m = loaded(v_open, rth[idx, j], r_in) / r_in
                x0 = dc.x[idx] - i_m[:, None] * resp[idx, j]
                far = frac[idx] > LINEAR_START
                x0[far] = dc.x[idx][far]
                again.append((pair, idx, x0))
                biased[pair] = idx[frac[idx] > METER_BIAS]
        if again:
            _reload(circuit, params, B, again, volt_cols, r_in, zin, out)
    burden = float(meter.get("a_burden", 0.0) or 0.0)
    if supply_cols and burden > 0.0:
        for ref, cols in supply_cols.items():
            _burden(circuit, params, dc, ok, B, ref, cols, burden, out)
    out[~ok, :] = np.nan
    if not large_signal:
        return out
    from diag.core import overdrive

    reloaded = {pair: (idx, 1.0 / r_in) for pair, idx in biased.items() if idx.size}
    return overdrive.limit_observed(circuit, params, dc, ac, observables, out, reloaded)


def _reload(circuit, params, B, again, volt_cols, r_in, zin, out) -> None:
    """Readings at each (pair, variants idx, starting state) of `again` from solves with
    the meter connected there: one batched solve for all of them (variant rows stacked,
    each row's meter branch at its own pair, the other pairs' branches 0 S)."""
    from diag.core import solver

    rows = np.concatenate([idx for _, idx, _ in again])
    seg = np.repeat(np.arange(len(again)), [idx.size for _, idx, _ in again])
    sub = solver.take(params, rows, B)
    load = [(a, b, np.where(seg == j, 1.0 / r_in, 0.0))
            for j, ((a, b), _, _) in enumerate(again)]
    x0 = np.concatenate([x for _, _, x in again])
    dcl = solver.solve_dc(circuit, sub, load=load, x_start=x0)
    good = np.asarray(dcl.ok, bool)        # where the loaded solve fails, keep the divider
    acl = None
    if any(k == "ac" for pair, _, _ in again for _, k in volt_cols[pair]):
        yac = [(a, b, np.where(seg == j, 1.0 / zin, 0.0))
               for j, ((a, b), _, _) in enumerate(again)]
        acl = solver.solve_ac(circuit, sub, dcl, load=yac)

    def diff(v, a, b):
        return solver.node_v(circuit, v, a) - solver.node_v(circuit, v, b)

    for j, (pair, _, _) in enumerate(again):
        mine = (seg == j) & good
        for m, kind in volt_cols[pair]:
            got = diff(dcl.v, *pair) if kind == "dc" else np.abs(diff(acl.v, *pair))
            out[rows[mine], m] = got[mine]


def _burden(circuit, params, dc, ok, B, ref, cols, burden, out) -> None:
    """Supply-current readings of supply `ref` with the ammeter's burden in series: the
    variants where the burden is more than LOAD_EXACT of the loop resistance (the
    supply's r plus the network's incremental resistance, from the Thevenin resistance
    r ∥ R_net at the supply's terminals) are solved with r + burden."""
    from diag.core import solver

    part = circuit.parts[[p.ref for p in circuit.parts].index(ref)]
    plus, minus = part.terminal("plus"), part.terminal("minus")
    key = f"{ref}.r"
    r = np.broadcast_to(np.asarray(params.get(key, circuit.nominal[key]), float), (B,))
    r = np.maximum(r, 1e-6)
    rth = np.asarray(solver.thevenin(circuit, params, dc, [(plus, minus)]), float)[:, 0]
    with np.errstate(all="ignore"):
        r_net = r * rth / (r - rth)
        frac = burden / (r + burden + r_net)
    idx = np.flatnonzero(ok & ~((r_net > 0) & (frac <= LOAD_EXACT)))
    if idx.size == 0:
        return
    sub = solver.take(params, idx, B)
    sub[key] = r[idx] + burden
    dcl = solver.solve_dc(circuit, sub, x_start=dc.x[idx])
    s = list(circuit.supplies).index(ref)
    good = np.asarray(dcl.ok, bool)
    for m in cols:
        out[idx[good], m] = dcl.i_supply[good, s]
