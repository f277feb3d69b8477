"""Likelihood, posterior, goodness of fit and groups on synthetic ensembles.

The synthetic ensembles are Gaussian clouds in the noise-scaled coordinate u (unit noise,
infer.py), so the expected behaviour follows from Bayes' rule worked by hand."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from diag.core import infer

EPS = 0.02  # blunder probability as in rules/faults.yaml


def cloud(centres, K=128, spread=0.5, seed=0):
    """(H, K, M) units scattered around per-hypothesis centres (H, M)."""
    rng = np.random.default_rng(seed)
    c = np.asarray(centres, float)
    return c[:, None, :] + spread * rng.standard_normal((c.shape[0], K, c.shape[1]))


CENTRES = [[0, 0, 0, 0], [10, 0, 0, 0], [0, 10, 0, 0], [0, 0, 10, 0], [10, 10, 0, 40]]


def post_of(U, taken, u, prior=None):
    H = U.shape[0]
    lp = np.log(np.full(H, 1.0 / H) if prior is None else np.asarray(prior))
    lo, W = infer.blunder_range(U)
    return infer.score(U, np.asarray(taken), np.asarray(u, float), lp, EPS, W)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.floats(-50, 50), min_size=1, max_size=4))
def test_posterior_sums_to_one(vals):
    U = cloud(CENTRES)
    sc = post_of(U, list(range(len(vals))), vals)
    assert sc.posterior.sum() == pytest.approx(1.0, abs=1e-12)  # definition of a posterior
    assert np.all(sc.posterior >= 0)


def test_no_readings_gives_the_prior():
    U = cloud(CENTRES)
    prior = np.array([0.5, 0.2, 0.1, 0.1, 0.1])
    sc = post_of(U, [], [], prior)
    np.testing.assert_allclose(sc.posterior, prior, rtol=1e-12)  # Bayes with no evidence


def test_reading_on_a_prediction_raises_it():
    U = cloud(CENTRES)
    before = post_of(U, [], []).posterior
    after = post_of(U, [1], [10.0]).posterior  # hypothesis 2 predicts 10 at observable 1
    assert after[2] > before[2]
    assert after[4] > before[4]  # so does 4 (also 10 there)
    assert after[0] < before[0]
    # the second reading at observable 3 tells 2 from 4 (0 versus 40)
    both = post_of(U, [1, 3], [10.0, 0.0]).posterior
    assert np.argmax(both) == 2 and both[2] > 0.95


def test_a_blunder_does_not_drop_the_truth_below_top_three():
    U = cloud(CENTRES)
    # truth = hypothesis 4 (10, 10, 0, 40); the reading at observable 2 is a slip (25)
    sc = post_of(U, [0, 1, 2, 3], [10.0, 10.0, 25.0, 40.0])
    rank = list(np.argsort(-sc.posterior))
    assert rank.index(4) < 3
    assert rank[0] == 4  # the other three readings still single it out


def test_failed_units_are_ignored():
    U = cloud(CENTRES)
    U[1, :64] = np.nan
    sc = post_of(U, [0], [10.0])
    assert np.isfinite(sc.loglik[1]) and np.argmax(sc.posterior) in (1, 4)
    U[3] = np.nan
    sc = post_of(U, [0], [0.0])
    assert sc.posterior[3] == 0.0


def _ref(R, M, seed):
    rng = np.random.default_rng(seed)
    return (np.arange(R), rng.standard_normal((R, M)), rng.uniform(size=(R, M)),
            rng.uniform(size=(R, M)))


def test_fit_pvalue_is_calibrated_when_the_model_holds():
    """Readings of fresh units of the hypothesis (unit noise, blunders at the modelled
    rate): p-values about uniform, so p < 0.05 about 5 % of the time (definition of a
    calibrated p-value)."""
    U = cloud(CENTRES, K=128, spread=2.0, seed=3)
    lo, W = infer.blunder_range(U)
    rk, rz, rb, rw = _ref(256, 4, 11)
    rng = np.random.default_rng(7)
    ps = []
    for _ in range(200):
        unit = np.asarray(CENTRES[2], float) + 2.0 * rng.standard_normal(4)
        truth = unit + rng.standard_normal(4)
        slip = rng.uniform(size=4) < EPS
        truth[slip] = (lo + rng.uniform(size=4) * W)[slip]
        ps.append(infer.fit_pvalue(U[2], np.arange(4), truth, EPS, lo, W, rk, rz, rb, rw))
    ps = np.array(ps)
    # binomial(200, 0.05): mean 10, sd 3.1; allow 2.5 sd each side
    assert 2 <= np.sum(ps < 0.05) <= 18
    assert 0.35 <= np.mean(ps) <= 0.65  # uniform mean 0.5


def test_fit_pvalue_flags_readings_no_hypothesis_explains():
    U = cloud(CENTRES, spread=1.0)
    lo, W = infer.blunder_range(U)
    rk, rz, rb, rw = _ref(256, 4, 11)
    odd = np.array([5.0, 5.0, 5.0, 20.0])  # between every cloud, four readings off
    ps = [infer.fit_pvalue(U[h], np.arange(4), odd, EPS, lo, W, rk, rz, rb, rw)
          for h in range(5)]
    assert max(ps) < 0.01
    assert infer.fit_pvalue(U[0], np.array([], int), np.array([]), EPS, lo, W,
                            rk, rz, rb, rw) == 1.0  # no readings: nothing to reject


def test_groups_join_only_indistinguishable_hypotheses():
    centres = [[0, 0], [0.5, 0.3], [10, 0], [10, 0.2], [0, 30]]
    U = cloud(centres, spread=0.5)
    g = infer.groups(U, np.arange(5), q=0.05, sigmas=1.0, share=0.5)
    assert g[0] == g[1] and g[2] == g[3]
    assert len({g[0], g[2], g[4]}) == 3


def test_noise_transform_round_trip():
    nz = infer.Noise(np.array([0.02, 0.05]), np.array([0.02, 1e-6]))
    y = np.array([[12.0, 0.03], [-0.5, 1e-7]])
    np.testing.assert_allclose(nz.y(nz.u(y)), y, rtol=1e-10)
    # du/dy = 1/sigma(y): at y = 0 one noise width b is one unit (derivative of asinh)
    d = (nz.u(np.array([1e-6, 1e-12])) - nz.u(np.array([0.0, 0.0]))) / np.array([1e-6, 1e-12])
    np.testing.assert_allclose(d, 1 / nz.b, rtol=1e-3)


def test_fit_without_blunders_in_the_reference_flags_one_slipped_reading():
    """`fits` means explained without a slip (rules/faults.yaml fit_blunders: false): one
    reading 40 noise widths off a unit of the hypothesis is kept from overturning the
    ranking by the blunder term, but the blunder-free reference rejects it, while clean
    readings of the hypothesis still pass about 95 % of the time (calibrated p-value)."""
    U = cloud(CENTRES, K=128, spread=2.0, seed=3)
    lo, W = infer.blunder_range(U)
    rk, rz, _, rw = _ref(256, 4, 11)
    rb = np.ones((256, 4))  # what ensemble.reference_draws(..., blunders=False) gives
    rng = np.random.default_rng(8)
    clean, slipped = [], []
    for _ in range(100):
        unit = np.asarray(CENTRES[2], float) + 2.0 * rng.standard_normal(4)
        truth = unit + rng.standard_normal(4)
        clean.append(infer.fit_pvalue(U[2], np.arange(4), truth, EPS, lo, W, rk, rz, rb, rw))
        truth[3] -= 40.0  # where no hypothesis has units
        slipped.append(infer.fit_pvalue(U[2], np.arange(4), truth, EPS, lo, W, rk, rz, rb,
                                        rw))
    # binomial(100, 0.05): mean 5, sd 2.2; allow 2.5 sd above
    assert np.sum(np.array(clean) < 0.05) <= 10
    assert np.all(np.array(slipped) < 0.05)
    post = post_of(U, [0, 1, 2, 3], truth)
    assert np.argmax(post.posterior) == 2  # the slip does not move the ranking


def test_spread_is_the_standard_deviation_of_a_normal_law_and_sees_long_tails():
    rng = np.random.default_rng(4)
    x = rng.standard_normal((1, 20000, 1)) * 3.0
    # IQR = 1.349 sigma and the 10-90 % range = 2.563 sigma for a normal law
    # (scipy.stats.norm.ppf(0.75) * 2, norm.ppf(0.9) * 2)
    assert infer.spread(x)[0, 0] == pytest.approx(3.0, rel=0.03)
    # a fault over decades: 80 % of units at one value, 20 % spread far below it
    tail = np.concatenate([np.zeros(800), -rng.uniform(5, 100, 200)])[None, :, None]
    q10, q25, q75, q90 = np.quantile(tail[0, :, 0], [0.1, 0.25, 0.75, 0.9])
    assert (q75 - q25) / 1.349 < 1.0  # the IQR sees only a sliver of the tail
    assert infer.spread(tail)[0, 0] == pytest.approx((q90 - q10) / 2.563, rel=1e-9)


def test_one_law_is_one_group_however_many_observables():
    """Two hypotheses drawn from the same law cannot be told apart. With 30 independent
    observables a box of per-observable 5-95 % bands would hold 0.9^30 = 4 % of a
    hypothesis's own units (a product of probabilities worked by hand); `apart` widens
    each box until it holds 90 % of its own units, so the two stay together."""
    rng = np.random.default_rng(2)
    U = 20.0 * rng.standard_normal((2, 200, 30))
    ap = infer.apart(U, 0.05, 1.0, 0.5)
    assert not ap[0, 1]
    far = U.copy()
    far[1] += 200.0  # ten spreads away on every observable
    assert infer.apart(far, 0.05, 1.0, 0.5)[0, 1]


def _fit_pvalue_direct(U_h, taken, u_read, lo, W, rk, rz, rb, rw):
    """The predictive p-value as its definition reads (infer.py, fit_pvalues_from),
    computed in one go with plain loops: for the observed readings and each reference
    reading, the log-likelihood L and the least conditional log-likelihood of one
    reading given the others; each statistic's p-value by `<=` against the reference;
    the smaller of the two calibrated against the reference's own smaller p-values."""
    ok = np.all(np.isfinite(U_h), axis=1)
    U = U_h[ok][:, taken]
    K, d = U.shape
    s = np.sqrt(1.0 + infer.bandwidth(U_h[ok][None], len(taken))[0, taken] ** 2)
    Ws = W[taken]

    def stats(u, skip=None):
        units = [k for k in range(K) if k != skip]
        per = np.array([[math.log((1 - EPS) / (s[j] * math.sqrt(2 * math.pi))
                                  * math.exp(-0.5 * ((u[j] - U[k, j]) / s[j]) ** 2)
                                  + EPS / Ws[j]) for j in range(d)] for k in units])
        def lme(x):
            m = x.max()
            return m + math.log(np.mean(np.exp(x - m)))
        L = lme(per.sum(axis=1))
        cond = min(L - lme(per.sum(axis=1) - per[:, j]) for j in range(d)) if d > 1 else L
        return L, cond

    k = rk % K
    sim = np.where(rb[:, taken] < EPS, lo[taken] + rw[:, taken] * Ws, U[k] + rz[:, taken])
    ref = np.array([stats(sim[r], skip=k[r]) for r in range(len(k))])
    R = len(ref)

    def p_of(x):
        return ((np.sum(ref[:, 0] <= x[0]) + 1) / (R + 1),
                (np.sum(ref[:, 1] <= x[1]) + 1) / (R + 1))

    own = np.array([min(p_of(x)) for x in ref])
    obs = min(p_of(stats(u_read)))
    return (np.sum(own <= obs) + 1) / (R + 1)


def test_kept_fit_reference_gives_the_direct_p_value():
    """fit_reference once per taken set, then fit_pvalue_from per reading set: the same
    p-value as the direct computation (an independent path: plain loops), for readings
    that fit, miss and slip."""
    U = cloud(CENTRES, K=64, spread=1.5, seed=5)
    U[1, :3, 2] = np.nan  # failed units are left out of both
    lo, W = infer.blunder_range(U)
    rk, rz, rb, rw = _ref(256, 4, 2)
    rng = np.random.default_rng(9)
    for h in range(5):
        for taken in (np.array([0, 2]), np.arange(4)):
            fr = infer.fit_reference(U[h], taken, EPS, lo, W, rk, rz, rb, rw)
            for _ in range(5):
                u = np.asarray(CENTRES[h], float)[taken] + 3.0 * rng.standard_normal(
                    len(taken))
                assert infer.fit_pvalue_from(fr, u) == _fit_pvalue_direct(
                    U[h], taken, u, lo, W, rk, rz, rb, rw)


def test_apart_extended_by_added_rows_is_apart_of_the_whole_set():
    """apart_extend (the built set's matrix and boxes reused, pairs added) gives exactly
    apart() of the whole set, failed hypotheses included."""
    U = cloud(CENTRES + [[5, 5, 0, 0], [0, 0, 10, 1], [10, 0, 0, 0]], K=64, spread=2.0,
              seed=4)
    U[2, :40, 1] = np.nan   # a hypothesis with many failed units
    U[6] = np.nan           # one that never solved
    q, sig, share = 0.05, 2.0, 0.5  # the defaults' order of size (faults.yaml)
    full = infer.apart(U, q, sig, share)
    H0 = 5
    ext = infer.apart_extend(U, infer.apart(U[:H0], q, sig, share),
                             *infer.boxes(U[:H0], q, sig), q, sig, share)
    np.testing.assert_array_equal(ext, full)


def test_fit_test_sees_one_reading_the_others_contradict():
    """Units along a line in 12 readings (a fault whose value sweeps every reading
    together): a unit read on the line but with one reading 4 noise widths off it. The
    log-likelihood statistic alone hardly sees it (one reading's excess drowns in the
    spread of the sum over twelve); the conditional statistic (that reading given the
    other eleven) does. Readings on the line keep the false-alarm rate below alpha
    (the combined p-value is calibrated by the same reference, infer.fit_pvalues_from).
    Bayes' rule and the normal law by hand: a 4-sigma excess on one of 12 readings has
    a two-sided chance 12 x 6.3e-5 under the model (scipy.stats.norm.sf(4) * 2)."""
    rng = np.random.default_rng(3)
    d, K, R = 12, 128, 256
    U = rng.uniform(-20, 20, K)[None, :, None] * np.ones(d)
    lo, W = infer.blunder_range(U)
    rk, rz, rb, rw = (np.arange(R), rng.standard_normal((R, d)), np.ones((R, d)),
                      rng.uniform(size=(R, d)))           # no blunders: fit_blunders false
    fr = infer.fit_reference(U[0], np.arange(d), EPS, lo, W, rk, rz, rb, rw)
    flagged, flagged_sum_only, alarms = [], [], []
    for trial in range(200):
        u = rng.uniform(-15, 15) + rng.standard_normal(d)
        alarms.append(infer.fit_pvalue_from(fr, u) < 0.05)
        u[trial % d] += 4.0
        flagged.append(infer.fit_pvalue_from(fr, u) < 0.05)
        v = infer._kernel_values(fr.U, u[None].astype(infer.FIT_DTYPE), fr.s, fr.eps,
                                 fr.W_S)
        L, _ = infer._fit_statistics(v, np.array(K))
        flagged_sum_only.append(infer._rank_p(fr.sorted_ref, L, fr.R)[0] < 0.05)
    assert np.mean(alarms) <= 0.05
    assert np.mean(flagged) >= 0.4 > 0.1 >= np.mean(flagged_sum_only)


def test_one_hypothesis_loglik_is_the_score_row():
    # our own rule (infer.py): loglik_units scores many units' readings under one
    # hypothesis with score's kernel; each must be score's log-likelihood of that row,
    # and pooling two halves of the units gives the whole (a mean of means)
    U = cloud(CENTRES, K=96, seed=4)
    lo, W = infer.blunder_range(U)
    taken = np.array([0, 1, 3])
    rng = np.random.default_rng(9)
    reads = np.array(CENTRES, float)[[0, 1, 4]][:, taken] + rng.standard_normal((3, 3))
    s = np.sqrt(1.0 + infer.bandwidth(U, len(taken))[:, taken] ** 2)
    for h in range(U.shape[0]):
        got, n = infer.loglik_units(U[h], taken, reads, s[h], EPS, W)
        want = [infer.score(U, taken, r, np.zeros(U.shape[0]), EPS, W).loglik[h]
                for r in reads]
        np.testing.assert_allclose(got, want, rtol=1e-12)
        assert n == 96
        a, na = infer.loglik_units(U[h, :30], taken, reads, s[h], EPS, W)
        b, nb = infer.loglik_units(U[h, 30:], taken, reads, s[h], EPS, W)
        np.testing.assert_allclose(infer.pooled(a, na, b, nb), want, rtol=1e-12)


def test_more_units_estimate_a_tail_likelihood_more_closely():
    """The kernel mixture is a Monte Carlo estimate of the hypothesis's density at the
    readings; its expectation over the drawn units, for a normal cloud N(c, sd^2) per
    axis and a normal kernel of width s, is N(u; c, sd^2 + s^2) per axis, and its
    spread about that shrinks as the units grow (a kernel estimate's variance falls as
    1/(K h^d): from memory, Silverman 1986, "Density Estimation", ch. 4). Why diag
    pools its leading suspects' further units in (Engine._refine): a reading in the
    edge of a fault's spread, here 2.5 sd out on every axis of four, at one kernel
    width (the K units' own)."""
    sd, d, K = 2.0, 4, 128
    u = np.full(d, 2.5 * sd)
    W = np.full(d, 1e9)  # no blunder floor: the kernel alone
    taken = np.arange(d)
    errs = {128: [], 512: []}
    for seed in range(40):
        U = sd * np.random.default_rng(seed).standard_normal((4 * K, d))
        s2 = 1.0 + infer.bandwidth(U[None, :K], d, np.full((1, d), sd))[0] ** 2
        exact = float(np.sum(-0.5 * u ** 2 / (sd ** 2 + s2)
                             - 0.5 * np.log(2 * math.pi * (sd ** 2 + s2))))
        a, na = infer.loglik_units(U[:K], taken, u[None], np.sqrt(s2), 0.0, W)
        b, nb = infer.loglik_units(U[K:], taken, u[None], np.sqrt(s2), 0.0, W)
        errs[128].append(a[0] - exact)
        errs[512].append(infer.pooled(a, na, b, nb)[0] - exact)
    rms = {k: float(np.sqrt(np.mean(np.square(v)))) for k, v in errs.items()}
    assert rms[512] < 0.7 * rms[128]


def test_fit_statistics_taken_a_few_rows_at_a_time_equal_all_rows_at_once():
    # our own rule (infer._fit_statistics_of): the rows are independent, so working
    # them a tile at a time (to stay in the CPU cache) changes no bit of either statistic
    rng = np.random.default_rng(11)
    K, d, R = 300, 9, 1000
    U = rng.normal(size=(K, d)).astype(infer.FIT_DTYPE)
    U[5] = np.nan                                         # a unit that failed
    u = rng.normal(scale=2.0, size=(R, d)).astype(infer.FIT_DTYPE)
    s = rng.uniform(1.0, 2.0, d).astype(infer.FIT_DTYPE)
    W_S = rng.uniform(20, 40, d).astype(infer.FIT_DTYPE)
    left_out = np.zeros((R, K), dtype=bool)
    left_out[np.arange(R), rng.integers(K, size=R)] = True
    assert R * K * d > infer._FIT_TILE                     # more than one tile
    L0, c0 = infer._fit_statistics(infer._kernel_values(U[None], u, s[None], EPS, W_S),
                                   np.array(K - 1), left_out)
    L1, c1 = infer._fit_statistics_of(U, u, s, EPS, W_S, np.array(K - 1), left_out)
    np.testing.assert_array_equal(L0, L1)
    np.testing.assert_array_equal(c0, c1)
