"""The straight-line box scan row by row, as first written (numba): the reference that
pmap.spectral._detect_scan (the tabled scan) must match bit for bit (tests/test_detect.py)."""

from __future__ import annotations

import math

import numba as nb
import numpy as np


@nb.njit(cache=True, nogil=True)
def scan_rows(Z, widths, strides):  # pragma: no cover - compiled
    """Per row: max over boxes of (Σ_box e)/sqrt(q), e = residual of an LS line (see _detect)."""
    m, n = Z.shape
    out = np.empty(m)
    sx = 0.5 * n * (n - 1.0)
    sxx = (n - 1.0) * n * (2.0 * n - 1.0) / 6.0
    det = n * sxx - sx * sx
    c = np.empty(n + 1)
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
        for k in range(widths.size):
            w = widths[k]
            st = strides[k]
            for i in range(0, n - w + 1, st):
                bx = w * (i + 0.5 * (w - 1.0))  # Σ_box x
                q = w - (sxx * w * w - 2.0 * sx * w * bx + n * bx * bx) / det
                if q <= 1e-12:
                    continue
                t = (c[i + w] - c[i] - c0 * w - c1 * bx) / math.sqrt(q)
                if t > best:
                    best = t
        out[r] = best
    return out
