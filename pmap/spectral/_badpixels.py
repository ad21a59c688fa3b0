"""Masking of dead, saturated and hot detector values (set to NaN)."""

from __future__ import annotations

from typing import Any

import dask.array as da
import numba
import numpy as np
import xarray as xr
from scipy import ndimage

from ..cube import spread_indices
from ..errors import StepError
from ..steps import WholeMapPass, register_step, whole_map_values
from ._common import check_cube, finish, float_dtype
from ._robust import diff_noise_sd, robust_sigma_of_diff

__all__ = ["mask_bad_pixels", "hot_channels"]


def hot_channels(
    mean_spectrum: Any, *, threshold: float = 10.0, half_window: int = 3
) -> np.ndarray:
    """Channels standing out of the map's median spectrum like a one-channel spike (bool (n,)).

    A detector hot pixel adds signal to one channel of every spectrum; in the mean
    spectrum it rises above the median of ±``half_window`` channels by more than
    ``threshold`` noise s.d. (from the MAD of the first difference of the mean spectrum).
    """
    s = np.asarray(mean_spectrum, dtype=float)
    flags = np.zeros(s.shape, dtype=bool)
    good = np.isfinite(s)
    if good.sum() < 2 * half_window + 2:
        return flags
    filled = np.where(good, s, np.nanmedian(s))
    ref = ndimage.median_filter(filled, size=2 * half_window + 1, mode="nearest")
    sigma = float(robust_sigma_of_diff(filled - ref))
    if sigma <= 0:
        sigma = 1e-12 * max(float(np.max(np.abs(filled))), 1.0)
    flags = good & (filled - ref > threshold * sigma)
    return flags


#: Maps with at least this many spectra vote on hot channels from one spectrum in four
#: (every other pixel in y and in x); smaller maps vote with every spectrum.
HOT_VOTE_SUBSAMPLE_FROM = 16384

#: Chunked maps of more spectra than this vote (on the same lattice) only in tiles of
#: HOT_VOTE_TILE x HOT_VOTE_TILE pixels spread evenly over the map, as few as hold this
#: many spectra, so the whole-map pass reads a sample instead of the cube. The tiles
#: depend on the map's shape only, never on the chunking or the memory limit. A majority
#: of n >= 32768 voters is decided as the whole map's unless the channel's vote share
#: lies within about 3 * 0.5 / sqrt(n) = 0.8 % of one half (for a spatially uniform share).
HOT_VOTE_SAMPLE_SPECTRA = 131072
HOT_VOTE_TILE = 64


def _vote_tiles(ny: int, nx: int) -> list[tuple[int, int, int, int]] | None:
    """(y0, y1, x0, x1) of the tiles the hot-channel vote reads, or None for the whole map.

    The map is cut into HOT_VOTE_TILE-pixel tiles from (0, 0) (stored chunks of that
    size or a multiple line up with them); the fewest tiles, spread evenly in row-major
    order (:func:`pmap.cube.spread_indices`, as the other whole-map samples), that hold
    HOT_VOTE_SAMPLE_SPECTRA spectra.
    """
    t = HOT_VOTE_TILE
    ty, tx = -(-ny // t), -(-nx // t)
    n = ty * tx
    if ny * nx <= HOT_VOTE_SAMPLE_SPECTRA:
        return None
    h = np.minimum(t, ny - t * np.arange(ty))
    w = np.minimum(t, nx - t * np.arange(tx))
    sizes = np.multiply.outer(h, w).ravel()
    for m in range(1, n + 1):
        pick = spread_indices(n, m)
        if int(sizes[pick].sum()) >= HOT_VOTE_SAMPLE_SPECTRA:
            break
    if pick.size == n:
        return None
    out = []
    for k in pick:
        iy, ix = divmod(int(k), tx)
        out.append((iy * t, min(ny, (iy + 1) * t), ix * t, min(nx, (ix + 1) * t)))
    return out


def _block_hot_votes(
    block: np.ndarray, threshold: float, stride: int = 1, block_info=None,
    offset: tuple[int, int] = (0, 0),
) -> np.ndarray:
    """Per channel, how many spectra of one chunk show a one-channel excess (shape (1,..,1,n)).

    A channel votes "hot" in a spectrum when it exceeds *both* neighbours by more than
    ``threshold`` noise s.d. (noise from the MAD of the spectrum's first difference). A
    real emission line spans several channels and so never votes; a cosmic spike votes
    in one spectrum only. With ``stride`` > 1 only the pixels whose map indices y and x
    are multiples of ``stride`` vote (a fixed lattice: the same whatever the chunking);
    ``offset``: the map indices (y, x) of the first pixel of the array the block is of.
    """
    n = block.shape[-1]
    if stride > 1:
        loc = block_info[0]["array-location"] if block_info else None
        y0, x0 = (loc[-3][0], loc[-2][0]) if loc else (0, 0)
        y0, x0 = y0 + offset[0], x0 + offset[1]
        block = block[..., (-y0) % stride :: stride, (-x0) % stride :: stride, :]
    flat = block.reshape(-1, n)
    votes = np.zeros(n, dtype=np.float64)
    if n >= 3 and flat.shape[0]:
        _hot_votes_rows(np.ascontiguousarray(flat), float(threshold), votes)
    return votes.reshape((1,) * (block.ndim - 1) + (n,))


@numba.njit(cache=True, nogil=True)
def _hot_votes_rows(flat, threshold, votes):  # pragma: no cover - compiled
    """Add each spectrum's one-channel-excess votes of rows (m, n) to votes (n,)."""
    m, n = flat.shape
    x = np.empty(n)
    d = np.empty(n)
    buf = np.empty(n)
    for i in range(m):
        for j in range(n):
            x[j] = flat[i, j]
        sigma = diff_noise_sd(x, 0, n, d, buf)
        if not (np.isfinite(sigma) and sigma > 0):
            continue
        limit = threshold * sigma  # NaN anywhere: no vote
        votes[0] += 1.0 if x[0] - x[1] > limit else 0.0  # the end channels: one neighbour
        votes[n - 1] += 1.0 if x[n - 1] - x[n - 2] > limit else 0.0
        left, mid, right, inner = x[: n - 2], x[1 : n - 1], x[2:], votes[1 : n - 1]
        for j in range(n - 2):  # views from 0: no wraparound checks, the loop vectorises
            inner[j] += 1.0 if (mid[j] - left[j] > limit) & (mid[j] - right[j] > limit) else 0.0


def _mask_core(
    x: np.ndarray,
    gmax: np.ndarray,
    hot: np.ndarray,
    sat_level: float | None,
    auto_sat: bool,
    dead: bool,
    masked: bool = False,
) -> np.ndarray:
    """Codes (…, n) uint8: 1 dead, 2 saturated, 4 bad channel; 0 good.

    With ``masked``, return x (floating) with every coded value set to NaN instead.
    """
    n = x.shape[-1]
    flat = np.ascontiguousarray(x.reshape(-1, n))  # floating: the step casts first
    code = np.empty((0, n) if masked else flat.shape, dtype=np.uint8)
    out = np.empty(flat.shape, dtype=flat.dtype) if masked else flat[:0]
    level = np.nan if sat_level is None else float(sat_level)
    top = float(np.asarray(gmax).reshape(())) if auto_sat else np.nan
    hot_code = np.where(np.asarray(hot, dtype=np.bool_).reshape(n), np.uint8(4), np.uint8(0))
    _mask_rows(flat, hot_code, level, top, dead, code, out)
    return (out if masked else code).reshape(x.shape)


@numba.njit(cache=True, nogil=True)
def _mask_rows(flat, hot_code, level, top, dead, code, out):  # pragma: no cover - compiled
    """Bad-value codes of rows (m, n) into code and/or the masked values into out
    (each written if it has rows; branch-free passes over each row, in cache).

    hot_code (n,) uint8: 4 on hot or bad channels, else 0. level: fixed saturation
    level (NaN: none); top: estimated level, where only runs of two or more adjacent
    values at or above it count (NaN: none; used only without a fixed level). A row is
    dead when it holds no number other than NaN, or one value only.
    """
    m, n = flat.shape
    fill = out.shape[0] > 0
    keep = code.shape[0] > 0
    plateau = level != level and top == top and n > 1
    row_code = np.empty(n, dtype=np.uint8)
    for i in range(m):
        x = flat[i]
        c = code[i] if keep else row_code
        first = 0
        while first < n and x[first] != x[first]:
            first += 1
        ref = x[first] if first < n else x[0]
        differs = 0  # numbers other than ref (NaN never differs)
        for j in range(n):
            v = x[j]
            differs += (v != ref) & (v == v)
            c[j] = hot_code[j] | (np.uint8(2) if v >= level else np.uint8(0))
        if plateau:
            c[0] |= np.uint8(2) if (x[0] >= top) & (x[1] >= top) else np.uint8(0)
            for j in range(1, n - 1):
                run = (x[j] >= top) & ((x[j - 1] >= top) | (x[j + 1] >= top))
                c[j] |= np.uint8(2) if run else np.uint8(0)
            c[n - 1] |= np.uint8(2) if (x[n - 1] >= top) & (x[n - 2] >= top) else np.uint8(0)
        if dead and differs == 0:
            for j in range(n):
                c[j] |= np.uint8(1)
        if fill:
            o = out[i]
            for j in range(n):
                o[j] = np.nan if c[j] else x[j]


@register_step("mask_bad_pixels")
def mask_bad_pixels(
    cube: xr.DataArray,
    *,
    dead: bool = True,
    saturated: bool = True,
    saturation_counts: float | None = None,
    hot: bool = True,
    hot_threshold: float = 10.0,
    bad_channels: Any = None,
    return_mask: bool = False,
    whole_map: WholeMapPass | None = None,
) -> xr.DataArray | tuple[xr.DataArray, xr.DataArray]:
    """Set dead spectra, saturated values, hot and bad channels to NaN.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube (*stack, y, x, S), raw counts preferably.
    dead : bool
        Mask spectra without signal: constant over all channels (e.g. all zero) or all NaN.
    saturated : bool
        Mask values at or above the saturation level.
    saturation_counts : float, optional
        Saturation level in the cube's units; default the attr ``saturation_counts``; if
        neither, the level is estimated as the cube's maximum, and only values on a plateau
        (two or more adjacent channels at that maximum) are masked.
    hot : bool
        Mask hot detector channels: channels that exceed both neighbours by more
        than ``hot_threshold`` noise s.d. in more than half of the spectra (on maps of
        16384 spectra or more, half of a fixed lattice of one spectrum in four: every
        other pixel in y and x; on chunked maps of more than 131072 spectra, that
        lattice within 64 x 64-pixel tiles spread over the map that hold 131072 spectra,
        fixed by the map's shape: see ``HOT_VOTE_SAMPLE_SPECTRA``).
    bad_channels : list of int, optional
        Channel indices (0-based, ascending axis) to mask in every spectrum.
    return_mask : bool
        Also return a uint8 DataArray ``bad_pixel_code`` (1 dead, 2 saturated,
        4 hot or bad channel; codes add up).
    whole_map : pmap.steps.WholeMapPass, optional
        Given by the pipeline runner: the hot-channel mask and the map maximum
        (saturation) are computed through it once, now, and recorded in the provenance.
        Without it (the default) nothing is computed here.

    Returns
    -------
    xarray.DataArray or (xarray.DataArray, xarray.DataArray)
        Lazy cube with masked values NaN (floating dtype), and the codes.

    Notes
    -----
    The hot-channel test and the estimated saturation level need a reduction over the
    map (hot-channel votes, maximum) before the masking pass: computing the result reads
    the cube twice when the level is estimated (the maximum of every value), else the
    vote's tiles and then the cube.
    """
    cube, sdim = check_cube(cube)
    n = cube.sizes[sdim]
    dt = float_dtype(cube.dtype)
    data = cube.data.astype(dt)
    bad = np.zeros(n, dtype=bool)
    if bad_channels is not None:
        ch = np.atleast_1d(np.asarray(bad_channels))
        if ch.dtype.kind not in "iu" or np.any((ch < 0) | (ch >= n)):
            raise StepError(f"bad_channels must be channel indices 0…{n - 1}, got {bad_channels!r}")
        bad[ch] = True
    lead = tuple(range(data.ndim - 1))
    if hot:
        # A hot detector channel stands out in most spectra; cosmic spikes (one spectrum
        # each) and a saturated pixel do not reach a majority.
        one = tuple((1,) * len(c) for c in data.chunks[:-1])
        ny, nx = cube.sizes["y"], cube.sizes["x"]
        canonical = cube.dims[-3:-1] == ("y", "x")
        big = ny * nx >= HOT_VOTE_SUBSAMPLE_FROM and min(ny, nx) >= 2
        stride = 2 if canonical and big else 1
        tiles = (_vote_tiles(ny, nx) if canonical and data.ndim == 3
                 and isinstance(data, da.Array) else None)
        if tiles is None:
            votes = data.map_blocks(
                _block_hot_votes,
                chunks=(*one, data.chunks[-1]),
                dtype=np.float64,
                threshold=float(hot_threshold),
                stride=stride,
            )
            voters = -(-ny // stride) * -(-nx // stride)
            n_spectra = cube.size // (ny * nx * n) * voters
            hot_mask = (da.sum(votes, axis=lead) > 0.5 * n_spectra) | bad
        else:  # tiles spread over the map (HOT_VOTE_SAMPLE_SPECTRA), the same lattice
            parts, n_spectra = [], 0
            for y0, y1, x0, x1 in tiles:
                tile = data[y0:y1, x0:x1]
                parts.append(tile.map_blocks(
                    _block_hot_votes, chunks=(*((1,) * len(c) for c in tile.chunks[:2]), (n,)),
                    dtype=np.float64, threshold=float(hot_threshold), stride=stride,
                    offset=(y0, x0)).sum(axis=(0, 1)))
                n_spectra += len(range(-(-y0 // stride) * stride, y1, stride)) * len(
                    range(-(-x0 // stride) * stride, x1, stride))
            hot_mask = (da.stack(parts).sum(axis=0) > 0.5 * n_spectra) | bad
    else:
        hot_mask = da.from_array(bad, chunks=-1)
    level = (
        saturation_counts if saturation_counts is not None else cube.attrs.get("saturation_counts")
    )
    level = float(level) if (saturated and level is not None) else None
    auto = saturated and level is None
    gmax = da.nanmax(data) if auto else da.zeros((), dtype=dt)
    hot_mask, gmax = whole_map_values(  # one pass over the data for both
        whole_map, "mask_bad_pixels", hot_channels=hot_mask, max_counts=gmax)
    opts = {"sat_level": level, "auto_sat": auto, "dead": dead}
    cleaned = da.map_blocks(_mask_core, data, gmax, hot_mask, dtype=dt, masked=True, **opts)
    out = finish(
        cube.copy(data=cleaned),
        cube,
        "mask_bad_pixels",
        {
            "dead": dead,
            "saturated": saturated,
            "saturation_counts": level,
            "hot": hot,
            "hot_threshold": hot_threshold,
            "bad_channels": None if bad_channels is None else np.atleast_1d(bad_channels).tolist(),
        },
    )
    if not return_mask:
        return out
    code = da.map_blocks(_mask_core, data, gmax, hot_mask, dtype=np.uint8, **opts)
    codes = cube.copy(data=code)
    codes.attrs = {
        "long_name": "bad-value code (1 dead, 2 saturated, 4 hot/bad channel)",
        "units": "1",
    }
    codes.name = "bad_pixel_code"
    return out, codes
