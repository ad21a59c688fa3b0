"""Cosmic-spike removal for maps: spectral modified z-score + spatial-neighbour test."""

from __future__ import annotations

import warnings

import dask.array as da
import numba
import numpy as np
import xarray as xr

from ..errors import StepError
from ..steps import register_step
from ._common import check_cube, finish, float_dtype

__all__ = ["remove_spikes", "spike_candidates"]

# offsets of the 8 spatial neighbours (dy, dx)
_NEIGHBOURS = [(dy, dx) for dy in (-1, 0, 1) for dx in (-1, 0, 1) if (dy, dx) != (0, 0)]


@numba.njit(cache=True, nogil=True)
def _row_stats(flat):  # pragma: no cover - compiled
    """Per row of (m, k): NaN-aware median, MAD and mean absolute deviation."""
    m = flat.shape[0]
    med = np.empty(m)
    mad = np.empty(m)
    meanad = np.empty(m)
    for i in range(m):
        r = flat[i]
        mi = np.nanmedian(r)
        dev = np.abs(r - mi)
        med[i] = mi
        mad[i] = np.nanmedian(dev)
        meanad[i] = np.nanmean(dev)
    return med, mad, meanad


def _robust_scale(d: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Median and MAD of (…, m) along the last axis, NaN-aware; MAD = 0 → scaled mean |dev|.

    Compiled per-row loop (numba); all-NaN rows give NaN.
    """
    flat = np.ascontiguousarray(d.reshape(-1, d.shape[-1]), dtype=np.float64)
    med, mad, meanad = _row_stats(flat)
    # MAD = 0 happens with quantised or flat data: use the mean absolute deviation
    # scaled to the MAD of a Gaussian (0.6745/0.7979), and if that is 0 too, no spikes.
    mad = np.where(mad > 0, mad, meanad * (0.6745 / 0.7979))
    shape = d.shape[:-1] + (1,)
    return med.reshape(shape), mad.reshape(shape)


def spike_candidates(x: np.ndarray, threshold: float = 6.0) -> tuple[np.ndarray, np.ndarray]:
    """Spectral spike candidates after Whitaker & Hayes (2018), batched over (…, n).

    The modified z-score of the first difference ∇x[i] = x[i+1] − x[i] is
    z = 0.6745 (∇x − median)/MAD per spectrum. Channel i is a candidate when the step into
    it rises (z[i−1] > threshold) or the step out of it falls (z[i] < −threshold): cosmic
    spikes are positive. Candidates are then widened by one channel on each side so that
    the top of a 3-channel spike is tested too.

    Returns
    -------
    (candidates bool (…, n), sigma (…, 1))
        sigma is the white-noise s.d. of one value, 1.4826·MAD/√2.
    """
    flat = np.ascontiguousarray(x.reshape(-1, x.shape[-1]), dtype=np.float64)
    wide, mad = _candidates_rows(flat, float(threshold))
    shape = x.shape[:-1]
    return wide.reshape(x.shape), (1.4826 * mad / np.sqrt(2.0)).reshape(shape + (1,))


@numba.njit(cache=True, nogil=True)
def _candidates_rows(flat, threshold):  # pragma: no cover - compiled
    """Compiled core of :func:`spike_candidates` over rows (m, n): (wide bool, MAD (m,))."""
    m, n = flat.shape
    wide = np.zeros((m, n), dtype=np.bool_)
    mads = np.empty(m)
    if n < 2:
        mads[:] = np.nan
        return wide, mads
    d = np.empty(n - 1)
    cand = np.zeros(n, dtype=np.bool_)
    for i in range(m):
        for j in range(n - 1):
            d[j] = flat[i, j + 1] - flat[i, j]
        med = np.nanmedian(d)
        dev = np.abs(d - med)
        mad = np.nanmedian(dev)
        if not mad > 0:  # quantised or flat data: scaled mean absolute deviation
            mad = np.nanmean(dev) * (0.6745 / 0.7979)
        mads[i] = mad
        cand[:] = False
        if mad > 0:
            for j in range(n - 1):
                z = 0.6745 * (d[j] - med) / mad
                if z > threshold:
                    cand[j + 1] = True
                elif z < -threshold:
                    cand[j] = True
        for j in range(n):
            if cand[j] or (j > 0 and cand[j - 1]) or (j < n - 1 and cand[j + 1]):
                wide[i, j] = True
    return wide, mads


def _interp_fill(x: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Linear interpolation across masked channels (…, n) from the nearest unmasked ones."""
    n = x.shape[-1]
    idx = np.broadcast_to(np.arange(n), x.shape)
    left = np.maximum.accumulate(np.where(~mask, idx, -1), axis=-1)
    right = np.minimum.accumulate(np.where(~mask, idx, n)[..., ::-1], axis=-1)[..., ::-1]
    lc, rc = np.clip(left, 0, n - 1), np.clip(right, 0, n - 1)
    xl = np.take_along_axis(x, lc, -1)
    xr_ = np.take_along_axis(x, rc, -1)
    t = np.where((left >= 0) & (right < n), (idx - left) / np.maximum(right - left, 1), 0.0)
    out = np.where(left < 0, xr_, np.where(right >= n, xl, xl + t * (xr_ - xl)))
    return out


def _local_sigma(inner: np.ndarray, ib, iy, ix, ic, half: int = 10) -> np.ndarray:
    """Noise s.d. near each candidate: 1.4826·MAD/√2 of the first difference over
    2·half + 1 channels of its own spectrum (follows shot noise, which grows with signal)."""
    n = inner.shape[-1]
    w = min(2 * half + 1, n)
    start = np.clip(ic - half, 0, n - w)
    cc = start[:, None] + np.arange(w)
    win = inner[ib[:, None], iy[:, None], ix[:, None], cc]
    _, mad = _robust_scale(np.diff(win, axis=-1))
    return 1.4826 * mad[:, 0] / np.sqrt(2.0)


def _clean_block(
    block: np.ndarray, threshold: float, min_neighbours: int, out_dtype: np.dtype
) -> np.ndarray:
    """Core over a padded block (B…, Y + 2, X + 2, n) with NaN outside the map."""
    shape = block.shape
    b = block.reshape((-1,) + shape[-3:])
    inner = b[:, 1:-1, 1:-1, :].astype(np.float64)
    cand, _ = spike_candidates(inner, threshold)
    out = b.astype(out_dtype, copy=True)
    ib, iy, ix, ic = np.nonzero(cand)
    if ib.size == 0:
        return out.reshape(shape)
    val = inner[ib, iy, ix, ic]
    nb = np.stack([b[ib, iy + 1 + dy, ix + 1 + dx, ic] for dy, dx in _NEIGHBOURS], axis=-1)
    nb = nb.astype(np.float64)
    n_valid = np.sum(~np.isnan(nb), axis=-1)
    spatial = n_valid >= min_neighbours
    with warnings.catch_warnings():  # all-NaN neighbourhoods (single spectra) are expected
        warnings.simplefilter("ignore", RuntimeWarning)
        nb_med = np.nanmedian(nb, axis=-1)
        nb_mad = np.nanmedian(np.abs(nb - nb_med[:, None]), axis=-1)
    sig = _local_sigma(inner, ib, iy, ix, ic)
    scale = np.maximum(sig, np.where(np.isfinite(nb_mad), 1.4826 * nb_mad, 0.0))
    spike_sp = spatial & (val - nb_med > threshold * scale) & (scale >= 0)
    # spectral fallback (map edges with < min_neighbours, single spectra): compare with the
    # median of ±3 channels that are not candidates themselves
    fb = ~spatial
    spike_fb = np.zeros_like(fb)
    if fb.any():
        n = inner.shape[-1]
        win = np.arange(-3, 4)
        cc = np.clip(ic[fb, None] + win, 0, n - 1)
        wv = inner[ib[fb, None], iy[fb, None], ix[fb, None], cc]
        wc = cand[ib[fb, None], iy[fb, None], ix[fb, None], cc]
        wv = np.where(wc | (cc == ic[fb, None]), np.nan, wv)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            ref = np.nanmedian(wv, axis=-1)
        spike_fb[fb] = np.nan_to_num(val[fb] - ref, nan=-np.inf) > threshold * sig[fb]
    spike = spike_sp | spike_fb
    if not spike.any():
        return out.reshape(shape)
    inner_out = out[:, 1:-1, 1:-1, :]
    s_sp = spike_sp
    inner_out[ib[s_sp], iy[s_sp], ix[s_sp], ic[s_sp]] = nb_med[s_sp]
    if spike_fb.any():
        mask = np.zeros(inner.shape, dtype=bool)
        mask[ib[spike_fb], iy[spike_fb], ix[spike_fb], ic[spike_fb]] = True
        rows = np.unique(np.stack([ib[spike_fb], iy[spike_fb], ix[spike_fb]]), axis=1)
        sub = inner[rows[0], rows[1], rows[2]]
        filled = _interp_fill(sub, mask[rows[0], rows[1], rows[2]])
        m = mask[rows[0], rows[1], rows[2]]
        cur = inner_out[rows[0], rows[1], rows[2]]
        inner_out[rows[0], rows[1], rows[2]] = np.where(m, filled, cur)
    return out.reshape(shape)


@register_step("remove_spikes")
def remove_spikes(
    cube: xr.DataArray,
    *,
    threshold: float = 6.0,
    min_neighbours: int = 3,
    return_mask: bool = False,
) -> xr.DataArray | tuple[xr.DataArray, xr.DataArray]:
    """Remove cosmic-ray spikes using both the spectrum and the spatial neighbours.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube (*stack, y, x, S).
    threshold : float
        Threshold of the spectral modified z-score (Whitaker & Hayes use 6) and of the
        spatial test, in robust noise s.d.
    min_neighbours : int
        Fewest valid spatial neighbours for the spatial test (default 3; a corner has 3);
        with fewer (single spectra, 1-pixel-wide maps) a spectral test is used.
    return_mask : bool
        Also return the mask of replaced values.

    Returns
    -------
    xarray.DataArray or (xarray.DataArray, xarray.DataArray)
        The cleaned cube (floating dtype; every value not replaced is bit-identical to the
        input) and, with ``return_mask``, a bool DataArray named ``spike_mask`` of the same
        dims (``mask.sum()`` is the lazy count of replaced values).

    Notes
    -----
    A value x(y, x, i) is a spike when (1) channel i is a spectral candidate
    (:func:`spike_candidates`: modified z-score of the first difference beyond
    ``threshold``, the channel entered by a rise or left by a fall, widened by one channel)
    and (2) it exceeds the median of its 3×3 spatial neighbours at channel i by more than
    ``threshold`` × s, s = max(local noise s.d. of the spectrum, 1.4826·MAD of the
    neighbours at i); the local s.d. is 1.4826·MAD/√2 of the first difference over 21
    channels around i, so it follows shot noise. Spikes are replaced by that neighbour median. Where fewer than
    ``min_neighbours`` neighbours exist, (2) compares with the median of ±3 channels and the
    spike is replaced by linear interpolation across the flagged channels. Chunks are read
    with a 1-pixel spatial overlap (:func:`dask.array.map_overlap`). Cost: two medians per
    spectrum plus work proportional to the (few) candidates.

    References
    ----------
    Whitaker & Hayes, Chemometr. Intell. Lab. Syst. 179, 82 (2018).
    """
    cube, sdim = check_cube(cube)
    threshold = float(threshold)
    if not threshold > 0:
        raise StepError(f"threshold must be positive, got {threshold}")
    if cube.sizes[sdim] < 3:
        raise StepError("spike removal needs at least 3 spectral channels")
    dt = float_dtype(cube.dtype)
    data = cube.data.astype(dt)
    ay, ax = cube.get_axis_num("y"), cube.get_axis_num("x")
    depth = {i: 0 for i in range(data.ndim)}
    depth.update({ay: 1, ax: 1})
    boundary = {i: "none" for i in range(data.ndim)}
    boundary.update({ay: np.nan, ax: np.nan})
    cleaned = da.map_overlap(
        _clean_block,
        data,
        depth=depth,
        boundary=boundary,
        dtype=dt,
        threshold=threshold,
        min_neighbours=int(min_neighbours),
        out_dtype=dt,
    )
    out = cube.copy(data=cleaned)
    out = finish(
        out, cube, "remove_spikes", {"threshold": threshold, "min_neighbours": int(min_neighbours)}
    )
    if not return_mask:
        return out
    changed = (cleaned != data) & ~(da.isnan(cleaned) & da.isnan(data))
    mask = cube.copy(data=changed)
    mask.attrs = {"long_name": "replaced spike values", "units": "1"}
    mask.name = "spike_mask"
    return out, mask
