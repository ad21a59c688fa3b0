"""Export one map of a result store as a CSV table or a 32-bit float TIFF.

An edge module (layer 6, beside :mod:`pmap.report`), behind ``plcube export``.

- **CSV**: one row per pixel, columns ``x (um)``, ``y (um)``, ``NAME (UNITS)``,
  rows in store order (y outer, x inner), NaN written as ``NaN``; the units
  of every column are in the header.
- **TIFF**: one page, 32-bit IEEE float, (rows, columns) = (y, x) with row 0
  the *largest* y, so the image shows the map as pmap's figures do (origin
  lower left, y up). The pixel size is in the TIFF resolution tags
  (pixels per centimetre, ResolutionUnit = centimetre) and, with the units
  and orientation, in a JSON ImageDescription (``pmap_export: 1``).
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ._version import __version__
from .errors import StepError

__all__ = ["select_map", "export_map", "export_csv", "export_tiff", "EXPORT_FORMATS"]

EXPORT_FORMATS = {".csv": "csv", ".tif": "tiff", ".tiff": "tiff"}
UM_PER_CM = 1e4


def select_map(ds: xr.Dataset, name: str, *, index: Mapping[str, int] | None = None
               ) -> xr.DataArray:
    """The (y, x) map ``name`` of a result, one slice of any other dim chosen by ``index``.

    Parameters
    ----------
    ds : xarray.Dataset
        A result store.
    name : str
        Variable name, e.g. ``peak_energy``.
    index : mapping of str to int, optional
        Position along each extra dim, e.g. ``{"peak": 1}``; a dim of size 1
        needs none.

    Returns
    -------
    xarray.DataArray
        Dims (y, x), attrs and coordinates kept (the selected slice as scalar coords).
    """
    if name not in ds.data_vars:
        maps = [v for v in ds.data_vars if {"y", "x"} <= set(ds[v].dims)]
        raise StepError(f"no variable {name!r} in the store; maps: {', '.join(sorted(maps))}")
    da = ds[name]
    if not {"y", "x"} <= set(da.dims):
        raise StepError(f"{name!r} has dims {da.dims}, not a map on (y, x)")
    index = dict(index or {})
    for d in index:
        if d not in da.dims:
            raise StepError(f"{name!r} has no dim {d!r} (dims {da.dims})")
    sel = {}
    for d in da.dims:
        if d in ("y", "x"):
            continue
        if d in index:
            i = int(index[d])
            if not 0 <= i < da.sizes[d]:
                raise StepError(f"{d} {i} is out of range: {name!r} has {da.sizes[d]} along {d}")
            sel[d] = i
        elif da.sizes[d] == 1:
            sel[d] = 0
        else:
            opt = "--peak N" if d == "peak" else f"--index {d}=N"
            raise StepError(f"{name!r} has {da.sizes[d]} {d} slices: choose one with {opt} "
                            f"(0 to {da.sizes[d] - 1})")
    return da.isel(sel).transpose("y", "x")


def _axis(da: xr.DataArray, dim: str) -> tuple[np.ndarray, str]:
    if dim in da.coords:
        return np.asarray(da[dim].values, float), str(da[dim].attrs.get("units", "pixel"))
    return np.arange(da.sizes[dim], dtype=float), "pixel"


def _yx(da: xr.DataArray) -> tuple[xr.DataArray, np.ndarray, str, np.ndarray, str]:
    """The map as (y, x) with its y and x values and their units."""
    da = da.transpose("y", "x")
    yv, yu = _axis(da, "y")
    xv, xu = _axis(da, "x")
    return da, yv, yu, xv, xu


def _units(da: xr.DataArray) -> str:
    u = str(da.attrs.get("units", "")).strip()
    return u if u not in ("", "none") else "1"


def export_csv(da: xr.DataArray, path: str | Path) -> Path:
    """Write a (y, x) map as a CSV table: ``x (UNIT)``, ``y (UNIT)``, ``NAME (UNITS)`` per pixel.

    Parameters
    ----------
    da : xarray.DataArray
        Map with dims (y, x) (e.g. from :func:`select_map`); ``units`` attr.
    path : str or Path
        CSV file to write.

    Returns
    -------
    Path
        The file written.
    """
    da, yv, yu, xv, xu = _yx(da)
    vals = np.asarray(da.values)
    name = str(da.name or "value")
    yy, xx = np.meshgrid(yv, xv, indexing="ij")
    integer = vals.dtype.kind in "iub"
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    with p.open("w", encoding="utf-8", newline="\n") as fh:
        fh.write(f"x ({xu}),y ({yu}),{name} ({_units(da)})\n")
        for x, y, v in zip(xx.ravel().tolist(), yy.ravel().tolist(), vals.ravel().tolist()):
            if integer:
                val = str(int(v))
            else:
                f = float(v)
                val = repr(f) if np.isfinite(f) else "NaN"  # repr: shortest exact round trip
            fh.write(f"{x!r},{y!r},{val}\n")
    return p


def export_tiff(da: xr.DataArray, path: str | Path) -> Path:
    """Write a (y, x) map as a one-page 32-bit float TIFF with its pixel size recorded.

    Row 0 of the image is the largest y (the map as in pmap's figures, origin
    lower left). The pixel size goes into XResolution/YResolution (pixels per
    cm, ResolutionUnit centimetre) when the axes are in µm, and with the
    variable, units, origin and orientation into the ImageDescription (JSON).

    Parameters
    ----------
    da : xarray.DataArray
        Map with dims (y, x); ``units`` attr.
    path : str or Path
        TIFF file to write.

    Returns
    -------
    Path
        The file written.
    """
    import tifffile

    da, yv, yu, xv, xu = _yx(da)
    img = np.asarray(da.values, dtype=np.float32)
    if yv.size > 1 and yv[1] < yv[0]:
        img, yv = img[::-1], yv[::-1]
    if xv.size > 1 and xv[1] < xv[0]:
        img, xv = img[:, ::-1], xv[::-1]
    dy = float(np.median(np.diff(yv))) if yv.size > 1 else None
    dx = float(np.median(np.diff(xv))) if xv.size > 1 else None
    desc: dict[str, Any] = {
        "pmap_export": 1,
        "software": f"pmap {__version__}",
        "variable": str(da.name or "value"),
        "long_name": str(da.attrs.get("long_name", "")),
        "units": _units(da),
        "pixel_size": {"y": dy, "x": dx, "units": yu if yu == xu else f"y {yu}, x {xu}"},
        "origin": {"y": float(yv[0]), "x": float(xv[0]), "units": yu},
        "row_order": "row 0 is the largest y (origin lower left, y up, as in pmap's figures)",
        "nodata": "NaN",
        "scalar_coords": {str(k): (c.values.item() if c.ndim == 0 else None)
                          for k, c in da.coords.items() if c.ndim == 0},
    }
    kw: dict[str, Any] = {}
    if xu == "um" and yu == "um" and dx and dy:
        kw["resolution"] = (UM_PER_CM / abs(dx), UM_PER_CM / abs(dy))
        kw["resolutionunit"] = "CENTIMETER"
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(p, img[::-1], photometric="minisblack",
                     description=json.dumps(desc, default=str), metadata=None, **kw)
    return p


def export_map(ds: xr.Dataset, name: str, path: str | Path, *,
               index: Mapping[str, int] | None = None) -> Path:
    """Export map ``name`` of a result to ``path``: ``.csv`` table or ``.tif``/``.tiff`` image.

    Parameters
    ----------
    ds : xarray.Dataset
        A result store.
    name : str
        Variable to export.
    path : str or Path
        Output file; its suffix chooses the format.
    index : mapping of str to int, optional
        Slice of each extra dim (see :func:`select_map`).

    Returns
    -------
    Path
        The file written.
    """
    fmt = EXPORT_FORMATS.get(Path(path).suffix.lower())
    if fmt is None:
        raise StepError(f"cannot tell the export format of {Path(path).name}: use .csv, .tif "
                        "or .tiff")
    da = select_map(ds, name, index=index).load()
    return export_csv(da, path) if fmt == "csv" else export_tiff(da, path)
