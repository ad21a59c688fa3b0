"""Batched non-negative least squares: abundances of fixed component spectra, row by row.

Every row is solved on its own (no criterion shared between rows), so the
result does not depend on how the pixels are chunked.
"""

from __future__ import annotations

import numpy as np

#: Up to this many components the exact solution is found by enumerating supports.
ENUMERATE_MAX = 8


def nnls_rows(
    x: np.ndarray, spectra: np.ndarray, *, max_iter: int = 2000, tol: float = 1e-12
) -> np.ndarray:
    """Non-negative abundances ``w`` (n, k) minimising ``||x - w @ spectra||`` for each row.

    Parameters
    ----------
    x : ndarray, shape (n, n_channels)
        Spectra (finite).
    spectra : ndarray, shape (k, n_channels)
        Fixed component spectra.
    max_iter, tol : int, float
        Coordinate-descent limits, used only when k > :data:`ENUMERATE_MAX`.

    Notes
    -----
    For k ≤ 8 the solution is exact: the optimum of a convex non-negative least
    squares problem is the unconstrained least-squares solution on its support
    (Lawson & Hanson, *Solving Least Squares Problems*, 1974), so the feasible
    support solution with the largest ``w·b`` (b = x·spectraᵀ) wins; 2^k − 1
    supports, each a (n, |S|) product. Larger k uses cyclic coordinate descent
    (Franc, Hlaváč & Navara, CAIP 2005) started from the clipped least-squares
    solution, stopped per batch when the largest update is below ``tol`` times
    the largest abundance.
    """
    g = spectra @ spectra.T
    b = x @ spectra.T
    n, k = b.shape
    if k <= ENUMERATE_MAX:
        return _enumerate(g, b)
    return _coordinate_descent(g, b, max_iter=max_iter, tol=tol)


def nnls_clipped_rows(x: np.ndarray, spectra: np.ndarray) -> np.ndarray:
    """Abundances (n, k) of the rows x (n, C), values below 0 clipped to 0, NaN for rows
    with a non-finite value: what ``nnls_rows(np.clip(x[ok], 0, None), spectra)`` gives
    on the finite rows, with the products ``clip(x) · spectraᵀ`` taken in one compiled
    pass over x in its stored dtype (no float64, finite-row or clipped copies). The
    products are summed in another order than BLAS: abundances agree to rounding."""
    from ._nnls_kernel import _clipped_products

    spectra = np.ascontiguousarray(spectra, dtype=np.float64)
    if x.dtype not in (np.float32, np.float64):
        x = x.astype(np.float64)
    b, ok = _clipped_products(np.ascontiguousarray(x), spectra)
    out = np.full((len(x), len(spectra)), np.nan)
    if ok.any():
        g = spectra @ spectra.T
        bo = b[ok] if not ok.all() else b
        k = len(spectra)
        out[ok] = _enumerate(g, bo) if k <= ENUMERATE_MAX else \
            _coordinate_descent(g, bo, max_iter=2000, tol=1e-12)
    return out


def _enumerate(g: np.ndarray, b: np.ndarray) -> np.ndarray:
    n, k = b.shape
    best = np.zeros((n, k))
    best_val = np.zeros(n)
    scale = np.abs(b).max(initial=0.0) * 1e-12
    for code in range(1, 2**k):
        idx = [j for j in range(k) if code >> j & 1]
        inv = np.linalg.pinv(g[np.ix_(idx, idx)])
        bs = b[:, idx]
        ws = bs @ inv
        val = np.einsum("ij,ij->i", ws, bs)
        better = (ws >= 0).all(axis=1) & (val > best_val + scale)
        if better.any():
            rows = np.flatnonzero(better)
            best[rows] = 0.0
            best[np.ix_(rows, idx)] = ws[rows]
            best_val[rows] = val[rows]
    return best


def _coordinate_descent(g: np.ndarray, b: np.ndarray, *, max_iter: int, tol: float) -> np.ndarray:
    k = g.shape[0]
    w = np.clip(b @ np.linalg.pinv(g), 0.0, None)
    diag = np.where(np.diag(g) > 0, np.diag(g), 1.0)
    for _ in range(max_iter):
        change = 0.0
        for t in range(k):
            new = np.clip(w[:, t] - (w @ g[:, t] - b[:, t]) / diag[t], 0.0, None)
            change = max(change, float(np.abs(new - w[:, t]).max(initial=0.0)))
            w[:, t] = new
        if change <= tol * max(float(w.max(initial=0.0)), np.finfo(float).tiny):
            break
    return w
