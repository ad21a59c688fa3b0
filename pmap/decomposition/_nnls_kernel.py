"""Compiled products of :func:`._nnls.nnls_clipped_rows` (numba, nogil; imported on use,
so that importing pmap.decomposition does not load numba)."""

from __future__ import annotations

import numba as nb
import numpy as np


@nb.njit(cache=True, nogil=True, fastmath={"reassoc"})
def _clipped_products(x, spectra):  # pragma: no cover - compiled
    """(b (n, k) = clip(x, 0) · spectraᵀ, ok (n,): row finite); b undefined where not ok."""
    n, c = x.shape
    k = spectra.shape[0]
    b = np.zeros((n, k))
    ok = np.zeros(n, dtype=np.bool_)
    row = np.empty(c)
    for r in range(n):
        chk = 0.0
        for i in range(c):
            v = np.float64(x[r, i])
            chk += v * 0.0  # NaN for inf or NaN
            row[i] = v if v > 0.0 else 0.0
        if not chk == 0.0:
            continue
        ok[r] = True
        for j in range(k):
            s = 0.0
            for i in range(c):
                s += row[i] * spectra[j, i]
            b[r, j] = s
    return b, ok
