"""Shared helpers of the fitting package: per-spectrum block application and descriptors."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import xarray as xr

from ..cube import spectral_dim


def apply_per_spectrum(
    cube: xr.DataArray,
    func: Callable[..., np.ndarray],
    n_out: int,
    *extra: xr.DataArray,
    out_dim: str = "fit_output",
    keep_float32: bool = False,
) -> xr.DataArray:
    """Lazily apply a batched row function to every spectrum of a cube.

    ``func(Y, *extra_1d)`` gets ``Y`` shaped (n_spectra, n_channels) float64 (or
    float32 as stored when ``keep_float32``, saving a float64 copy of the chunk)
    and each extra array as a 1-D (n_channels,) vector, and returns
    (n_spectra, n_out). The result has dims (*stack, y, x, out_dim). Computes nothing.
    """
    sdim = spectral_dim(cube)
    n_ch = cube.sizes[sdim]

    def block(y, *ex):
        shp = y.shape[:-1]
        dt = np.float32 if keep_float32 and y.dtype == np.float32 else np.float64
        rows = np.ascontiguousarray(y.reshape(-1, y.shape[-1]), dtype=dt)
        vecs = [np.asarray(e, dtype=np.float64).reshape(-1, n_ch)[0] for e in ex]
        if rows.shape[0] == 0:
            return np.empty((*shp, n_out))
        return func(rows, *vecs).reshape(*shp, n_out)

    out = xr.apply_ufunc(
        block,
        cube,
        *extra,
        input_core_dims=[[sdim]] * (1 + len(extra)),
        output_core_dims=[[out_dim]],
        dask="parallelized",
        output_dtypes=[np.float64],
        dask_gufunc_kwargs={"output_sizes": {out_dim: n_out}},
        keep_attrs=False,
    )
    return out.assign_coords({d: cube[d] for d in out.dims if d in cube.coords})


def fwhm_at_half(x: np.ndarray, Y: np.ndarray, imax: np.ndarray, half: np.ndarray) -> np.ndarray:
    """Full width where Y crosses ``half`` either side of ``imax`` (linear interpolation).

    NaN when a side never falls below ``half`` within the axis.
    """
    n = x.size
    rows = np.arange(Y.shape[0])
    idx = np.arange(n)[None, :]
    below = Y < half[:, None]
    left = np.where(below & (idx < imax[:, None]), idx, -1).max(axis=1)
    right = np.where(below & (idx > imax[:, None]), idx, n).min(axis=1)
    ok = (left >= 0) & (right < n)
    lj = np.clip(left, 0, n - 2)
    rj = np.clip(right, 1, n - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        ya, yb = Y[rows, lj], Y[rows, lj + 1]
        xl = x[lj] + (half - ya) * (x[lj + 1] - x[lj]) / (yb - ya)
        ya, yb = Y[rows, rj - 1], Y[rows, rj]
        xr_ = x[rj - 1] + (half - ya) * (x[rj] - x[rj - 1]) / (yb - ya)
        width = xr_ - xl
    return np.where(ok, width, np.nan)


def smooth3(Y: np.ndarray) -> np.ndarray:
    """Three-channel running mean along the last axis (edges keep their value)."""
    out = Y.copy()
    if Y.shape[-1] >= 3:
        out[:, 1:-1] = (Y[:, :-2] + Y[:, 1:-1] + Y[:, 2:]) / 3.0
    return out
