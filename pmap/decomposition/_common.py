"""Shared helpers of the decomposition subpackage: pixel layout, sampling, per-pixel mapping.

A *pixel* is every position along the non-core dims of an array (``*stack, y, x``);
the *core* dim is the spectral dim of a cube, ``component`` for abundances or
``feature`` for parameter maps. Nothing here imports scikit-learn.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from typing import Any

import dask.array as da
import numpy as np
import xarray as xr

from ..conventions import SPECTRAL_DIMS
from ..errors import StepError


def check_spectral(obj: Any, what: str = "cube") -> tuple[xr.DataArray, str]:
    """Check that ``obj`` is a DataArray with y, x and one spectral dim; return (array, dim)."""
    if not isinstance(obj, xr.DataArray):
        raise StepError(
            f"{what} must be an xarray DataArray (a pmap cube), got {type(obj).__name__}"
        )
    sdims = [d for d in obj.dims if d in SPECTRAL_DIMS]
    if len(sdims) != 1:
        raise StepError(
            f"{what} needs exactly one spectral dim among {list(SPECTRAL_DIMS)}, has dims "
            f"{list(obj.dims)}"
        )
    return check_pixels(obj, sdims[0], what)


def check_pixels(arr: xr.DataArray, core: str, what: str) -> tuple[xr.DataArray, str]:
    """Check y and x dims and a real dtype; return the array with ``core`` last."""
    missing = [d for d in ("y", "x") if d not in arr.dims]
    if missing:
        raise StepError(f"{what} has no {' or '.join(missing)} dim (dims {list(arr.dims)})")
    if arr.dtype.kind not in "iuf":
        raise StepError(f"{what} must hold real numbers, got dtype {arr.dtype}")
    if arr.sizes[core] < 1:
        raise StepError(f"{what} has an empty {core!r} dim")
    if isinstance(arr.data, da.Array) and len(arr.chunks[arr.get_axis_num(core)]) > 1:
        arr = arr.chunk({core: -1})
    pix = [d for d in arr.dims if d != core]
    return arr.transpose(*pix, core), core


def apply_mask(arr: xr.DataArray, mask: xr.DataArray | None) -> xr.DataArray:
    """Set pixels where ``mask`` is True to NaN (lazily); mask aligns by coordinates."""
    if mask is None:
        return arr
    if not isinstance(mask, xr.DataArray) or mask.dtype.kind != "b":
        raise StepError("mask must be a boolean xarray DataArray (True marks pixels to leave out)")
    extra = [d for d in mask.dims if d not in arr.dims]
    if extra:
        raise StepError(f"mask has dims {extra} that the data lack")
    out = arr.where(~mask)
    return out.transpose(*arr.dims)


def pixel_dims(arr: xr.DataArray, core: str) -> list[str]:
    """The non-core dims of ``arr`` in order (the pixel layout)."""
    return [d for d in arr.dims if d != core]


def sample_positions(
    arr: xr.DataArray, core: str, n: int | None, seed: int | np.random.Generator
) -> tuple[np.ndarray, ...] | None:
    """Seeded random pixel positions, without replacement, in row-major order.

    Returns a tuple of index arrays (one per pixel dim), or None for "every pixel"
    (``n`` None or at least the number of pixels).
    """
    shape = tuple(arr.sizes[d] for d in pixel_dims(arr, core))
    total = int(np.prod(shape))
    if n is None or n >= total:
        return None
    if int(n) < 1:
        raise StepError(f"sample_pixels must be a positive integer or None, got {n!r}")
    rng = np.random.default_rng(seed)
    flat = np.sort(rng.choice(total, size=int(n), replace=False))
    return np.unravel_index(flat, shape)


def block_sample_positions(
    arr: xr.DataArray, core: str, n: int | None, seed: int, block: int = 2
) -> tuple[np.ndarray, ...] | None:
    """Like :func:`sample_positions`, but whole ``block`` × ``block`` squares of pixels
    (seeded random squares of a fixed grid, without replacement), so that the sample
    holds neighbouring pixels; about ``n`` pixels. None for "every pixel"."""
    dims = pixel_dims(arr, core)
    shape = tuple(arr.sizes[d] for d in dims)
    total = int(np.prod(shape))
    if n is None or n >= total:
        return None
    if int(n) < 1:
        raise StepError(f"sample_pixels must be a positive integer or None, got {n!r}")
    iy, ix = dims.index("y"), dims.index("x")
    cells = list(shape)
    cells[iy], cells[ix] = shape[iy] // block, shape[ix] // block
    n_cells = int(np.prod(cells))
    if n_cells == 0 or block <= 1:
        return sample_positions(arr, core, n, seed)
    m = min(n_cells, -(-int(n) // (block * block)))
    rng = np.random.default_rng(seed)
    chosen = np.unravel_index(rng.choice(n_cells, size=m, replace=False), cells)
    idx = []
    for dy in range(block):
        for dx in range(block):
            pos = [np.asarray(c).copy() for c in chosen]
            pos[iy] = pos[iy] * block + dy
            pos[ix] = pos[ix] * block + dx
            idx.append(np.ravel_multi_index(pos, shape))
    flat = np.sort(np.concatenate(idx))
    return np.unravel_index(flat, shape)


def neighbour_pairs(
    arr: xr.DataArray, core: str, positions: tuple[np.ndarray, ...] | None, keep: np.ndarray
) -> np.ndarray:
    """(p, 2) indices into the kept rows of a sample: pixels that are 4-neighbours in
    (y, x) (same stack position), both kept."""
    dims = pixel_dims(arr, core)
    shape = tuple(arr.sizes[d] for d in dims)
    if positions is None:
        positions = tuple(i.ravel() for i in np.indices(shape))
    pos = [np.asarray(p)[keep] for p in positions]
    if not len(pos[0]):
        return np.zeros((0, 2), dtype=np.int64)
    flat = np.ravel_multi_index(pos, shape)
    order = np.argsort(flat)
    sorted_flat = flat[order]
    out = []
    for name in ("y", "x"):
        d = dims.index(name)
        ok = pos[d] < shape[d] - 1
        stride = int(np.prod(shape[d + 1 :]))
        target = flat[ok] + stride
        j = np.searchsorted(sorted_flat, target)
        j = np.clip(j, 0, len(sorted_flat) - 1)
        hit = sorted_flat[j] == target
        src = np.flatnonzero(ok)[hit]
        out.append(np.column_stack([src, order[j[hit]]]))
    return np.concatenate(out).astype(np.int64) if out else np.zeros((0, 2), dtype=np.int64)


def gather(arr: xr.DataArray, core: str, positions: tuple[np.ndarray, ...] | None) -> np.ndarray:
    """Core vectors of the chosen pixels as a float64 array (n_pixels, n_core); computes."""
    data = arr.data
    n_core = arr.sizes[core]
    if positions is None:
        out = data.compute() if isinstance(data, da.Array) else np.asarray(data)
        return np.asarray(out, dtype=np.float64).reshape(-1, n_core)
    if isinstance(data, da.Array):
        out = data.vindex[positions].compute()
    else:
        out = np.asarray(data)[positions]
    return np.asarray(out, dtype=np.float64).reshape(-1, n_core)


def finite_rows(x: np.ndarray) -> np.ndarray:
    """Boolean (n,) : rows of a (n, m) array with every value finite."""
    return np.isfinite(x).all(axis=-1)


def map_pixels(
    func: Callable[..., np.ndarray],
    arr: xr.DataArray,
    core: str,
    *,
    out_core: str | None,
    out_size: int = 1,
    dtype: Any = np.float64,
    kwargs: Mapping[str, Any] | None = None,
    in_dtype: Any = np.float64,
) -> xr.DataArray:
    """Apply a batched ``func((n, n_core) float64 array, **kwargs)`` to every pixel, lazily.

    ``func`` returns (n, out_size) when ``out_core`` is a name, else (n,). Dask-backed
    input gives a dask-backed output (one task per spatial chunk); nothing is computed.
    ``in_dtype`` None passes each chunk in its stored dtype (no float64 copy).
    """
    kw = dict(kwargs or {})
    n_core = arr.sizes[core]

    def core_fn(block: np.ndarray) -> np.ndarray:
        lead = block.shape[:-1]
        x = np.asarray(block, dtype=in_dtype).reshape(-1, n_core)
        y = func(x, **kw)
        return y.reshape(*lead, out_size) if out_core else y.reshape(lead)

    out_dims = [[out_core]] if out_core else [[]]
    gufunc_kw = {"output_sizes": {out_core: out_size}} if out_core else {}
    return xr.apply_ufunc(
        core_fn,
        arr,
        input_core_dims=[[core]],
        output_core_dims=out_dims,
        dask="parallelized",
        output_dtypes=[dtype],
        dask_gufunc_kwargs=gufunc_kw,
        keep_attrs=False,
    )


def iter_batches(
    arr: xr.DataArray, core: str, batch: int, min_rows: int, seed: int
) -> Iterator[np.ndarray]:
    """Finite rows of ``arr`` in batches of about ``batch`` rows, one spatial chunk at a time.

    Each chunk is computed on its own (out of core), its valid rows are shuffled
    with a seeded generator and cut into batches; a tail shorter than ``min_rows``
    joins the batch before it.
    """
    rng = np.random.default_rng(seed)
    data = arr.data
    n_core = arr.sizes[core]
    blocks: Iterator[np.ndarray]
    if isinstance(data, da.Array):
        blocks = (data.blocks[key] for key in np.ndindex(*data.numblocks))
    else:
        blocks = iter([np.asarray(data)])
    pending: np.ndarray | None = None
    for blk in blocks:
        x = np.asarray(blk.compute() if isinstance(blk, da.Array) else blk, dtype=np.float64)
        x = x.reshape(-1, n_core)
        x = x[finite_rows(x)]
        x = x[rng.permutation(len(x))]
        for start in range(0, len(x), batch):
            part = x[start : start + batch]
            if pending is None:
                pending = part
            elif len(part) >= min_rows and len(pending) >= min_rows:
                yield pending
                pending = part
            else:
                pending = np.concatenate([pending, part])
    if pending is None or len(pending) < min_rows:
        n = 0 if pending is None else len(pending)
        raise StepError(f"only {n} valid pixels to fit, need at least {min_rows}")
    yield pending


def centroid_of(x: np.ndarray, axis_values: np.ndarray) -> np.ndarray:
    """Intensity-weighted mean of the spectral axis per row (negative values clipped at 0)."""
    w = np.clip(x, 0.0, None)
    tot = w.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(tot > 0, (w @ axis_values) / tot, np.nan)


def peak_positions(spectra: np.ndarray, axis_values: np.ndarray) -> np.ndarray:
    """Spectral coordinate of the maximum of each row of a (k, n_channels) array."""
    return np.asarray(axis_values)[np.argmax(spectra, axis=-1)]


def jsonable_params(params: Mapping[str, Any]) -> dict[str, Any]:
    """Parameters as plain TOML/JSON-style values (ranges become lists)."""
    out: dict[str, Any] = {}
    for k, v in params.items():
        if isinstance(v, range):
            v = list(v)
        elif isinstance(v, xr.DataArray):
            v = f"<DataArray {v.name!r}>"
        out[k] = v
    return out
