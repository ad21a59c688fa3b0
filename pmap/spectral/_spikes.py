"""Cosmic-spike removal for maps: spectral modified z-score + spatial-neighbour test."""

from __future__ import annotations

from functools import partial

import dask.array as da
import numba
import numpy as np
import xarray as xr

from ..errors import StepError
from ..steps import register_step
from ._common import check_cube, finish, float_dtype
from ._halo import map_with_halo
from ._robust import MAD_DIFF_TO_SD, diff_noise_sd, diff_scale, median_of, nan_median_mad

__all__ = ["remove_spikes", "spike_candidates"]


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
    return wide.reshape(x.shape), (MAD_DIFF_TO_SD * mad).reshape(shape + (1,))


@numba.njit(cache=True, nogil=True)
def _mark_candidates(x, n, threshold, d, buf, cand, wide):  # pragma: no cover - compiled
    """Candidates of one spectrum x[:n] into ``wide`` (bool, widened by ±1); returns MAD."""
    for j in range(n):
        cand[j] = False
        wide[j] = False
    if n < 2:
        return np.nan
    med, mad = diff_scale(x, 0, n, d, buf)
    if not mad > 0:
        return mad
    found = False
    for j in range(n - 1):
        z = 0.6745 * (d[j] - med) / mad
        if z > threshold:
            cand[j + 1] = True
            found = True
        elif z < -threshold:
            cand[j] = True
            found = True
    if found:
        for j in range(n):
            if cand[j] or (j > 0 and cand[j - 1]) or (j < n - 1 and cand[j + 1]):
                wide[j] = True
    return mad


@numba.njit(cache=True, nogil=True)
def _candidates_rows(flat, threshold):  # pragma: no cover - compiled
    """Compiled core of :func:`spike_candidates` over rows (m, n): (wide bool, MAD (m,))."""
    m, n = flat.shape
    wide = np.zeros((m, n), dtype=np.bool_)
    mads = np.empty(m)
    d = np.empty(max(n, 1))
    buf = np.empty(max(n, 1))
    cand = np.zeros(n, dtype=np.bool_)
    for i in range(m):
        mads[i] = _mark_candidates(flat[i], n, threshold, d, buf, cand, wide[i])
    return wide, mads


#: Half width (channels) of the window giving the local noise s.d. near a candidate.
_LOCAL_HALF = 10


@numba.njit(cache=True, nogil=True)
def _local_sigma(x, n, c, d, buf):  # pragma: no cover - compiled
    """Noise s.d. near channel c of x[:n]: 1.4826·MAD/√2 of the first difference over
    2·_LOCAL_HALF + 1 channels (follows shot noise, which grows with signal)."""
    w = min(2 * _LOCAL_HALF + 1, n)
    start = min(max(c - _LOCAL_HALF, 0), n - w)
    return diff_noise_sd(x, start, start + w, d, buf)


@numba.njit(cache=True, nogil=True)
def _clean_kernel(b, threshold, min_neighbours, out):  # pragma: no cover - compiled
    """Spike removal over a padded block b (B, Y + 2, X + 2, n), NaN outside the map,
    into out (B, Y, X, n). See :func:`remove_spikes` for the rule."""
    nb_, y2, x2, n = b.shape
    x = np.empty(n)
    d = np.empty(n)
    buf = np.empty(n)
    cand = np.zeros(n, dtype=np.bool_)
    wide = np.zeros(n, dtype=np.bool_)
    fb = np.zeros(n, dtype=np.bool_)
    nbv = np.empty(8)
    nbuf = np.empty(8)
    win = np.empty(7)
    for ib in range(nb_):
        for iy in range(y2 - 2):
            for ix in range(x2 - 2):
                for j in range(n):
                    v = b[ib, iy + 1, ix + 1, j]
                    x[j] = v
                    out[ib, iy, ix, j] = v
                mad = _mark_candidates(x, n, threshold, d, buf, cand, wide)
                if not mad > 0:
                    continue
                any_fb = False
                for c in range(n):
                    if not wide[c]:
                        continue
                    val = x[c]
                    cnt = 0
                    for dy in range(3):
                        for dx in range(3):
                            if dy == 1 and dx == 1:
                                continue
                            v = b[ib, iy + dy, ix + dx, c]
                            if v == v:
                                nbv[cnt] = v
                                cnt += 1
                    if cnt >= min_neighbours:
                        # spatial test: against the median of the 3×3 neighbours, in units of
                        # max(local noise s.d., neighbour spread); the cheap spread test first
                        nb_med, nb_mad, _ = nan_median_mad(nbv, cnt, nbuf)
                        spread = 1.4826 * nb_mad if np.isfinite(nb_mad) else 0.0
                        excess = val - nb_med
                        if not excess > threshold * spread:
                            continue
                        sig = _local_sigma(x, n, c, d, buf)
                        if excess > threshold * sig:
                            out[ib, iy, ix, c] = nb_med
                    else:
                        # spectral fallback: median of ±3 channels that are not candidates
                        k = 0
                        for o in range(-3, 4):
                            cc = min(max(c + o, 0), n - 1)
                            if not wide[cc] and cc != c and x[cc] == x[cc]:
                                win[k] = x[cc]
                                k += 1
                        sig = _local_sigma(x, n, c, d, buf)
                        diff = val - median_of(win, k)
                        if diff == diff and diff > threshold * sig:
                            fb[c] = True
                            any_fb = True
                if any_fb:
                    _fill_flagged(x, n, fb, out[ib, iy, ix])
    return out


@numba.njit(cache=True, nogil=True)
def _fill_flagged(x, n, flag, out):  # pragma: no cover - compiled
    """Linear interpolation of x across flagged channels (from the nearest unflagged ones)
    into out; clears the flags."""
    for c in range(n):
        if not flag[c]:
            continue
        left = c - 1
        while left >= 0 and flag[left]:
            left -= 1
        right = c + 1
        while right < n and flag[right]:
            right += 1
        if left < 0:
            out[c] = x[min(right, n - 1)]
        elif right >= n:
            out[c] = x[left]
        else:
            t = (c - left) / (right - left)
            out[c] = x[left] + t * (x[right] - x[left])
    for c in range(n):
        flag[c] = False


def _clean_block(
    block: np.ndarray, threshold: float, min_neighbours: int, out_dtype: np.dtype
) -> np.ndarray:
    """Core over a padded block (B…, Y + 2, X + 2, n) with NaN outside the map.

    Returns the cleaned inner block (B…, Y, X, n) in ``out_dtype``.
    """
    shape = block.shape
    b = block.reshape((-1,) + shape[-3:])
    out = np.empty((b.shape[0], shape[-3] - 2, shape[-2] - 2, shape[-1]), dtype=out_dtype)
    _clean_kernel(b, float(threshold), int(min_neighbours), out)
    return out.reshape(shape[:-3] + out.shape[1:])


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
    spike is replaced by linear interpolation across the flagged channels. Each chunk gets a
    1-pixel spatial halo copied from its neighbours (:mod:`pmap.spectral._halo`). Cost: one
    compiled pass per spectrum (two medians) plus work proportional to the candidates.

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
    order = cube.dims
    canonical = (*[d for d in order if d not in ("y", "x", sdim)], "y", "x", sdim)
    data = cube.transpose(*canonical).data.astype(dt)
    cleaned = map_with_halo(
        partial(
            _clean_block, threshold=threshold, min_neighbours=int(min_neighbours), out_dtype=dt
        ),
        data,
        dtype=dt,
    )
    if canonical != order:
        cleaned = cleaned.transpose([canonical.index(d) for d in order])
        data = cube.data.astype(dt)
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
