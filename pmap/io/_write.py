"""Writing cubes: Zarr (v2 or v3) and NetCDF4/HDF5, streamed chunk by chunk."""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import warnings
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..conventions import CUBE_NAME
from ..cube import validate_cube
from ..errors import FormatError, OutputExistsError
from ..provenance import VALUE_STATS_ATTRS, get_provenance
from ._common import FORMATS

#: Formats pmap writes cubes in (those with a writer in the registry).
WRITE_FORMATS = tuple(name for name, f in FORMATS.items() if f.writer)


def output_format(path: Path, fmt: str | None) -> str:
    """Format to write ``path`` in: ``fmt`` if given, else from the ending (default Zarr)."""
    if fmt is not None:
        if fmt not in WRITE_FORMATS:
            raise FormatError(f"cannot write format {fmt!r}; writable formats: {WRITE_FORMATS}")
        return fmt
    return "netcdf" if FORMATS["netcdf"].matches_name(path) else "zarr"


def _same_or_inside(a: Path, b: Path) -> bool:
    a, b = a.resolve(), b.resolve()
    return a == b or b in a.parents or a in b.parents


def prepare_output(path: str | os.PathLike, *, overwrite: bool, attrs: dict[str, Any],
                   remove: bool = True) -> Path:
    """Check that ``path`` may be written, removing an old output if ``overwrite``.

    Raises OutputExistsError when the path exists and ``overwrite`` is False, or
    when it is (or contains, or lies inside) the input recorded in ``attrs``. With
    ``remove=False`` an old output is left in place (:func:`atomic_output` replaces it
    only once the new one is complete).
    """
    out = Path(path).expanduser()
    src = get_provenance(attrs).get("input", {}).get("path")
    if src and _same_or_inside(out, Path(src)):
        raise OutputExistsError(
            f"refusing to write {out}: it is the input the cube was read from ({src})"
        )
    if out.exists() or out.is_symlink():
        if not overwrite:
            raise OutputExistsError(f"output {out} exists; pass overwrite=True to replace it")
        if remove:
            _remove(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    return out


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path)
    elif path.exists() or path.is_symlink():
        path.unlink()


def partial_name(out: Path) -> Path:
    """The temporary name a conversion writes ``out`` under (same folder, hidden)."""
    return out.with_name(f".{out.name}.partial-{os.getpid()}")


@contextlib.contextmanager
def atomic_output(out: Path) -> Iterator[Path]:
    """Write under a temporary name, then rename to ``out``: whole or not at all.

    Yields the temporary path. On success an old ``out`` (checked beforehand by
    :func:`prepare_output` with ``remove=False``) is replaced; on any error or
    interruption the temporary output is removed and ``out`` is untouched.
    """
    tmp = partial_name(out)
    _remove(tmp)
    try:
        yield tmp
    except BaseException:
        _remove(tmp)
        raise
    if out.exists() or out.is_symlink():
        _remove(out)
    os.replace(tmp, out)


def _netcdf_safe(attrs: dict[str, Any]) -> dict[str, Any]:
    """NetCDF attrs cannot hold bools, None or mappings: drop None, bools as 0/1, dicts as JSON."""
    out: dict[str, Any] = {}
    for k, v in attrs.items():
        if v is None:
            continue
        if isinstance(v, bool | np.bool_):
            out[k] = int(v)
        elif isinstance(v, dict):
            out[k] = json.dumps(v)
        else:
            out[k] = v
    return out


def cube_dataset(cube: xr.DataArray) -> xr.Dataset:
    """The cube as a Dataset with one variable ``intensity`` and encodings cleared."""
    ds = cube.rename(CUBE_NAME).to_dataset()
    for name in ds.variables:
        ds[name].encoding = {}
    return ds


def write_zarr(ds: xr.Dataset, out: Path, *, zarr_format: int, compute: bool = True) -> Any:
    """Write a Dataset to a new Zarr store (consolidated metadata for v2 only)."""
    if zarr_format not in (2, 3):
        raise FormatError(f"zarr_format must be 2 or 3, got {zarr_format}")
    enc = {CUBE_NAME: {"_FillValue": np.nan}} if ds[CUBE_NAME].dtype.kind == "f" else {}
    if ds[CUBE_NAME].chunks is not None:
        enc.setdefault(CUBE_NAME, {})["chunks"] = tuple(c[0] for c in ds[CUBE_NAME].chunks)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*[Cc]onsolidated metadata.*")
        return ds.to_zarr(
            out,
            mode="w-",
            zarr_format=zarr_format,
            encoding=enc,
            consolidated=zarr_format == 2,
            compute=compute,
            write_empty_chunks=True,  # an all-NaN chunk is stored, so a missing one is an error
        )


def save_cube(
    cube: xr.DataArray,
    path: str | os.PathLike,
    *,
    fmt: str | None = None,
    overwrite: bool = False,
    zarr_format: int = 3,
) -> Path:
    """Write a cube to Zarr (default) or NetCDF4/HDF5, streaming dask chunks.

    Parameters
    ----------
    cube : xarray.DataArray
        A cube (validated on the way; computes nothing until the write).
    path : str or path-like
        Output path. ``.nc``/``.h5``/``.hdf5`` endings write NetCDF, anything
        else a Zarr directory store.
    fmt : {"zarr", "netcdf"}, optional
        Force the output format.
    overwrite : bool
        Replace an existing output (never the input the cube was read from).
    zarr_format : {2, 3}
        Zarr format version (default 3).

    Returns
    -------
    pathlib.Path
        The written path.

    Raises
    ------
    OutputExistsError
        The path exists and ``overwrite`` is False, or it is the cube's input.
    FormatError
        Unknown output format or attrs the format cannot store.

    Notes
    -----
    The variable is named ``intensity``; attrs (provenance JSON included) and
    coordinate attrs are stored with it. Chunks are written one by one by dask,
    so peak memory is a few chunks, not the cube.
    """
    out = Path(path).expanduser()
    kind = output_format(out, fmt)
    cube = validate_cube(cube) if cube.name != CUBE_NAME or cube.chunks is None else cube
    out = prepare_output(out, overwrite=overwrite, attrs=cube.attrs, remove=False)
    ds = cube_dataset(cube)
    # a range read from the input may be stale after processing: never pass it on
    for k in STATS_ATTRS:
        ds[CUBE_NAME].attrs.pop(k, None)
    writer = FORMATS[kind].function("writer")
    with atomic_output(out) as tmp:
        if kind == "zarr":
            _write_zarr_with_stats(ds, tmp, zarr_format=zarr_format)
        else:
            writer(ds, tmp)
    return out


#: value statistics save_cube stores with a Zarr cube (``plcube info`` shows them as stored)
STATS_ATTRS = VALUE_STATS_ATTRS


def _write_zarr_with_stats(ds: xr.Dataset, out: Path, *, zarr_format: int) -> None:
    """Write a Zarr cube and store its value range in the same read of the data.

    The writes and the min / max / finite count share one dask graph, so every
    chunk is read (or computed) once. ``actual_range`` (CF conventions 1.10,
    section 2.5.1: [min, max] of the stored values, NaN excluded) and
    ``pmap_finite_count`` are added to the variable's attrs after the data; a
    cube without a finite value gets neither.
    """
    import dask
    import dask.array as da
    import zarr

    data = ds[CUBE_NAME].data
    if not isinstance(data, da.Array) or data.dtype.kind not in "iuf":
        write_zarr(ds, out, zarr_format=zarr_format)
        return
    delayed = write_zarr(ds, out, zarr_format=zarr_format, compute=False)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="All-NaN slice", category=RuntimeWarning)
        _, lo, hi, n = dask.compute(delayed, da.nanmin(data), da.nanmax(data),
                                    da.isfinite(data).sum())
    if int(n) == 0:
        return
    array = zarr.open_array(str(out / CUBE_NAME), mode="r+")
    array.attrs.update({"actual_range": [float(lo), float(hi)], "pmap_finite_count": int(n)})
    if zarr_format == 2:
        zarr.consolidate_metadata(str(out))


def _write_netcdf(ds: xr.Dataset, out: Path) -> None:
    """The cube Dataset as NetCDF4 (attrs made storable, chunks kept)."""
    ds.attrs = {}
    ds[CUBE_NAME].attrs = _netcdf_safe(ds[CUBE_NAME].attrs)
    enc: dict[str, Any] = {}
    if ds[CUBE_NAME].chunks is not None:
        enc["chunksizes"] = tuple(c[0] for c in ds[CUBE_NAME].chunks)
    if ds[CUBE_NAME].dtype.kind == "f":
        enc["_FillValue"] = np.nan
    try:
        ds.to_netcdf(out, engine="h5netcdf", encoding={CUBE_NAME: enc})
    except (TypeError, ValueError) as exc:
        raise FormatError(f"cannot write NetCDF: {exc}") from exc
