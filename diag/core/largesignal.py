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
and how much the tone's own size changes the reading for one that is not. The run at
SMALL is nearly always linear, so it takes four phases and its rms follows from them
(CHECK_PHASES); the few units where it is not are run again at PHASES.

Charge balance: in the steady state a capacitor carries no net charge over a period, so
where the waveform is not symmetric (a stage clipping on one side, a junction that
conducts on peaks only) its charge, and its voltage, shift away from the operating
point. At the tone (not at SMALL of it, where the shift is ten thousand times smaller)
the held voltages are moved until the mean current through every hold over the period
is zero: F = mean(v) - hold (volts, per capacitor) is driven to 0 by Newton steps whose
matrix comes from the operating point's DC Jacobian (`_newton_matrix`; exact for a
linear unit; a step that barely helps is followed by a longer one, STRETCH, and a
bracketed balance too steep for Newton is bisected), a step that leaves max|F| larger
being taken again at half its length,
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
# The reference run first takes four phases: at ±π/2 a linear response is ±k, at π/6
# and 7π/6 ±k/2, and half the difference at ±π/2 over √2 is its rms (4 solves per unit
# rather than PHASES). Off it, within ODD_TOL/3 + EVEN_TOL²/8 (1.3e-3) of the rms over
# PHASES:
# - a cubic term c sin³ moves the first difference d1 = 2(k + c) and the second
#   d2 = k + c/4, and the rms to (k + 3c/4)/√2 (sin³ = (3 sin - sin 3φ)/4, handbook),
#   so the estimate is off by about (d1 - 2 d2) / (3 d1): ODD_TOL bounds |d1 - 2 d2| / |d1|;
# - an even term e sin² (or a response steeper on one side than the other by δ) puts
#   the sum at ±π/2 off twice the operating point by 2e (δ k) and changes the rms by
#   only (e/k)²/8 (a second harmonic adds in quadrature; δ²/7 for the kink): EVEN_TOL
#   bounds that sum over |d1|.
# A unit off either bound (its run sits on a kink, at the edge of saturation) is run
# again at PHASES.
CHECK_PHASES = (0.5 * math.pi, 1.5 * math.pi, math.pi / 6.0, 7.0 * math.pi / 6.0)
ODD_TOL = 3e-3
EVEN_TOL = 0.05
# Charge balance (see above): a held voltage within a hundredth of the thermal voltage of
# its balance moves a junction's current by under 1 %. Four steps, at about 0.1 s of
# mic-preamp's cold build (bench/engine_bench.py): most units settle within them or
# come near enough (the saturated test stage's readings stay up to 17 % from the fully
# balanced ones, inside overdrive.SPREAD). A follower that the tone cuts off for most of
# the period (pushpull-output with R7 open: Q2 alone conducts, on the peaks) meets a
# slope far under the operating point's, and the chord steps creep (37 of them to its
# balance, 0.5 V away): a step that took off less than half of the residual is followed
# by one STRETCH times longer, and such a unit has STRETCH_STEPS more. Where the balance
# lies between two points already solved but the residual is too steep between them for
# Newton (a junction conducting at one phase only: line-driver with R6 open), the unit
# bisects that bracket where it is wider than BISECT_WIDE, for up to BISECT_STEPS more.
# Both then balance (tests/test_overdrive.py, against ngspice's transient); the other
# units stop at four as before.
BALANCE_TOL = 0.01 * VT   # volts
BALANCE_STEPS = 4
STRETCH_STEPS = 4         # more, for units that crept: two steps running stretched
CREEP = 16.0              # (gain STRETCH², each taking off under half the residual)
BISECT_STEPS = 8          # more, for units bisecting a bracketed balance: 8 halvings
                          # take a 1 V bracket to 4 mV, about a junction's VT / 6
BISECT_WIDE = 0.1         # volts: a bracket narrower than about 4 VT leaves the best
                          # point's readings inside overdrive.SPREAD (mic-preamp's
                          # figures did not move when every bracket was bisected)
STRETCH = 4.0             # a step that barely helped: the next this much longer; one that
                          # made things worse: the next this much shorter (not under 1)
STRETCH_MAX = 256.0       # at most this many Newton steps in one


def ratios(circuit: Any, params: Mapping[str, Any], dc: Any, rows: np.ndarray,
           pairs: Sequence[tuple[str, str]],
           load: Sequence[tuple[str, str, Any]] | None = None) -> np.ndarray:
    """(len(rows), len(pairs)) ratio of the AC rms of V(a) - V(b) at the case's tone to
    that at SMALL of it (scaled up by 1/SMALL), for the units `rows` of `params`/`dc`
    (B = dc.v's rows); NaN where a phase did not solve or the small reading is 0.
    `load` [(node a, node b, siemens (B,) or scalar)]: branches that are not parts in
    every run (a meter's input across the point read), as `dc` was solved with them.

    The run at SMALL takes the four CHECK_PHASES first. Where it is near enough linear
    (ODD_TOL, EVEN_TOL), its rms is half the difference at ±π/2 over √2; elsewhere (a
    unit on the edge of saturation) it is run again at PHASES."""
    from diag.core import solver

    n, P = len(rows), PHASES
    out = np.full((n, len(pairs)), np.nan)
    if circuit.case.signal is None or n == 0 or not pairs:
        return out

    def volts(v: np.ndarray, node: str) -> np.ndarray:
        return solver.node_v(circuit, v, node)

    tone_ph = (np.arange(P) + 0.5) * 2.0 * math.pi / P
    big, x0, caps, R, lb = _inputs(circuit, params, dc, rows,
                                   [(tone_ph, 1.0), (np.asarray(CHECK_PHASES), SMALL)], load)
    T = n * P                                   # the tone's variants come first
    tone = np.full((n, len(pairs)), np.nan)
    small = np.full((n, len(pairs)), np.nan)
    linear = np.zeros((n, len(pairs)), dtype=bool)
    with np.errstate(all="ignore"):
        res = solver.solve_dc(circuit, big, x_start=x0, load=lb)
        v, ok = res.v, np.asarray(res.ok, bool)
        if caps:
            g = np.stack([np.asarray(big[f"{ref}.hold_g"])[:T].reshape(n, P)[:, 0]
                          for ref, _, _ in caps], axis=1)
            M = _newton_matrix(circuit, params, dc, rows, caps, g, load)
            v, ok = _balanced(circuit, big, res, caps, n, R, M, lb)
        v0 = np.asarray(dc.v)[rows]
        for m, (a, b) in enumerate(pairs):
            w = np.where(ok, volts(v, a) - volts(v, b), np.nan)
            tone[:, m] = np.std(w[:T].reshape(n, P), axis=1)
            pk = w[T:].reshape(n, len(CHECK_PHASES))
            d1, d2 = pk[:, 0] - pk[:, 1], pk[:, 2] - pk[:, 3]   # 2k and k when linear
            even = pk[:, 0] + pk[:, 1] - 2.0 * (volts(v0, a) - volts(v0, b))
            small[:, m] = np.abs(d1) / (2.0 * math.sqrt(2.0))
            linear[:, m] = ((np.abs(d1 - 2.0 * d2) <= ODD_TOL * np.abs(d1))
                            & (np.abs(even) <= EVEN_TOL * np.abs(d1)))
        redo = np.flatnonzero(~linear.all(axis=1))
        if redo.size:
            big2, x2, _, _, lb2 = _inputs(circuit, params, dc, rows[redo], [(tone_ph, SMALL)],
                                          load)
            res2 = solver.solve_dc(circuit, big2, x_start=x2, load=lb2)
            ok2 = np.asarray(res2.ok, bool)
            for m, (a, b) in enumerate(pairs):
                w2 = np.where(ok2, volts(res2.v, a) - volts(res2.v, b), np.nan)
                small[redo, m] = np.std(w2.reshape(len(redo), P), axis=1)
        out = tone / (small / SMALL)
    return np.where(np.isfinite(out), out, np.nan)


def _inputs(circuit: Any, params: Mapping[str, Any], dc: Any, rows: np.ndarray,
            segments: Sequence[tuple[np.ndarray, float]],
            load: Sequence[tuple[str, str, Any]] | None = None
            ) -> tuple[dict, np.ndarray, list, int, list | None]:
    """The pass's variants: for each (phases (radians), level (of the tone)) of
    `segments`, every unit of `rows` at each phase (segment-major, then unit, then
    phase), with the capacitors held (module docstring). Returns (params, start points,
    [(capacitor ref, node a, node b)], R variants, `load` per variant or None)."""
    from diag.core import solver

    case = circuit.case
    sig = case.signal
    n = len(rows)
    B = dc.v.shape[0]
    R = n * sum(len(ph) for ph, _ in segments)

    def per_variant(a: Any) -> Any:
        a = np.asarray(a, dtype=float)
        if a.ndim == 1 and a.shape[0] == B:
            return np.concatenate([np.repeat(a[rows], len(ph)) for ph, _ in segments])
        return a

    big: dict[str, Any] = {k: per_variant(v) for k, v in params.items()}
    omega = 2.0 * math.pi * float(circuit.hz)
    caps = []
    for part in case.parts:
        if part.kind in ("capacitor", "electrolytic"):
            a, b = part.nodes
            caps.append((part.ref, a, b))
            c = params.get(f"{part.ref}.c", circuit.nominal[f"{part.ref}.c"])
            big[f"{part.ref}.hold_g"] = omega * np.broadcast_to(per_variant(c), (R,))
            big[f"{part.ref}.hold_v"] = per_variant(solver.node_v(circuit, dc.v, a)
                                                    - solver.node_v(circuit, dc.v, b))
    vac = np.broadcast_to(per_variant(params.get(f"{sig.ref}.vac",
                                                 circuit.nominal[f"{sig.ref}.vac"])), (R,))
    level = np.concatenate([np.full(n * len(ph), lev) for ph, lev in segments])
    phase = np.concatenate([np.tile(ph, n) for ph, _ in segments])
    big[f"{sig.ref}.vdc"] = vac * math.sqrt(2.0) * level * np.sin(phase)
    x0 = np.concatenate([np.repeat(dc.x[rows], len(ph), axis=0) for ph, _ in segments])
    lb = None if load is None else [
        (a, b, np.broadcast_to(per_variant(np.broadcast_to(np.asarray(g, float), (B,))), (R,)))
        for a, b, g in load]
    return big, x0, caps, R, lb


def _balanced(circuit: Any, big: dict, res: Any, caps: Sequence[tuple[str, str, str]],
              n: int, R: int, M: np.ndarray, load: list | None = None
              ) -> tuple[np.ndarray, np.ndarray]:
    """(node volts (R, nodes), ok (R,)) of the pass with each capacitor's held voltage at
    the tone moved to its charge balance (module docstring); the first n * PHASES
    variants of `big` (R in all) are the tone's, `res` their first solve; M (n, C, C) the
    Newton matrix of `_newton_matrix`; `load` the meter's branch per variant, if any."""
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
    gain = np.ones(n)                             # each unit's step, in Newton steps
    dom = np.zeros(n, dtype=int)                  # the capacitor furthest off balance
    side_h = np.full((2, n, hold.shape[1]), np.nan)   # last holds with F[dom] > 0, < 0
    bisect = np.zeros(n, dtype=bool)              # units bracketing their balance
    crept = np.zeros(n, dtype=bool)               # units that have met a flat residual
    last = BALANCE_STEPS + max(STRETCH_STEPS, BISECT_STEPS)
    for k in range(last + 1):
        rows_v = (todo[:, None] * P + np.arange(P)).reshape(-1)
        good = ok[rows_v].reshape(-1, P).all(axis=1)
        F = np.stack([(solver.node_v(circuit, v[rows_v], a)
                       - solver.node_v(circuit, v[rows_v], b)).reshape(-1, P).mean(axis=1)
                      for _, a, b in caps], axis=1) - hold[todo]
        size = np.where(good, np.abs(np.nan_to_num(F, nan=np.inf)).max(axis=1), np.inf)
        if k == 0:
            dom[todo] = np.argmax(np.abs(np.nan_to_num(F)), axis=1)
        fd = F[np.arange(len(todo)), dom[todo]]
        for side, on in ((0, good & (fd > 0)), (1, good & (fd < 0))):
            side_h[side, todo[on]] = hold[todo[on]]
        better = (size < last_size[todo]) | ((k == 0) & good) | (bisect[todo] & good)
        # a Newton step takes off the whole residual where the slope is the operating
        # point's; one that took off less than half met a much smaller slope (a junction
        # the tone cuts off for most of the period): the next is STRETCH times longer
        # (at most STRETCH_MAX Newton steps); one that made things worse, shorter again
        slow = better & (k > 0) & (size > 0.5 * last_size[todo])
        crept[todo] |= slow
        gain[todo] = np.where(slow, np.minimum(gain[todo] * STRETCH, STRETCH_MAX),
                              np.where(better, gain[todo], np.maximum(gain[todo] / STRETCH, 1.0)))
        won = todo[better]
        won_v = (won[:, None] * P + np.arange(P)).reshape(-1)
        best_v[won_v], best_ok[won_v] = v[won_v], ok[won_v]
        last_h[won], last_size[won] = hold[won], size[better]
        # after the Newton steps, a unit that met a flat residual and whose balance lies
        # between two holds already solved, more than BISECT_WIDE apart (flat, then too
        # steep for Newton: a junction conducting at one phase only), bisects that bracket
        if k == BALANCE_STEPS:
            wide = np.abs(side_h[0, todo] - side_h[1, todo]).max(axis=1) > BISECT_WIDE
            bisect[todo] = wide & good & crept[todo]
        if k == last or not good.any():
            break
        # Newton's step from a better point; half the way back from a worse one
        step = gain[todo, None] * np.einsum("uij,uj->ui", M[todo],
                                            np.where(better[:, None], F, 0.0))
        new = np.where(better[:, None], hold[todo] + step,
                       0.5 * (hold[todo] + last_h[todo]))
        new = np.where(bisect[todo, None], 0.5 * (side_h[0, todo] + side_h[1, todo]), new)
        new = np.clip(new, -span, span)
        keep = (np.abs(new - hold[todo]).max(axis=1) > BALANCE_TOL) & np.isfinite(last_size[todo])
        keep &= (bisect[todo] | (k < BALANCE_STEPS)
                 | ((gain[todo] >= CREEP) & (k < BALANCE_STEPS + STRETCH_STEPS)))
        if not keep.any():
            break
        todo = todo[keep]
        hold[todo] = new[keep]
        rows_v = (todo[:, None] * P + np.arange(P)).reshape(-1)
        sub = solver.take(big, rows_v, R)
        for c, (ref, _, _) in enumerate(caps):
            sub[f"{ref}.hold_v"] = np.repeat(hold[todo, c], P)
        lsub = None if load is None else [(a, b, g[rows_v]) for a, b, g in load]
        again = solver.solve_dc(circuit, sub, x_start=x[rows_v], load=lsub)
        fine = np.asarray(again.ok, dtype=bool)
        v[rows_v] = np.where(fine[:, None], again.v, np.nan)
        x[rows_v] = np.where(fine[:, None], again.x, x[rows_v])
        ok[rows_v] = fine
    v[:T], ok[:T] = best_v, best_ok
    return v, ok


def _newton_matrix(circuit: Any, params: Mapping[str, Any], dc: Any, rows: np.ndarray,
                   caps: Sequence[tuple[str, str, str]], g: np.ndarray,
                   load: Sequence[tuple[str, str, Any]] | None = None) -> np.ndarray:
    """(n, C, C) the step matrix I + Z G of the charge balance at the units' operating
    points: Z[i, j] the change of capacitor i's voltage per ampere driven through
    capacitor j's terminals (solver.thevenin, the DC Jacobian, the capacitors open), G the
    holds' conductances g (n, C) siemens. With the holds in, a held voltage moved by dh
    changes the hold currents by -(I + G Z)^-1 G dh, so the residual F (the mean hold
    current over g) has the Jacobian -G^-1 (I + G Z)^-1 G and Newton's step is
    (I + Z G) F: exact for a linear unit, the first of a chord iteration otherwise.
    `load`: the meter's branch per unit (B,), as the operating point was solved with."""
    from diag.core import solver

    pairs = [(a, b) for _, a, b in caps]
    B = dc.v.shape[0]
    lr = None if load is None else [
        (a, b, np.broadcast_to(np.asarray(y, float), (B,))[rows]) for a, b, y in load]
    _, cols = solver.thevenin(circuit, solver.take(params, rows, B),
                              solver.take_dc(dc, rows), pairs, columns=True, load=lr)
    cols = np.nan_to_num(np.asarray(cols))                           # (n, C, unknowns)
    idx = [(circuit.index(a), circuit.index(b)) for a, b in pairs]

    def at(k: int) -> np.ndarray:
        return cols[:, :, k] if k >= 0 else np.zeros(cols.shape[:2])

    Z = np.stack([at(i) - at(j) for i, j in idx], axis=1)           # (n, C_i, C_j)
    return np.eye(len(caps))[None] + Z * g[:, None, :]
