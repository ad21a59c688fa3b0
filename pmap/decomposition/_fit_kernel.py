"""Compiled helpers of the segmentation fit: row statistics of
:meth:`._emission.EmissionSpace.fit` and the mean spectrum of a set of rows for the
merge tests (numba, nogil; imported on use, so that importing pmap.decomposition does
not load numba). Each gives numpy's values bit for bit (same operations, same order)."""

from __future__ import annotations

import numba as nb
import numpy as np

from ..spectral._robust import median_of


@nb.njit(cache=True, nogil=True)
def second_difference_ratio_medians(s, var_mid):  # pragma: no cover - compiled
    """Per row of s (n, C), C ≥ 3: the median over i of d_i² / var_mid[i], where
    d_i = s[i] − 2·s[i+1] + s[i+2] (evaluated in that order, as numpy does for the
    whole array), i.e. ``np.median((d2 * d2) / var_mid, axis=1)`` without the (n, C−2)
    temporaries. NaN where a row holds NaN (as numpy's median)."""
    n, c = s.shape
    nd = c - 2
    out = np.empty(n)
    buf = np.empty(nd)
    for r in range(n):
        nan = False
        for i in range(nd):
            d = s[r, i] - 2.0 * s[r, i + 1] + s[r, i + 2]
            v = (d * d) / var_mid[i]
            nan |= v != v
            buf[i] = v
        out[r] = np.nan if nan else median_of(buf, nd)
    return out


@nb.njit(cache=True, nogil=True)
def mean_of_rows(x, rows):  # pragma: no cover - compiled
    """``x[rows].mean(axis=0)`` for x (n, C) float64 and row indices ``rows`` (m ≥ 1,)
    without the (m, C) copy: the rows summed one after another in the given order (as
    numpy reduces a C-ordered array over its first axis), then divided by m."""
    c = x.shape[1]
    out = np.zeros(c)
    for r in rows:
        for i in range(c):
            out[i] += x[r, i]
    m = len(rows)
    for i in range(c):
        out[i] = out[i] / m
    return out
