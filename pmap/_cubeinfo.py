"""A fast ``cube_info`` for canonical Zarr stores, and the text of any info dict.

``plcube info`` must answer within a second on any size. Opening a cube through
:func:`pmap.io.open_cube` imports xarray and dask.array (together about 1 s of a
2-core machine's time before anything is read), so for the common case, a Zarr
store already in pmap's canonical form (dims ``(*stack, y, x, S)``, ascending
finite axes in canonical units, float data with a NaN fill value, variable
``intensity``), :func:`quick_zarr_info` reads the metadata, the axes and the
value-range sample with zarr and numpy alone. It returns the same dict as the
full path (checked against it in tests/test_io_info.py) and ``None`` whenever the
store needs anything the full path does (a unit to convert, an axis to reverse, a
missing coordinate, an odd fill value, a missing chunk, read options, a full scan
of a large cube): the caller then takes the full path, which converts or raises.

This module imports neither xarray nor dask; the constants it mirrors from
:mod:`pmap.cube` (metadata attrs, stack dims, the processing chunk rule) are
checked against that module in the tests.
"""

from __future__ import annotations

import base64
import json
import math
import os
import struct
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from ._layout import METADATA_ATTRS, STACK_DIMS, choose_spatial_chunks
from .conventions import SPECTRAL_DIMS, normalise_intensity_unit, normalise_length_unit
from .errors import PmapError
from .provenance import PROVENANCE_ATTR, get_provenance, with_input, with_medium

#: cubes up to this many bytes (in memory) get a full min/max scan by default
FULL_SCAN_BYTES = 64 * 2**20
#: the sampled value range reads about this many bytes, spread over the map
SAMPLE_BYTES = 32 * 2**20

#: spectral units that need no conversion (factor 1 in pmap.cube's table)
_SPECTRAL_UNITS_AS_IS = {
    "wavelength": ("nm", "nanometer", "nanometre"),
    "energy": ("ev",),
    "wavenumber": ("cm-1", "1/cm", "cm^-1", "cm⁻¹"),
    "raman_shift": ("cm-1", "1/cm", "cm^-1", "cm⁻¹"),
}
_MEDIUM_SOURCES = ("data", "sidecar", "option", "assumed")
#: attrs that make xarray decode values (masking, scaling, times): the full path decides
_DECODING_ATTRS = ("scale_factor", "add_offset", "missing_value", "calendar", "coordinates",
                   "dtype", "compression", "_Unsigned")


def axis_summary(vals: np.ndarray, unit: str) -> dict[str, Any]:
    """min, max, n, median step and units of an ascending axis (values in ``unit``)."""
    step = float(np.median(np.diff(vals))) if vals.size > 1 else None
    return {"min": float(vals[0]), "max": float(vals[-1]), "n": int(vals.size), "step": step,
            "units": unit}


def path_size_bytes(path: Path) -> int:
    """Size of a file, or the summed size of the files in a directory store, in bytes."""
    if path.is_dir():
        return sum(f.stat().st_size for f in path.rglob("*") if f.is_file())
    return path.stat().st_size


class _NotCanonical(Exception):
    """The store needs the full open_cube path (conversion, decoding or a proper error)."""


def _is_nan_fill(v: Any) -> bool:
    """True for a fill value that decodes to NaN (or none at all)."""
    if v is None:
        return True
    if isinstance(v, str):
        if v.lower() == "nan":
            return True
        try:  # xarray stores a float _FillValue in Zarr v3 attributes as base64 bytes
            raw = base64.b64decode(v, validate=True)
        except ValueError:
            return False
        fmt = {8: "<d", 4: "<f"}.get(len(raw))
        return fmt is not None and math.isnan(struct.unpack(fmt, raw)[0])
    try:
        return math.isnan(float(v))
    except (TypeError, ValueError):
        return False


def _array_parts(arr, zarr_format: int) -> tuple[tuple[str, ...], dict[str, Any]]:
    """(dims, attrs as xarray gives them) of a zarr array, or _NotCanonical."""
    attrs = dict(arr.attrs)
    if zarr_format == 2:
        dims = tuple(attrs.pop("_ARRAY_DIMENSIONS", None) or ())
        fill = arr.metadata.fill_value
    else:
        dims = tuple(arr.metadata.dimension_names or ())
        fill = attrs.get("_FillValue")
    if len(dims) != arr.ndim or any(d is None for d in dims):
        raise _NotCanonical("dims not named")
    if arr.dtype.kind != "f" or not _is_nan_fill(fill) or not _is_nan_fill(
            attrs.pop("_FillValue", None)):
        raise _NotCanonical("not float with a NaN fill value")
    if any(k in attrs for k in _DECODING_ATTRS) or any(k.startswith("_") for k in attrs):
        raise _NotCanonical("attrs that xarray decodes")
    return dims, attrs


def _coord(group, name: str, n: int, zarr_format: int) -> tuple[np.ndarray, dict]:
    if name not in group:
        raise _NotCanonical(f"no {name} coordinate")
    arr = group[name]
    dims, attrs = _array_parts(arr, zarr_format)
    if dims != (name,) or arr.shape != (n,):
        raise _NotCanonical(f"{name} coordinate shape")
    vals = np.asarray(arr[...], dtype=float)
    if not np.all(np.isfinite(vals)) or (vals.size > 1 and not np.all(np.diff(vals) > 0)):
        raise _NotCanonical(f"{name} coordinate not finite and ascending")
    return vals, attrs


def _sample_range(arr, dims, sdim: str, full: bool, full_scan_bytes: int,
                  sample_bytes: int) -> dict[str, Any]:
    """Value range read with zarr: full scan of a small cube, else the chunk sample of _info."""
    shape = arr.shape
    nbytes = int(np.prod(shape)) * arr.dtype.itemsize
    if full or nbytes <= full_scan_bytes:
        if nbytes > full_scan_bytes:
            raise _NotCanonical("full scan of a large cube: dask reads it in parallel")
        data = arr[...]
        with warnings.catch_warnings():  # all NaN: the full path says so
            warnings.simplefilter("ignore", RuntimeWarning)
            lo, hi = np.nanmin(data), np.nanmax(data)
        out = {"value_min": float(lo), "value_max": float(hi), "value_range_source": "full"}
    else:
        unit = [min(int(c), n) for c, n in zip(arr.chunks, shape)]
        unit[dims.index(sdim)] = shape[dims.index(sdim)]  # whole spectra
        grid = [-(-n // u) for n, u in zip(shape, unit)]
        n_units = int(np.prod(grid))
        unit_bytes = max(int(np.prod(unit)) * arr.dtype.itemsize, 1)
        k = max(1, min(n_units, sample_bytes // unit_bytes))
        picks = np.unique(np.linspace(0, n_units - 1, k).round().astype(int))
        lows, highs, read = [], [], 0
        for p in picks:
            idx = np.unravel_index(int(p), grid)
            sel = tuple(slice(i * u, min((i + 1) * u, n)) for i, u, n in zip(idx, unit, shape))
            block = arr[sel]
            read += block.size
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                lows.append(np.nanmin(block))
                highs.append(np.nanmax(block))
        out = {"value_min": float(np.min(lows)), "value_max": float(np.max(highs)),
               "value_range_source": "sample",
               "value_range_sample": read / max(int(np.prod(shape)), 1),
               "value_range_chunks": (len(picks), n_units)}
    if not (math.isfinite(out["value_min"]) and math.isfinite(out["value_max"])):
        raise _NotCanonical("no finite value read")
    return out


def stored_range(attrs: dict) -> tuple[float, float] | None:
    """(min, max) stated in the file: the CF ``actual_range`` attribute, if well formed."""
    v = attrs.get("actual_range")
    try:
        lo, hi = (float(t) for t in np.asarray(v, dtype=float).ravel())
    except (TypeError, ValueError):
        return None
    return (lo, hi) if np.isfinite(lo) and np.isfinite(hi) and lo <= hi else None


def quick_zarr_info(path: str | os.PathLike, *, value_range: bool = True,
                    full_range: bool = False, full_scan_bytes: int = FULL_SCAN_BYTES,
                    sample_bytes: int = SAMPLE_BYTES) -> dict[str, Any] | None:
    """:func:`pmap.io.cube_info` of a canonical Zarr store without xarray or dask.

    Returns the info dict (same keys and values as the full path) or ``None`` when
    the store is not a plainly canonical Zarr cube (the caller then uses the full
    path). Never raises for a bad store: the full path gives the error.
    """
    p = Path(path).expanduser()
    if not (p.is_dir() and p.name.lower().endswith(".zarr")
            and ((p / "zarr.json").is_file() or (p / ".zgroup").is_file())):
        return None
    try:
        return _quick(p, value_range, full_range, full_scan_bytes, sample_bytes)
    except (_NotCanonical, PmapError, OSError, KeyError, ValueError, TypeError):
        return None


def _quick(p: Path, value_range: bool, full_range: bool, full_scan_bytes: int,
           sample_bytes: int) -> dict[str, Any]:
    import zarr

    group = zarr.open_group(str(p), mode="r")
    zf = int(group.metadata.zarr_format)
    if "intensity" not in group:
        raise _NotCanonical("no intensity variable")
    arr = group["intensity"]
    if not isinstance(arr, zarr.Array):
        raise _NotCanonical("intensity is not an array")
    dims, arr_attrs = _array_parts(arr, zf)
    sdims = [d for d in dims if d in SPECTRAL_DIMS]
    if len(sdims) != 1 or len(dims) < 3 or dims[-3:] != ("y", "x", sdims[0]):
        raise _NotCanonical("dims not (*stack, y, x, spectral)")
    sdim = sdims[0]
    stack = dims[:-3]
    if any(d not in STACK_DIMS for d in stack) or any(n == 0 for n in arr.shape):
        raise _NotCanonical("stack dims")
    if int(arr.nchunks_initialized) < int(arr.nchunks):
        raise _NotCanonical("missing chunks: the full path names them")
    sizes = dict(zip(dims, arr.shape))
    spec, spec_attrs = _coord(group, sdim, sizes[sdim], zf)
    unit_raw = str(spec_attrs.get("units", SPECTRAL_DIMS[sdim])).strip()
    if unit_raw not in _SPECTRAL_UNITS_AS_IS[sdim] and unit_raw.lower() not in \
            _SPECTRAL_UNITS_AS_IS[sdim]:
        raise _NotCanonical("spectral unit to convert")
    if sdim in ("wavelength", "energy") and np.any(spec <= 0):
        raise _NotCanonical("non-positive spectral axis")
    spatial = {}
    for d in ("y", "x"):
        vals, attrs = _coord(group, d, sizes[d], zf)
        if "units" not in attrs:
            raise _NotCanonical("spatial axis without units (the full path notes it)")
        unit = normalise_length_unit(attrs["units"])
        if unit in ("nm", "mm"):
            raise _NotCanonical("spatial unit to convert")
        spatial[d] = (vals, unit)
    for d in stack:
        if d in group:
            _coord(group, d, sizes[d], zf)

    attrs = {**dict(group.attrs), **arr_attrs}
    attrs["units"] = normalise_intensity_unit(attrs.get("units"))
    if sdim == "wavelength":
        medium = str(attrs.get("wavelength_medium", "air")).lower()
        if medium not in ("air", "vacuum"):
            raise _NotCanonical("bad medium: the full path raises")
        if attrs.get("wavelength_medium") is None:
            source = "assumed"
        else:
            stored = attrs.get("wavelength_medium_source")
            source = stored if stored in _MEDIUM_SOURCES else "data"
        attrs["wavelength_medium"] = medium
    attrs = with_input(attrs, p, fmt="zarr")
    if sdim == "wavelength":
        attrs = with_medium(attrs, source)

    stored_chunks = {d: int(c) for d, c in zip(dims, arr.chunks)}
    cy, cx = choose_spatial_chunks((sizes["y"], sizes["x"]), sizes[sdim], arr.dtype.itemsize,
                                   align=(stored_chunks["y"], stored_chunks["x"]))
    chunks = {d: 1 for d in stack}
    chunks.update({"y": cy, "x": cx, sdim: sizes[sdim]})
    info: dict[str, Any] = {
        "dims": list(dims),
        "shape": [int(n) for n in arr.shape],
        "dtype": str(arr.dtype),
        "spectral_dim": sdim,
        "spectral": axis_summary(spec, SPECTRAL_DIMS[sdim]),
        "y": axis_summary(*spatial["y"]),
        "x": axis_summary(*spatial["x"]),
        "chunks": chunks,
        "stored_chunks": stored_chunks,
        "value_min": None,
        "value_max": None,
        "units": attrs.get("units"),
    }
    if value_range:
        stored = stored_range(attrs)
        if stored is not None and not full_range:
            info.update(value_min=stored[0], value_max=stored[1], value_range_source="stored")
        else:
            info.update(_sample_range(arr, dims, sdim, full_range, full_scan_bytes,
                                      sample_bytes))
    rest = {k: v for k, v in attrs.items() if k not in (PROVENANCE_ATTR, "units", "long_name")}
    if sdim == "wavelength":
        info["medium"] = {"medium": rest.pop("wavelength_medium", "air"),
                          "source": rest.pop("wavelength_medium_source", "assumed")}
    info["metadata"] = {k: rest.pop(k) for k in list(rest) if k in METADATA_ATTRS}
    info["attrs"] = rest
    info["provenance"] = get_provenance(attrs)
    finish_info(info, p, "zarr")
    return info


def finish_info(info: dict[str, Any], p: Path, fmt: str) -> None:
    """Add extents, pixel size, path, format and size on disk to an info dict (in place)."""
    for dim in ("y", "x"):
        ax = info[dim]
        ax["extent"] = (ax["max"] - ax["min"]) + (ax["step"] or 0.0)
    um = info["x"]["units"] == "um" and info["y"]["units"] == "um"
    info["pixel_size_um"] = {"y": info["y"]["step"], "x": info["x"]["step"]} if um else None
    info["extent_um"] = {"y": info["y"]["extent"], "x": info["x"]["extent"]} if um else None
    info.update(path=str(p), format=fmt, file_size_bytes=path_size_bytes(p))


# ---------------------------------------------------------------- text
def _human_bytes(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if n < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n} B"


_MEDIUM_SOURCE_TEXT = {
    "data": "stated in the file",
    "sidecar": "stated in the sidecar",
    "option": "stated by an option",
    "assumed": "ASSUMED, not stated; give -O wavelength_medium=air|vacuum",
}


def _medium_text(medium: dict[str, str]) -> str:
    src = medium.get("source", "assumed")
    return f"{medium.get('medium', 'air')} wavelengths ({_MEDIUM_SOURCE_TEXT.get(src, src)})"


def _range_source_text(info: dict[str, Any]) -> str:
    src = info.get("value_range_source", "full")
    if src == "stored":
        n = (info.get("attrs") or {}).get("pmap_finite_count")
        finite = f", {int(n):,} finite values" if isinstance(n, int | float) else ""
        return (f"stated in the file (actual_range{finite}); --full-range to scan every chunk")
    if src == "sample":
        k, n = info["value_range_chunks"]
        return (f"SAMPLE of {k} of {n} chunks, {100 * info['value_range_sample']:.2g} % of the "
                "spectra; --full-range to scan every chunk")
    return "full scan"


def format_cube_info(info: dict[str, Any]) -> str:
    """Human-readable text of a :func:`pmap.io.cube_info` dict (for ``plcube info``)."""
    lines = [
        f"{info['path']}",
        f"  format        {info['format']}"
        + (f" ({info['layout']})" if info.get("layout") else ""),
        f"  file size     {_human_bytes(info['file_size_bytes'])}",
    ]
    shape = " x ".join(f"{d}={n}" for d, n in zip(info["dims"], info["shape"]))
    lines.append(f"  shape         {shape}  ({info['dtype']}, {info.get('units')})")
    s = info["spectral"]
    step = f", step {s['step']:.6g}" if s["step"] else ""
    lines.append(
        f"  {info['spectral_dim']:<13} {s['min']:.6g} .. {s['max']:.6g} {s['units']}"
        f" ({s['n']} channels{step})"
    )
    for dim in ("y", "x"):
        a = info[dim]
        st = f", step {a['step']:.6g}" if a["step"] else ""
        lines.append(
            f"  {dim:<13} {a['min']:.6g} .. {a['max']:.6g} {a['units']} ({a['n']} pixels{st})"
        )
    if info.get("pixel_size_um"):
        ps, ex = info["pixel_size_um"], info["extent_um"]
        fmt_ps = "/".join(f"{v:.4g}" if v else "-" for v in (ps["y"], ps["x"]))
        lines.append(f"  pixel size    {fmt_ps} um (y/x); extent {ex['y']:.4g} x {ex['x']:.4g} um")
    if info.get("chunks"):
        lines.append("  chunks        " + ", ".join(f"{k}={v}" for k, v in info["chunks"].items()))
    if info.get("stored_chunks"):
        lines.append(
            "  stored chunks " + ", ".join(f"{k}={v}" for k, v in info["stored_chunks"].items())
        )
    if info.get("medium"):
        lines.append(f"  medium        {_medium_text(info['medium'])}")
    if info.get("rows") is not None:
        lines.append(f"  rows          {info['rows']}")
    if info.get("value_min") is not None:
        lines.append(f"  values        {info['value_min']:.6g} .. {info['value_max']:.6g}"
                     f" ({_range_source_text(info)})")
    for k, v in {**info.get("metadata", {}), **info.get("attrs", {})}.items():
        lines.append(f"  {k:<13} {v}")
    prov = info.get("provenance") or {}
    if prov.get("steps"):
        lines.append("  steps         " + ", ".join(s.get("step", "?") for s in prov["steps"]))
    if prov.get("input"):
        lines.append(f"  read from     {json.dumps(prov['input'].get('path'))}")
    return "\n".join(lines)
