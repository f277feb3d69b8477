"""Overdrive: the large-signal limit on small-signal AC readings.

The AC analysis is small-signal (solver.solve_ac): a predicted reading grows with a
stage's gain without bound. A real stage cannot swing past its rails. No waveform
confined between the lowest and the highest rail, S volts apart (Case.supply_span), has
an AC rms above S/2 (a square wave between them), a sine of more than S/(2√2) rms cannot
fit at all, and a stage biased inside the rails runs out of room well before that.

`limit` takes each unit's overdrive g, its largest AC reading over S/(2√2). Where g is
above FLOOR (a sine across more than half the rails somewhere) a stage may clip, and its
distortion pulls the readings beyond it down together: each AC reading a becomes a·s,
with s drawn log-uniformly in [FLOOR/g, 1] at each point, capped at S/2. So the point
that swings most reads at least a sine across FLOOR of the rails. Below FLOOR nothing
changes (the healthy units of every bundled case stay under 0.3).

Checked against transient runs of ngspice at the case's own signal level
(tests/test_overdrive.py): mic-preamp with an emitter resistor shorted reads 0.42 to 0.60
of its small-signal prediction at the output (g 1.3 to 2.5) and 0.59 to 0.84 at the
first collector; sounder-driver with its speaker open 0.74 at the collector (g 1.3);
every healthy unit within 0.3 % of it. The readings at the signal source's own node are
left alone: the generator sets them. The draws s come from the unit's parameters
("overdrive.<point>/ac", uniform in 0..1, drawn last by ensemble.draw_unit; 0.5 at
nominal).
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


def limit(readings: np.ndarray, ac_cols: Sequence[int], span: float,
          draws: np.ndarray) -> np.ndarray:
    """Readings (B, M) with the AC columns `ac_cols` limited as the module says.

    readings: small-signal meter readings, volts rms in the AC columns; span: the rail
    span S (volts); draws: (B, len(ac_cols)) uniform 0..1. Returns a new array."""
    out = np.array(readings, dtype=float, copy=True)
    if not len(ac_cols) or span <= 0:
        return out
    a = out[:, ac_cols]
    with np.errstate(invalid="ignore"):
        g = np.nanmax(np.where(np.isfinite(a), a, np.nan), axis=1, initial=0.0) \
            / (span / (2.0 * math.sqrt(2.0)))
    over = g > FLOOR
    if not over.any():
        return out
    lo = np.minimum(1.0, FLOOR / np.where(over, g, 1.0))[:, None]
    s = np.exp(np.log(lo) * (1.0 - np.asarray(draws, float)))
    limited = np.minimum(a * s, span / 2.0)
    out[:, ac_cols] = np.where(over[:, None], limited, a)
    return out


def limit_observed(case: Any, params: Mapping[str, Any], observables: Sequence[Any],
                   readings: np.ndarray) -> np.ndarray:
    """`limit` for meter readings at `observables` (Case.observables order) of the units
    in `params` (B = readings' rows): the AC points away from the signal's own node."""
    sig = case.signal
    src = sig.nodes[0] if sig is not None else None
    cols = [m for m, o in enumerate(observables)
            if o.kind == "ac" and case.point(o.point).node != src]
    if not cols:
        return readings
    B = readings.shape[0]
    draws = np.column_stack([
        np.broadcast_to(np.asarray(params.get(key(observables[m].point), 0.5), float), (B,))
        for m in cols])
    return limit(readings, cols, float(case.supply_span), draws)
