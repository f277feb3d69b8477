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
and how much the tone's own size changes the reading for one that is not.

Charge balance: in the steady state a capacitor carries no net charge over a period, so
where the waveform is not symmetric (a stage clipping on one side, a junction that
conducts on peaks only) its charge, and its voltage, shift away from the operating
point. At the tone (not at SMALL of it, where the shift is ten thousand times smaller)
the held voltages are moved until the mean current through every hold over the period
is zero: F = mean(v) - hold (volts, per capacitor) is driven to 0 by Newton steps whose
matrix comes from the operating point's DC Jacobian (`_newton_matrix`; exact for a
linear unit), a step that leaves max|F| larger being taken again at half its length,
until every hold moves by less than BALANCE_TOL or BALANCE_STEPS solves are spent; the
best point found is kept. Against ngspice transient runs (tests/test_overdrive.py) the
centre of the saturated test stage's readings came from up to ln 1.2 (a factor 3.3) off
to within ln 0.4, and a diode clamp reads its whole tone, shifted, as ngspice does
(held at the operating voltage, the pass had it clipped on every half cycle).
What the quasi-static pass still leaves out, overdrive.py allows for with a spread.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from diag.core.parts.base import VT

PHASES = 16       # points per period of the tone: the ngspice-checked units' readings
                  # (tests/test_overdrive.py) move by 1.1 % at most from 24 phases, the
                  # evaluation's figures not at all, and mic-preamp builds 0.06 s sooner
SMALL = 0.01      # the reference run's tone, a fraction of the case's (small-signal)
# Charge balance (see above): a held voltage within a hundredth of the thermal voltage of
# its balance moves a junction's current by under 1 %. Four steps, at about 0.1 s of
# mic-preamp's cold build at 24 phases (bench/engine_bench.py): most units settle
# within them; the saturated test stage's readings stay up to 17 % from the fully
# balanced ones (15 steps), inside overdrive.SPREAD.
BALANCE_TOL = 0.01 * VT   # volts
BALANCE_STEPS = 4


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
    caps = []
    for part in case.parts:
        if part.kind in ("capacitor", "electrolytic"):
            a, b = part.nodes
            caps.append((part.ref, a, b))
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
        v, ok = res.v, np.asarray(res.ok, bool)
        if caps:
            g = np.stack([np.asarray(big[f"{ref}.hold_g"])[: n * P].reshape(n, P)[:, 0]
                          for ref, _, _ in caps], axis=1)
            M = _newton_matrix(circuit, params, dc, rows, caps, g)
            v, ok = _balanced(circuit, big, res, caps, n, R, M)
        for m, (a, b) in enumerate(pairs):
            w = np.where(ok, volts(v, a) - volts(v, b), np.nan).reshape(2, n, P)
            rms = np.std(w, axis=2)
            out[:, m] = rms[0] / (rms[1] / SMALL)
    return np.where(np.isfinite(out), out, np.nan)


def _balanced(circuit: Any, big: dict, res: Any, caps: Sequence[tuple[str, str, str]],
              n: int, R: int, M: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(node volts (R, nodes), ok (R,)) of the pass with each capacitor's held voltage at
    the tone moved to its charge balance (module docstring); the first n * PHASES
    variants of `big` (R in all) are the tone's, `res` their first solve; M (n, C, C) the
    Newton matrix of `_newton_matrix`."""
    from diag.core import solver

    P = PHASES
    v = np.array(res.v, dtype=float)
    ok = np.asarray(res.ok, dtype=bool).copy()
    x = np.array(res.x, dtype=float)
    span = max(float(circuit.case.supply_span), 1.0)
    hold = np.stack([np.asarray(big[f"{ref}.hold_v"], dtype=float)[: n * P].reshape(n, P)[:, 0]
                     for ref, _, _ in caps], axis=1)                    # (n, C) volts
    last_h, last_size = hold.copy(), np.full(n, np.inf)   # the best point so far
    T = n * P                                     # the tone's variants come first
    best_v, best_ok = v[:T].copy(), ok[:T].copy()
    todo = np.arange(n)                           # units still off balance
    for k in range(BALANCE_STEPS + 1):
        rows_v = (todo[:, None] * P + np.arange(P)).reshape(-1)
        good = ok[rows_v].reshape(-1, P).all(axis=1)
        F = np.stack([(solver.node_v(circuit, v[rows_v], a)
                       - solver.node_v(circuit, v[rows_v], b)).reshape(-1, P).mean(axis=1)
                      for _, a, b in caps], axis=1) - hold[todo]
        size = np.where(good, np.abs(np.nan_to_num(F, nan=np.inf)).max(axis=1), np.inf)
        better = (size < last_size[todo]) | ((k == 0) & good)
        won = todo[better]
        won_v = (won[:, None] * P + np.arange(P)).reshape(-1)
        best_v[won_v], best_ok[won_v] = v[won_v], ok[won_v]
        last_h[won], last_size[won] = hold[won], size[better]
        if k == BALANCE_STEPS or not good.any():
            break
        # Newton's step from a better point; half the way back from a worse one
        step = np.einsum("uij,uj->ui", M[todo], np.where(better[:, None], F, 0.0))
        new = np.where(better[:, None], hold[todo] + step,
                       0.5 * (hold[todo] + last_h[todo]))
        new = np.clip(new, -span, span)
        keep = (np.abs(new - hold[todo]).max(axis=1) > BALANCE_TOL) & np.isfinite(last_size[todo])
        if not keep.any():
            break
        todo = todo[keep]
        hold[todo] = new[keep]
        rows_v = (todo[:, None] * P + np.arange(P)).reshape(-1)
        sub = solver.take(big, rows_v, R)
        for c, (ref, _, _) in enumerate(caps):
            sub[f"{ref}.hold_v"] = np.repeat(hold[todo, c], P)
        again = solver.solve_dc(circuit, sub, x_start=x[rows_v])
        fine = np.asarray(again.ok, dtype=bool)
        v[rows_v] = np.where(fine[:, None], again.v, np.nan)
        x[rows_v] = np.where(fine[:, None], again.x, x[rows_v])
        ok[rows_v] = fine
    v[:T], ok[:T] = best_v, best_ok
    return v, ok


def _newton_matrix(circuit: Any, params: Mapping[str, Any], dc: Any, rows: np.ndarray,
                   caps: Sequence[tuple[str, str, str]], g: np.ndarray) -> np.ndarray:
    """(n, C, C) the step matrix I + Z G of the charge balance at the units' operating
    points: Z[i, j] the change of capacitor i's voltage per ampere driven through
    capacitor j's terminals (solver.thevenin, the DC Jacobian, the capacitors open), G the
    holds' conductances g (n, C) siemens. With the holds in, a held voltage moved by dh
    changes the hold currents by -(I + G Z)^-1 G dh, so the residual F (the mean hold
    current over g) has the Jacobian -G^-1 (I + G Z)^-1 G and Newton's step is
    (I + Z G) F: exact for a linear unit, the first of a chord iteration otherwise."""
    from diag.core import solver

    pairs = [(a, b) for _, a, b in caps]
    _, cols = solver.thevenin(circuit, solver.take(params, rows, dc.v.shape[0]),
                              solver.take_dc(dc, rows), pairs, columns=True)
    cols = np.nan_to_num(np.asarray(cols))                           # (n, C, unknowns)
    idx = [(circuit.index(a), circuit.index(b)) for a, b in pairs]

    def at(k: int) -> np.ndarray:
        return cols[:, :, k] if k >= 0 else np.zeros(cols.shape[:2])

    Z = np.stack([at(i) - at(j) for i, j in idx], axis=1)           # (n, C_i, C_j)
    return np.eye(len(caps))[None] + Z * g[:, None, :]
