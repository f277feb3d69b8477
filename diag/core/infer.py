"""Likelihood, posterior, goodness of fit and groups over an ensemble of drawn units.

Every reading is compared in a noise-scaled coordinate: with the reading's standard
deviation sigma(y) = sqrt(b^2 + (a*y)^2) (meter error plus model imperfection; a relative,
b absolute, per observable), u(y) = asinh(a*y/b)/a has unit noise everywhere (du/dy =
1/sigma(y)), so volts near 0 and volts near the rail weigh alike. The Jacobian du/dy is
the same for every hypothesis and cancels in the posterior.

Likelihood of hypothesis h (samples U[h, k, j], K drawn units; S = readings taken):

    p(u_S | h) = mean_k  prod_{j in S} [ (1-eps) N(u_j; U_hkj, s_hj^2) + eps / W_j ]

a kernel mixture over the drawn units (so correlations between points are kept), kernel
width s_hj^2 = 1 + bw_hj^2 (unit noise plus a Scott's-rule bandwidth over the units'
spread, narrowed per hypothesis by leave-one-out likelihood cross-validation, see
`kernel_spread`), a blunder probability eps per reading spread uniformly over the
observable's range W_j. Only taken readings count.

Goodness of fit (`fit_pvalue`): a predictive p-value against readings simulated from h's
own units with unit noise and blunders (leave-one-out: the simulating unit is left out of
the kernel), so "does not fit" has a false-alarm rate of alpha whenever the model holds,
on any case. Two statistics (with Scott's width: calibrated by their own reference, and
smoother), combined by the smaller of their p-values, itself calibrated on the same
reference: log p(u_S | h), which sees an overall misfit, and the least conditional
log-likelihood of one reading given the others, log p(u_j | u_S-j, h), which sees one
reading the others' best explanation misses (a second fault or a bridge that shows at one
point only, a slipped probe).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Noise:
    """Per-observable reading noise: sigma(y) = sqrt(b^2 + (a y)^2); a (M,) relative,
    b (M,) in volts or amperes."""

    a: np.ndarray
    b: np.ndarray

    def u(self, y: np.ndarray, j: np.ndarray | slice | None = None) -> np.ndarray:
        """Noise-scaled coordinate of values y (..., M) or of y at observables j."""
        a = self.a if j is None else self.a[j]
        b = self.b if j is None else self.b[j]
        return np.arcsinh(a * np.asarray(y, dtype=float) / b) / a

    def y(self, u: np.ndarray, j=None) -> np.ndarray:
        """Inverse of `u`."""
        a = self.a if j is None else self.a[j]
        b = self.b if j is None else self.b[j]
        return np.sinh(a * np.asarray(u, dtype=float)) * b / a


@dataclass(frozen=True)
class Scored:
    """Result of scoring the readings: log-likelihood per hypothesis (H,), per unit
    (H, K; -inf for failed units), posterior (H,)."""

    loglik: np.ndarray
    loglik_k: np.ndarray
    posterior: np.ndarray


def blunder_range(U: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Lower edge and width (M,) of the blunder range in u units: the span of every
    hypothesis's units plus ten noise widths each side."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        lo = np.nanmin(U, axis=(0, 1))
        hi = np.nanmax(U, axis=(0, 1))
    ok = np.isfinite(hi - lo)
    return np.where(ok, lo, 0.0) - 10.0, np.where(ok, hi - lo, 0.0) + 20.0


def nan_quantile(x: np.ndarray, qs, axis: int = 1) -> np.ndarray:
    """Quantiles (len(qs), ...) along `axis`, NaN ignored (linear interpolation, as
    numpy's default); NaN where a slice has no finite value. Much faster than
    np.nanquantile on batched arrays."""
    xs = np.sort(np.moveaxis(np.asarray(x, float), axis, -1), axis=-1)  # NaN sort last
    n = np.sum(np.isfinite(xs), axis=-1)
    out = []
    for q in np.atleast_1d(qs):
        pos = q * np.maximum(n - 1, 0)
        lo = np.floor(pos).astype(int)
        hi = np.minimum(lo + 1, np.maximum(n - 1, 0))
        f = pos - lo
        a = np.take_along_axis(xs, lo[..., None], -1)[..., 0]
        b = np.take_along_axis(xs, hi[..., None], -1)[..., 0]
        with np.errstate(invalid="ignore"):
            v = a + f * (b - a)
        out.append(np.where(n > 0, np.where(f > 0, v, a), np.nan))
    return np.stack(out)


def spread(U: np.ndarray) -> np.ndarray:
    """Robust spread (H, M) of each hypothesis's units, u units: the larger of IQR / 1.349
    and the 10-90 % range / 2.563 (both the standard deviation of a normal law). A fault
    whose value ranges over decades puts a share of its units in a long tail (a leak
    that matters only at its low end) which the IQR alone does not see; a kernel that
    narrow around those few tail units makes the likelihood hinge on where they happened
    to be drawn."""
    q10, q25, q75, q90 = nan_quantile(U, [0.10, 0.25, 0.75, 0.90], axis=1)
    with np.errstate(invalid="ignore"):
        return np.maximum(np.nan_to_num(q75 - q25) / 1.349, np.nan_to_num(q90 - q10) / 2.563)


def bandwidth(U: np.ndarray, d: int, spread_: np.ndarray | None = None) -> np.ndarray:
    """Scott's-rule kernel bandwidth (H, M): K^(-1/(d+4)) times the robust spread of each
    hypothesis's units (d = readings taken), u units; `spread_` replaces that spread
    (the engine passes `kernel_spread`'s)."""
    K = np.sum(np.isfinite(U), axis=1).clip(min=1)
    sp = spread(U) if spread_ is None else spread_
    return sp * K ** (-1.0 / (max(d, 1) + 4))


def kernel_spread(U: np.ndarray, z: np.ndarray, W: np.ndarray, eps: float,
                  grid: np.ndarray, sims: int = 128, chunk: int = 4) -> np.ndarray:
    """`spread(U)` times a factor per hypothesis (H, M): `kernel_choice` of
    `kernel_scores` (the two halves, so that the second, which needs every hypothesis's
    units for W, can follow the first worked out block by block where the units were
    solved). The factor is chosen from `grid` by
    leave-one-out likelihood cross-validation (Habbema, Hermans and van den Broek 1974;
    Duin 1976): a reading simulated from each of a hypothesis's first `sims` units with
    unit noise (z (>= sims, M) standard normal) is scored by the Gaussian kernel of
    `score` (all readings taken) over the hypothesis's other units, and the factor with
    the highest mean log-likelihood is kept. A reading no other unit comes near counts
    as the kernel's blunder floor, sum_j log(eps / W_j), at worst, as in `score`.

    Scott's rule assumes a normal cloud. A fault whose value ranges over decades puts
    its units along a curve, where the rule's width blurs the curve over many noise
    widths and the density of a reading on it comes out far too low (the fault then
    loses to any narrow hypothesis nearby); cross-validation finds the width the units
    support."""
    return kernel_choice(kernel_scores(U, z, grid, sims, chunk), U, W, eps, grid)


def kernel_scores(U: np.ndarray, z: np.ndarray, grid: np.ndarray, sims: int = 128,
                  chunk: int = 4) -> np.ndarray:
    """The leave-one-out log-likelihoods (H, C, S) of `kernel_spread`, per hypothesis of U
    (H, K, M), kernel factor of `grid` (C) and simulated reading (S = min(sims, K)), with
    no blunder floor; -inf where nothing was scored."""
    H, K, M = U.shape
    sp = spread(U)
    grid = np.asarray(grid, dtype=float)
    ok = np.all(np.isfinite(U), axis=2)                               # (H, K)
    n = ok.sum(axis=1)
    bw = sp * np.maximum(n, 1)[:, None] ** (-1.0 / (M + 4))           # (H, M)
    S = min(sims, K)
    out = np.full((H, len(grid), S), -np.inf)
    diag = np.arange(S)
    for a in range(0, H, chunk):
        b = min(H, a + chunk)
        Uc = np.where(ok[a:b, :, None], U[a:b], 0.0)                  # (h, K, M)
        sim = Uc[:, :S] + z[None, :S]                                 # (h, S, M)
        s2 = 1.0 + (grid[None, :, None] * bw[a:b, None, :]) ** 2      # (h, C, M)
        w = 0.5 / s2
        # q = sum_m w (sim - U)^2, expanded so that no (S, K, M) array is formed
        cross = np.matmul(sim[:, None] * w[:, :, None, :],
                          np.swapaxes(Uc, 1, 2)[:, None])             # (h, C, S, K)
        q = (np.einsum("hsm,hcm->hcs", sim * sim, w)[..., None]
             + np.einsum("hkm,hcm->hck", Uc * Uc, w)[:, :, None, :] - 2.0 * cross)
        llk = (-0.5 * np.sum(np.log(2.0 * math.pi * s2), axis=2))[:, :, None, None] - q
        llk[np.broadcast_to(~ok[a:b, None, None, :], llk.shape)] = -np.inf
        llk[:, :, diag, diag] = -np.inf                               # leave one out
        m = np.max(llk, axis=3, keepdims=True)
        m = np.where(np.isfinite(m), m, 0.0)
        with np.errstate(divide="ignore"):
            loo = (np.log(np.sum(np.exp(llk - m), axis=3)) + m[..., 0]
                   - np.log(np.maximum(n[a:b] - 1, 1))[:, None, None])  # (h, C, S)
        out[a:b] = np.where(ok[a:b, None, :S], loo, -np.inf)
    return out


def kernel_choice(scores: np.ndarray, U: np.ndarray, W: np.ndarray, eps: float,
                  grid: np.ndarray) -> np.ndarray:
    """`kernel_spread` from its `kernel_scores` (H, C, S) of the units U (H, K, M): each
    score raised to the blunder floor sum_j log(eps / W_j), the factor of `grid` with
    the highest sum kept (1 for a hypothesis with under three valid units)."""
    floor = float(np.sum(np.log(eps / W)))
    grid = np.asarray(grid, dtype=float)
    n = np.all(np.isfinite(U), axis=2).sum(axis=1)
    S = scores.shape[2]
    ok = np.all(np.isfinite(U[:, :S]), axis=2)                        # (H, S)
    cv = np.sum(np.where(ok[:, None, :], np.maximum(scores, floor), 0.0), axis=2)  # (H, C)
    fac = np.where(n >= 3, grid[np.argmax(cv, axis=1)], 1.0)
    return spread(U) * fac[:, None]


def _kernel_values(U_S: np.ndarray, u_S: np.ndarray, s: np.ndarray, eps: float,
                   W_S: np.ndarray) -> np.ndarray:
    """Per-unit, per-reading kernel (..., K, d), (1 - eps) N(u; U, s^2) + eps / W, of
    readings u_S (..., d) under units U_S (..., K, d) with kernel widths s (..., d); NaN
    where a unit failed. In the dtype of the arguments."""
    with np.errstate(invalid="ignore", over="ignore", under="ignore"):
        v = u_S[..., None, :] - U_S
        v /= s[..., None, :]
        np.square(v, out=v)
        v *= -0.5
        np.exp(v, out=v)
        v *= (1.0 - eps) / (s[..., None, :] * math.sqrt(2.0 * math.pi))
        v += eps / W_S
    return v


def _log_kernel_terms(U_S: np.ndarray, u_S: np.ndarray, s: np.ndarray, eps: float,
                      W_S: np.ndarray) -> np.ndarray:
    """The logarithm of `_kernel_values` (..., K, d); NaN where a unit failed."""
    v = _kernel_values(U_S, u_S, s, eps, W_S)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.log(v, out=v)


def _log_kernel(U_S: np.ndarray, u_S: np.ndarray, s: np.ndarray, eps: float,
                W_S: np.ndarray) -> np.ndarray:
    """Per-unit log-likelihood (..., K) of readings u_S (..., d) under units U_S
    (..., K, d) with kernel widths s (..., d)."""
    out = np.sum(_log_kernel_terms(U_S, u_S, s, eps, W_S), axis=-1)
    return np.where(np.isnan(out), -np.inf, out)


def _fit_statistics(v: np.ndarray, n: np.ndarray, left_out: np.ndarray | None = None
                    ) -> tuple[np.ndarray, np.ndarray]:
    """The two goodness-of-fit statistics from per-reading kernel values v (..., K, d)
    (`_kernel_values`; NaN for a failed unit), units `left_out` (..., K) not counted,
    n units counted: the log-likelihood of all the readings, L = log mean_k prod_j, and
    the least conditional log-likelihood of one reading given the others,
    min_j [L - log mean_k prod_{i != j}] (d >= 2; L itself for one reading). The first
    sees an overall misfit, the second one reading that the others' best explanation
    misses."""
    with np.errstate(invalid="ignore", divide="ignore"):
        full = np.sum(np.log(v), axis=-1)                              # (..., K)
        if left_out is not None:
            full[left_out] = -np.inf
        full[np.isnan(full)] = -np.inf
        L = _logmeanexp(full, n)
        if v.shape[-1] < 2:
            return L, L
        # L - log mean_k exp(full_k - t_kj) = -log sum_k w_k / v_kj, w the units'
        # weights softmax(full); 1 / v stays finite: the blunder term bounds v below
        ok = np.isfinite(full)
        m = np.max(np.where(ok, full, -np.inf), axis=-1, keepdims=True)
        w = np.where(ok, np.exp(full - np.where(np.isfinite(m), m, 0.0)), 0.0)
        w /= np.where(w.sum(axis=-1, keepdims=True) > 0, w.sum(axis=-1, keepdims=True), 1.0)
        E = np.reciprocal(v)
        if not ok.all():
            E[~ok] = 0.0  # weight 0 already; keeps a failed unit's NaN out of the sum
        with np.errstate(over="ignore"):
            cond = -np.log(np.einsum("...k,...kd->...d", w.astype(E.dtype), E))
        cond = np.where(np.isfinite(L)[..., None], cond, np.nan)
    return L, np.min(np.where(np.isnan(cond), np.inf, cond), axis=-1)


def _fit_statistics_of(U: np.ndarray, u: np.ndarray, s: np.ndarray, eps: float,
                       W_S: np.ndarray, n: np.ndarray, left_out: np.ndarray | None = None
                       ) -> tuple[np.ndarray, np.ndarray]:
    """`_fit_statistics` (each (r,)) of readings u (r, d) under units U (K, d) with
    widths s (d,) (`_kernel_values`), a few rows at a time so that the kernel values
    stay near the CPU (_FIT_TILE; the same figures as all rows at once); `left_out`
    (r, K) as in `_fit_statistics`."""
    rows = max(1, _FIT_TILE // max(U.size, 1))
    L, cond = np.empty(len(u), dtype=float), np.empty(len(u), dtype=float)
    for a in range(0, len(u), rows):
        b = min(a + rows, len(u))
        v = _kernel_values(U[None], u[a:b], s[None], eps, W_S)          # (rows, K, d)
        L[a:b], cond[a:b] = _fit_statistics(v, n, None if left_out is None
                                            else left_out[a:b])
    return L, cond


def _logmeanexp(x: np.ndarray, n: np.ndarray) -> np.ndarray:
    m = np.max(x, axis=-1)
    safe = np.where(np.isfinite(m), m, 0.0)
    with np.errstate(divide="ignore"):
        s = np.log(np.sum(np.exp(x - safe[..., None]), axis=-1))
    return np.where(n > 0, safe + s - np.log(np.maximum(n, 1)), -np.inf)


def score(U: np.ndarray, taken: np.ndarray, u_read: np.ndarray, log_prior: np.ndarray,
          eps: float, W: np.ndarray, spread_: np.ndarray | None = None) -> Scored:
    """Score readings. U (H, K, M) units in u coordinates; `taken` (d,) observable
    indices; u_read (d,) the readings in u coordinates; log_prior (H,); W (M,) blunder
    widths; spread_ (H, M) precomputed `spread(U)` (optional)."""
    H, K, _ = U.shape
    valid = np.all(np.isfinite(U), axis=2)
    n = valid.sum(axis=1)
    if len(taken) == 0:
        llk = np.where(valid, 0.0, -np.inf)
    else:
        U_S = U[:, :, taken]
        s = np.sqrt(1.0 + bandwidth(U, len(taken), spread_)[:, taken] ** 2)
        llk = _log_kernel(U_S, u_read, s, eps, W[taken])
        llk = np.where(valid, llk, -np.inf)
    ll = _logmeanexp(llk, n)
    return Scored(ll, llk, posterior(log_prior + ll))


def posterior(lp: np.ndarray) -> np.ndarray:
    """Posterior (..., H) from log prior plus log-likelihood lp (..., H), over the last
    axis (one unit's row, or many units' at once); uniform where no hypothesis has a
    finite one."""
    fin = np.isfinite(lp)
    m = np.where(fin.any(axis=-1), np.max(np.where(fin, lp, -np.inf), axis=-1), 0.0)
    with np.errstate(over="ignore", invalid="ignore"):
        post = np.exp(lp - m[..., None])
    post = np.where(np.isfinite(post), post, 0.0)
    tot = post.sum(axis=-1, keepdims=True)
    return np.where(tot > 0, post / np.where(tot > 0, tot, 1.0), 1.0 / lp.shape[-1])


# The kernel product is taken to a logarithm every this many readings, so that it stays
# far inside the float64 range (each factor lies between eps/W and 0.4).
_LOG_EVERY = 16
# Working-array size of the kernel, in float64 elements (about 0.5 MB: inside a typical
# per-core L2 cache, where the passes run several times faster than from main memory).
_TILE_ELEMENTS = 1 << 16


def _exp_floor(c: np.ndarray) -> np.ndarray:
    """Lower bound (d,) for the exponent of the kernel factor exp(x) + c_j: below
    log(c_j) - 40, exp(x) < c_j e^-40 is under half a unit in the last place of c_j, so
    the factor is c_j exactly with or without it. Raising such x to the bound keeps every
    factor bit for bit and keeps exp away from results near and below the smallest
    normal float (e^-708), where it runs tens of times slower."""
    with np.errstate(divide="ignore"):
        return np.log(np.asarray(c, dtype=float)) - 40.0


def kernel_loglik(ut: np.ndarray, Ut: np.ndarray, logpeak: np.ndarray, c: np.ndarray
                  ) -> np.ndarray:
    """log prod_j [ exp(logpeak_hj - (ut_ihj - Ut_jhk)^2) + c_j ], shape (n, H, K).

    The per-unit kernel mixture of `score`, log of (1-eps) N(u; U, s^2) + eps/W, with
    the readings and units pre-divided by s*sqrt(2) (ut (n, H, d), Ut (d, H, K)),
    logpeak = log((1-eps) / (s sqrt(2 pi))) (H, d) and c = eps / W (d,). NaN units give
    -inf. Units are taken a few at a time so that the working arrays stay in the CPU
    cache; one pass over them per reading, one logarithm per _LOG_EVERY readings; the
    exponent is bounded below (`_exp_floor`, the same factors).
    """
    n, H, d = ut.shape
    K = Ut.shape[2]
    floor = _exp_floor(c)
    out = np.zeros((n, H, K))
    tile = max(1, _TILE_ELEMENTS // (H * K))
    prod = np.empty((tile, H, K))
    w = np.empty((tile, H, K))
    with np.errstate(invalid="ignore", over="ignore", under="ignore", divide="ignore"):
        for a in range(0, n, tile):
            m = min(tile, n - a)
            p_, w_, o_ = prod[:m], w[:m], out[a:a + m]
            p_.fill(1.0)
            for j in range(d):
                np.subtract(ut[a:a + m, :, j, None], Ut[j][None], out=w_)
                np.square(w_, out=w_)
                np.subtract(logpeak[None, :, j, None], w_, out=w_)
                np.maximum(w_, floor[j], out=w_)
                np.exp(w_, out=w_)
                w_ += c[j]
                p_ *= w_
                if (j + 1) % _LOG_EVERY == 0 or j == d - 1:
                    o_ += np.log(p_)
                    p_.fill(1.0)
    out[np.isnan(out)] = -np.inf
    return out


def kernel_setup(U: np.ndarray, taken: np.ndarray, s: np.ndarray, eps: float
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The arguments of `kernel_loglik` for the drawn units U (r, K, M) of r hypotheses
    at observables `taken` with kernel widths s (r, d): scale s*sqrt(2) (r, d), the
    units divided by it Ut (d, r, K), and logpeak (r, d)."""
    scale = np.asarray(s, float) * math.sqrt(2.0)
    Ut = np.ascontiguousarray(np.moveaxis(U[:, :, taken] / scale[:, None, :], 2, 0))
    with np.errstate(divide="ignore"):
        logpeak = np.log((1.0 - eps) / (scale * math.sqrt(math.pi)))
    return scale, Ut, logpeak


def unit_logliks(U: np.ndarray, taken: np.ndarray, u_reads: np.ndarray, s: np.ndarray,
                 eps: float, W: np.ndarray) -> np.ndarray:
    """Per-unit log-likelihood (n, r, K) of n units' readings u_reads (n, d) at
    observables `taken` under the drawn units U (r, K, M) of r hypotheses, with the
    kernel of `score` of widths s (r, d) (`kernel_loglik`); -inf for a unit that
    failed."""
    scale, Ut, logpeak = kernel_setup(U, taken, s, eps)
    ut = np.asarray(u_reads, float)[:, None, :] / scale[None]               # (n, r, d)
    llk = kernel_loglik(ut, Ut, logpeak, eps / W[taken])                    # (n, r, K)
    return np.where(np.all(np.isfinite(U), axis=2)[None], llk, -np.inf)


def loglik_units(U_h: np.ndarray, taken: np.ndarray, u_reads: np.ndarray, s: np.ndarray,
                 eps: float, W: np.ndarray) -> tuple[np.ndarray, int]:
    """Log-likelihood (n,) of n units' readings u_reads (n, d) under one hypothesis's
    drawn units U_h (K, M) with kernel widths s (d,) (`unit_logliks`): the mean over its
    valid units, and their number."""
    n = int(np.all(np.isfinite(U_h), axis=1).sum())
    llk = unit_logliks(U_h[None], taken, u_reads, np.asarray(s)[None], eps, W)[:, 0]
    return _logmeanexp(llk, np.array(n)), n


def pooled(ll_a: np.ndarray, n_a, ll_b: np.ndarray, n_b) -> np.ndarray:
    """Log of the mean kernel likelihood over two sets of units, from each set's (ll_a
    over n_a units, ll_b over n_b): log((n_a e^ll_a + n_b e^ll_b) / (n_a + n_b))."""
    n_a = np.asarray(n_a, float)
    n_b = np.asarray(n_b, float)
    with np.errstate(divide="ignore"):
        return np.logaddexp(ll_a + np.log(n_a), ll_b + np.log(n_b)) - np.log(n_a + n_b)


def per_reading(U: np.ndarray, taken: np.ndarray, u_read: np.ndarray, eps: float,
                W: np.ndarray, spread_: np.ndarray | None = None) -> np.ndarray:
    """Log-likelihood (H, d) of each taken reading alone under each hypothesis, with the
    kernel of `score`; a reading near log(eps / W_j) is one the hypothesis misses."""
    s = np.sqrt(1.0 + bandwidth(U, len(taken), spread_)[:, taken] ** 2)
    with np.errstate(invalid="ignore", over="ignore", under="ignore", divide="ignore"):
        z = (u_read[None, None, :] - U[:, :, taken]) / s[:, None, :]
        peak = (1.0 - eps) / (s * math.sqrt(2.0 * math.pi))
        mix = np.log(peak[:, None, :] * np.exp(-0.5 * z * z) + eps / W[taken])
    mix = np.where(np.isnan(mix), -np.inf, mix)
    n = np.sum(np.all(np.isfinite(U), axis=2), axis=1)
    return _logmeanexp(np.moveaxis(mix, 2, 1), n[:, None])


def fit_pvalue(U_h: np.ndarray, taken: np.ndarray, u_read: np.ndarray, eps: float,
               W_lo: np.ndarray, W: np.ndarray, ref_k: np.ndarray, ref_z: np.ndarray,
               ref_b: np.ndarray, ref_w: np.ndarray, spread_h: np.ndarray | None = None
               ) -> float:
    """Predictive p-value of readings under one hypothesis (units U_h (K, M)): the share
    of simulated readings that fit no better than the observed ones, by the combined
    statistic of `fit_pvalues_from` (log-likelihood, and one reading given the others).

    Reference readings r use unit ref_k[r] plus standard-normal noise ref_z[r], and a
    blunder (uniform over W, position ref_w[r]) where ref_b[r] < eps; each is scored
    against the other units (leave one out). ref_* (R, M) are drawn by ensemble.py;
    W_lo, W the blunder range (see `blunder_range`); spread_h (M,) optional `spread`.
    The same as `fit_pvalue_from(fit_reference(...), u_read)`."""
    if len(taken) == 0:
        return 1.0
    return fit_pvalue_from(fit_reference(U_h, taken, eps, W_lo, W, ref_k, ref_z, ref_b,
                                         ref_w, spread_h), u_read)


# The fit test's kernel terms are single precision: its p-value resolves 1/(R + 1) at
# best (R reference readings, a few hundred), far coarser than float32's 1e-7 relative
# rounding of log-likelihoods, and single-precision exp and log run about three times
# faster (the reference is R x K x d terms per hypothesis and set of readings taken).
FIT_DTYPE = np.float32
# Kernel values the fit test works on at once, in FIT_DTYPE elements (1 MB): mic-preamp's
# fit references over random sets of readings took about a fifth less time than with
# every row at once, and less than with a quarter of this (2026-12-05).
_FIT_TILE = 1 << 18


@dataclass(frozen=True)
class FitReference:
    """What `fit_pvalue` needs besides the readings, for one hypothesis and one set of
    taken readings: the reference's sorted statistics (`_fit_statistics`: sorted_ref the
    log-likelihood, sorted_cond the least conditional one) and the sorted combined
    p-values of its own readings (sorted_min), out of R, and the kernel (valid units U
    (K, d), widths s (d,), blunder density eps / W_S) that scores the observed
    readings. None from `fit_reference` means p = 0 (under 3 units)."""

    sorted_ref: np.ndarray
    sorted_cond: np.ndarray
    sorted_min: np.ndarray
    R: int
    U: np.ndarray
    s: np.ndarray
    eps: float
    W_S: np.ndarray


def fit_reference(U_h: np.ndarray, taken: np.ndarray, eps: float, W_lo: np.ndarray,
                  W: np.ndarray, ref_k: np.ndarray, ref_z: np.ndarray, ref_b: np.ndarray,
                  ref_w: np.ndarray, spread_h: np.ndarray | None = None
                  ) -> FitReference | None:
    """The readings-independent part of `fit_pvalue` (same arguments less u_read; taken
    not empty): it depends on the hypothesis and the set of readings taken only, so a
    caller may keep it across readings."""
    valid = np.all(np.isfinite(U_h), axis=1)
    if valid.sum() < 3:
        return None
    U = U_h[valid][:, taken]
    K = U.shape[0]
    sp = None if spread_h is None else spread_h[None]
    s = np.sqrt(1.0 + bandwidth(U_h[valid][None], len(taken), sp)[0, taken] ** 2)
    W_S = W[taken]
    k = ref_k % K
    sim = U[k] + ref_z[:, taken]
    blunder = W_lo[taken] + ref_w[:, taken] * W_S
    sim = np.where(ref_b[:, taken] < eps, blunder, sim).astype(FIT_DTYPE)
    U, s, W_S = U.astype(FIT_DTYPE), s.astype(FIT_DTYPE), W_S.astype(FIT_DTYPE)
    left_out = np.zeros((len(k), K), dtype=bool)
    left_out[np.arange(len(k)), k] = True  # leave the simulating unit out
    ref, cond = _fit_statistics_of(U, sim, s, eps, W_S, np.array(K - 1), left_out)
    sref = np.sort(ref[~np.isnan(ref)])
    scond = np.sort(cond[~np.isnan(cond)])
    R = len(ref)
    own = _combined(sref, scond, R, ref, cond)
    return FitReference(sref, scond, np.sort(own), R, U, s, float(eps), W_S)


def _rank_p(sorted_ref: np.ndarray, x: np.ndarray, R: int) -> np.ndarray:
    """(number of reference values <= x + 1) / (R + 1); NaN x gives 1."""
    below = np.searchsorted(sorted_ref, np.where(np.isnan(x), -np.inf, x), side="right")
    return np.where(np.isnan(x), 1.0, (below + 1) / (R + 1))


def _combined(sorted_ref: np.ndarray, sorted_cond: np.ndarray, R: int, L: np.ndarray,
              cond: np.ndarray) -> np.ndarray:
    """The smaller of the two statistics' reference p-values (before calibration)."""
    return np.minimum(_rank_p(sorted_ref, L, R), _rank_p(sorted_cond, cond, R))


def fit_pvalue_from(fr: FitReference | None, u_read: np.ndarray) -> float:
    """`fit_pvalue` of readings u_read (d,) from a `fit_reference` of the same taken
    set (see `fit_pvalues_from`)."""
    if fr is None:
        return 0.0
    return float(fit_pvalues_from(fr, np.asarray(u_read, float)[None])[0])


def fit_pvalues_from(fr: FitReference | None, u_reads: np.ndarray,
                     block: int = 256) -> np.ndarray:
    """`fit_pvalue_from` of many units' readings at once: u_reads (n, d) -> (n,).

    Each statistic of `_fit_statistics` gets its reference p-value (number of reference
    values <= the observed one + 1) / (R + 1); the smaller of the two is then calibrated
    against the same smaller p-value of the reference's own readings, so the combined
    test keeps its false-alarm rate (a min-p combination, calibrated by simulation)."""
    n = len(u_reads)
    if fr is None:
        return np.zeros(n)
    L, cond = _fit_statistics_of(fr.U, u_reads.astype(FIT_DTYPE), fr.s, fr.eps, fr.W_S,
                                 np.array(fr.U.shape[0]))
    m = _combined(fr.sorted_ref, fr.sorted_cond, fr.R, L, cond)
    below = np.searchsorted(fr.sorted_min, m, side="right")
    return np.where(np.isnan(L), 1.0, (below + 1) / (fr.R + 1))


def band_q(U: np.ndarray, q: float) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper q-quantile (H, M) of each hypothesis's units (NaN ignored)."""
    lo, hi = nan_quantile(U, [q, 1.0 - q], axis=1)
    return lo, hi


def apart(U: np.ndarray, q: float, sigmas: float, share: float) -> np.ndarray:
    """(H, H) bool: hypotheses i and j can be told apart by the offered readings.

    j's region is a box of central per-observable bands q'..1-q', q' the first of q,
    q/2, q/5, q/10, 0 whose box (widened by `sigmas` noise widths each side) holds at
    least 1 - 2q of j's own units at every observable at once: q..1-q bands alone leave
    out many more than 2q of the units when there are many observables. i and j are
    apart when fewer than `share` of i's units fall inside j's region and fewer than
    `share` of j's inside i's: then the offered readings usually tell which it is.
    When most units of one (say a mild R1:high, or a leak whose range lies inside
    another's) read like the other, no reading can be relied on to split them. Failed
    hypotheses are apart from all."""
    lo, hi = boxes(U, q, sigmas)
    return _apart_from(_inside(U, lo, hi), np.isfinite(U).all(axis=2).sum(axis=1), share)


def boxes(U: np.ndarray, q: float, sigmas: float) -> tuple[np.ndarray, np.ndarray]:
    """Each hypothesis's region of `apart`: lower and upper edges (H, M), u units,
    widened by `sigmas`. A hypothesis's box depends on its own units only."""
    ok = np.isfinite(U).all(axis=2)  # (H, K)
    n = ok.sum(axis=1)
    lo, hi = band_q(U, q)
    need = 1.0 - 2.0 * q
    for qq in (q / 2, q / 5, q / 10, 0.0):  # widen each box until it holds its own units
        with np.errstate(invalid="ignore"):
            box = ((U >= lo[:, None, :] - sigmas) & (U <= hi[:, None, :] + sigmas)).all(axis=2)
        own = np.where(n > 0, (box & ok).sum(axis=1) / np.maximum(n, 1), 1.0)
        short = own < need
        if not short.any():
            break
        lq, hq = band_q(U[short], qq)
        lo[short], hi[short] = lq, hq
    return lo - sigmas, hi + sigmas


def _inside(U: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """(H, J): share of hypothesis i's valid units inside box j (edges (J, M))."""
    ok = np.isfinite(U).all(axis=2)
    inside = np.zeros((U.shape[0], lo.shape[0]))
    for i in range(U.shape[0]):
        ui = U[i][ok[i]]  # (k, M)
        if len(ui) == 0:
            continue
        within = (ui[None] >= lo[:, None, :]) & (ui[None] <= hi[:, None, :])  # (J, k, M)
        inside[i] = within.all(axis=2).mean(axis=1)
    return inside


def _apart_from(inside: np.ndarray, n: np.ndarray, share: float) -> np.ndarray:
    bad = n == 0
    out = (inside < share) & (inside.T < share)
    out[bad, :] = True
    out[:, bad] = True
    np.fill_diagonal(out, False)
    return out


def apart_extend(U: np.ndarray, ap0: np.ndarray, lo0: np.ndarray, hi0: np.ndarray,
                 q: float, sigmas: float, share: float) -> np.ndarray:
    """`apart(U, ...)` when its first H0 rows are a set whose `apart` matrix ap0 and
    `boxes` lo0, hi0 are known (the built hypotheses, U's later rows pairs): only the
    new rows' boxes and the shares involving them are computed. The same matrix."""
    H0 = ap0.shape[0]
    lo1, hi1 = boxes(U[H0:], q, sigmas)
    inside = np.zeros((U.shape[0], U.shape[0]))
    inside[:, H0:] = _inside(U, lo1, hi1)
    inside[H0:, :H0] = _inside(U[H0:], lo0, hi0)
    n = np.isfinite(U).all(axis=2).sum(axis=1)
    out = _apart_from(inside, n, share)
    out[:H0, :H0] = ap0
    return out


def groups_from(ap: np.ndarray, order: np.ndarray) -> np.ndarray:
    """Group number (H,) from an `apart` matrix: greedy in `order`, a hypothesis joins
    the first group none of whose members it can be told from; numbers follow `order`."""
    H = ap.shape[0]
    g = np.full(H, -1, dtype=int)
    blocked = np.zeros((H, H), dtype=bool)  # per group (row): apart from some member
    count = 0  # groups formed so far
    for h in order:
        free = np.flatnonzero(~blocked[:count, h])
        gi = int(free[0]) if len(free) else count
        if gi == count:
            count += 1
        blocked[gi] |= ap[h]
        g[h] = gi
    return g


def groups(U: np.ndarray, order: np.ndarray, q: float, sigmas: float,
           share: float = 0.5) -> np.ndarray:
    """Group number (H,) per hypothesis: hypotheses no offered reading can tell apart
    (see `apart`) share a number; greedy in `order` (e.g. by prior or posterior)."""
    return groups_from(apart(U, q, sigmas, share), order)
