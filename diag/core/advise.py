"""Expected information gain of each untaken reading (bits), for the next-reading advice.

With the current readings, every drawn unit k of hypothesis h carries a posterior weight
w_hk (prior x its kernel likelihood). A new reading at observable j then follows the
mixture of the units' predictions with unit noise in the noise-scaled coordinate u (see
infer.py). The expected gain is the mutual information I(G; Y_j) of that joint law between
the reading and the group of the hypothesis (the engine passes the groups formed around
the leading suspects: telling apart what no offered reading can split earns nothing),
computed on a histogram of u in half-noise-width bins, each hypothesis's row smoothed by
the Gaussian kernel the likelihood will give that reading once taken (unit noise widened
by the hypothesis's bandwidth, infer.bandwidth with one reading more) and mixed with the
likelihood's blunder term (probability eps spread over the observable's blunder range W,
in one more bin for the part of W outside the histogram), so the advice expects exactly
the update that follows: a split the blunder term would blur earns less. An observable
every hypothesis predicts alike gains 0 bits.
"""

from __future__ import annotations

import functools

import numpy as np

BIN = 0.5          # histogram bin, in noise widths
SHOWN_BITS = 0.01  # gains are shown to two decimals; below this, as "under 0.01 bits"
MAX_BINS = 4000    # wider ranges use wider bins (the gain is then slightly underrated)


def format_bits(bits: float) -> str:
    """An expected gain for people: "1.69 bits", or "under 0.01 bits" where two decimals
    would show 0.00."""
    return f"{bits:.2f} bits" if bits >= SHOWN_BITS - 0.005 else f"under {SHOWN_BITS:g} bits"


def unit_weights(loglik_k: np.ndarray, posterior: np.ndarray) -> np.ndarray:
    """Posterior weight of each drawn unit (H, K), summing to 1: each hypothesis's
    posterior shared among its units by their kernel likelihood."""
    m = np.max(loglik_k, axis=1, keepdims=True)
    safe = np.where(np.isfinite(m), m, 0.0)
    w = np.exp(loglik_k - safe)
    tot = w.sum(axis=1, keepdims=True)
    w = np.divide(w, tot, out=np.zeros_like(w), where=tot > 0) * posterior[:, None]
    s = w.sum()
    return w / s if s > 0 else w


def _smooth(a: np.ndarray, sigma: float) -> np.ndarray:
    """Convolve rows of `a` with a Gaussian of `sigma` bins (zero outside, 4 sigma)."""
    half = int(np.ceil(4.0 * sigma))
    k = np.exp(-0.5 * (np.arange(-half, half + 1) / sigma) ** 2)
    k /= k.sum()
    pad = np.pad(a, ((0, 0), (half, half)))
    out = np.zeros_like(a)
    n = a.shape[1]
    for i, kv in enumerate(k):
        out += kv * pad[:, i:i + n]
    return out


@functools.lru_cache(maxsize=256)
def _fast_len(n: int) -> int:
    """Smallest 2^a 3^b 5^c >= n: a length numpy's FFT transforms fast."""
    best = 1 << max(int(n - 1).bit_length(), 0)
    p5 = 1
    while p5 < best:
        p35 = p5
        while p35 < best:
            m = p35
            while m < n:
                m *= 2
            best = min(best, m)
            p35 *= 3
        p5 *= 5
    return best


def _smooth_rows(a: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Convolve each row i of `a` with a Gaussian of sigma[i] bins (zero outside), by FFT
    with enough zero padding (5 sigma each side) that nothing wraps round. The length is
    the next 2^a 3^b 5^c, not the next power of two: the length changes only the part of
    the kernel the padding leaves out (beyond 10 sigma), and the gain with it by under
    1e-9 bits (about 1e-10 at most on the bundled cases); tests/test_advise.py checks."""
    n = a.shape[1]
    pad = int(np.ceil(5.0 * float(np.max(sigma))))
    m = _fast_len(n + 2 * pad)
    f = np.fft.rfftfreq(m)
    spec = np.fft.rfft(np.pad(a, ((0, 0), (pad, m - n - pad))), axis=1)
    arg = -2.0 * (np.pi * f[None, :] * sigma[:, None]) ** 2
    # exp is 0.0 exactly below -746 (float64 underflow): those terms are not evaluated
    spec *= np.exp(arg, out=np.zeros_like(arg), where=arg > -746.0)
    return np.clip(np.fft.irfft(spec, m, axis=1)[:, pad:pad + n], 0.0, None)


def _group_sum(joint: np.ndarray, lab: np.ndarray) -> np.ndarray:
    """Rows of `joint` (H, n) summed per label lab (H,) in 0..G-1, each present: (G, n),
    in row order within a label (the sums np.add.at forms, to rounding), by one
    np.add.reduceat over the rows sorted by label."""
    order = np.argsort(lab, kind="stable")
    starts = np.searchsorted(lab[order], np.arange(int(lab.max()) + 1))
    return np.add.reduceat(joint[order], starts, axis=0)


def gain(u_j: np.ndarray, w: np.ndarray, tiny: float = 1e-9,
         labels: np.ndarray | None = None, width: np.ndarray | None = None,
         eps: float = 0.0, W: float | None = None) -> float:
    """Mutual information (bits) between the hypothesis (or its group, when `labels`
    (H,) gives each hypothesis's group) and a new reading whose units' predictions are
    u_j (H, K) in u coordinates with weights w (H, K); `width` (H,) is each hypothesis's
    kernel width in noise widths (1 when not given: meter and model noise only); `eps`
    the blunder probability spread uniformly over a range of width W (u units; none
    when eps is 0 or W not given)."""
    keep = (w > tiny) & np.isfinite(u_j)
    if not keep.any():
        return 0.0
    hs = np.nonzero(keep.any(axis=1))[0]
    if len(hs) < 2:
        return 0.0
    u = u_j[hs]
    ww = np.where(keep[hs], w[hs], 0.0)
    lo = np.min(u[keep[hs]]) - 4.0
    hi = np.max(u[keep[hs]]) + 4.0
    kw = np.ones(len(hs)) if width is None else np.maximum(np.asarray(width, float)[hs], 1.0)
    lo -= 4.0 * (kw.max() - 1.0)
    hi += 4.0 * (kw.max() - 1.0)
    bw = max(BIN, (hi - lo) / MAX_BINS)
    nb = int(np.ceil((hi - lo) / bw)) + 1
    idx = np.clip(((np.where(keep[hs], u, lo) - lo) / bw).astype(int), 0, nb - 1)
    rows = np.repeat(np.arange(len(hs)), u.shape[1])
    joint = np.bincount(rows * nb + idx.ravel(), weights=ww.ravel(),
                        minlength=len(hs) * nb).reshape(len(hs), nb)
    if width is None:
        joint = _smooth(joint, 1.0 / bw)
    else:
        joint = _smooth_rows(joint, kw / bw)
    if labels is not None:  # rows summed per group: gain about the group only
        lab = np.unique(np.asarray(labels)[hs], return_inverse=True)[1]
        joint = _group_sum(joint, lab)
    if eps > 0 and W is not None and W > 0:  # the likelihood's blunder term, per row
        mass = joint.sum(axis=1, keepdims=True)
        inside = min(1.0, nb * bw / float(W))
        joint = np.hstack([(1.0 - eps) * joint + eps * mass * (bw / float(W)),
                           eps * mass * (1.0 - inside)])
    total = joint.sum()
    if total <= 0:
        return 0.0
    joint /= total
    ph = joint.sum(axis=1, keepdims=True)
    py = joint.sum(axis=0, keepdims=True)
    denom = ph * py
    nz = (joint > 0) & (denom > 0)
    jn = joint[nz]
    mi = float(np.sum(jn * np.log2(jn / denom[nz])))
    return max(mi, 0.0) if mi > 1e-9 else 0.0


def gains(U: np.ndarray, w: np.ndarray, untaken: np.ndarray,
          labels: np.ndarray | None = None, width: np.ndarray | None = None,
          eps: float = 0.0, W: np.ndarray | None = None) -> np.ndarray:
    """Expected gain (bits) of each untaken observable index (len(untaken),); about the
    group when `labels` is given; `width` (H, M) kernel widths, `eps` and W (M,) the
    blunder term (see `gain`)."""
    return np.array([gain(U[:, :, j], w, labels=labels,
                          width=None if width is None else width[:, j],
                          eps=eps, W=None if W is None else float(W[j]))
                     for j in untaken], dtype=float)
