"""Kernel widths chosen by leave-one-out likelihood cross-validation (infer.kernel_spread).

The property checked is the one the method is defined by (Habbema, Hermans and van den
Broek 1974; Duin 1976): the width it picks scores fresh draws from the same law at least
as well as Scott's rule (Scott 1992, Multivariate Density Estimation, chapter 6) does when
the units lie along a curve, as a fault whose value ranges over decades puts them.
"""

from __future__ import annotations

import numpy as np

from diag.core import infer

GRID = 2.0 ** (np.arange(-8, 1) / 2)
EPS = 0.02


def _curve(theta: np.ndarray, rng: np.random.Generator, M: int = 6) -> np.ndarray:
    """Units (n, M) in noise units along a curve of one parameter theta (log10 of a
    value over three decades), plus a small tolerance scatter of 0.3 noise widths."""
    w = np.linspace(0.5, 2.0, M)
    return 40.0 * np.tanh(w[None, :] * (theta[:, None] - 1.5)) + 0.3 * rng.standard_normal(
        (len(theta), M))


def _heldout_loglik(U: np.ndarray, spread: np.ndarray, fresh: np.ndarray) -> float:
    """Mean log-likelihood of fresh noisy readings (n, M) under the kernel of
    infer.score with every reading taken."""
    M = U.shape[2]
    W = np.full(M, 200.0)
    taken = np.arange(M)
    return float(np.mean([infer.score(U, taken, r, np.zeros(1), EPS, W, spread).loglik[0]
                          for r in fresh]))


def test_curve_gets_a_narrower_kernel_that_scores_fresh_draws_better():
    rng = np.random.default_rng(3)
    U = _curve(rng.uniform(0.0, 3.0, 128), rng)[None]        # (1, 128, 6)
    z = rng.standard_normal((256, 6))
    W = np.full(6, 200.0)
    cv = infer.kernel_spread(U, z, W, EPS, GRID)
    scott = infer.spread(U)
    factor = cv[0] / scott[0]
    assert np.allclose(factor, factor[0])                      # one factor per hypothesis
    assert factor[0] < 1.0 and np.isclose(GRID, factor[0]).any()
    fresh = _curve(rng.uniform(0.0, 3.0, 200), rng) + rng.standard_normal((200, 6))
    assert _heldout_loglik(U, cv, fresh) > _heldout_loglik(U, scott, fresh) + 0.5


def test_factor_is_from_the_grid_and_never_wider_than_scott():
    rng = np.random.default_rng(4)
    U = np.stack([rng.normal(0.0, 5.0, (64, 4)), _curve(rng.uniform(0, 3, 64), rng, 4)])
    cv = infer.kernel_spread(U, rng.standard_normal((128, 4)), np.full(4, 200.0), EPS, GRID)
    sp = infer.spread(U)
    for h in range(2):
        f = cv[h] / sp[h]
        assert np.isclose(GRID, f[0]).any() and np.allclose(f, f[0]) and f[0] <= 1.0


def test_too_few_units_keep_scotts_width():
    U = np.full((1, 8, 3), np.nan)
    U[0, :2] = [[0.0, 1.0, 2.0], [1.0, 2.0, 3.0]]  # two solved units only
    cv = infer.kernel_spread(U, np.zeros((16, 3)), np.full(3, 50.0), EPS, GRID)
    assert np.allclose(cv, infer.spread(U))
