"""Batch triage: every unit of a returned batch ranked, and a summary across the batch.

`triage(engine, units, rejected)` diagnoses each unit (in order of first appearance) and
sums up: counts by fault and by part (most frequent first), units no hypothesis explains
(send to engineering), units that look healthy (no fault found), and units whose readings
are incomplete (an observable the rest of the batch measured is missing). The per-unit
posterior is computed for all units at once (`rank_batch`, `BatchScorer`); it gives the
same numbers as `Engine.diagnose` one unit at a time (to rounding, about 1e-15 in p).

Speed (bench/triage_bench.py): 10 000 units of the largest bundled case (97 hypotheses,
K = 128, 14 readings) take 5 to 7 s on two cores (6.3 s on one) after the ensemble is
cached, in about 0.3 GiB. Most of it is the kernel product over units x hypotheses x drawn units x
readings; a meter shows a few digits, so readings repeat across a batch and
`table_loglik` computes each distinct reading's kernel factors once and gathers them.

Refused rows of the batch file (`refused_rows`) are tied to the unit their row names and
kept with that unit; rows that belong to no triaged unit are kept in the summary.

`to_json`, `to_markdown` and `to_csv` render a TriageResult; every rendering closes with
the safety cautions given to it (rules/cautions.yaml through load_rules()["cautions"]),
as the session report does. Values are volts (amperes at supply points); p are posterior
probabilities.
"""

from __future__ import annotations

import contextlib
import csv
import functools
import gc
import io
import math
import os
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from diag.core.case import Case
from diag.core.engine import Diagnosis, Engine, Reading, ids_index
from diag.core.errors import DiagError
from diag.core.infer import _LOG_EVERY, _exp_floor, kernel_loglik
from diag.core.workers import Later

STATUSES = ("fault", "healthy", "no-fit", "undecided")
LOOKALIKES = 5  # look-alike faults named under "No fault found" in the Markdown report


@dataclass(frozen=True)
class UnitResult:
    """One unit: its readings, its diagnosis, its status (`fault`; `healthy`: the leading
    suspect is the healthy circuit or cannot be told from it by the offered readings, so
    no fault is found; `no-fit`: no hypothesis explains the readings), the
    observables it lacks that the rest of the batch measured (`missing`) and the rows of
    the batch file refused for it (`refused`)."""

    unit: str
    readings: tuple[Reading, ...]
    diagnosis: Diagnosis
    status: str
    missing: tuple[tuple[str, str], ...] = ()
    refused: tuple[RefusedRow, ...] = ()

    @property
    def incomplete(self) -> bool:
        return bool(self.missing)

    @property
    def top(self):
        return self.diagnosis.suspects[0]


@dataclass(frozen=True)
class TriageResult:
    """A triaged batch. `units` in order of first appearance; `rejected` holds every
    refused row of the batch file, in file order (each unit's own are also on the unit);
    `summary` is the JSON-ready summary (see `summarise`)."""

    case: Case
    engine: Engine
    units: tuple[UnitResult, ...]
    rejected: tuple[RefusedRow, ...] = ()
    summary: dict = field(default_factory=dict)

    def unit(self, name: str) -> UnitResult:
        for u in self.units:
            if u.unit == name:
                return u
        raise KeyError(name)

    @property
    def unplaced(self) -> tuple[RefusedRow, ...]:
        """Refused rows that belong to no triaged unit: rows that name no unit, and rows
        of a unit none of whose rows could be used."""
        names = {u.unit for u in self.units}
        return tuple(r for r in self.rejected if r.unit not in names)


@dataclass(frozen=True)
class RefusedRow:
    """A row of the batch file that was left out. `row` is its number (header = row 1;
    None when the message gives none), `unit` the unit name the row gives (None when it
    gives none) and `text` the message: file, row, unit, what is wrong, what to do."""

    row: int | None
    unit: str | None
    text: str


def refused_rows(errors: Sequence[DiagError | RefusedRow | str],
                 row_units: Mapping[int, str] | None = None,
                 unit: str | None = None) -> tuple[RefusedRow, ...]:
    """The refused rows of a readings file, each tied to the unit its row names.

    `errors` are readings.ReadingsFile.errors (DiagError, `line` = row); `row_units` is
    the file's ReadingsFile.row_units (row -> the unit its `unit` column names); `unit`
    ties every row to one unit instead (a one-unit file). A plain message string stays
    unplaced. The message gains the unit: "batch.csv:37: row 37 (unit U014): ..."."""
    units = row_units if row_units is not None and unit is None else {}
    out = []
    for e in errors:
        if isinstance(e, RefusedRow):
            out.append(e)
        elif isinstance(e, DiagError):
            name = unit if unit is not None else units.get(e.line or 0)
            where = e.where or (f"row {e.line}" if e.line else None)
            if name:
                where = f"{where} (unit {name})" if where else f"unit {name}"
            msg = DiagError(e.message, file=e.file, line=e.line, where=where, hint=e.hint)
            out.append(RefusedRow(e.line, name or None, str(msg)))
        else:
            out.append(RefusedRow(None, None, str(e)))
    return tuple(sorted(out, key=lambda r: (r.row is None, r.row or 0)))


# A unit's leading group must hold more than this p for its fault to count as found:
# below, no fault is more likely than not (a unit with a reading or two), and the unit
# is `undecided` until its next reading is taken.
FOUND_P = 0.5


def _status(d: Diagnosis) -> str:
    """`no-fit` when no hypothesis explains the readings; `healthy` when the leading
    suspect is the healthy circuit or one the readings cannot tell from it (same group);
    `undecided` when the leading group holds no more than FOUND_P; `fault` otherwise."""
    if not d.fits:
        return "no-fit"
    if d.reads_healthy():
        return "healthy"
    return "fault" if d.lead_p() > FOUND_P else "undecided"


@contextlib.contextmanager
def _gc_paused():
    """Pause Python's cyclic garbage collector while a batch builds its results: about a
    million small immutable objects that hold no cycles, over which the collector would
    otherwise walk again and again (about a sixth of the batch's time). Reference
    counting still frees everything; the collector runs again afterwards."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def rank_batch(engine: Engine, units: Sequence[Sequence[Reading]],
               progress: Callable[[float], None] | None = None,
               cancelled: Callable[[], bool] | None = None,
               healthy_prior: float | None = None, chunk: int = 64,
               threads: int | None = None) -> list[Diagnosis]:
    """Diagnose every unit, the same as `engine.diagnose` one unit at a time.

    Uses the engine's own batch entry point when it has one; otherwise `BatchScorer`
    scores all units that share a set of taken readings together (shared tables for a
    large group that takes every reading, else `chunk` units per block), the work spread
    over `threads` worker threads (default: the CPU count, at most 4). `progress(f)`
    gets 0..1; `cancelled()` is checked between tasks (InterruptedError).
    """
    batch = getattr(engine, "diagnose_batch", None)
    with _gc_paused():
        if batch is not None:
            return list(batch(units, progress=progress, cancelled=cancelled,
                              healthy_prior=healthy_prior))
        return BatchScorer(engine, healthy_prior).run(units, progress, cancelled, chunk,
                                                      threads)


# Largest kernel tables of one `table_loglik` call (one hypothesis at a time), bytes:
# a group whose distinct readings need more is split into that many row blocks.
_TABLE_BYTES = 32 << 20
# Tables are used when the readings take at most this share of distinct values (each
# distinct value costs a kernel row; a unit's row then costs a gather instead).
_TABLE_SHARE = 0.5
# Units per tile of `table_loglik` (a 512 x K product array stays in the CPU cache).
_TABLE_TILE = 512


def table_loglik(u_read: np.ndarray, scale: np.ndarray, Ut: np.ndarray,
                 logpeak: np.ndarray, c: np.ndarray, valid: np.ndarray, n_valid: np.ndarray,
                 hyps: Sequence[int]) -> np.ndarray:
    """Log-likelihood (n, len(hyps)) of the hypotheses `hyps` for many units at once:
    infer's log mean_k prod_j [(1-eps) N(u_j; U_hkj, s_hj^2) + eps/W_j] over the valid
    drawn units, the same as `kernel_loglik` followed by the log-mean over k.

    A meter shows a few digits, so across a batch each reading takes far fewer distinct
    values than there are units. Per hypothesis and reading, the kernel factor of each
    distinct value against the K drawn units is computed once (a table, the same
    floating-point operations as `kernel_loglik`); a unit's product over its readings
    is then one table row per reading, gathered and multiplied. u_read (n, d) readings
    in u coordinates; scale (H, d) = s*sqrt(2); Ut, logpeak, c as in `kernel_loglik`;
    valid (H, K) drawn units that solved; n_valid (H,) their count; d >= 1. The product stays
    linear (each factor lies between eps/W_j and 0.4) when the smallest possible
    product, prod_j eps/W_j, is far inside the float64 range; else logarithms are taken
    every _LOG_EVERY readings as in `kernel_loglik`.
    """
    n, d = u_read.shape
    K = Ut.shape[2]
    vals, inv = [], []
    for j in range(d):
        v, i = np.unique(u_read[:, j], return_inverse=True)
        vals.append(v)
        inv.append(i.reshape(-1))
    # units in order of their readings: neighbouring units gather neighbouring table
    # rows (cache locality); the output is put back in the given order
    perm = np.lexsort(inv[::-1]) if d else np.arange(n)
    inv = [i[perm] for i in inv]
    floor = _exp_floor(c)
    linear = float(np.sum(np.log(c))) > -600.0  # e^-600 ~ 1e-261 > the float64 floor
    out = np.empty((n, len(hyps)))
    tile = min(_TABLE_TILE, max(n, 1))
    p = np.empty((tile, K))
    w = np.empty((tile, K))
    # one buffer for the tables of a hypothesis, reused (no allocation per table)
    ends = np.cumsum([len(v) for v in vals]).tolist()
    buf = np.empty((ends[-1] if d else 0, K))
    us = np.empty(ends[-1] if d else 0)
    with np.errstate(invalid="ignore", over="ignore", under="ignore", divide="ignore"):
        for col, h in enumerate(hyps):
            bad = ~valid[h]
            tabs = []
            for j in range(d):
                a0 = ends[j - 1] if j else 0
                t, u_ = buf[a0:ends[j]], us[a0:ends[j]]
                np.divide(vals[j], scale[h, j], out=u_)
                np.subtract(u_[:, None], Ut[j, h][None, :], out=t)
                np.square(t, out=t)
                np.subtract(logpeak[h, j], t, out=t)
                np.maximum(t, floor[j], out=t)
                np.exp(t, out=t)
                t += c[j]
                if linear:
                    t[:, bad] = 0.0  # a unit that did not solve adds nothing to the mean
                tabs.append(t)
            for a in range(0, n, tile):
                m = min(tile, n - a)
                p_, w_ = p[:m], w[:m]
                # mode "wrap": the indices are valid, and "raise" buffers `out` (slower)
                np.take(tabs[0], inv[0][a:a + m], axis=0, out=p_, mode="wrap")
                if linear:
                    for j in range(1, d):
                        np.take(tabs[j], inv[j][a:a + m], axis=0, out=w_, mode="wrap")
                        p_ *= w_
                    out[a:a + m, col] = np.log(p_.sum(axis=1)) - math.log(max(n_valid[h], 1))
                    continue
                o = np.zeros((m, K))
                for j in range(1, d + 1):
                    if j % _LOG_EVERY == 0 or j == d:
                        o += np.log(p_)
                        p_.fill(1.0)
                    if j < d:
                        np.take(tabs[j], inv[j][a:a + m], axis=0, out=w_, mode="wrap")
                        p_ *= w_
                o[np.isnan(o)] = -np.inf
                o[:, bad] = -np.inf
                out[a:a + m, col] = _logmeanexp(o, n_valid[h])
            if n_valid[h] == 0:
                out[:, col] = -np.inf
    back = np.empty_like(out)
    back[perm] = out
    return back


def table_loglik_units(U_h: np.ndarray, taken: np.ndarray, u_reads: np.ndarray,
                       s: np.ndarray, eps: float, W: np.ndarray) -> tuple[np.ndarray, int]:
    """infer.loglik_units through `table_loglik`: the log-likelihood (n,) of n units'
    readings u_reads (n, d) at observables `taken` under one hypothesis's drawn units
    U_h (K, M) with kernel widths s (d,), and the number of its valid units (the same
    value to rounding; for many units whose readings repeat)."""
    from diag.core.infer import kernel_setup

    scale, Ut, logpeak = kernel_setup(U_h[None], taken, np.asarray(s)[None], eps)
    valid = np.all(np.isfinite(U_h), axis=1)[None]
    n = np.array([int(valid.sum())])
    return table_loglik(u_reads, scale, Ut, logpeak, eps / W[taken], valid, n, [0])[:, 0], \
        int(n[0])


def _logmeanexp(x: np.ndarray, n) -> np.ndarray:
    from diag.core.infer import _logmeanexp as f

    return f(x, np.asarray(n))


def groups_batch(ap: np.ndarray, orders: np.ndarray) -> np.ndarray:
    """infer.groups_from for many orders at once: group number (n, H) per unit's order
    (n, H) of hypothesis indices, from the (H, H) `apart` matrix. The same greedy rule:
    down the order, a hypothesis joins the first group none of whose members it can be
    told from, else starts a new one; numbers follow the order."""
    n, H = orders.shape
    g = np.full((n, H), -1, dtype=int)
    blocked = np.zeros((n, H + 1, H), dtype=bool)  # per unit and group: apart from some
    count = np.zeros(n, dtype=int)
    rows = np.arange(n)
    cols = np.arange(H + 1)
    top = 1  # groups formed so far by any unit, plus one (the next new group)
    for t in range(H):
        h = orders[:, t]
        free = ~blocked[rows, :top, h] & (cols[None, :top] <= count[:, None])  # (n, top)
        gi = np.argmax(free, axis=1)  # first free group; the next new one is always free
        top = min(H + 1, max(top, int(gi.max()) + 2))
        count = np.maximum(count, gi + 1)
        g[rows, h] = gi
        blocked[rows, gi] |= ap[h]
    return g


def solves_further_first(engine: Engine, n_units: int) -> bool:
    """Whether a batch of n_units solves every hypothesis's further units
    (Engine._refine) before it starts: a batch of at least as many units as hypotheses
    leads with nearly every hypothesis somewhere, and solving them at once, on every
    core, beats solving them block by block while the other blocks wait."""
    return int(engine.inf["refine_top"]) > 0 and n_units >= len(engine.specs)


class BatchScorer:
    """Engine.diagnose vectorised across units (see infer.py for the likelihood).

    Units are grouped by the set S of observables they read. The kernel mixture of
    infer.score is a product over the readings in S (one logarithm per unit, hypothesis
    and drawn unit instead of one per reading; the same value to rounding):
    - a group of at least `table_min` units that takes every reading (so no advice,
      which needs the per-unit kernel) is scored whole through `table_loglik`, its
      hypotheses spread over the threads, then finished in blocks of 4 x `chunk`;
    - any other group in blocks of `chunk` units through `kernel_loglik`.
    The goodness-of-fit reference of infer.fit_pvalue does not depend on the readings,
    only on (hypothesis, S, reference): the engine keeps one per triple
    (Engine.fit_reference, shared with diagnose) and each unit's p-value is a lookup. A
    unit that no single hypothesis fits is tested against the reference with slips as
    Engine.diagnose does; only a unit that fails that too (Engine.diagnose then tries
    pairs of faults) goes to Engine.diagnose itself. The next-reading advice, bench
    notes (notes.bench_notes_many) and texts are the engine's own. The cyclic garbage
    collector is paused while the results are built (`_gc_paused`).
    """

    def __init__(self, engine: Engine, healthy_prior: float | None = None):
        from diag.core import infer

        self.engine = engine
        engine.build()
        inf = engine.inf
        hp = float(inf["healthy_prior"]) if healthy_prior is None else float(healthy_prior)
        if not 0.0 <= hp < 1.0:
            raise DiagError(f"healthy prior {hp} must lie in [0, 1)",
                            hint="e.g. --healthy-prior 0.02")
        self.hp = hp
        self.infer = infer
        self.U = engine._U
        self.specs = list(engine.specs)
        self.eps = float(inf["blunder"])
        self.alpha = float(inf["fit_alpha"])
        self.top = int(inf["fit_test_top"])
        self.fit_blunders = bool(inf["fit_blunders"])
        self.lo, self.W = engine._blunder
        self.spread = engine._spread
        with np.errstate(divide="ignore"):
            self.log_prior = np.log(engine._priors(hp, self.specs))
        self.valid = np.all(np.isfinite(self.U), axis=2)
        self.n = self.valid.sum(axis=1)
        self._deferred: list = []  # (unit, its pair candidates): `_block` leaves them to `run`
        # the meter's accuracy bound for the bench notes, remembered per shown value
        # (readings repeat across a batch: they are rounded to the display resolution)
        self._acc = functools.lru_cache(maxsize=1 << 16)(engine._accuracy_fn())
        self._ids = np.array([sp.id for sp in self.specs], dtype=object)
        self._healthy = ids_index(self.specs, "healthy")
        self._texts = np.array([sp.text for sp in self.specs], dtype=object)

    # -- one group of units reading the same observables --------------------------------

    def _prepare(self, key: tuple[int, ...]) -> dict:
        idx = np.array(key, dtype=int)
        d = len(idx)
        s = np.sqrt(1.0 + self.infer.bandwidth(self.U, d, self.spread)[:, idx] ** 2)
        scale = s * math.sqrt(2.0)                                   # (H, d)
        Ut = self.U[:, :, idx] / scale[:, None, :]                   # (H, K, d)
        return {"idx": idx, "s": s, "scale": scale,
                "Ut": np.ascontiguousarray(np.moveaxis(Ut, 2, 0)),  # (d, H, K)
                "logpeak": np.log((1.0 - self.eps) / (s * math.sqrt(2.0 * math.pi))),
                "c": self.eps / self.W[idx]}

    def _score(self, g: dict, u_read: np.ndarray):
        """Per-unit log-likelihood (n, H, K) and log-likelihood (n, H) of readings
        u_read (n, d) in u coordinates, on the ensemble's K units."""
        llk = kernel_loglik(u_read[:, None, :] / g["scale"][None], g["Ut"], g["logpeak"],
                            g["c"])
        llk = np.where(self.valid[None], llk, -np.inf)
        return llk, self.infer._logmeanexp(llk, self.n)

    def _pvalues(self, g: dict, post: np.ndarray, u_read: np.ndarray,
                 which: str = "main") -> np.ndarray:
        """Goodness of fit (n,) of a block: for each unit the largest predictive p-value
        among its `fit_test_top` leading hypotheses, against the ensemble's reference
        (`which` "main") or the one with slips ("slip"), from the engine's own kept
        reference of each (hypothesis, readings taken) (Engine.fit_reference)."""
        eng = self.engine
        ref = eng.ensemble.ref if which == "main" else eng._slip_ref()
        lead = np.argsort(-post, axis=1)[:, :self.top]
        pv = np.zeros(lead.shape)
        for h in np.unique(lead):
            rows, cols = np.nonzero(lead == h)
            fr = eng.fit_reference(self.U, int(h), g["idx"], ref, self.specs)
            pv[rows, cols] = self.infer.fit_pvalues_from(fr, u_read[rows])
        return pv.max(axis=1)

    def _odd(self, g: dict, u_read: np.ndarray, best: np.ndarray) -> list[list[str]]:
        """Engine._odd_readings for a block: the taken readings (n lists of "TP5 dc") that
        each unit's leading hypothesis `best` (n,) explains only as blunders (its
        per-reading log-likelihood, infer.per_reading, within e of log(eps / W))."""
        idx, eps = g["idx"], self.eps
        s = g["s"][best]                                              # (n, d)
        Ub = self.U[best][:, :, idx]                                  # (n, K, d)
        with np.errstate(invalid="ignore", over="ignore", under="ignore", divide="ignore"):
            z = (u_read[:, None, :] - Ub) / s[:, None, :]
            peak = (1.0 - eps) / (s * math.sqrt(2.0 * math.pi))
            mix = np.log(peak[:, None, :] * np.exp(-0.5 * z * z) + eps / self.W[idx])
        mix = np.where(np.isnan(mix), -np.inf, mix)
        per = self.infer._logmeanexp(np.moveaxis(mix, 2, 1), self.n[best][:, None])
        floor = np.log(eps / self.W[idx]) + 1.0
        names = [f"{o.point} {o.kind}" for o in (self.engine.observables[j] for j in idx)]
        return [[names[k] for k in np.nonzero(row < floor)[0]] for row in per]

    def _used(self, rs, idx, vals, rejected) -> Sequence[Reading]:
        """The readings diagnose uses (one per observable, the last given), in
        observable order unless each was given once as is."""
        if len(rs) == len(idx) and not rejected:  # each reading used once, as given
            return rs
        obs = self.engine.observables
        return [Reading(obs[j].point, obs[j].kind, v) for j, v in zip(idx, vals, strict=True)]

    def _finish(self, idx, rejected, llk, ll, post, pval, order, group, odd, nts,
                healthy_fits: bool, u_read: np.ndarray) -> Diagnosis:
        from diag.core.engine import Suspect

        eng = self.engine
        d = len(idx)
        fits = pval >= self.alpha
        specs = self.specs
        # groups_batch numbers the groups down this order already, which is the
        # first-appearance numbering Engine.diagnose gives its suspects
        gs = group[order]
        suspects = tuple(map(Suspect, self._ids[order].tolist(), post[order].tolist(),
                             gs.tolist(), self._texts[order].tolist()))
        if d < len(eng.observables):
            nxt = eng._advise(self.U, specs, self.infer.Scored(ll, llk, post), idx, order,
                              group, u_read)
        else:
            nxt = []
        fit_text = eng._verdict(fits, pval, d, specs[order[0]], False, odd)
        confirm = {specs[h].id: specs[h].confirm for h in order[:5]}
        return Diagnosis(d, fits, suspects, tuple(nxt), tuple(nts), fit_text,
                         tuple(rejected), {"p_value": pval, "pairs_tried": False,
                                           "confirm": confirm, "odd_readings": odd,
                                           "healthy_fits": healthy_fits})

    def _block(self, items: list[int], matched, units, g: dict, out: list,
               rows: slice | None = None) -> int:
        """Diagnose units `items` of group g into `out`, but for those that no single fault
        fits (pairs are tried for them), which go to `_deferred`: how many did. With
        `rows`, their readings and log-likelihoods are rows of the group's tables
        (g["u_all"], g["ll_all"]) and no per-unit kernel is kept (the group takes every
        reading: no advice needs it)."""
        from diag.core import notes

        if not len(g["idx"]):
            for i in items:
                out[i] = self.engine.diagnose(units[i], healthy_prior=self.hp)
            return 0
        if rows is None:
            vals = np.stack([matched[i][1] for i in items])
            u_read = self.engine._noise_obj.u(vals, g["idx"])
            llk, ll = self._score(g, u_read)
        else:  # a table group's rows: refined already by _refine_part (if at all)
            u_read, ll = g["u_all"][rows], g["ll_all"][rows]
            llk = None
        if rows is None and int(self.engine.inf["refine_top"]) > 0:
            # leading suspects on all their units
            ll = self.engine._refine(self.U, self.specs, g["idx"], u_read, self.log_prior,
                                     ll)
        post = self.infer.posterior(self.log_prior[None] + ll)
        pval = self._pvalues(g, post, u_read)
        # Engine.diagnose tries pairs of faults when no single one fits, not even with
        # one slip of the probe (the reference with blunders at the modelled rate)
        low = np.flatnonzero(pval < self.alpha)
        if len(low) and not self.fit_blunders:
            slip = self._pvalues(g, post[low], u_read[low], "slip")
            low = low[slip < self.alpha]
        pairs = set(low.tolist())
        pval = pval.tolist()
        orders = np.argsort(-post, axis=1, kind="stable")
        groups = groups_batch(self.engine._apart, orders)  # around each unit's leaders
        odd = self._odd(g, u_read, orders[:, 0])
        eng = self.engine
        healthy_fits = self._healthy_fits(g, u_read, pval, orders, groups)
        nts = notes.bench_notes_many(eng.case, eng.rules,
                                     [self._used(units[i], *matched[i]) for i in items],
                                     self._acc)
        for r, i in enumerate(items):
            if r in pairs:  # diagnosed once every block is done (`run`)
                self._deferred.append((i, eng._pair_candidates(
                    self.U, self.specs, post[r], g["idx"], u_read[r])))
                continue
            idx, _, rej = matched[i]
            out[i] = self._finish(idx, rej, None if llk is None else llk[r], ll[r], post[r],
                                  pval[r], orders[r], groups[r], odd[r], nts[r],
                                  bool(healthy_fits[r]), u_read[r])
        return len(pairs)

    def _healthy_fits(self, g: dict, u_read: np.ndarray, pval: list, orders: np.ndarray,
                      groups: np.ndarray) -> np.ndarray:
        """Per unit of a block (n,): the readings fit (p >= alpha), `healthy` shares the
        leader's group and a good unit itself passes the fit test (Engine.diagnose's
        "healthy_fits")."""
        eng = self.engine
        out = np.zeros(len(pval), dtype=bool)
        h = self._healthy
        if h is None or len(g["idx"]) == 0:
            return out
        rows = np.flatnonzero((np.asarray(pval) >= self.alpha)
                              & (groups[:, h] == groups[np.arange(len(pval)), orders[:, 0]]))
        if len(rows):
            fr = eng.fit_reference(self.U, h, g["idx"], eng.ensemble.ref, self.specs)
            out[rows] = self.infer.fit_pvalues_from(fr, u_read[rows]) >= self.alpha
        return out

    def _table_part(self, g: dict, rows: slice, hyps: list[int]) -> None:
        """Log-likelihoods of hypotheses `hyps` for the group's units `rows`
        (table_loglik), into g["ll_all"]."""
        g["ll_all"][rows, hyps] = table_loglik(
            g["u_all"][rows], g["scale"], g["Ut"], g["logpeak"], g["c"], self.valid,
            self.n, hyps)

    def _refine_part(self, g: dict, rows: slice) -> None:
        """The group's units `rows` with their leading suspects scored on their further
        units too (Engine._refine, through `table_loglik_units`), in g["ll_all"]."""
        g["ll_all"][rows] = self.engine._refine(
            self.U, self.specs, g["idx"], g["u_all"][rows], self.log_prior,
            g["ll_all"][rows], units_loglik=table_loglik_units)

    def run(self, units: Sequence[Sequence[Reading]], progress=None, cancelled=None,
            chunk: int = 64, threads: int | None = None, table_min: int = 256
            ) -> list[Diagnosis]:
        """Diagnose `units` (see the class). A group of at least `table_min` units that
        take every reading is scored through shared tables first (`table_loglik`, split
        by hypotheses over the threads), then finished block by block."""
        # the further units solve on forked workers while the tables, which need none, fill
        further = self.engine.build_further_later() \
            if solves_further_first(self.engine, len(units)) else Later(lambda: None)
        try:
            return self._run(units, further, progress, cancelled, chunk, threads, table_min)
        except BaseException:
            further.cancel()
            raise

    def _run(self, units, further: Later, progress, cancelled, chunk, threads, table_min
             ) -> list[Diagnosis]:
        from concurrent.futures import ThreadPoolExecutor

        matched = [self.engine._match(rs) for rs in units]
        by_key: dict[tuple[int, ...], list[int]] = {}
        for i, (idx, _, _) in enumerate(matched):
            by_key.setdefault(tuple(int(j) for j in idx), []).append(i)
        if threads is None:
            threads = max(1, min(4, os.cpu_count() or 1))
        H = self.U.shape[0]
        M = len(self.engine.observables)
        out: list = [None] * len(units)
        tables, refines, blocks = [], [], []  # (weight in units, function, arguments)
        for key, members in by_key.items():
            g = self._prepare(key)
            use = len(key) == M and len(members) >= max(table_min, 1)
            if use:
                vals = np.stack([matched[i][1] for i in members])
                distinct = sum(len(np.unique(vals[:, j])) for j in range(len(key)))
                use = distinct <= _TABLE_SHARE * vals.size
            if use:
                g["u_all"] = self.engine._noise_obj.u(vals, g["idx"])
                g["ll_all"] = np.empty((len(members), H))
                parts = max(threads, H // 16)  # a few hypotheses per task
                pieces = math.ceil(distinct * self.U.shape[1] * 8 / _TABLE_BYTES)
                step_rows = math.ceil(len(members) / pieces)
                for a in range(0, len(members), step_rows):
                    rows = slice(a, min(a + step_rows, len(members)))
                    n_rows = rows.stop - rows.start
                    for hs in np.array_split(np.arange(H), parts):
                        tables.append((n_rows * len(hs) / H, self._table_part,
                                       (g, rows, hs.tolist())))
                if int(self.engine.inf["refine_top"]) > 0:  # once the tables are done
                    for rs in np.array_split(np.arange(len(members)), threads):
                        if len(rs):
                            refines.append((len(rs), self._refine_part,
                                            (g, slice(int(rs[0]), int(rs[-1]) + 1))))
                big = 4 * chunk  # no per-unit kernel to hold: larger blocks
                for b in range(0, len(members), big):
                    blocks.append((len(members[b:b + big]), self._block,
                                   (members[b:b + big], matched, units, g, out,
                                    slice(b, b + big))))
            else:
                for b in range(0, len(members), chunk):
                    blocks.append((len(members[b:b + chunk]), self._block,
                                   (members[b:b + chunk], matched, units, g, out)))
        phases = (tables, refines, blocks)  # each complete before the next starts
        total = max(sum(w for ph in phases for w, _, _ in ph), 1)
        state = {"done": 0.0}

        def step(w: float) -> None:
            state["done"] += w
            if progress is not None:
                progress(min(1.0, state["done"] / total))

        def check() -> None:
            if cancelled is not None and cancelled():
                raise InterruptedError("triage cancelled")

        self._deferred.clear()
        if threads <= 1:  # in the calling thread
            for n, phase in enumerate(phases):
                if n == 1:
                    further.get()
                for w, f, args in phase:
                    check()
                    step(w - (f(*args) or 0))
        else:
            with ThreadPoolExecutor(max_workers=threads) as pool:
                for n, phase in enumerate(phases):
                    if n == 1:
                        further.get()
                    futures = [(w, pool.submit(f, *args)) for w, f, args in phase]
                    for w, fut in futures:
                        try:
                            check()
                        except InterruptedError:
                            for _, rest in futures:
                                rest.cancel()
                            raise
                        step(w - (fut.result() or 0))  # a block's deferred units later
        # Units no single fault fits: Engine.diagnose tries pairs of faults for them. The
        # pairs of all of them are solved first, at once, from this thread alone (so on
        # forked workers where those are used); each unit then finds its own solved.
        if self._deferred:
            self._solve_deferred_pairs(matched)
        for i, _ in self._deferred:
            check()
            out[i] = self.engine.diagnose(units[i], healthy_prior=self.hp)
            step(1)
        return out

    def _solve_deferred_pairs(self, matched) -> None:
        """For the units left to the end (`_deferred`): their pairs of faults solved in
        one go, then the further units of the pairs that lead any of them (by the K
        units, as Engine._refine picks them) in a second; each unit's `Engine.diagnose`
        then finds what it needs solved instead of solving it a pair at a time."""
        eng, infer = self.engine, self.infer
        pairs = list({p.id: p for _, ps in self._deferred for p in ps}.values())
        if not pairs:
            return
        Up = dict(zip([p.id for p in pairs], eng._noise_obj.u(eng._samples_of(pairs)),
                      strict=True))
        H0, top = len(self.specs), int(eng.inf["refine_top"])
        lead: dict[str, object] = {}
        for i, cands in self._deferred:
            idx, vals, _ = matched[i]
            if not cands or top <= 0 or not len(idx):
                continue
            U2 = np.concatenate([self.U, np.stack([Up[p.id] for p in cands])])
            specs = self.specs + list(cands)
            with np.errstate(divide="ignore"):
                lp = np.log(eng._priors(self.hp, specs))
            sc = infer.score(U2, idx, eng._noise_obj.u(vals, idx), lp, self.eps, self.W,
                             eng._spread_for(U2))
            for h in np.argsort(-(lp + sc.loglik), kind="stable")[:top]:
                if h >= H0 and np.isfinite(lp[h] + sc.loglik[h]):
                    lead[specs[h].id] = specs[h]
        if lead:
            eng._further_u(list(lead.values()))


def triage(engine: Engine, units: Mapping[str, Sequence[Reading]],
           rejected: Sequence[RefusedRow | DiagError | str] = (),
           progress: Callable[[float], None] | None = None,
           cancelled: Callable[[], bool] | None = None,
           healthy_prior: float | None = None, threads: int | None = None) -> TriageResult:
    """Triage a batch: `units` maps unit id -> its readings (insertion order = order of
    first appearance in the file); `rejected` are the refused rows of the file
    (`refused_rows`, which ties each to its unit; a DiagError or a message given here
    stays unplaced); `threads` as in `rank_batch`."""
    refused = refused_rows(rejected)
    names = list(units)
    readings = [tuple(units[n]) for n in names]
    measured = set()
    for rs in readings:
        measured.update((r.point, r.kind) for r in rs)
    order = [(o.point, o.kind) for o in engine.case.observables if (o.point, o.kind) in
             measured]
    with _gc_paused():
        diags = rank_batch(engine, readings, progress=progress, cancelled=cancelled,
                           healthy_prior=healthy_prior, threads=threads)
        own: dict[str, list[RefusedRow]] = {}
        for r in refused:
            if r.unit is not None:
                own.setdefault(r.unit, []).append(r)
        results = []
        for name, rs, d in zip(names, readings, diags, strict=True):
            have = {(r.point, r.kind) for r in rs}
            results.append(UnitResult(unit=name, readings=rs, diagnosis=d,
                                      status=_status(d),
                                      missing=tuple(k for k in order if k not in have),
                                      refused=tuple(own.get(name, ()))))
        res = TriageResult(case=engine.case, engine=engine, units=tuple(results),
                           rejected=refused)
        object.__setattr__(res, "summary", summarise(res))
    return res


def summarise(res: TriageResult) -> dict[str, Any]:
    """Counts across the batch (JSON-ready).

    by_fault / by_part: units whose leading suspect is that fault / involves that part
    (units that fit and are not healthy), with `expected`, the sum over those units of the
    posterior p of the fault (of every fault involving the part), and by_fault with the
    units' names (`unit_names`, batch order); most units first. Refused rows:
    `rows_rejected` counts them all, `units_with_rows_rejected` names the units that lost
    rows (each unit's own rows are in its `rejected` list), `not_triaged` the units none
    of whose rows could be used, `rejected` the rows that belong to no triaged unit.
    `signal_warning`: Engine.signal_warning when any unit read AC, else "".
    `stability_warning`: Engine.stability_warning (the case's balance point is one a
    real unit leaves), else "".
    """
    hyps = {h.id: h for h in res.engine.ensemble.hypotheses}
    by_fault: Counter = Counter()
    by_part: Counter = Counter()
    names: dict[str, list[str]] = {}  # fault id -> the units it leads, in batch order
    exp: dict[str, float] = {}  # fault id -> sum of its p over the faulty units
    for u in res.units:
        if u.status != "fault":
            continue
        top = u.top.fault
        by_fault[top] += 1
        names.setdefault(top, []).append(u.unit)
        for ref in _parts(hyps, top):
            by_part[ref] += 1
        get = exp.get
        for f, p, _, _ in u.diagnosis.suspects:
            if p > 0:
                exp[f] = get(f, 0.0) + p
    exp.pop("healthy", None)
    exp_fault: Counter = Counter(exp)
    exp_part: Counter = Counter()  # a part's sum over every fault involving it
    for f, e in exp.items():
        for ref in _parts(hyps, f):
            exp_part[ref] += e

    def table(counts: Counter, expected: Counter, key: str) -> list[dict]:
        rows = [{key: k, "units": n, "expected": round(float(expected[k]), 3)}
                for k, n in counts.items()]
        rows.sort(key=lambda r: (-r["units"], -r["expected"], r[key]))
        return rows

    fault_rows = table(by_fault, exp_fault, "fault")
    for r in fault_rows:
        r["unit_names"] = names[r["fault"]]

    # faults a "no fault found" unit may still have: those its readings cannot tell from
    # the healthy circuit (healthy's group in its diagnosis), p summed over those units
    look: Counter = Counter()
    for u in res.units:
        if u.status != "healthy":
            continue
        g = next(s.group for s in u.diagnosis.suspects if s.fault == "healthy")
        for f, p, grp, _ in u.diagnosis.suspects:
            if grp == g and f != "healthy" and p > 0:
                look[f] += p
    ens = res.engine.ensemble
    ids = [h.id for h in ens.hypotheses]
    hg = int(ens.group[ids.index("healthy")]) if "healthy" in ids else None
    split = res.engine.splitters().get(hg) if look and hg is not None else None

    return {
        "units": len(res.units),
        "rows_rejected": len(res.rejected),
        "faulty": sum(u.status == "fault" for u in res.units),
        "by_fault": fault_rows,
        "by_part": table(by_part, exp_part, "part"),
        "no_fit": [u.unit for u in res.units if u.status == "no-fit"],
        "healthy": [u.unit for u in res.units if u.status == "healthy"],
        "undecided": [u.unit for u in res.units if u.status == "undecided"],
        "healthy_lookalikes": [{"fault": f, "expected": round(float(e), 3)}
                               for f, e in sorted(look.items(), key=lambda x: (-x[1], x[0]))
                               if e >= 0.0005],
        "healthy_split_by": split,
        "incomplete": [{"unit": u.unit, "missing": [f"{p} {k}" for p, k in u.missing]}
                       for u in res.units if u.incomplete],
        "units_with_rows_rejected": [u.unit for u in res.units if u.refused],
        "not_triaged": list(dict.fromkeys(r.unit for r in res.unplaced if r.unit)),
        "rejected": [r.text for r in res.unplaced],
        # the case's tone too big for small-signal AC predictions, once any unit read AC
        "signal_warning": (res.engine.signal_warning() if any(
            r.kind == "ac" for u in res.units for r in u.readings) else ""),
        "stability_warning": res.engine.stability_warning(),
    }


def _parts(hyps: Mapping, fault_id: str) -> tuple[str, ...]:
    h = hyps.get(fault_id)
    if h is not None and h.parts:
        return tuple(h.parts)
    if fault_id == "healthy":
        return ()
    return tuple(m.split(":")[0] for m in fault_id.split("+"))


# ---- cautions and renderings ---------------------------------------------------------


def caution_lines(rules) -> list[str]:
    """The safety cautions of rules/cautions.yaml (load_rules()["cautions"], read through
    session.load_cautions, which checks them) as one line each, "title: text", with the
    closing sentence that defers to local codes last."""
    from diag.core.session import load_cautions

    cautions, defer = load_cautions(rules)
    out = [" ".join(f"{c.title}: {c.text}".split()) for c in cautions]
    if defer:
        out.append(" ".join(defer.split()))
    return out


def to_json(res: TriageResult, case_path: str, cautions: Sequence[str] = (),
            top: int | None = None) -> dict[str, Any]:
    """SPEC section 5: {"case", "units": [diagnose object + "unit"], "summary"}; extra
    per-unit fields `status` and `missing`, the unit's refused rows at the head of its
    `rejected` list (as `diagnose --json` gives a file's refused rows), and a top-level
    `cautions` list, last."""
    units = []
    for u in res.units:
        obj = {"unit": u.unit}
        obj.update(u.diagnosis.to_json(case_path, top=top))
        obj["unit"] = u.unit
        obj["status"] = u.status
        obj["missing"] = [f"{p} {k}" for p, k in u.missing]
        obj["rejected"] = [r.text for r in u.refused] + obj["rejected"]
        units.append(obj)
    return {"case": case_path, "units": units, "summary": res.summary,
            "cautions": list(cautions)}


# How each status reads in the Markdown report (the JSON keeps the STATUSES words).
STATUS_TEXT = {"fault": "fault", "healthy": "no fault found", "no-fit": "no fit",
               "undecided": "undecided"}
# Suspects after the first are listed in the Markdown units table from this p up (below
# it they would show as 0.00).
SHOWN_P = 0.005
# Unit names listed per fault in the Markdown report before "and N more".
NAMES_SHOWN = 12


def _next_text(d: Diagnosis) -> str:
    return f"{d.next[0].point} {d.next[0].kind}" if d.next else "-"


def _suspects_text(d: Diagnosis, top: int) -> str:
    shown = [s for i, s in enumerate(d.suspects[:top]) if i == 0 or s.p >= SHOWN_P]
    return ", ".join(f"{s.fault} {s.p:.2f}" for s in shown)


def _names(names: Sequence[str], most: int = NAMES_SHOWN) -> str:
    more = f" and {len(names) - most} more" if len(names) > most else ""
    return ", ".join(names[:most]) + more


def _rows_word(n: int) -> str:
    return f"{n} row{'s' if n != 1 else ''}"


def _row_mark(rows: Sequence[RefusedRow]) -> str:
    """'row 50 refused', 'rows 50, 61 refused' for a unit's refused rows."""
    nums = [str(r.row) for r in rows if r.row is not None]
    if not nums:
        return f"{_rows_word(len(rows))} refused"
    return f"row{'s' if len(nums) > 1 else ''} {', '.join(nums)} refused"


def to_markdown(res: TriageResult, case_path: str, cautions: Sequence[str] = (),
                top: int = 3, list_refused: bool = True) -> str:
    """A Markdown report: what was found, the parts to have at hand, the lists to act on,
    one row per unit, and the safety cautions last. Sections with nothing in them are
    left out (the opening counts say so). `list_refused`: list every refused row with
    its message; False when the messages are already on the same screen (a terminal's
    stderr), and the report then counts them and says where they are."""
    s = res.summary
    w = io.StringIO()
    n_ref = s["rows_rejected"]
    w.write(f"# Batch triage: {res.case.title}\n\nCase `{case_path}`: {s['units']} units; "
            f"{s['faulty']} with a fault found, {len(s['no_fit'])} fit no modelled fault, "
            f"{len(s['healthy'])} with no fault found, "
            + (f"{len(s['undecided'])} undecided, " if s["undecided"] else "")
            + f"{len(s['incomplete'])} with readings missing.")
    if n_ref:
        w.write(f" {_rows_word(n_ref)} of the batch file refused (see Refused rows).")
    w.write("\n\n")
    for key in ("stability_warning", "signal_warning"):
        if s.get(key):
            w.write(f"**{s[key]}**\n\n")
    if s["by_fault"]:
        w.write("## Faults found\n\nMost frequent first. units: the units whose leading "
                "suspect it is; expected: its p summed over the units with a fault found "
                "(how many units to expect it in).\n\n"
                "| fault | units | expected | which units |\n|---|---:|---:|---|\n")
        for r in s["by_fault"]:
            w.write(f"| {r['fault']} | {r['units']} | {r['expected']:.1f} | "
                    f"{_names(r['unit_names'])} |\n")
        w.write("\n## Parts to have at hand\n\nunits: the units whose leading suspect "
                "involves the part; expected: the p of every fault involving it, summed "
                "over the units with a fault found.\n\n"
                "| part | units | expected |\n|---|---:|---:|\n")
        for r in s["by_part"]:
            w.write(f"| {r['part']} | {r['units']} | {r['expected']:.1f} |\n")
        w.write("\n")
    if s["no_fit"]:
        w.write("## Send to engineering (no modelled fault fits)\n\n"
                + _names(s["no_fit"], len(s["no_fit"])) + "\n\n")
    if s["undecided"]:
        w.write(f"## Undecided\n\nNo fault is more likely than not (the leading group "
                f"holds p {FOUND_P:g} or less): take the next reading each unit's row "
                "shows.\n\n" + _names(s["undecided"], len(s["undecided"])) + "\n\n")
    if s["incomplete"]:
        w.write("## Incomplete readings\n\nThese units lack readings the rest of the "
                "batch has; taking them makes their ranking surer.\n\n")
        for r in s["incomplete"]:
            w.write(f"- {r['unit']}: missing {', '.join(r['missing'])}\n")
        w.write("\n")
    if s["healthy"]:
        w.write("## No fault found\n\n" + _names(s["healthy"], len(s["healthy"])) + "\n\n")
    look = s.get("healthy_lookalikes") or []
    # named down to what shows as 0.1 units (the rest only counted)
    named = [r for r in look[:LOOKALIKES] if r["expected"] >= 0.05] or look[:1]
    if s["healthy"] and look:
        shown = ", ".join(f"{r['fault']} {r['expected']:.1f}" for r in named)
        more = f" and {len(look) - len(named)} more" if len(look) > len(named) else ""
        w.write("These units read like a good one, but the readings cannot tell a good "
                "unit from these faults, which may still be present (expected number of "
                f"units, the sum of p over them): {shown}{more}.")
        if s.get("healthy_split_by"):
            w.write(f" To tell them apart: {s['healthy_split_by'].rstrip('.')}.")
        w.write(" If the complaint persists, check those parts before returning a unit "
                "as good.\n\n")
    if res.rejected:
        w.write("## Refused rows\n\n")
        if s.get("not_triaged"):
            w.write("Not triaged, no row of theirs could be used: "
                    f"{', '.join(s['not_triaged'])}.\n\n")
        if list_refused:
            w.write("Each row was left out; the other readings of its unit were used.\n\n")
            for r in res.rejected:
                w.write(f"- {r.text}\n")
        else:
            w.write(f"{_rows_word(n_ref)} refused, each shown above with its row and "
                    "unit; the other readings of those units were used.\n")
        w.write("\n")
    w.write("## Units\n\n| unit | status | top suspects (p) | next reading |\n"
            "|---|---|---|---|\n")
    for u in res.units:
        d = u.diagnosis
        status = [STATUS_TEXT.get(u.status, u.status)]
        if u.incomplete:
            status.append("readings missing")
        if u.refused:
            status.append(_row_mark(u.refused))
        w.write(f"| {u.unit} | {'; '.join(status)} | {_suspects_text(d, top)} | "
                f"{_next_text(d)} |\n")
    if cautions:
        w.write("\n## Safety\n\n")
        for c in cautions:
            w.write(f"- {c}\n")
    return w.getvalue()


CSV_FIELDS = ("unit", "status", "fits", "readings_used", "fault_1", "p_1", "fault_2", "p_2",
              "fault_3", "p_3", "next_point", "next_kind", "next_bits", "missing",
              "rows_refused")
# First cell of the rows after the units: a refused row's message, a safety caution.
CSV_REFUSED = "# refused row"
CSV_CAUTION = "# caution"


def to_csv(res: TriageResult, cautions: Sequence[str] = ()) -> str:
    """The header, one row per unit (CSV_FIELDS; `rows_refused` the unit's refused row
    numbers), a blank line, then two-cell rows: each refused row (CSV_REFUSED, its
    message) and last the cautions (CSV_CAUTION, the caution). Every cell is quoted as
    needed, so each message or caution is one cell; a reader that skips lines starting
    with `#` (e.g. pandas comment="#") gets only the units."""
    w = io.StringIO()
    cw = csv.DictWriter(w, fieldnames=CSV_FIELDS, lineterminator="\n")
    cw.writeheader()
    for u in res.units:
        d = u.diagnosis
        row = {"unit": u.unit, "status": u.status, "fits": int(bool(d.fits)),
               "readings_used": d.readings_used,
               "missing": " ".join(f"{p}:{k}" for p, k in u.missing),
               "rows_refused": " ".join(str(r.row) for r in u.refused if r.row is not None)}
        for i, sus in enumerate(d.suspects[:3], start=1):
            row[f"fault_{i}"] = sus.fault
            row[f"p_{i}"] = f"{sus.p:.4f}"
        if d.next:
            row.update(next_point=d.next[0].point, next_kind=d.next[0].kind,
                       next_bits=f"{d.next[0].bits:.3f}")
        cw.writerow(row)
    tail = [(CSV_REFUSED, r.text) for r in res.rejected]
    tail += [(CSV_CAUTION, c) for c in cautions]
    if tail:
        w.write("\n")
        csv.writer(w, lineterminator="\n").writerows(tail)
    return w.getvalue()
