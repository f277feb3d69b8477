"""Overdrive: the large-signal limits on small-signal AC readings.

The AC analysis is small-signal (solver.solve_ac): a predicted reading scales with the
tone without bound and follows the operating point's slopes. A real stage cannot swing
past its rails, and a tone that is large against a junction's thermal voltage takes a
stage out of the small-signal range in either direction: it clips a stage that a fault
gave too much gain, and it swings a stage that a fault saturated out of saturation every
cycle (where small-signal says almost no gain).

`limit_observed` (called by meter.observe) checks each unit: its overdrive g, the
largest AC reading over a sine across the rails, S/(2√2) (S = Case.supply_span), and
each conducting junction's second harmonic (`junction_drive`; `saturation_drive` for a
saturated transistor's base-collector junction). Where g passes FLOOR or a
junction passes ONSET, largesignal.py sweeps the tone through the DC solver and gives r,
how much the tone's own size changes each reading. The reading then lies, log-uniformly
(the unit's draw, "overdrive.<point>/ac", drawn last by ensemble.draw_unit, picks
where), within a·r·exp(±SPREAD·max|ln r|), joined with `limit`'s rail range
[FLOOR/g, 1]·a where g passes FLOOR, never above S/2 (a square wave between the rails has
the most AC rms of any waveform confined to them). Units below both onsets keep their
readings: the healthy units of every bundled case do.

Checked against transient runs of ngspice at the case's own signal level
(tests/test_overdrive.py): mic-preamp with an emitter resistor shorted reads 0.42 to 0.60
of its small-signal prediction at the output; a degenerated test stage that a fault
saturates reads 4 to 5 V rms where small-signal says 0.02 to 0.6 V; each inside diag's
range with the model error and the meter's accuracy; healthy units within 0.3 %. The
readings at the signal source's own node are left alone: the generator sets them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

FLOOR = 0.5  # onset of clipping and the least a clipped point reads (see above)
PREFIX = "overdrive."


def key(point: str, kind: str = "ac") -> str:
    """The parameter holding a unit's draw (0..1) for one AC reading."""
    return f"{PREFIX}{point}/{kind}"


def overdrive_of(ac_readings: np.ndarray, span: float) -> np.ndarray:
    """(B,) each unit's overdrive g: its largest AC reading (volts rms, (B, m)) over a
    sine across the rail span, span / (2√2); 0 for a unit with no finite reading."""
    with np.errstate(all="ignore"):
        top = np.nanmax(np.where(np.isfinite(ac_readings), ac_readings, np.nan), axis=1,
                        initial=0.0)
    return top / (span / (2.0 * math.sqrt(2.0)))


def limit(readings: np.ndarray, ac_cols: Sequence[int], span: float,
          draws: np.ndarray) -> np.ndarray:
    """Readings (B, M) with the AC columns `ac_cols` limited as the module says.

    readings: small-signal meter readings, volts rms in the AC columns; span: the rail
    span S (volts); draws: (B, len(ac_cols)) uniform 0..1. Returns a new array."""
    out = np.array(readings, dtype=float, copy=True)
    if not len(ac_cols) or span <= 0:
        return out
    a = out[:, ac_cols]
    g = overdrive_of(a, span)
    over = g > FLOOR
    if not over.any():
        return out
    lo = np.minimum(1.0, FLOOR / np.where(over, g, 1.0))[:, None]
    s = np.exp(np.log(lo) * (1.0 - np.asarray(draws, float)))
    limited = np.minimum(a * s, span / 2.0)
    out[:, ac_cols] = np.where(over[:, None], limited, a)
    return out


ONSET = 0.05   # a junction whose tone makes more than this second harmonic in its stage
               # (half `diag check`'s warning level, bands.DISTORTION_LIMIT) may take the
               # unit out of the small-signal range
SPREAD = 0.2   # the large-signal reading's spread either way, per unit of the unit's
               # largest |ln r| (r the quasi-static ratio): what the pass leaves out (the
               # holds' phase, a charge balance not fully reached in its steps), set from
               # ngspice transient runs (tests/test_overdrive.py: up to 0.14 needed on
               # the saturated test stage, 0.18 on mic-preamp with R9 shorted)
SPREAD_TOP = math.log(10.0)   # the |ln r| that SPREAD is applied up to: it was set on
               # units within a factor of a few of linear; a unit whose reading somewhere
               # collapses (a stage cut off: r of 1e-6) would otherwise spread every other
               # point of it twentyfold, where those read as before


def _param(circuit: Any, params: Mapping[str, Any], name: str, B: int) -> np.ndarray:
    """Parameter `name` per unit (B,): the drawn value, else the circuit's nominal."""
    return np.broadcast_to(np.asarray(params.get(name, circuit.nominal[name]), float), (B,))


def junction_drive(circuit: Any, params: Mapping[str, Any], dc: Any, ac: Any,
                   regions: Mapping[str, np.ndarray] | None = None
                   ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Transistor ref -> (signal across its base-emitter junction, volts rms, (B,); the
    second harmonic its stage makes, a fraction of the fundamental, (B,)). A conducting
    junction's current i = I0 exp(v / (N VT)) driven by a sine of peak v makes a second
    harmonic of about v / (4 N VT) (the exponential's Taylor series); an emitter that
    follows the signal (an unbypassed emitter resistor, a follower) is series feedback and
    divides it by 1 + v_e / v_be (negative feedback divides distortion by 1 + loop gain,
    handbook). 0 where the transistor does not conduct at its operating point and the
    tone's peak does not take its junction past parts.bjt.ON_CURRENT either (Shockley:
    IS (exp((v_be + √2 v) / (NF VT)) - 1)). `regions` (solver.regions) when the caller
    has them."""
    from diag.core import solver
    from diag.core.parts.base import VT
    from diag.core.parts.bjt import ON_CURRENT

    case = circuit.case
    B = ac.v.shape[0]
    if regions is None:
        regions = solver.regions(circuit, params, dc)

    def v(node: str) -> np.ndarray:
        return solver.node_v(circuit, ac.v, node)

    out = {}
    for part in case.parts:
        if part.kind not in ("npn", "pnp"):
            continue
        ve = np.abs(v(part.terminal("e")))
        vbe = np.abs(v(part.terminal("b")) - v(part.terminal("e")))
        n = _param(circuit, params, f"{part.ref}.nf", B)
        # a junction off at its operating point that the tone's peak drives into
        # conduction (a follower whose emitter resistor is open, biased by leakage alone)
        # conducts on peaks only: as nonlinear as it gets
        pol = 1.0 if part.kind == "npn" else -1.0
        vbe_dc = pol * (solver.node_v(circuit, dc.v, part.terminal("b"))
                        - solver.node_v(circuit, dc.v, part.terminal("e")))
        i_pk = (_param(circuit, params, f"{part.ref}.is", B)      # an open junction's
                * _param(circuit, params, f"{part.ref}.k_be", B)     # hook k_be is 0
                * np.expm1(np.minimum((vbe_dc + math.sqrt(2.0) * vbe) / (n * VT), 700.0)))
        on = ((np.isin(np.asarray(regions[part.ref]), ("active", "saturated"))
               | (np.asarray(dc.ok, bool) & (i_pk > ON_CURRENT))) & (vbe > 0))
        with np.errstate(divide="ignore", invalid="ignore"):
            h = np.where(on, vbe * math.sqrt(2.0) / (4.0 * n * VT) / (1.0 + ve / vbe), 0.0)
        out[part.ref] = (vbe, np.nan_to_num(h))
    return out


def saturation_drive(circuit: Any, params: Mapping[str, Any], dc: Any, ac: Any,
                     regions: Mapping[str, np.ndarray] | None = None) -> np.ndarray:
    """The largest second harmonic (B,), a fraction of the fundamental, that the tone
    makes at the base-collector junction of a saturated transistor: saturated, that
    junction conducts too, i = I0 exp(v / (NR VT)), and a sine of peak v across it makes
    about v / (4 NR VT) (as in `junction_drive`, without its feedback divisor: this
    only decides which units get the large-signal pass, which finds r near 1 where the
    stage stays linear). 0 where no transistor is saturated. A stage
    saturated by a fault passes its tone through that junction, and a few millivolts
    across it swing the stage partly out of saturation every cycle (ngspice transient:
    a cascode with its lower emitter shorted reads 1.5 times its small-signal output)."""
    from diag.core import solver
    from diag.core.parts.base import VT

    B = ac.v.shape[0]
    if regions is None:
        regions = solver.regions(circuit, params, dc)
    worst = np.zeros(B)
    for part in circuit.case.parts:
        if part.kind not in ("npn", "pnp"):
            continue
        sat = np.asarray(regions[part.ref]) == "saturated"
        if not sat.any():
            continue
        vbc = np.abs(solver.node_v(circuit, ac.v, part.terminal("b"))
                     - solver.node_v(circuit, ac.v, part.terminal("c")))
        nr = _param(circuit, params, f"{part.ref}.nr", B)
        worst = np.maximum(worst, np.where(sat, np.nan_to_num(
            vbc * math.sqrt(2.0) / (4.0 * nr * VT)), 0.0))
    return worst


def swung(case: Any, observables: Sequence[Any]) -> list[int]:
    """Indices of the AC readings among `observables` that the tone's own size can
    change: every AC point but those on the signal source's own node (the generator
    sets what they read)."""
    src = case.signal.nodes[0] if case.signal is not None else None
    return [m for m, o in enumerate(observables)
            if o.kind == "ac" and case.point(o.point).node != src]


def node_pairs(case: Any, observables: Sequence[Any]) -> list[tuple[str, str]]:
    """(node, reference node) each of `observables` is read between: its point's node
    and its `minus`, or the case's ground."""
    return [(pt.node, pt.minus or case.ground)
            for pt in (case.point(o.point) for o in observables)]


def _metered(circuit: Any, params: Mapping[str, Any], dc: Any, rows: np.ndarray,
             pairs: Sequence[tuple[str, str]], r: np.ndarray,
             reloaded: Mapping[tuple[str, str], tuple[np.ndarray, float]]) -> np.ndarray:
    """`r` (len(rows), len(pairs)) with the units that meter.observe solved again at a
    pair (the meter's own current moves their operating point: an emitter whose only
    other DC path is a capacitor's leakage) given the ratio of a pass run with the meter
    connected across that pair. Without it the pass's r, from a unit the meter does not
    bias, scales a small-signal reading that the meter's bias sets. (line-driver with R6
    open, whose emitter the meter's 0.7 µA biases: r 0.20 without, 0.21 with, of a
    70 mV small-signal figure; ngspice's transient with the meter reads 16 mV.)"""
    from diag.core import largesignal, solver

    B = dc.v.shape[0]
    out = np.array(r, dtype=float)
    for j, pair in enumerate(pairs):
        got = reloaded.get(pair)
        if got is None:
            continue
        idx, g = got
        sel = np.flatnonzero(np.isin(rows, idx))
        if not sel.size:
            continue
        units = rows[sel]
        sub = solver.take(params, units, B)
        load = [(pair[0], pair[1], np.full(units.size, float(g)))]
        with np.errstate(all="ignore"):
            dcl = solver.solve_dc(circuit, sub, load=load, x_start=dc.x[units])
            rl = largesignal.ratios(circuit, sub, dcl, np.arange(units.size), [pair],
                                    load=load)[:, 0]
        fine = np.asarray(dcl.ok, bool) & np.isfinite(rl)
        out[sel[fine], j] = rl[fine]
    return out


def limit_observed(circuit: Any, params: Mapping[str, Any], dc: Any, ac: Any,
                   observables: Sequence[Any], readings: np.ndarray,
                   reloaded: Mapping[tuple[str, str], tuple[np.ndarray, float]] | None = None
                   ) -> np.ndarray:
    """Meter readings at `observables` (Case.observables order) of the units in `params`
    (B = readings' rows) with their AC points (away from the signal's own node) taken
    out of the small-signal range where the tone takes the unit out of it.

    A unit is checked when its overdrive g passes FLOOR or a junction makes more than
    ONSET second harmonic in its stage (junction_drive, and saturation_drive for the
    base-collector junction of a saturated transistor). For it, largesignal.ratios
    gives r, how much the tone's own size changes each AC reading. The reading lies
    within a·r·exp(±SPREAD·max|ln r|), joined with `limit`'s rail range where g passes
    FLOOR, log-uniformly (the unit's draw picks where), never above S/2. Where the pass
    did not solve, `limit`'s range. `reloaded` {(node, reference node): (units, meter
    siemens)}: readings meter.observe solved again with the meter connected (its current
    moves the operating point); their r comes from a pass with the meter connected too,
    so that r and the small-signal reading it scales rest on one bias (`_metered`)."""
    case = circuit.case
    cols = swung(case, observables)
    if not cols or ac is None:
        return readings
    from diag.core import largesignal

    B = readings.shape[0]
    span = float(case.supply_span)
    draws = np.column_stack([
        np.broadcast_to(np.asarray(params.get(key(observables[m].point), 0.5), float), (B,))
        for m in cols])
    out = limit(readings, cols, span, draws)  # the fallback where the pass fails
    a = np.asarray(readings, float)[:, cols]
    g = overdrive_of(a, span)
    from diag.core import solver

    regions = solver.regions(circuit, params, dc)    # once, for both junction tests
    drive = junction_drive(circuit, params, dc, ac, regions)
    worst = np.max(np.stack([h for _, h in drive.values()]), axis=0) if drive \
        else np.zeros(B)
    sat = saturation_drive(circuit, params, dc, ac, regions) > ONSET
    rows = np.flatnonzero(np.asarray(dc.ok, bool) & ((g > FLOOR) | (worst > ONSET) | sat))
    if not rows.size:
        return out
    pairs = node_pairs(case, [observables[m] for m in cols])
    r = largesignal.ratios(circuit, params, dc, rows, pairs)
    if reloaded:
        r = _metered(circuit, params, dc, rows, pairs, r, reloaded)
    ln_r = np.log(np.where(r > 0, r, np.nan))
    # the unit's own nonlinearity sets the spread at every one of its points
    with np.errstate(invalid="ignore"):
        width = SPREAD * np.minimum(np.nanmax(np.abs(ln_r), axis=1, initial=0.0),
                                    SPREAD_TOP)[:, None]
    lo_q, hi_q = ln_r - width, ln_r + width
    # with the rail range of `limit` (clipping; what the pass's balance steps leave of its
    # charge shift reaches back into the stages before the clipped one) where the unit
    # passes FLOOR
    gr = g[rows][:, None]
    lo_g = np.where(gr > FLOOR, np.log(np.minimum(1.0, FLOOR / np.maximum(gr, 1e-300))),
                    np.inf)
    hi_g = np.where(gr > FLOOR, 0.0, -np.inf)
    lo, hi = np.fmin(lo_q, lo_g), np.fmax(hi_q, hi_g)
    # a saturated stage: how far the tone swings it out of saturation rests on what the
    # card leaves out or does not spread (reverse gain, collector resistance, high
    # injection), so the reading lies anywhere from the small-signal figure to the pass's;
    # one unknown of the part, so one draw places every point of the unit
    sat_r = sat[rows][:, None]
    lo, hi = np.where(sat_r, np.fmin(lo, 0.0), lo), np.where(sat_r, np.fmax(hi, 0.0), hi)
    t = np.where(sat_r, draws[rows][:, :1], draws[rows])
    got = np.minimum(a[rows] * np.exp(lo + (hi - lo) * t), span / 2.0)
    keep = np.isfinite(got)
    block = out[np.ix_(rows, cols)]
    out[np.ix_(rows, cols)] = np.where(keep, got, block)
    return out
