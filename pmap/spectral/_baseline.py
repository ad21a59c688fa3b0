"""Baseline removal (asymmetric least squares, polynomial, constant) and Savitzky–Golay smoothing."""

from __future__ import annotations

from typing import Any

import numba
import numpy as np
import xarray as xr

from ..errors import StepError
from ..noise import noise_correlated, noise_subtracted
from ..steps import register_step
from ._common import check_cube, finish, float_dtype, map_spectra

__all__ = ["als_baseline", "remove_baseline", "smooth"]


def _penalty_bands(n: int, diff_order: int) -> np.ndarray:
    """Upper bands (diff_order + 1, n) of DᵀD, D the (n − d) × n difference matrix of order d.

    Row ``d − k`` holds the k-th superdiagonal, right-aligned as in
    :func:`scipy.linalg.solveh_banded`: band[d − k, i] = (DᵀD)[i − k, i]
    = Σ_j c[j − k]·c[j] over j = k…d with 0 ≤ i − j ≤ n − d − 1 (c: the row of D).
    """
    d = diff_order
    c = np.diff(np.eye(d + 1), n=d, axis=0)[0]
    i = np.arange(n)
    bands = np.zeros((d + 1, n))
    for k in range(d + 1):
        for j in range(k, d + 1):
            r = i - j
            bands[d - k] += np.where((r >= 0) & (r <= n - d - 1), c[j - k] * c[j], 0.0)
        bands[d - k, :k] = 0.0
    return bands


@numba.njit(cache=True, nogil=True)
def _als_core(y, bands, lam, p, max_iter, tol):  # pragma: no cover - compiled
    """Batched ALS: y (m, n) → baselines (m, n). Banded Cholesky solve per spectrum."""
    m, n = y.shape
    u = bands.shape[0] - 1
    out = np.empty((m, n))
    w = np.empty(n)
    w_new = np.empty(n)
    L = np.empty((u + 1, n))  # L[k, i] = L(i, i - k)
    z = np.empty(n)
    for s in range(m):
        yy = y[s]
        finite = True
        for i in range(n):
            if not np.isfinite(yy[i]):
                finite = False
                break
        if not finite:
            for i in range(n):
                out[s, i] = np.nan
            continue
        for i in range(n):
            w[i] = 1.0
        for _it in range(max_iter + 1):
            # Cholesky of A = W + lam DᵀD, A(i, i - k) = lam * bands[u - k, i]
            for i in range(n):
                for k in range(u, -1, -1):
                    j = i - k
                    if j < 0:
                        continue
                    a = lam * bands[u - k, i]
                    if k == 0:
                        a += w[i]
                    for q in range(1, u + 1 - k):
                        if j - q < 0:
                            break
                        a -= L[k + q, i] * L[q, j]
                    if k == 0:
                        L[0, i] = np.sqrt(a)
                    else:
                        L[k, i] = a / L[0, j]
            # forward: L z' = w y ; backward: Lᵀ z = z'
            for i in range(n):
                acc = w[i] * yy[i]
                for k in range(1, u + 1):
                    if i - k >= 0:
                        acc -= L[k, i] * z[i - k]
                z[i] = acc / L[0, i]
            for i in range(n - 1, -1, -1):
                acc = z[i]
                for k in range(1, u + 1):
                    if i + k < n:
                        acc -= L[k, i + k] * z[i + k]
                z[i] = acc / L[0, i]
            num = 0.0
            den = 0.0
            for i in range(n):
                w_new[i] = p if yy[i] > z[i] else 1.0 - p
                num += (w_new[i] - w[i]) ** 2
                den += w[i] ** 2
            if np.sqrt(num) / max(np.sqrt(den), 1e-300) < tol:
                break
            for i in range(n):
                w[i] = w_new[i]
        for i in range(n):
            out[s, i] = z[i]
    return out


def als_baseline(
    y: Any,
    *,
    lam: float = 1e5,
    p: float = 0.01,
    diff_order: int = 2,
    max_iter: int = 50,
    tol: float = 1e-3,
) -> np.ndarray:
    """Asymmetric least-squares baselines of a batch of spectra (…, n), numpy in and out.

    Minimises Σ wᵢ(yᵢ − zᵢ)² + λ Σ (Δᵈz)ᵢ² with wᵢ = p above the baseline and 1 − p below,
    re-weighting until the relative change of the weights is below ``tol``
    (the iteration of :func:`pybaselines.whittaker.asls`). Spectra with NaN give NaN.

    Notes
    -----
    Each solve is a banded Cholesky factorisation, O(n·d²) per spectrum and iteration,
    compiled with numba.

    References
    ----------
    Eilers & Boelens, Baseline correction with asymmetric least squares smoothing,
    Leiden University Medical Centre report (2005).
    """
    arr = np.asarray(y, dtype=np.float64)
    n = arr.shape[-1]
    if not 0 < p < 1:
        raise StepError(f"p must be between 0 and 1, got {p}")
    if not lam > 0:
        raise StepError(f"lam must be positive, got {lam}")
    if n <= diff_order:
        raise StepError(f"{n} channels are too few for a difference order {diff_order}")
    bands = _penalty_bands(n, int(diff_order))
    flat = np.ascontiguousarray(arr.reshape(-1, n))
    return _als_core(flat, bands, float(lam), float(p), int(max_iter), float(tol)).reshape(
        arr.shape
    )


def _windows_mask(axis: np.ndarray, window: Any) -> np.ndarray:
    """Channels inside one (lo, hi) window or a list of windows, in axis units."""
    if window is None:
        raise StepError("this baseline method needs window=(lo, hi) in the axis units")
    wins = np.asarray(window, dtype=float)
    if wins.ndim == 1:
        wins = wins[None, :]
    if wins.ndim != 2 or wins.shape[1] != 2:
        raise StepError(f"window must be (lo, hi) or a list of such pairs, got {window!r}")
    mask = np.zeros(axis.size, dtype=bool)
    for lo, hi in wins:
        mask |= (axis >= min(lo, hi)) & (axis <= max(lo, hi))
    if not mask.any():
        raise StepError(
            f"window {window!r} holds no channels of the axis ({axis[0]:g}–{axis[-1]:g})"
        )
    return mask


@numba.njit(cache=True, nogil=True, error_model="numpy")  # 0 / 0: NaN, as in numpy
def _window_means_rows(flat, idx, out):  # pragma: no cover - compiled
    """out[i] = mean of flat[i, idx] over the non-NaN values (NaN if none), float64.

    Summed from 0.0 in channel order, as np.nanmean(x[..., idx], axis=-1,
    dtype=np.float64) sums a block of several spectra (the gathered channels lie
    outermost in memory); a float64 sum of float32 values is exact anyway unless they
    span some 29 binary orders of magnitude.
    """
    for i in range(flat.shape[0]):
        total = 0.0
        count = 0
        for j in idx:
            v = np.float64(flat[i, j])
            finite = v == v
            total += v if finite else 0.0
            count += finite
        out[i] = total / count


def _window_means(x: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """Mean of each spectrum (…, n) over the channels ``idx``, NaN ignored (…), float64."""
    flat = np.ascontiguousarray(x.reshape(-1, x.shape[-1]))
    out = np.empty(flat.shape[0])
    _window_means_rows(flat, idx, out)
    return out.reshape(x.shape[:-1])


def _minus_level(x: np.ndarray, level: np.ndarray) -> np.ndarray:
    """Spectra x (…, n) minus one level each (…), the level cast to x's dtype first;
    returned in the floating dtype that holds x."""
    return np.asarray(x - level.astype(x.dtype)[..., None], dtype=float_dtype(x.dtype))


def _poly_baseline(
    x: np.ndarray, t: np.ndarray, degree: int, mask: np.ndarray | None, max_iter: int, tol: float
) -> np.ndarray:
    """Polynomial baselines (…, n): least squares on the masked channels, or iterative
    clipping (values above the fit replaced by the fit) over all channels."""
    v = np.polynomial.polynomial.polyvander(t, degree)
    if mask is not None:
        coef = np.linalg.lstsq(v[mask], x[..., mask].reshape(-1, mask.sum()).T, rcond=None)[0]
        return (v @ coef).T.reshape(x.shape)
    q, _ = np.linalg.qr(v)  # orthonormal basis: the fit of y is (y q) qᵀ, cost 2n(d + 1)
    q, qt = np.ascontiguousarray(q), np.ascontiguousarray(q.T)  # C order: fast BLAS path
    flat = x.reshape(-1, x.shape[-1])
    out = np.empty(flat.shape, dtype=np.float64)
    for start in range(0, flat.shape[0], 1024):  # cache-sized batches of spectra
        y = flat[start : start + 1024].astype(np.float64)
        base = (y @ q) @ qt
        for _ in range(max_iter):
            np.minimum(y, base, out=y)
            new = (y @ q) @ qt
            change = np.linalg.norm(new - base, axis=-1) / np.maximum(
                np.linalg.norm(base, axis=-1), 1e-300
            )
            base = new
            if np.all(change < tol):
                break
        out[start : start + 1024] = base
    return out.reshape(x.shape)


@register_step("remove_baseline")
def remove_baseline(
    cube: xr.DataArray,
    *,
    method: str = "als",
    lam: float = 1e5,
    p: float = 0.01,
    degree: int = 2,
    window: Any = None,
    max_iter: int = 50,
    tol: float = 1e-3,
) -> xr.DataArray:
    """Subtract a baseline from every spectrum.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube (*stack, y, x, S).
    method : {"als", "poly", "constant"}
        "als": asymmetric least squares (``lam``, ``p``, ``max_iter``, ``tol``);
        "poly": polynomial of ``degree`` fitted to the channels in ``window`` (one
        (lo, hi) pair or a list, axis units) or, without ``window``, by iterative clipping
        of the values above the fit (until the relative change of every baseline is below
        ``tol`` or ``max_iter``); "constant": mean of the channels in ``window``.
    lam : float
        ALS smoothness λ (second differences; larger is stiffer). Default 1e5.
    p : float
        ALS asymmetry: weight of points above the baseline (default 0.01).
    degree : int
        Polynomial degree for "poly".
    window : (float, float) or list of them, or "edges"
        Signal-free range(s) of the spectral axis (nm, eV…); for "constant",
        ``"edges"`` takes the outer 5 % of channels at each end.

    Returns
    -------
    xarray.DataArray
        Lazy cube minus its baseline, same units.

    Notes
    -----
    ALS costs O(n) per spectrum and iteration (banded Cholesky, numba); about 10–20
    iterations are typical.

    References
    ----------
    Eilers & Boelens, Baseline correction with asymmetric least squares smoothing (2005).
    """
    cube, sdim = check_cube(cube)
    axis = np.asarray(cube[sdim].values, dtype=float)
    params: dict[str, Any] = {"method": method}
    if method == "als":
        als_baseline(np.zeros((1, axis.size)), lam=lam, p=p, max_iter=1)  # validate early

        def core(x):
            return x - als_baseline(x, lam=lam, p=p, max_iter=max_iter, tol=tol)

        params.update(lam=lam, p=p, max_iter=max_iter, tol=tol)
    elif method == "poly":
        degree = int(degree)
        if not 0 <= degree < axis.size:
            raise StepError(f"degree must be between 0 and {axis.size - 1}, got {degree}")
        mask = _windows_mask(axis, window) if window is not None else None
        if mask is not None and mask.sum() <= degree:
            raise StepError(f"window holds {mask.sum()} channels, too few for degree {degree}")
        t = (axis - axis.mean()) / max(np.ptp(axis) / 2, 1e-300)

        def core(x):
            return x - _poly_baseline(x.astype(np.float64), t, degree, mask, max_iter, tol)

        params.update(degree=degree, window=window, max_iter=max_iter, tol=tol)
    elif method == "constant":
        if isinstance(window, str) and window == "edges":
            # the outer 5 % of channels at each end (at least 3): signal-free on a
            # spectrometer window chosen around the emission (common practice)
            k = max(3, int(round(0.05 * axis.size)))
            mask = np.zeros(axis.size, dtype=bool)
            mask[:k] = mask[-k:] = True
        else:
            mask = _windows_mask(axis, window)

        # each spectrum's mean over the windows (float64, NaN ignored), computed once:
        # it is subtracted, and it joins the noise model's pedestal
        base = xr.apply_ufunc(_window_means, cube, input_core_dims=[[sdim]],
                              kwargs={"idx": np.flatnonzero(mask)}, dask="parallelized",
                              output_dtypes=[np.float64])
        out = xr.apply_ufunc(_minus_level, cube, base, input_core_dims=[[sdim], []],
                             output_core_dims=[[sdim]], dask="parallelized",
                             output_dtypes=[float_dtype(cube.dtype)], keep_attrs=True)
        params.update(window=window)
    else:
        raise StepError(f"unknown baseline method {method!r}; use 'als', 'poly' or 'constant'")
    if method != "constant":
        out = map_spectra(core, cube, sdim)
        base = cube - out
    # the noise model keeps the variance of the raw counts: the subtracted baseline
    # joins the pedestal (a per-pixel constant for "constant", else per channel)
    out = noise_subtracted(out, cube, base, f"remove_baseline {method}")
    return finish(out, cube, "remove_baseline", params)


@register_step("smooth")
def smooth(cube: xr.DataArray, *, window: int = 5, order: int = 2) -> xr.DataArray:
    """Savitzky–Golay smoothing along the spectral axis.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube (*stack, y, x, S).
    window : int
        Odd window length in channels (default 5).
    order : int
        Polynomial order, smaller than ``window`` (default 2).

    Returns
    -------
    xarray.DataArray
        Lazy smoothed cube (:func:`scipy.signal.savgol_filter`, mode "interp" at the ends).

    References
    ----------
    Savitzky & Golay, Anal. Chem. 36, 1627 (1964).
    """
    cube, sdim = check_cube(cube)
    window, order = int(window), int(order)
    if window < 3 or window % 2 == 0:
        raise StepError(f"window must be an odd number ≥ 3, got {window}")
    if not 0 <= order < window:
        raise StepError(f"order must be between 0 and window − 1, got {order}")
    if window > cube.sizes[sdim]:
        raise StepError(f"window {window} is longer than the spectrum ({cube.sizes[sdim]})")
    from scipy import signal  # on use: scipy.signal (with scipy.stats) costs ~0.5 s to import

    out = map_spectra(
        signal.savgol_filter,
        cube,
        sdim,
        kwargs={"window_length": window, "polyorder": order, "axis": -1},
    )
    out = noise_correlated(out, cube, f"smooth (Savitzky-Golay, {window} channels)")
    return finish(out, cube, "smooth", {"window": window, "order": order})
