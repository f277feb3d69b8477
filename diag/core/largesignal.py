"""Quasi-static large-signal AC: how far a tone takes a circuit from its small-signal
readings.

Every capacitor is held at its voltage of the unit's operating point through a
conductance of its admittance at the tone, ωC (a coupling or bypass capacitor barely
changes its charge within one period; an open one, with a few picofarads left, holds
nothing), and the tone is swept over one period through the DC solver: PHASES DC solves,
the signal source at vpk·sin(phase). The AC rms of a voltage is its standard deviation
over the phases (exact for harmonics below PHASES/2). Inductors are shorts, as in DC.

The hold keeps a capacitor's admittance but not its phase, so on its own the pass reads a
linear stage 10 to 20 % off. `ratios` therefore runs it twice, at the tone and at
SMALL times it, and returns the ratio: 1 for a linear unit whatever the hold gets wrong,
and how much the tone's own size changes the reading for one that is not. Left out: the
slow shift of the capacitors' charge when the waveform is not symmetric (rectification);
overdrive.py allows for it with a spread.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

PHASES = 24       # points per period of the tone
SMALL = 0.01      # the reference run's tone, a fraction of the case's (small-signal)


def ratios(circuit: Any, params: Mapping[str, Any], dc: Any, rows: np.ndarray,
           pairs: Sequence[tuple[str, str]]) -> np.ndarray:
    """(len(rows), len(pairs)) ratio of the AC rms of V(a) - V(b) at the case's tone to
    that at SMALL of it (scaled up by 1/SMALL), for the units `rows` of `params`/`dc`
    (B = dc.v's rows); NaN where a phase did not solve or the small reading is 0."""
    from diag.core import solver

    case = circuit.case
    sig = case.signal
    n, P = len(rows), PHASES
    out = np.full((n, len(pairs)), np.nan)
    if sig is None or n == 0 or not pairs:
        return out
    B = dc.v.shape[0]
    R = 2 * n * P  # (level, unit, phase) variants, level-major

    def per_variant(a: Any) -> Any:
        a = np.asarray(a, dtype=float)
        if a.ndim == 1 and a.shape[0] == B:
            return np.tile(np.repeat(a[rows], P), 2)
        return a

    big: dict[str, Any] = {k: per_variant(v) for k, v in params.items()}

    def volts(v: np.ndarray, node: str) -> np.ndarray:
        return solver.node_v(circuit, v, node)

    omega = 2.0 * math.pi * float(circuit.hz)
    for part in case.parts:
        if part.kind in ("capacitor", "electrolytic"):
            a, b = part.nodes
            c = params.get(f"{part.ref}.c", circuit.nominal[f"{part.ref}.c"])
            big[f"{part.ref}.hold_g"] = omega * np.broadcast_to(per_variant(c), (R,))
            big[f"{part.ref}.hold_v"] = per_variant(volts(dc.v, a) - volts(dc.v, b))
    vac = np.broadcast_to(per_variant(params.get(f"{sig.ref}.vac",
                                                 circuit.nominal[f"{sig.ref}.vac"])), (R,))
    level = np.repeat([1.0, SMALL], n * P)
    phase = np.tile((np.arange(P) + 0.5) * 2.0 * math.pi / P, 2 * n)
    big[f"{sig.ref}.vdc"] = vac * math.sqrt(2.0) * level * np.sin(phase)
    x0 = np.tile(np.repeat(dc.x[rows], P, axis=0), (2, 1))
    with np.errstate(all="ignore"):
        res = solver.solve_dc(circuit, big, x_start=x0)
        ok = np.asarray(res.ok, dtype=bool)
        for m, (a, b) in enumerate(pairs):
            w = np.where(ok, volts(res.v, a) - volts(res.v, b), np.nan).reshape(2, n, P)
            rms = np.std(w, axis=2)
            out[:, m] = rms[0] / (rms[1] / SMALL)
    return np.where(np.isfinite(out), out, np.nan)
