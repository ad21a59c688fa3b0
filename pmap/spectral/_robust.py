"""Compiled robust statistics of one spectrum (median, MAD of the first difference).

Small numba helpers shared by the per-spectrum kernels (spike removal, hot-channel
votes). They work in caller-owned buffers, so a kernel looping over millions of
spectra allocates nothing per spectrum. Medians follow numpy: NaN ignored, the mean of
the two middle values for an even count, NaN when nothing is left.
"""

from __future__ import annotations

import numba
import numpy as np

#: MAD of a Gaussian over its mean absolute deviation (0.6745 / 0.7979): the fallback
#: scale when the MAD is 0 (quantised or flat data).
MEANAD_TO_MAD = 0.6745 / 0.7979

#: White-noise s.d. of one value from the MAD of the first difference,
#: σ = 1.4826·MAD(∇x)/√2 (common practice: ∇ of white noise has variance 2σ²).
MAD_DIFF_TO_SD = 1.4826 / np.sqrt(2.0)


@numba.njit(cache=True, nogil=True)
def select_kth(a, m, k):  # pragma: no cover - compiled
    """k-th smallest (0-based) of a[:m]; reorders a[:m] so that a[:k] <= a[k] <= a[k+1:m].

    Quickselect with a median-of-three pivot and a branch-free Lomuto partition (a
    swap every step, the boundary advanced by the comparison), which avoids the
    mispredicted branches that dominate a classic partition on noisy data. When no
    value lies below the pivot, the values equal to it are split off, so ties
    (quantised counts, flat spectra) stay linear.
    """
    lo = 0
    hi = m  # exclusive
    while hi - lo > 16:
        mid = (lo + hi) >> 1
        x, y, z = a[lo], a[mid], a[hi - 1]
        if x > y:
            x, y = y, x
        if y > z:
            y = z
            if x > y:
                y = x
        p = y
        s = lo
        for i in range(lo, hi):  # a[lo:s] < p <= a[s:i]
            t = a[i]
            a[i] = a[s]
            a[s] = t
            s += t < p
        if k < s:
            hi = s
            continue
        if s > lo:
            lo = s
            continue
        s2 = s  # nothing below the pivot: split off the values equal to it
        for i in range(s, hi):
            t = a[i]
            a[i] = a[s2]
            a[s2] = t
            s2 += t <= p
        if k < s2:
            return p
        lo = s2
    for i in range(lo + 1, hi):  # insertion sort of what is left
        t = a[i]
        j = i - 1
        while j >= lo and a[j] > t:
            a[j + 1] = a[j]
            j -= 1
        a[j + 1] = t
    return a[k]


@numba.njit(cache=True, nogil=True)
def median_of(a, m):  # pragma: no cover - compiled
    """Median of a[:m] (no NaN inside; reorders a); NaN for m == 0."""
    if m == 0:
        return np.nan
    k = m // 2
    hi = select_kth(a, m, k)
    if m % 2:
        return hi
    lo = a[0]
    for i in range(1, k):
        if a[i] > lo:
            lo = a[i]
    return (lo + hi) / 2.0


@numba.njit(cache=True, nogil=True)
def nan_median_mad(v, m, buf):  # pragma: no cover - compiled
    """(median, MAD, mean absolute deviation) of v[:m] ignoring NaN; buf: work (≥ m)."""
    c = 0
    for i in range(m):
        if v[i] == v[i]:
            buf[c] = v[i]
            c += 1
    if c == 0:
        return np.nan, np.nan, np.nan
    med = median_of(buf, c)
    s = 0.0
    c = 0
    for i in range(m):
        if v[i] == v[i]:
            dv = abs(v[i] - med)
            buf[c] = dv
            s += dv
            c += 1
    return med, median_of(buf, c), s / c


@numba.njit(cache=True, nogil=True)
def diff_scale(x, start, stop, d, buf):  # pragma: no cover - compiled
    """Median and robust MAD of the first difference of x[start:stop].

    Fills d[:stop - start - 1] with the differences. The MAD falls back to the scaled
    mean absolute deviation when it is 0; both NaN when no difference is finite.
    """
    m = stop - start - 1
    for j in range(m):
        d[j] = x[start + j + 1] - x[start + j]
    med, mad, meanad = nan_median_mad(d, m, buf)
    if not mad > 0:
        mad = meanad * MEANAD_TO_MAD
    return med, mad


@numba.njit(cache=True, nogil=True)
def diff_noise_sd(x, start, stop, d, buf):  # pragma: no cover - compiled
    """White-noise s.d. of one value of x[start:stop] from the robust MAD of its first
    difference (see :func:`diff_scale`); NaN when no difference is finite."""
    _, mad = diff_scale(x, start, stop, d, buf)
    return MAD_DIFF_TO_SD * mad


@numba.njit(cache=True, nogil=True)
def _noise_sd_rows(flat):  # pragma: no cover - compiled
    m, n = flat.shape
    out = np.full(m, np.nan)
    x = np.empty(n)
    d = np.empty(max(n, 1))
    buf = np.empty(max(n, 1))
    if n < 2:
        return out
    for i in range(m):
        for j in range(n):
            x[j] = flat[i, j]
        out[i] = diff_noise_sd(x, 0, n, d, buf)
    return out


def robust_sigma_of_diff(x: np.ndarray) -> np.ndarray:
    """Per-spectrum white-noise s.d. from the MAD of the first difference (…, n) → (…).

    σ = 1.4826·MAD(∇x)/√2 (common practice), NaN ignored; falls back to the scaled
    mean absolute deviation where the MAD is zero (quantised data).
    """
    a = np.asarray(x, dtype=np.float64)
    flat = np.ascontiguousarray(a.reshape(-1, a.shape[-1]))
    return _noise_sd_rows(flat).reshape(a.shape[:-1])
