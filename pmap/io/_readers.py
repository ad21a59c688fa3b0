"""Format readers. Each returns an un-validated DataArray or Dataset, lazily."""

from __future__ import annotations

import logging
import warnings
from pathlib import Path
from typing import Any

import dask
import dask.array as da
import numpy as np
import xarray as xr
import zarr

from ..conventions import SPECTRAL_DIMS
from ..cube import choose_spatial_chunks
from ..errors import FormatError, InputFileError, PmapNotice
from ._common import (
    AXIS_OPTIONS,
    META_OPTIONS,
    check_options,
    metadata_attrs,
    parse_dims,
    read_sidecar,
    spatial_coords,
    spectral_axis,
)

STORE_OPTIONS = ("variable", *META_OPTIONS)
ZARR_OPTIONS = (*STORE_OPTIONS, "allow_missing_chunks")
ARRAY_OPTIONS = ("sidecar", *AXIS_OPTIONS)


def _pick_variable(ds: xr.Dataset, options: dict[str, Any], path: Path) -> xr.DataArray:
    name = options.get("variable")
    if name is not None:
        if name not in ds.data_vars:
            raise FormatError(
                f"{path.name}: no variable {name!r} (variables: {list(ds.data_vars)})"
            )
        arr = ds[name]
    elif "intensity" in ds.data_vars:
        arr = ds["intensity"]
    elif len(ds.data_vars) == 1:
        arr = ds[next(iter(ds.data_vars))]
    else:
        raise FormatError(
            f"{path.name}: no 'intensity' variable and several others {list(ds.data_vars)}; "
            "choose one with variable="
        )
    arr = arr.copy()
    arr.attrs = {**ds.attrs, **arr.attrs, **metadata_attrs(options)}
    return arr


def read_zarr(path: Path, options: dict[str, Any], target_mib: float | None = None
              ) -> xr.DataArray:
    """Zarr v2 or v3 store, lazily (dask chunks follow the stored chunks).

    A chunk missing from the store (a deleted file, an incomplete copy) would read as
    the fill value (NaN): refused with InputFileError naming the pixel range, unless
    the option ``allow_missing_chunks`` is true (then those pixels are missing, NaN,
    and a note says how many).
    """
    check_options(options, ZARR_OPTIONS, "zarr")
    allow_missing = str(options.pop("allow_missing_chunks", "false")).lower() in (
        "1", "true", "yes")
    if path.is_file():
        raise FormatError(f"{path.name}: a Zarr store is a directory, this is a file")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            warnings.filterwarnings("ignore", message=".*[Cc]onsolidated.*")
            ds = xr.open_zarr(path, chunks={}, consolidated=None)
    except (
        FileNotFoundError,
        KeyError,
        ValueError,
        TypeError,
        OSError,
        zarr.errors.BaseZarrError,
    ) as exc:
        raise FormatError(
            f"{path.name}: not a readable Zarr store ({type(exc).__name__}: {exc})"
        ) from exc
    arr = _pick_variable(ds, options, path)
    _check_chunks_present(path, arr, allow_missing)
    return _opened_in_processing_chunks(path, arr, options, target_mib)


def _opened_in_processing_chunks(path: Path, arr: xr.DataArray, options: dict[str, Any],
                                 target_mib: float | None) -> xr.DataArray:
    """``arr`` opened again with the chunks the cube is processed in (whole multiples of
    the stored chunks, :func:`pmap.cube.choose_spatial_chunks`), so that each dask task
    reads its stored chunks straight from the store and a slice of it reads only the
    stored chunks it touches (the hot-channel vote's tiles). Opened in stored chunks and
    merged by a rechunk, a slice decodes the whole processing chunk: dask does not push
    a slice through the merge. A whole `plcube process` run of the 1 GB bench cube took
    the same time either way. Unchanged where the layout is not (…, y, x, spectral) with
    the spectral axis last, or the chunks would be the stored ones or split them.
    """
    sd = [d for d in arr.dims if d in SPECTRAL_DIMS]
    pref = arr.encoding.get("preferred_chunks") or {}
    if (target_mib is None or len(sd) != 1 or arr.dims[-3:] != ("y", "x", sd[0])
            or "y" not in pref or "x" not in pref):
        return arr
    cy, cx = choose_spatial_chunks((arr.sizes["y"], arr.sizes["x"]), arr.sizes[sd[0]],
                                   arr.dtype.itemsize, target_mib=target_mib,
                                   align=(pref["y"], pref["x"]))
    sy, sx = pref["y"], pref["x"]
    whole = (cy % sy == 0 or cy == arr.sizes["y"]) and (cx % sx == 0 or cx == arr.sizes["x"])
    if (cy, cx) == (sy, sx) or not whole:  # a split stored chunk: read once, then split
        return arr
    chunks = {d: 1 if d not in ("y", "x", sd[0]) else -1 for d in arr.dims}
    chunks.update({"y": cy, "x": cx})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated.*")
        again = _pick_variable(xr.open_zarr(path, chunks=chunks, consolidated=None),
                               options, path)
    return again if again.dims == arr.dims and again.shape == arr.shape else arr


def _check_chunks_present(path: Path, arr: xr.DataArray, allow: bool) -> None:
    """Refuse a local Zarr store whose array lacks chunk files (see :func:`read_zarr`)."""
    try:
        za = zarr.open_array(str(path / str(arr.name)), mode="r")
        n_all, n_have = int(za.nchunks), int(za.nchunks_initialized)
    except Exception:  # not a local directory array: nothing to check here
        return
    if n_have >= n_all:
        return
    grid = [range(-(-s // c)) for s, c in zip(za.shape, za.chunks)]
    import itertools

    first = None
    for idx in itertools.product(*grid):
        key = za.metadata.encode_chunk_key(idx) if hasattr(za.metadata, "encode_chunk_key") \
            else ".".join(map(str, idx))
        if not (path / str(arr.name) / key).exists():
            first = idx
            break
    where = ""
    if first is not None:
        ranges = [f"{d} {i * c}–{min((i + 1) * c, s)}"
                  for d, i, c, s in zip(arr.dims, first, za.chunks, za.shape)]
        where = f", the first at {', '.join(ranges[:-1] or ranges)}"
    msg = (f"{path.name}: {n_all - n_have} of {n_all} chunks of {arr.name!r} are missing "
           f"(deleted or never copied{where})")
    if not allow:
        raise InputFileError(msg + "; give -O allow_missing_chunks=true to read the rest with "
                                   "those pixels missing")
    warnings.warn(msg + ": those pixels are read as missing (NaN)", PmapNotice, stacklevel=3)


def read_netcdf(path: Path, options: dict[str, Any], target_mib: float | None = None
                ) -> xr.DataArray:
    """NetCDF4/HDF5 file through h5netcdf, lazily (dask chunks follow the HDF5 chunks)."""
    check_options(options, STORE_OPTIONS, "netcdf")
    with open(path, "rb") as fh:
        head = fh.read(8)
    if head.startswith(b"CDF"):
        raise FormatError(f"{path.name}: classic NetCDF3 is not supported; use NetCDF4/HDF5")
    if not head.startswith(b"\x89HDF"):
        raise InputFileError(f"{path.name}: not an HDF5/NetCDF4 file (corrupt or truncated header)")
    try:
        ds = xr.open_dataset(path, engine="h5netcdf", chunks={})
    except OSError as exc:
        raise InputFileError(
            f"{path.name}: cannot read HDF5 file, truncated or corrupt ({exc})"
        ) from exc
    except (ValueError, KeyError, TypeError) as exc:
        raise FormatError(f"{path.name}: not a readable NetCDF4 file ({exc})") from exc
    return _pick_variable(ds, options, path)


def _array_cube(
    data: da.Array, path: Path, options: dict[str, Any], dims: tuple[str, ...]
) -> xr.DataArray:
    """Attach axes from options/sidecar to a (…, y, x, channel)-ordered dask array."""
    sdim_pos = next(
        (i for i, d in enumerate(dims) if d in SPECTRAL_DIMS or d == "spectral"), len(dims) - 1
    )
    sdim, svals = spectral_axis(options, data.shape[sdim_pos], source=path.name)
    dims = tuple(sdim if i == sdim_pos else d for i, d in enumerate(dims))
    ny = data.shape[dims.index("y")] if "y" in dims else 1
    nx = data.shape[dims.index("x")] if "x" in dims else 1
    coords = {k: v for k, v in spatial_coords(options, ny, nx).items() if k in dims}
    coords[sdim] = (sdim, svals, {"units": SPECTRAL_DIMS[sdim]})
    return xr.DataArray(data, dims=dims, coords=coords, attrs=metadata_attrs(options))


def _merged(path: Path, options: dict[str, Any], fmt: str) -> dict[str, Any]:
    check_options(options, ARRAY_OPTIONS, fmt)
    opts = read_sidecar(path, options.get("sidecar"))
    opts.update({k: v for k, v in options.items() if v is not None and k != "sidecar"})
    return opts


def _spatial_chunks(
    shape: tuple[int, ...], dims: tuple[str, ...], itemsize: int, target_mib: float
) -> tuple[int, ...]:
    s = next(
        (i for i, d in enumerate(dims) if d in SPECTRAL_DIMS or d == "spectral"), len(dims) - 1
    )
    ny = shape[dims.index("y")] if "y" in dims else 1
    nx = shape[dims.index("x")] if "x" in dims else 1
    cy, cx = choose_spatial_chunks((ny, nx), shape[s], itemsize, target_mib=target_mib)
    return tuple({"y": cy, "x": cx}.get(d, -1 if i == s else 1) for i, d in enumerate(dims))


def read_npy(path: Path, options: dict[str, Any], target_mib: float) -> xr.DataArray:
    """NumPy .npy file, memory-mapped and wrapped in dask; axes from options or sidecar."""
    opts = _merged(path, options, "npy")
    try:
        mm = np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as exc:
        msg = str(exc)
        if "mmap length" in msg or "cannot reshape" in msg or "size" in msg:
            raise InputFileError(f"{path.name}: truncated .npy file ({msg})") from exc
        raise FormatError(f"{path.name}: not a readable .npy array ({msg})") from exc
    except (OSError, EOFError) as exc:
        raise InputFileError(f"{path.name}: cannot read .npy file ({exc})") from exc
    if not isinstance(mm, np.ndarray):
        raise FormatError(f"{path.name}: expected one array")
    default = {1: ("spectral",), 2: ("x", "spectral"), 3: ("y", "x", "spectral")}
    if opts.get("dims") is not None:
        dims = parse_dims(opts["dims"], mm.ndim)
    elif mm.ndim in default:
        dims = default[mm.ndim]
    else:
        raise FormatError(f"{path.name}: {mm.ndim}-D array; name its dims with dims=")
    chunks = _spatial_chunks(mm.shape, dims, mm.dtype.itemsize, target_mib)
    data = da.from_array(mm, chunks=chunks, asarray=False, fancy=False)
    return _array_cube(data, path, opts, dims)


def _tiff_pages(path: Path) -> tuple[tuple[int, int, int], np.dtype, bool]:
    """(channels, y, x), dtype and whether the data can be memory-mapped; checks truncation."""
    import tifffile

    size = path.stat().st_size
    log = logging.getLogger("tifffile")
    problems: list[str] = []
    catcher = logging.Handler(logging.ERROR)
    catcher.emit = lambda record: problems.append(record.getMessage())  # type: ignore[method-assign]
    log.addHandler(catcher)
    try:
        with tifffile.TiffFile(path) as tf:
            pages = tf.pages
            n = len(pages)
            first = pages.first
            shape2 = first.shape
            if len(shape2) != 2:
                raise FormatError(f"{path.name}: pages of shape {shape2}; expected 2-D pages")
            end = 0
            for page in pages:
                if page.shape != shape2:
                    raise FormatError(
                        f"{path.name}: pages differ in shape ({page.shape} vs "
                        f"{shape2}); each page must be one channel of the map"
                    )
                if page.dataoffsets:
                    end = max(
                        end, max(o + c for o, c in zip(page.dataoffsets, page.databytecounts))
                    )
            series = tf.series[0]
            mappable = series.dataoffset is not None and len(tf.series) == 1
            dtype = first.dtype
            if int(np.prod(series.shape)) != n * shape2[0] * shape2[1]:
                problems.append(f"series shape {series.shape} but {n} readable pages")
    except FormatError:
        raise
    except Exception as exc:  # tifffile raises several kinds on corrupt files
        raise InputFileError(
            f"{path.name}: cannot read TIFF, truncated or corrupt ({exc})"
        ) from exc
    finally:
        log.removeHandler(catcher)
    if problems:
        raise InputFileError(f"{path.name}: TIFF is truncated or corrupt ({problems[0]})")
    if end > size:
        raise InputFileError(
            f"{path.name}: truncated TIFF (data run to byte {end}, file has {size})"
        )
    return (n, *shape2), dtype, mappable


def _read_page(path: str, i: int) -> np.ndarray:
    import tifffile

    with tifffile.TiffFile(path) as tf:
        return tf.pages[i].asarray()


def read_tiff(path: Path, options: dict[str, Any], target_mib: float) -> xr.DataArray:
    """Multi-page TIFF, one page per channel, read lazily (memmap or page by page)."""
    import tifffile

    opts = _merged(path, options, "tiff")
    opts.pop("dims", None)
    (n, ny, nx), dtype, mappable = _tiff_pages(path)
    if mappable:
        mm = tifffile.memmap(path, mode="r").reshape(n, ny, nx)
        cy, cx = choose_spatial_chunks((ny, nx), n, dtype.itemsize, target_mib=target_mib)
        stack = da.from_array(mm, chunks=(-1, cy, cx), asarray=False, fancy=False)
    else:
        pages = [
            da.from_delayed(dask.delayed(_read_page)(str(path), i), (ny, nx), dtype=dtype)
            for i in range(n)
        ]
        stack = da.stack(pages)
    data = stack.transpose(1, 2, 0)
    return _array_cube(data, path, opts, ("y", "x", "spectral"))
