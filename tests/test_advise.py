"""Expected information gain of the next reading (advise.py) on synthetic ensembles."""

from __future__ import annotations

import numpy as np
import pytest

from diag.core import advise


def test_gain_zero_where_every_hypothesis_predicts_alike():
    rng = np.random.default_rng(0)
    same = np.broadcast_to(5.0 + rng.standard_normal(64), (4, 64))  # identical clouds
    w = np.full((4, 64), 1 / 256)
    assert advise.gain(same, w) == 0.0  # I(H;Y) = 0 when p(y|h) does not depend on h


def test_gain_of_a_perfect_split_is_the_prior_entropy():
    # four equally likely hypotheses predicting 0, 100, 200, 300 (far apart in noise
    # widths): the reading reveals h, so the gain is log2(4) = 2 bits (Shannon)
    u = np.repeat(np.array([0.0, 100.0, 200.0, 300.0])[:, None], 32, axis=1)
    w = np.full((4, 32), 1 / 128)
    assert advise.gain(u, w) == pytest.approx(2.0, abs=1e-3)


def test_gain_of_a_binary_split_is_one_bit():
    u = np.repeat(np.array([0.0, 0.0, 50.0, 50.0])[:, None], 16, axis=1)
    w = np.full((4, 16), 1 / 64)
    assert advise.gain(u, w) == pytest.approx(1.0, abs=1e-3)  # H(1/2, 1/2) = 1 bit


def test_overlap_within_noise_gains_little():
    # two hypotheses one noise width apart: the gain is well under the 1 bit of a split
    u = np.repeat(np.array([0.0, 1.0])[:, None], 16, axis=1)
    w = np.full((2, 16), 1 / 32)
    g = advise.gain(u, w)
    assert 0.0 < g < 0.5


def test_unit_weights_share_each_posterior():
    llk = np.log(np.array([[1.0, 3.0], [1.0, 1.0]]))
    w = advise.unit_weights(llk, np.array([0.8, 0.2]))
    np.testing.assert_allclose(w, [[0.2, 0.6], [0.1, 0.1]])  # by hand
    assert w.sum() == pytest.approx(1.0)


def test_gain_about_groups_ignores_splits_inside_a_group():
    # hypotheses 0 and 1 differ at this reading but share a group: only the split
    # between the group {0, 1} and hypothesis 2 counts, H(1/3, 2/3) = 0.918 bits
    u = np.repeat(np.array([0.0, 100.0, 200.0])[:, None], 8, axis=1)
    w = np.full((3, 8), 1 / 24)
    assert advise.gain(u, w) == pytest.approx(np.log2(3), abs=1e-3)
    h = -(1 / 3) * np.log2(1 / 3) - (2 / 3) * np.log2(2 / 3)  # Shannon entropy by hand
    assert advise.gain(u, w, labels=np.array([0, 0, 1])) == pytest.approx(h, abs=1e-3)


def test_gain_uses_each_hypothesis_kernel_width():
    """Two hypotheses 6 noise widths apart. With unit kernels the reading nearly splits
    them; when the likelihood will use kernels 5 wide (a sparse ensemble's bandwidth)
    the two predictive laws N(0, 5^2) and N(6, 5^2) overlap and the gain is what the
    mutual information of two equal-weight Gaussians that far apart gives (numerical
    integration worked here with numpy, no smoothing by histogram)."""
    u = np.repeat(np.array([0.0, 6.0])[:, None], 16, axis=1)
    w = np.full((2, 16), 1 / 32)
    sharp = advise.gain(u, w)
    wide = advise.gain(u, w, width=np.array([5.0, 5.0]))
    y = np.linspace(-60, 66, 20001)
    p0 = np.exp(-0.5 * (y / 5.0) ** 2)
    p1 = np.exp(-0.5 * ((y - 6.0) / 5.0) ** 2)
    p0, p1 = p0 / p0.sum(), p1 / p1.sum()
    m = 0.5 * (p0 + p1)
    mi = 0.5 * np.sum(p0 * np.log2(p0 / m)) + 0.5 * np.sum(p1 * np.log2(p1 / m))
    assert sharp > 0.9
    assert wide == pytest.approx(mi, abs=0.02)


def test_gain_counts_the_blunder_term_of_the_likelihood():
    """Two equally likely hypotheses 200 noise widths apart. Without blunders the reading
    splits them (1 bit); when any reading may be a blunder with probability eps, spread
    uniformly over a range W, a reading far from both predictions is uninformative and
    the gain is the mutual information of the two laws (1 - eps) N(mu_h, 1) + eps / W on
    that range (numerical integration worked here with numpy, no histogram)."""
    u = np.repeat(np.array([0.0, 200.0])[:, None], 16, axis=1)
    w = np.full((2, 16), 1 / 32)
    eps, W, lo = 0.1, 1000.0, -400.0
    g = advise.gain(u, w, eps=eps, W=W)
    y = np.linspace(lo, lo + W, 400001)
    dy = y[1] - y[0]
    p0 = (1 - eps) * np.exp(-0.5 * y ** 2) / np.sqrt(2 * np.pi) + eps / W
    p1 = (1 - eps) * np.exp(-0.5 * (y - 200.0) ** 2) / np.sqrt(2 * np.pi) + eps / W
    m = 0.5 * (p0 + p1)
    mi = 0.5 * np.sum(p0 * np.log2(p0 / m)) * dy + 0.5 * np.sum(p1 * np.log2(p1 / m)) * dy
    assert advise.gain(u, w) == pytest.approx(1.0, abs=1e-3)  # H(1/2, 1/2) = 1 bit
    assert mi < 0.95
    assert g == pytest.approx(mi, abs=0.01)


def test_group_sum_is_the_sum_np_add_at_forms():
    rng = np.random.default_rng(3)
    joint = rng.uniform(size=(40, 300)) * (rng.uniform(size=(40, 1)) < 0.8)
    lab = np.concatenate([np.arange(12), rng.integers(0, 12, 28)])
    rng.shuffle(lab)
    want = np.zeros((12, 300))
    np.add.at(want, lab, joint)  # numpy's unbuffered in-place sum, the former path
    np.testing.assert_allclose(advise._group_sum(joint, lab), want, rtol=1e-13, atol=0)


def _smooth_rows_pow2(a, sigma):
    """The former smoothing: the same FFT convolution at the next power-of-two length."""
    n = a.shape[1]
    pad = int(np.ceil(5.0 * float(np.max(sigma))))
    m = 1 << int(np.ceil(np.log2(n + 2 * pad)))
    f = np.fft.rfftfreq(m)
    spec = np.fft.rfft(np.pad(a, ((0, 0), (pad, m - n - pad))), axis=1)
    spec *= np.exp(-2.0 * (np.pi * f[None, :] * sigma[:, None]) ** 2)
    return np.clip(np.fft.irfft(spec, m, axis=1)[:, pad:pad + n], 0.0, None)


def test_fast_fft_length_gives_the_power_of_two_gains(monkeypatch):
    """Gains with the 2^a 3^b 5^c transform length agree with the power-of-two length to
    1e-9 bits (the project's bound for a performance change), with per-hypothesis
    widths from 1 (the narrowest kernel, where the padding is least) to 20."""
    rng = np.random.default_rng(8)
    H, K, M = 30, 64, 6
    U = rng.uniform(0, 300, (H, 1, M)) + rng.uniform(0.5, 8, (H, 1, M)) * \
        rng.standard_normal((H, K, M))
    w = rng.uniform(size=(H, K)) * rng.uniform(size=(H, 1))
    w /= w.sum()
    labels = rng.integers(0, 12, H)
    W = np.ptp(U, axis=(0, 1)) + 20.0
    for width in (np.ones((H, M)), 1.0 + rng.uniform(0, 19, (H, M))):
        got = advise.gains(U, w, np.arange(M), labels=labels, width=width, eps=0.02, W=W)
        monkeypatch.setattr(advise, "_smooth_rows", _smooth_rows_pow2)
        want = advise.gains(U, w, np.arange(M), labels=labels, width=width, eps=0.02, W=W)
        monkeypatch.undo()
        assert np.all(want > 0.01)  # gains worth comparing
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-9)


def test_fast_length_is_the_next_5_smooth_number():
    # 5-smooth (Hamming) numbers by hand: 1 2 3 4 5 6 8 9 10 12 15 16 ... 1000 1024 1080
    assert [advise._fast_len(n) for n in (1, 7, 11, 13, 17, 1001, 1025, 1081)] == \
        [1, 8, 12, 15, 18, 1024, 1080, 1125]


def test_a_gain_too_small_for_two_decimals_is_shown_as_under_one_hundredth():
    """Two decimals would print 0.004 bits as "0.00 bits": a reading that seems to
    promise nothing is listed; it is shown as under 0.01 bits instead."""
    from diag.core.advise import format_bits

    assert format_bits(1.694) == "1.69 bits"
    assert format_bits(0.006) == "0.01 bits"
    assert format_bits(0.0049) == "under 0.01 bits"
