"""cube_info / format_cube_info: a summary of a map file without loading it."""

from __future__ import annotations

import os
from typing import Any

import dask
import dask.array as da
import numpy as np

from .. import _cubeinfo
from .._cubeinfo import axis_summary, finish_info, format_cube_info, stored_range  # noqa: F401 (re-export)
from ..conventions import SPECTRAL_DIMS, length_to_um_factor
from ..cube import METADATA_ATTRS, spectral_dim
from ..provenance import PROVENANCE_ATTR, get_provenance
from ._api import open_cube
from ._common import check_input, detect_format
from ._text import TEXT_OPTIONS, inspect_text, scan_text


def _stored_chunks(cube) -> Any:
    enc = cube.encoding
    c = enc.get("preferred_chunks") or enc.get("chunks") or enc.get("chunksizes")
    if isinstance(c, dict):
        return {str(k): int(v) for k, v in c.items()}
    if c is not None:
        return dict(zip(cube.dims, (int(v) for v in c)))
    return None


#: cubes up to this many bytes (in memory) get a full min/max scan by default
FULL_SCAN_BYTES = _cubeinfo.FULL_SCAN_BYTES
#: the sampled value range reads about this many bytes, spread over the map
SAMPLE_BYTES = _cubeinfo.SAMPLE_BYTES


_stored_range = stored_range


def _value_range(cube, full: bool) -> dict[str, Any]:
    """Value range of a cube: stored, full scan (small cubes or ``full``) or a chunk sample.

    Returns ``value_min``, ``value_max`` and ``value_range_source``: "stored"
    (CF ``actual_range`` in the file), "full" (every chunk read) or "sample"
    (``value_range_sample`` = fraction of the spectra read: whole stored chunks
    spread evenly over the stored chunk grid, about ``SAMPLE_BYTES``).
    """
    stored = _stored_range(cube.attrs)
    if stored is not None and not full:
        return {"value_min": stored[0], "value_max": stored[1], "value_range_source": "stored"}
    data = cube.data
    if full or not isinstance(data, da.Array) or data.nbytes <= FULL_SCAN_BYTES:
        lo, hi = dask.compute(da.nanmin(data), da.nanmax(data), scheduler="threads") if isinstance(
            data, da.Array) else (np.nanmin(data), np.nanmax(data))
        return {"value_min": float(lo), "value_max": float(hi), "value_range_source": "full"}
    # sample units: the stored chunks (a read touches only those), else the dask chunks
    stored_chunks = _stored_chunks(cube) or {}
    unit = [min(int(stored_chunks.get(d) or max(c)), n)
            for d, c, n in zip(cube.dims, data.chunks, data.shape)]
    sdim = cube.dims.index(spectral_dim(cube))
    unit[sdim] = data.shape[sdim]  # whole spectra
    grid = [-(-n // u) for n, u in zip(data.shape, unit)]
    n_units = int(np.prod(grid))
    unit_bytes = max(int(np.prod(unit)) * data.dtype.itemsize, 1)
    k = max(1, min(n_units, SAMPLE_BYTES // unit_bytes))
    picks = np.unique(np.linspace(0, n_units - 1, k).round().astype(int))
    parts = []
    for p in picks:
        idx = np.unravel_index(int(p), grid)
        parts.append(data[tuple(slice(i * u, (i + 1) * u) for i, u in zip(idx, unit))])
    mins_maxs = dask.compute(*[(da.nanmin(b), da.nanmax(b)) for b in parts], scheduler="threads")
    lo = np.nanmin([m[0] for m in mins_maxs])
    hi = np.nanmax([m[1] for m in mins_maxs])
    read = sum(int(np.prod(b.shape)) for b in parts)
    return {
        "value_min": float(lo), "value_max": float(hi), "value_range_source": "sample",
        "value_range_sample": read / max(int(np.prod(data.shape)), 1),
        "value_range_chunks": (len(parts), n_units),
    }


def _text_info(path, fmt: str, value_range: bool, options: dict[str, Any]) -> dict[str, Any]:
    spec = inspect_text(path, **options)
    layout = scan_text(spec, value_range=value_range, **options)
    fac = 1.0 if spec.xy_units == "pixel" else length_to_um_factor(spec.xy_units)
    unit = "pixel" if spec.xy_units == "pixel" else "um"
    shape = (layout.y.n, layout.x.n, layout.spectral.size)
    info = {
        "dims": ["y", "x", spec.spectral_dim],
        "shape": list(shape),
        "dtype": "float32",
        "spectral_dim": spec.spectral_dim,
        "spectral": axis_summary(layout.spectral, spec.spectral_units),
        "y": axis_summary(layout.y.values * fac, unit),
        "x": axis_summary(layout.x.values * fac, unit),
        "chunks": None,
        "stored_chunks": None,
        "layout": f"{spec.layout} table",
        "rows": layout.n_rows,
        "value_min": layout.value_min,
        "value_max": layout.value_max,
        "value_range_source": "full" if value_range else None,
        "units": options.get("units", "counts"),
        "metadata": {},
        "attrs": {},
    }
    if spec.spectral_dim == "wavelength":
        stated = options.get("wavelength_medium")
        info["medium"] = {"medium": str(stated).lower() if stated else "air",
                          "source": "option" if stated else "assumed"}
    return info


def cube_info(
    path: str | os.PathLike, *, value_range: bool = True, full_range: bool = False,
    **read_options: Any
) -> dict[str, Any]:
    """Summary of a map file: dims, shape, axes, pixel size, chunks, value range, metadata.

    Parameters
    ----------
    path : str or path-like
        Any file :func:`pmap.io.open_cube` reads.
    value_range : bool
        Give the minimum and maximum intensity (in the cube's units). For a
        binary cube: the CF ``actual_range`` attribute when the file states one,
        else a full scan (chunk by chunk, bounded memory) of a cube of up to
        ``FULL_SCAN_BYTES``, else the range of a sample of whole chunks spread
        over the map (about ``SAMPLE_BYTES`` read, so info stays fast on any
        size); ``value_range_source`` says which ("stored", "full", "sample").
        Text tables are read whole (the scan that finds the grid). False skips it.
    full_range : bool
        Always scan every chunk (exact range of huge files; one full read).
    **read_options
        Read options of :func:`pmap.io.open_cube`.

    A Zarr store already in canonical form, read without options, is summarised
    by :func:`pmap._cubeinfo.quick_zarr_info` (zarr and numpy only, no xarray or
    dask imports; same dict); anything else goes through :func:`open_cube`.

    Returns
    -------
    dict
        Keys: ``path``, ``format``, ``file_size_bytes``, ``dims``, ``shape``,
        ``dtype``, ``spectral_dim``, ``spectral`` / ``y`` / ``x`` (min, max, n,
        step, units; positions in µm), ``pixel_size_um``, ``extent_um``
        (y, x), ``chunks``, ``stored_chunks``, ``value_min``, ``value_max``,
        ``value_range_source`` (and for a sample ``value_range_sample``, the
        fraction of spectra read, and ``value_range_chunks``, (read, total)),
        ``units``, ``medium`` (wavelength axes only: ``{"medium": "air"|"vacuum",
        "source": "data"|"sidecar"|"option"|"assumed"}``), ``metadata`` (known
        acquisition attrs), ``attrs`` (the rest), ``provenance`` (decoded record).
    """
    p = check_input(path)
    if not read_options:
        quick = _cubeinfo.quick_zarr_info(p, value_range=value_range, full_range=full_range,
                                          full_scan_bytes=FULL_SCAN_BYTES,
                                          sample_bytes=SAMPLE_BYTES)
        if quick is not None:
            return quick
    fmt = detect_format(p)
    if fmt == "text":
        opts = {k: v for k, v in read_options.items() if k in (*TEXT_OPTIONS, "chunk_rows")}
        info = _text_info(p, fmt, value_range, opts)
    else:
        # rechunking with no distributed client uses dask's "tasks" method; saying so
        # up front spares dask importing distributed to look for a client (~0.5-1 s)
        with dask.config.set({"array.rechunk.method": "tasks"}):
            cube = open_cube(p, fmt=fmt, **read_options)
        sdim = spectral_dim(cube)
        info = {
            "dims": list(cube.dims),
            "shape": list(cube.shape),
            "dtype": str(cube.dtype),
            "spectral_dim": sdim,
            "spectral": axis_summary(cube[sdim].values, SPECTRAL_DIMS[sdim]),
            "y": axis_summary(cube["y"].values, cube["y"].attrs.get("units", "pixel")),
            "x": axis_summary(cube["x"].values, cube["x"].attrs.get("units", "pixel")),
            "chunks": {d: int(c[0]) for d, c in zip(cube.dims, cube.chunks)},
            "stored_chunks": _stored_chunks(cube),
            "value_min": None,
            "value_max": None,
            "units": cube.attrs.get("units"),
        }
        if value_range:
            sample_cube = cube
            st = info["stored_chunks"] or {}
            if (not full_range and _stored_range(cube.attrs) is None
                    and cube.data.nbytes > FULL_SCAN_BYTES and "chunks" not in read_options
                    and st.get("y") and st.get("x")
                    and (st["y"], st["x"]) != (info["chunks"]["y"], info["chunks"]["x"])):
                # the sample reads stored chunks: a view chunked like the file, so a
                # sampled stored chunk does not pull in the whole processing chunk
                with dask.config.set({"array.rechunk.method": "tasks"}):
                    sample_cube = open_cube(p, fmt=fmt, chunks={"y": int(st["y"]),
                                                                "x": int(st["x"])},
                                            **read_options)
            info.update(_value_range(sample_cube, full_range))
        attrs = {
            k: v for k, v in cube.attrs.items() if k not in (PROVENANCE_ATTR, "units", "long_name")
        }
        if sdim == "wavelength":
            info["medium"] = {"medium": attrs.pop("wavelength_medium", "air"),
                              "source": attrs.pop("wavelength_medium_source", "assumed")}
        info["metadata"] = {k: attrs.pop(k) for k in list(attrs) if k in METADATA_ATTRS}
        info["attrs"] = attrs
        info["provenance"] = get_provenance(cube.attrs)
    finish_info(info, p, fmt)
    return info
