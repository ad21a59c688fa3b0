"""Box scan of :func:`pmap.spectral.detect_signal` with the row-independent terms in a table.

The variance q of a box's residual sum (hat matrix of {1, x}) and Σ_box x depend on
the box only, not on the spectrum, so √q, Σ_box x and the box ends are computed once
per plan (:func:`box_table`) with the operations and order of the row kernel (kept
as the reference in tests/_detect_reference.py); the scan over rows then does per
box one subtraction chain and one division. Every statistic equals the untabled kernel's
bit for bit (same expressions on the same values; the maximum does not depend on the
order of the boxes).
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np


@nb.njit(cache=True, nogil=True)
def box_table(n, widths, strides):  # pragma: no cover - compiled
    """(start (B,) int64, width (B,) int64, Σ_box x (B,), √q (B,)) of the B boxes with
    q > 1e-12, in the scan order of ``scan_rows``."""
    sx = 0.5 * n * (n - 1.0)
    sxx = (n - 1.0) * n * (2.0 * n - 1.0) / 6.0
    det = n * sxx - sx * sx
    total = 0
    for k in range(widths.size):
        w = widths[k]
        if n - w + 1 > 0:
            total += (n - w + strides[k]) // strides[k]
    start = np.empty(total, dtype=np.int64)
    width = np.empty(total, dtype=np.int64)
    bxs = np.empty(total)
    sq = np.empty(total)
    b = 0
    for k in range(widths.size):
        w = widths[k]
        st = strides[k]
        for i in range(0, n - w + 1, st):
            bx = w * (i + 0.5 * (w - 1.0))
            q = w - (sxx * w * w - 2.0 * sx * w * bx + n * bx * bx) / det
            if q <= 1e-12:
                continue
            start[b] = i
            width[b] = w
            bxs[b] = bx
            sq[b] = math.sqrt(q)
            b += 1
    return start[:b], width[:b], bxs[:b], sq[:b]


@nb.njit(cache=True, nogil=True)
def scan_rows_table(Z, start, width, bxs, sq):  # pragma: no cover - compiled
    """Per row of Z (m, n): the largest (Σ_box residual) / √q over the tabled boxes."""
    m, n = Z.shape
    out = np.empty(m)
    sx = 0.5 * n * (n - 1.0)
    sxx = (n - 1.0) * n * (2.0 * n - 1.0) / 6.0
    det = n * sxx - sx * sx
    c = np.empty(n + 1)
    nb_ = start.size
    for r in range(m):
        s0 = 0.0
        s1 = 0.0
        c[0] = 0.0
        for i in range(n):
            v = Z[r, i]
            s0 += v
            s1 += v * i
            c[i + 1] = s0
        c1 = (n * s1 - sx * s0) / det
        c0 = (s0 - c1 * sx) / n
        best = -np.inf
        for b in range(nb_):
            i = start[b]
            w = width[b]
            t = (c[i + w] - c[i] - c0 * w - c1 * bxs[b]) / sq[b]
            if t > best:
                best = t
        out[r] = best
    return out
