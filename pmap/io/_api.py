"""open_cube and convert: the format-independent entry points."""

from __future__ import annotations

import json
import os
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
import zarr

from .._version import __version__
from ..conventions import CUBE_NAME, udunits
from ..cube import DEFAULT_CHUNK_MIB
from ..errors import InputFileError, OutputExistsError
from ..noise import describe_noise_coords
from ..provenance import with_medium
from ._common import check_input, detect_format, finish_cube, get_format, read_sidecar
from ._text import text_to_zarr
from ._write import _same_or_inside, atomic_output, output_format, prepare_output, save_cube


def _read_text(path: Path, options: dict[str, Any], target_mib: float | None = None
               ) -> xr.Dataset:
    store = zarr.storage.MemoryStore()
    text_to_zarr(path, store, **options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return xr.open_zarr(store, chunks={}, consolidated=False)


def open_cube(
    path: str | os.PathLike,
    *,
    fmt: str | None = None,
    chunks: Mapping[str, int] | None = None,
    target_chunk_mib: float = DEFAULT_CHUNK_MIB,
    **axis_options: Any,
) -> xr.DataArray:
    """Open a PL map file as a canonical cube, lazily where the format allows.

    Parameters
    ----------
    path : str or path-like
        Zarr store (v2/v3), NetCDF4/HDF5 file, ``.npy`` array, multi-page TIFF
        (one page per channel) or a .csv/.tsv/.txt table (long or wide).
    fmt : str, optional
        Force the format (see :data:`pmap.io.SUPPORTED_FORMATS`); detected otherwise.
    chunks : mapping, optional
        Spatial chunk sizes ``{"y": cy, "x": cx}`` of the returned cube.
    target_chunk_mib : float
        Memory target of one chunk in MiB when ``chunks`` is omitted.
    **axis_options
        Format-specific read options as plain values, e.g. ``wavelength_nm=[...]``,
        ``wavelength_start_nm=``/``wavelength_step_nm=``, ``energy_ev=``,
        ``pixel_size_um=``, ``dims="y,x,wavelength"``, ``sidecar=`` (npy, TIFF);
        ``x_col=``, ``y_col=``, ``spectral_col=``, ``value_col=``, ``delimiter=``,
        ``grid_tolerance=`` (text); ``variable=`` (Zarr, NetCDF); and metadata
        such as ``units=``, ``excitation_wavelength_nm=``, ``temperature_K=``.

    Returns
    -------
    xarray.DataArray
        Validated cube (:func:`pmap.cube.validate_cube`), dask-backed, with the
        input file's path, format and fingerprint in its provenance attrs.
        Text tables are parsed into memory (convert big ones with
        :func:`text_to_zarr` first); every other format computes nothing here.

    Raises
    ------
    InputFileError
        Missing, unreadable or truncated file.
    FormatError
        Unknown format (the message lists the supported ones), bad options or
        sidecar, points off a regular grid, duplicate points.
    CubeValidationError
        The content is not a valid cube.
    """
    p = check_input(path)
    kind = fmt or detect_format(p)
    raw = get_format(kind).function("reader")(p, axis_options, target_chunk_mib)
    source = _medium_source(raw, p, kind, axis_options)
    cube = finish_cube(raw, p, kind, chunks=chunks, target_chunk_mib=target_chunk_mib)
    if "wavelength" in cube.dims:
        cube.attrs = with_medium(cube.attrs, source)
    return cube


def _record_medium(store: Path, source: str) -> None:
    """Add the medium's source to a Zarr cube written from text (wavelength axis only)."""
    group = zarr.open_group(str(store), mode="r+")
    array = group[CUBE_NAME]
    if "wavelength" not in group:
        return
    array.attrs.update(with_medium(dict(array.attrs), source))
    if group.metadata.zarr_format == 2:
        zarr.consolidate_metadata(str(store))


#: Where a cube's wavelength medium came from (attr ``wavelength_medium_source``).
_MEDIUM_SOURCES = ("data", "sidecar", "option", "assumed")


def _medium_source(raw: Any, path: Path, kind: str, options: Mapping[str, Any]) -> str:
    """Whether the wavelength medium was stated (data, sidecar, option) or will be assumed."""
    if options.get("wavelength_medium") is not None:
        return "option"
    if kind == "text":  # the text reader fills in the default: only an option states it
        return "assumed"
    if kind in ("npy", "tiff"):
        if read_sidecar(path, options.get("sidecar")).get("wavelength_medium") is not None:
            return "sidecar"
        return "assumed"
    if raw.attrs.get("wavelength_medium") is None:
        return "assumed"
    stored = raw.attrs.get("wavelength_medium_source")
    return stored if stored in _MEDIUM_SOURCES else "data"


def convert(
    src: str | os.PathLike,
    dst: str | os.PathLike,
    *,
    fmt: str | None = None,
    overwrite: bool = False,
    zarr_format: int = 3,
    src_fmt: str | None = None,
    **read_options: Any,
) -> Path:
    """Convert a map file to Zarr (default) or NetCDF without loading it into memory.

    Parameters
    ----------
    src : str or path-like
        Input in any format :func:`open_cube` reads.
    dst : str or path-like
        Output path; ``.nc``/``.h5`` write NetCDF, anything else Zarr.
    fmt : {"zarr", "netcdf"}, optional
        Output format, if not given by the ending of ``dst``.
    overwrite : bool
        Replace an existing output (never the input).
    zarr_format : {2, 3}
        Zarr version for Zarr output.
    src_fmt : str, optional
        Input format, if the ending of ``src`` does not tell.
    **read_options
        Read options of :func:`open_cube` (or of :func:`text_to_zarr` for text,
        e.g. ``chunk_rows``, ``buffer_mib``).

    Returns
    -------
    pathlib.Path
        The written output.
    """
    p = check_input(src)
    out = Path(dst).expanduser()
    if (src_fmt or detect_format(p)) == "text" and output_format(out, fmt) == "zarr":
        out = prepare_output(out, overwrite=overwrite, attrs={}, remove=False)
        if _same_or_inside(out, p):
            raise OutputExistsError(f"refusing to write {out}: it is the input ({p})")
        with atomic_output(out) as tmp:  # a failed conversion leaves nothing behind
            text_to_zarr(p, tmp, overwrite=True, zarr_format=zarr_format, **read_options)
            source = "option" if read_options.get("wavelength_medium") is not None \
                else "assumed"
            _record_medium(tmp, source)
        return out
    if p.is_dir() and output_format(out, fmt) == "netcdf" and _is_result(p):
        return _result_to_netcdf(p, out, overwrite=overwrite)
    cube = open_cube(p, fmt=src_fmt, **read_options)
    return save_cube(cube, out, fmt=fmt, overwrite=overwrite, zarr_format=zarr_format)


def _is_result(path: Path) -> bool:
    """A pmap result store (every map, not a cube): its attrs carry ``pmap_result``."""
    try:
        return "pmap_result" in zarr.open_group(str(path), mode="r").attrs
    except Exception:  # not a readable Zarr group: let open_cube say what is wrong
        return False


def _netcdf_attr(v: Any) -> Any:
    """An attribute value NetCDF can store: booleans as 0/1, containers as JSON text."""
    if isinstance(v, (bool, np.bool_)):
        return int(v)
    if isinstance(v, (dict, list, tuple)) and not (
        isinstance(v, (list, tuple)) and all(isinstance(e, (int, float)) and
                                             not isinstance(e, bool) for e in v)
    ):
        return json.dumps(v)
    if v is None:
        return ""
    return v


def _result_to_netcdf(src: Path, out: Path, *, overwrite: bool) -> Path:
    """Every map of a result store into one NetCDF4 file (lazily, chunk by chunk)."""
    if _same_or_inside(out, src):
        raise OutputExistsError(f"refusing to write {out}: it is the input ({src})")
    if out.exists() and not overwrite:
        raise OutputExistsError(f"{out} exists; pass --overwrite to replace it")
    ds = xr.open_zarr(str(src), consolidated=None)
    if not bool(ds.attrs.get("pmap_complete", False)):
        raise InputFileError(f"{src} is an incomplete result (an interrupted run); resume it "
                             "first")
    ds = describe_noise_coords(ds)
    ds.attrs = {k: _netcdf_attr(v) for k, v in ds.attrs.items()}
    ds.attrs.setdefault("title", f"PL map results of {_input_name(ds.attrs)} (pmap)")
    ds.attrs.setdefault("history", f"{_now_iso()} converted from {src.name} by pmap "
                                   f"{__version__}")
    encoding: dict[str, dict] = {}
    for name, var in ds.variables.items():
        var.attrs = {k: _netcdf_attr(v) for k, v in var.attrs.items()}
        if "units" in var.attrs:
            var.attrs["units"] = udunits(str(var.attrs["units"]))
        if "flag_values" in var.attrs:  # CF: flag values of the variable's own type
            var.attrs["flag_values"] = np.asarray(var.attrs["flag_values"], dtype=var.dtype)
        var.encoding = {}
        if name in ("x", "y"):  # stage axes, not the Earth's: see pmap.results (CF §4, §5.6)
            var.attrs.pop("axis", None)
        if name in ds.dims:  # CF §2.5.1: coordinate variables carry no _FillValue
            encoding[name] = {"_FillValue": None}
    with atomic_output(out) as tmp:  # written whole or not at all
        ds.to_netcdf(tmp, engine="h5netcdf", encoding=encoding)
    return out


def _input_name(attrs: dict) -> str:
    """File name of the input recorded in a store's provenance, or "a PL map"."""
    try:
        return Path(json.loads(attrs.get("pmap_provenance", "{}"))["input"]["path"]).name
    except (ValueError, KeyError, TypeError):
        return "a PL map"


def _now_iso() -> str:
    from datetime import UTC, datetime

    return datetime.now(UTC).isoformat(timespec="seconds")
