"""Plain-Python logic of the viewer: layers from stores and cubes, pixel look-up, spectra, fits.

Nothing here imports napari or Qt, so every function is testable on its own.
Layer data are returned in napari's plain ``(data, kwargs, layer_type)`` form.
World coordinates of the viewer are (…, y, x) in µm (pixel indices when a map
has no physical positions); the last two entries of a world position are
always y and x.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .. import _style
from ..conventions import SPECTRAL_DIMS, nm_to_ev
from ..errors import FormatError, InputFileError, StepError
from ..provenance import get_provenance

__all__ = [
    "META_KEY",
    "Grid",
    "grid_of",
    "pixel_at",
    "shape_mask",
    "robust_limits",
    "map_label",
    "REGION_COLOURS",
    "region_colour",
    "discrete_colours",
    "series_at",
    "map_names",
    "result_layers",
    "cube_layer",
    "read_path",
    "MapSource",
    "open_source",
    "fit_settings",
    "fit_curves",
    "region_histograms",
    "region_legend",
    "region_stats_table",
    "TaskProgress",
    "run_process",
]

#: Key of the dict that pmap puts in ``layer.metadata`` (path, variable, kind, …).
META_KEY = "pmap"

#: Variables shown first (on top) when a store opens, best first.
_PRIMARY = ("peak_energy", "max_energy", "centroid_energy", "integrated_intensity")

#: Colours of regions 0, 1, 2, … (the palette of :mod:`pmap._style`, as in the figures).
REGION_COLOURS = _style.CATEGORY_PALETTE

#: Name of the layer that greys the pixels without a value (NaN, masked, no signal).
NO_VALUE_LAYER = "No value (NaN, masked or no signal): grey"

#: Dims that are split into one layer per entry.
_SPLIT_DIMS = ("peak", "component")


# ----------------------------------------------------------------------------- grid


@dataclass(frozen=True)
class Grid:
    """Pixel positions of a map: ``y``, ``x`` (µm, or pixel indices when ``units`` is "pixel")."""

    y: np.ndarray
    x: np.ndarray
    units: str = "um"

    @property
    def shape(self) -> tuple[int, int]:
        """(ny, nx) in pixels."""
        return self.y.size, self.x.size

    @property
    def spacing(self) -> tuple[float, float]:
        """(dy, dx) pixel pitch (µm or 1 pixel); 1 for a single row or column."""
        return _step(self.y), _step(self.x)

    @property
    def origin(self) -> tuple[float, float]:
        """(y0, x0), the position of the first pixel (µm)."""
        return (float(self.y[0]) if self.y.size else 0.0, float(self.x[0]) if self.x.size else 0.0)


def _step(c: np.ndarray) -> float:
    if c.size < 2:
        return 1.0
    d = float(np.median(np.diff(c)))
    return d if d > 0 and np.isfinite(d) else 1.0


def grid_of(obj: xr.DataArray | xr.Dataset) -> Grid:
    """Pixel grid of a cube, map or result store (y, x in µm unless marked "pixel").

    A y or x coordinate without ``units`` is taken as µm (the result-store
    contract); a missing coordinate gives pixel indices.
    """
    units = "um"
    out = []
    for d in ("y", "x"):
        if d not in obj.sizes:
            raise FormatError(f"no {d} dimension: not a map (dims {list(obj.sizes)})")
        if d in obj.coords:
            c = np.asarray(obj[d].values, dtype=float)
            if str(obj[d].attrs.get("units", "um")).lower() in ("pixel", "pixels", "px"):
                units = "pixel"
        else:
            c = np.arange(obj.sizes[d], dtype=float)
            units = "pixel"
        out.append(c)
    return Grid(out[0], out[1], units)


def pixel_at(world_yx: Sequence[float], grid: Grid) -> tuple[int, int] | None:
    """Pixel (iy, ix) nearest to a world position, or None outside the map.

    Parameters
    ----------
    world_yx : sequence of float
        A viewer world position; its last two entries are y and x (µm).
    grid : Grid
        Pixel positions of the map.

    Returns
    -------
    (int, int) or None
        Indices of the nearest pixel, None when the position lies more than
        half a pixel outside the map.
    """
    if len(world_yx) < 2:
        return None
    idx = []
    for v, c in zip(world_yx[-2:], (grid.y, grid.x)):
        v = float(v)
        if not np.isfinite(v) or c.size == 0:
            return None
        half = _step(c) / 2
        if v < c.min() - half or v > c.max() + half:
            return None
        idx.append(int(np.argmin(np.abs(c - v))))
    return idx[0], idx[1]


def shape_mask(vertices: np.ndarray, grid: Grid, *, shape_type: str = "polygon") -> np.ndarray:
    """Pixels whose centres lie inside a drawn shape.

    Parameters
    ----------
    vertices : array (n, >=2)
        Vertices in world coordinates; the last two columns are y and x (µm).
    grid : Grid
        Pixel positions of the map.
    shape_type : {"polygon", "rectangle", "ellipse", "path", "line"}
        napari shape type; an ellipse is given by the four corners of its box,
        paths and lines enclose nothing.

    Returns
    -------
    numpy.ndarray of bool, shape (ny, nx)
    """
    v = np.asarray(vertices, dtype=float)[:, -2:]
    yy, xx = np.meshgrid(grid.y, grid.x, indexing="ij")
    if shape_type in ("path", "line") or len(v) < 3:
        return np.zeros(grid.shape, dtype=bool)
    if shape_type == "ellipse":
        c = v.mean(axis=0)
        u, w = (v[1] - v[0]) / 2, (v[3] - v[0]) / 2 if len(v) > 3 else (v[2] - v[1]) / 2
        nu, nw = np.linalg.norm(u), np.linalg.norm(w)
        if nu == 0 or nw == 0:
            return np.zeros(grid.shape, dtype=bool)
        p = np.stack([yy - c[0], xx - c[1]], axis=-1)
        return (p @ (u / nu) / nu) ** 2 + (p @ (w / nw) / nw) ** 2 <= 1.0
    from matplotlib.path import Path as MplPath

    pts = np.column_stack([yy.ravel(), xx.ravel()])
    return MplPath(v).contains_points(pts).reshape(grid.shape)


def robust_limits(
    values: Any, *, percentiles: tuple[float, float] = (1.0, 99.0), max_samples: int = 1_000_000
) -> tuple[float, float]:
    """Contrast limits from percentiles of the finite values (strided subsample when large)."""
    a = np.asarray(values).ravel()
    if a.size > max_samples:
        a = a[:: int(np.ceil(a.size / max_samples))]
    a = a[np.isfinite(a)] if a.dtype.kind == "f" else a
    if a.size == 0:
        return 0.0, 1.0
    lo, hi = (float(v) for v in np.percentile(a, percentiles))
    if not hi > lo:
        lo, hi = lo - 0.5, hi + 0.5
    return lo, hi


# ----------------------------------------------------------------------------- layers


def _unit_text(units: Any) -> str:
    u = str(units or "").strip()
    if u in ("", "1", "none", "dimensionless"):
        return ""
    return u.replace("um", "µm") if u in ("um", "um2") else u


def map_label(name: str, units: Any = None, *, dim: str | None = None, index: Any = None,
              attrs: Mapping | None = None) -> str:
    """Layer name of a result map, the figure's title: ``"Peak energy (eV) — peak 0"``.

    See :func:`pmap._style.map_title`.
    """
    return _style.map_title(name, units, attrs=attrs, dim=dim, index=index)


def _colormap(name: str) -> str:
    return _style.colormap_for(name)


def _placement(grid: Grid, lead: Sequence[str]) -> dict:
    kw: dict[str, Any] = {
        "scale": (*([1.0] * len(lead)), *grid.spacing),
        "translate": (*([0.0] * len(lead)), *grid.origin),
        "axis_labels": (*lead, "y", "x"),
    }
    if grid.units == "um":  # stack dims (an index, scale 1) are dimensionless
        kw["units"] = (*(["dimensionless"] * len(lead)), "um", "um")
    return kw


def _is_map(var: xr.DataArray) -> bool:
    return (
        {"y", "x"} <= set(var.dims)
        and not any(d in SPECTRAL_DIMS for d in var.dims)
        and var.dtype.kind in "iufb"
    )


def map_names(ds: xr.Dataset) -> list[str]:
    """Names of the (…, y, x) maps of a result, the ``region`` map included (data var or coord)."""
    names = [n for n in ds.data_vars if _is_map(ds[n])]
    if "region" in ds.coords and "region" not in names and {"y", "x"} <= set(ds["region"].dims):
        names.append("region")
    return sorted(names)


def result_layers(ds: xr.Dataset, *, path: str | Path | None = None) -> list[tuple]:
    """napari layer data for every map of a result store, the most useful on top.

    Each map with dims (…, y, x) becomes an image layer placed in µm (scale
    and translate from the coordinates), one layer per peak or component; the
    ``region`` map becomes a Labels layer (label = region + 2, so that "no
    signal" (−1) is label 1, drawn in the neutral grey of the figures) and
    ``fit_status`` a Labels layer (label = status + 1). Colours, colour maps,
    names and orientation are those of the figures (:mod:`pmap._style`). Maps load lazily (dask) until shown. Only the
    primary map (peak energy when fitted) is visible at first.

    Parameters
    ----------
    ds : xarray.Dataset
        A result store (``pmap.results.open_result``).
    path : path, optional
        Store path, recorded in each layer's ``metadata["pmap"]``.

    Returns
    -------
    list of (data, kwargs, layer_type)
    """
    grid = grid_of(ds)
    entries: list[tuple[int, tuple]] = []
    meta_base = {"kind": "result", "path": str(path) if path is not None else None}
    law = str(ds.attrs.get("series_law", ""))
    first = f"{law}_{_series_params(law)[0]}" if _series_params(law) else None
    primary = first if first in ds.data_vars else next(
        (p for p in _PRIMARY if p in ds.data_vars), None)
    for name in map_names(ds):
        var = ds[name]
        if name == "intensity":
            continue
        var = var.transpose(..., "y", "x")
        split = next((d for d in _SPLIT_DIMS if d in var.dims), None)
        units = var.attrs.get("units")
        for k in range(var.sizes[split]) if split else [None]:
            v = var.isel({split: k}) if split else var
            index = v[split].values.item() if split and split in v.coords else k
            colours = discrete_colours(name, v) if v.size <= _MAX_DISCRETE_PX else None
            if colours is not None:
                # integer maps (regions, status flags, iteration counts): one colour per
                # value, as in the figures; label = value + offset (label 0, NaN: transparent)
                offset, colours = colours
                vals = np.asarray(v.values, dtype=float)
                data = np.where(np.isfinite(vals), vals + offset, 0).astype(np.int32)
                meta = {**meta_base, "variable": name, "dim": split, "index": k,
                        "label_offset": offset, "legend": var.attrs.get("legend"),
                        "levels": sorted(c - offset for c in colours)}
                kw = {
                    "name": map_label(name, attrs=var.attrs, dim=split if split else None,
                                      index=index if split else None),
                    "metadata": {META_KEY: meta},
                    "opacity": 0.7 if name == "region" else 1.0,
                    "colormap": {0: "transparent", None: _style.NAN_COLOUR, **colours},
                    "visible": False,
                    **_placement(grid, v.dims[:-2]),
                }
                entries.append((3 if name == "region" else 0, (data, kw, "labels")))
                continue
            arr = v.data
            lim = robust_limits(v.values if v.size <= 4_000_000 else v[..., ::4, ::4].values)
            meta = {**meta_base, "variable": name, "dim": split, "index": k}
            visible = name == primary and not k
            kw = {
                "name": map_label(name, units, dim=split, index=index, attrs=var.attrs),
                "metadata": {META_KEY: meta},
                "colormap": _colormap(name),
                "contrast_limits": lim,
                "visible": visible,
                **_placement(grid, v.dims[:-2]),
            }
            rank = (
                2
                if visible
                else (
                    0
                    if name.endswith("_err") or name in ("n_iter", "chi2_red", "background_slope")
                    else 1
                )
            )
            entries.append((rank, (arr, kw, "image")))
    if primary is not None:
        # one rule for pixels without a value, as in the figures: a neutral grey under the
        # maps (napari shows NaN as the dark canvas otherwise)
        pv = ds[primary].transpose(..., "y", "x")
        pv = pv.isel({d: 0 for d in pv.dims[:-2]})
        nan = ~np.isfinite(np.asarray(pv.values, dtype=float))
        kw = {
            "name": NO_VALUE_LAYER,
            "metadata": {META_KEY: {**meta_base, "variable": None, "kind": "no_value"}},
            "colormap": {0: "transparent", None: "transparent", 1: _style.NAN_COLOUR},
            "opacity": 1.0,
            **_placement(grid, ()),
        }
        entries.append((-1, (nan.astype(np.int32), kw, "labels")))
    entries.sort(key=lambda e: e[0])  # stable: bottom of the layer list first
    return [e[1] for e in entries]


#: Integer maps above this many pixels are drawn as continuous images (not loaded to look).
_MAX_DISCRETE_PX = 50_000_000


def discrete_colours(name: str, var: xr.DataArray) -> tuple[int, dict[int, str]] | None:
    """(label offset, {label: hex colour}) of an integer map, or None for a continuous one.

    The figures' rule (:func:`pmap.report.plot_labels`, :func:`pmap.report.plot_map`):
    ``region`` by code (:func:`pmap._style.region_colour`, grey for −1); CF flag maps
    (status) by flag order (:func:`pmap._style.status_colours`, no-value states grey,
    codes outside the flags grey); other integer-typed maps by code like regions;
    float maps with whole values (:func:`pmap._style.discrete_levels`) one colour per
    value sampled from their colour map. Labels are value + offset ≥ 1 (0 is transparent).
    """
    is_int = var.dtype.kind in "iub"
    if not (is_int or "flag_values" in var.attrs or var.dtype.kind == "f"):
        return None
    vals = np.asarray(var.values)
    levels = _style.discrete_levels(vals, var.attrs)
    if levels is None:
        return None
    f = vals.astype(float)
    present = np.unique(f[np.isfinite(f)]).astype(int).tolist()
    codes = sorted(set(levels) | set(present))
    offset = max(0, 1 - min(codes)) if codes else 1
    if name == "region" or (is_int and "flag_values" not in var.attrs):
        cols = {c: _style.region_colour(c) for c in codes}
    elif "flag_values" in var.attrs:
        by = _style.status_colours(levels, var.attrs)
        cols = {c: by.get(c, _style.NAN_COLOUR) for c in codes}
    else:
        import matplotlib as mpl
        from matplotlib.colors import to_hex

        base = mpl.colormaps[_style.colormap_for(name)]
        n = len(levels)
        cols = {lv: to_hex(base(0.5 if n == 1 else i / (n - 1))) for i, lv in enumerate(levels)}
        cols.update({c: _style.NAN_COLOUR for c in codes if c not in cols})
    return offset, {c + offset: col for c, col in cols.items()}


def region_colour(region: int) -> str:
    """Colour (hex) of a region number, the same on the map, in the panels' plots and in
    the figures (:func:`pmap._style.region_colour`; grey for −1, no signal)."""
    return _style.region_colour(region)


def _spectral_of(cube: xr.DataArray) -> str:
    found = [d for d in cube.dims if d in SPECTRAL_DIMS]
    if len(found) != 1:
        raise FormatError(f"not a cube: dims {list(cube.dims)} have no single spectral dim")
    return found[0]


def cube_layer(cube: xr.DataArray, *, path: str | Path | None = None, keep: bool = False) -> tuple:
    """napari layer data of a cube: a lazy image with the spectral axis as a slider.

    The array is transposed to (*stack, S, y, x) and stays dask-backed; y and x
    are placed in µm, the spectral axis by its mean channel step (display only).
    Contrast limits come from a central window of at most 64 × 64 pixels.

    Parameters
    ----------
    cube : xarray.DataArray
        A canonical cube (``pmap.io.open_cube``).
    path : path, optional
        File it came from (``metadata["pmap"]["path"]``).
    keep : bool
        Also keep the DataArray in the metadata (for cubes that exist only in memory).
    """
    sdim = _spectral_of(cube)
    grid = grid_of(cube)
    stack = [d for d in cube.dims if d not in ("y", "x", sdim)]
    arr = cube.transpose(*stack, sdim, "y", "x")
    s = np.asarray(cube[sdim].values, dtype=float)
    ny, nx = grid.shape
    cy, cx = slice(max(0, ny // 2 - 32), ny // 2 + 32), slice(max(0, nx // 2 - 32), nx // 2 + 32)
    window = arr.isel({d: 0 for d in stack}).isel(y=cy, x=cx)
    units = cube.attrs.get("units", "")
    meta = {
        "kind": "cube",
        "path": str(path) if path is not None else None,
        "variable": cube.name,
        "spectral_dim": sdim,
    }
    if keep:
        meta["cube"] = cube
    kw = {
        "name": f"spectra [{_unit_text(units)}]" if _unit_text(units) else "spectra",
        "metadata": {META_KEY: meta},
        "colormap": "magma",
        "contrast_limits": robust_limits(np.asarray(window.values)),
        "scale": (*([1.0] * len(stack)), abs(_step(s)) if s.size > 1 else 1.0, *grid.spacing),
        "translate": (*([0.0] * len(stack)), float(s[0]) if s.size else 0.0, *grid.origin),
        "axis_labels": (*stack, sdim, "y", "x"),
    }
    return arr.data, kw, "image"


def read_path(path: str | Path) -> list[tuple]:
    """Layers of a pmap result store or of a cube in any format pmap reads.

    Raises
    ------
    InputFileError, FormatError
        Missing or unreadable path.
    """
    from ..results import is_result_store, open_result

    p = Path(path)
    if is_result_store(p):
        return result_layers(open_result(p, require_complete=False), path=p)
    from ..io import open_cube

    return [cube_layer(open_cube(p), path=p)]


# ----------------------------------------------------------------------------- sources


def fit_settings(ds: xr.Dataset) -> dict:
    """Line shape, background and slope reference energy of the fit stored in a result.

    Taken from the dataset attrs when present (``fit_model``…), else from the
    provenance record (last ``fit_peaks`` step or the pipeline's ``[fit]``
    table), else the defaults of :func:`pmap.fitting.fit_peaks`.
    """
    params: dict = {}
    prov = get_provenance(ds.attrs)
    for step in prov.get("steps", []):
        if step.get("step") == "fit_peaks":
            params = dict(step.get("params") or {})
    pipe_fit = (prov.get("pipeline") or {}).get("fit") or {}
    model = ds.attrs.get("fit_model") or params.get("model") or pipe_fit.get("model") or "gaussian"
    background = (
        ds.attrs.get("fit_background")
        or params.get("background")
        or pipe_fit.get("background")
        or "constant"
    )
    ref = ds.attrs.get("fit_background_reference_energy_ev")
    if ref is None and "background_slope" in ds:
        ref = ds["background_slope"].attrs.get("reference_energy_ev")
    return {
        "model": str(model),
        "background": str(background),
        "reference_energy_ev": None if ref is None else float(ref),
    }


def fit_curves(
    ds: xr.Dataset, iy: int, ix: int, energy_ev: Any, *, settings: Mapping | None = None,
    at: Mapping | None = None,
) -> xr.Dataset | None:
    """Fitted model, its peak components and background at one pixel of a result.

    Evaluated with :func:`pmap.fitting.model_spectrum` from the stored
    parameters (``peak_energy``, ``peak_fwhm``, ``peak_area``, ``peak_shape``,
    ``background_offset``, ``background_slope``).

    Parameters
    ----------
    ds : xarray.Dataset
        Result store with fitted parameters.
    iy, ix : int
        Pixel indices.
    energy_ev : array_like
        Photon energies (eV) to evaluate at.
    settings : mapping, optional
        Output of :func:`fit_settings` (computed when omitted).
    at : mapping, optional
        Index along stack dims (e.g. ``{"temperature": 2}``; default 0).

    Returns
    -------
    xarray.Dataset or None
        ``total``, ``peak_component`` (peak, energy), ``background``; None when
        the store has no fit or the pixel's fit failed (all centres NaN).
    """
    from ..fitting import model_spectrum

    if not {"peak_energy", "peak_fwhm", "peak_area"} <= set(ds.data_vars):
        return None
    settings = dict(settings or fit_settings(ds))
    px = ds.isel(y=iy, x=ix)
    stack = [d for d in px["peak_energy"].dims if d != "peak"]
    px = px.isel({d: min(int(dict(at or {}).get(d, 0)), px.sizes[d] - 1) for d in stack})
    center = np.atleast_1d(np.asarray(px["peak_energy"].values, dtype=float))
    if not np.any(np.isfinite(center)):
        return None

    def scalar(name):
        return float(px[name].values) if name in px else 0.0

    params = {
        "center": center,
        "fwhm": np.atleast_1d(np.asarray(px["peak_fwhm"].values, dtype=float)),
        "area": np.atleast_1d(np.asarray(px["peak_area"].values, dtype=float)),
        "shape": (
            np.atleast_1d(np.asarray(px["peak_shape"].values, dtype=float))
            if "peak_shape" in px
            else None
        ),
        "offset": scalar("background_offset"),
        "slope": scalar("background_slope"),
        "units": ds["peak_height"].attrs.get("units", "1") if "peak_height" in ds else "1",
    }
    e = np.asarray(energy_ev, dtype=float)
    ref = settings.get("reference_energy_ev")
    if ref is None:
        ref = float(np.mean(e[[0, -1]])) if e.size else 0.0
    return model_spectrum(params, e, model=settings["model"], reference_energy_ev=ref)


def _cube_point(
    cube: xr.DataArray, y_um: float, x_um: float, *, at: Mapping | None = None
) -> tuple[np.ndarray, np.ndarray] | None:
    grid = grid_of(cube)
    ij = pixel_at((y_um, x_um), grid)
    if ij is None:
        return None
    sdim = _spectral_of(cube)
    at = dict(at or {})
    sp = cube.isel(y=ij[0], x=ij[1])
    sp = sp.isel({d: min(int(at.get(d, 0)), sp.sizes[d] - 1) for d in sp.dims if d != sdim})
    return np.asarray(cube[sdim].values, dtype=float), np.asarray(sp.values, dtype=float)


class MapSource:
    """What the panels read: a result store (maps, processed spectra, fit) or a bare cube.

    Parameters
    ----------
    path : path, optional
        Result store or cube file.
    cube : xarray.DataArray, optional
        A cube in memory (when there is no file).

    Attributes
    ----------
    kind : {"result", "cube"}
    ds : xarray.Dataset or None
        The result (None for a cube).
    cube : xarray.DataArray or None
        The spectra shown: the processed cube stored as ``intensity`` in a
        result, or the cube itself.
    grid : Grid
    """

    def __init__(self, path: str | Path | None = None, *, cube: xr.DataArray | None = None):
        from ..results import is_result_store, open_result

        self.path = Path(path) if path is not None else None
        self.ds: xr.Dataset | None = None
        self._raw: xr.DataArray | None | bool = False  # False = not looked up yet
        if cube is not None:
            self.kind, self.cube = "cube", cube
        elif self.path is not None and is_result_store(self.path):
            self.kind = "result"
            self.ds = open_result(self.path, require_complete=False)
            self.cube = self.ds["intensity"] if "intensity" in self.ds else None
        elif self.path is not None:
            from ..io import open_cube

            self.kind, self.cube = "cube", open_cube(self.path)
        else:
            raise StepError("MapSource needs a path or a cube")
        self.grid = grid_of(self.ds if self.ds is not None else self.cube)
        self.fit = fit_settings(self.ds) if self.ds is not None else None

    @property
    def label(self) -> str:
        """Short name for menus."""
        return self.path.name if self.path is not None else "cube in memory"

    @property
    def has_fit(self) -> bool:
        """True if the store holds fitted peak parameters."""
        return self.ds is not None and "peak_energy" in self.ds and "peak_area" in self.ds

    @property
    def has_series(self) -> bool:
        """True for a series store or a result whose maps carry a stack dim."""
        return self.ds is not None and _stack_dim_of(self.ds) is not None

    @property
    def stack_dim(self) -> str | None:
        """The stack dim of the result (temperature, excitation_power, …) or cube, or None."""
        from ..cube import STACK_DIMS

        if self.ds is not None:
            return _stack_dim_of(self.ds)
        if self.cube is not None:
            return next((str(d) for d in self.cube.dims if d in STACK_DIMS), None)
        return None

    def series(self, iy: int, ix: int, *, at: Mapping | None = None) -> dict | None:
        """The series at a pixel and its law (:func:`series_at`), or None."""
        if self.ds is None:
            return None
        return series_at(self.ds, iy, ix, at=at)

    @property
    def has_regions(self) -> bool:
        """True if the store holds a region map."""
        return self.ds is not None and "region" in self.ds

    def spectral_name(self) -> tuple[str, str]:
        """(dim, units) of the spectral axis of :attr:`cube` (("energy", "eV") by default)."""
        if self.cube is None:
            return "energy", "eV"
        s = _spectral_of(self.cube)
        return s, self.cube[s].attrs.get("units", SPECTRAL_DIMS[s])

    def spectrum(self, iy: int, ix: int, *, at: Mapping | None = None
                 ) -> tuple[np.ndarray, np.ndarray] | None:
        """(axis, values) of the spectrum at a pixel, or None without spectra.

        ``at`` picks the index along stack dims (e.g. ``{"temperature": 3}``; default 0).
        """
        if self.cube is None:
            return None
        at = dict(at or {})
        sdim = _spectral_of(self.cube)
        sp = self.cube.isel(y=iy, x=ix)
        sp = sp.isel({d: min(int(at.get(d, 0)), sp.sizes[d] - 1) for d in sp.dims if d != sdim})
        return (np.asarray(self.cube[sdim].values, dtype=float), np.asarray(sp.values, dtype=float))

    def fit_at(self, iy: int, ix: int, axis: np.ndarray, *, at: Mapping | None = None
               ) -> xr.Dataset | None:
        """Fitted model and components at a pixel on ``axis`` (eV), or None."""
        if not self.has_fit or self.spectral_name()[0] != "energy":
            return None
        return fit_curves(self.ds, iy, ix, axis, settings=self.fit, at=at)

    def raw_cube(self) -> xr.DataArray | None:
        """The input cube named in a result's provenance, when it is still readable."""
        if self._raw is False:
            self._raw = None
            inp = get_provenance(self.ds.attrs).get("input", {}) if self.ds is not None else {}
            path = inp.get("path") if isinstance(inp, dict) else None
            if path and Path(path).exists():
                from ..io import open_cube

                try:
                    self._raw = open_cube(path)
                except (FormatError, InputFileError, OSError, ValueError):
                    self._raw = None
        return self._raw if isinstance(self._raw, xr.DataArray) else None

    def raw_spectrum(self, iy: int, ix: int, *, at: Mapping | None = None
                     ) -> tuple[np.ndarray, np.ndarray, str] | None:
        """(energy_ev, values, units) of the raw input spectrum at a pixel's position, or None.

        A wavelength axis is shown as E = hc/λ (the air/vacuum difference,
        below 1 meV in the visible, is not corrected: display only).
        """
        raw = self.raw_cube()
        if raw is None:
            return None
        got = _cube_point(raw, float(self.grid.y[iy]), float(self.grid.x[ix]), at=at)
        if got is None:
            return None
        axis, vals = got
        sdim = _spectral_of(raw)
        if sdim == "wavelength":
            axis = nm_to_ev(axis)
        elif sdim != "energy":
            return None
        order = np.argsort(axis)
        return axis[order], vals[order], str(raw.attrs.get("units", ""))

    def mean_spectrum(self, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, int] | None:
        """(axis, mean spectrum, number of pixels) over the pixels where ``mask`` is True."""
        if self.cube is None or not mask.any():
            return None
        ys, xs = np.nonzero(mask)
        y0, y1, x0, x1 = ys.min(), ys.max() + 1, xs.min(), xs.max() + 1
        sdim = _spectral_of(self.cube)
        sub = self.cube.isel(y=slice(y0, y1), x=slice(x0, x1))
        sub = sub.isel({d: 0 for d in sub.dims if d not in ("y", "x", sdim)})
        vals = np.asarray(sub.transpose("y", "x", sdim).values, dtype=float)
        sel = vals[mask[y0:y1, x0:x1]]
        with np.errstate(invalid="ignore"):
            mean = np.nanmean(sel, axis=0) if sel.size else np.full(vals.shape[-1], np.nan)
        return np.asarray(self.cube[sdim].values, dtype=float), mean, int(sel.shape[0])

    def pixel_summary(self, iy: int, ix: int, *, at: Mapping | None = None) -> str:
        """One or two lines about a pixel: position, region, fit status and peak parameters.

        ``at`` picks the index along a stack dim (default 0).
        """
        y, x = float(self.grid.y[iy]), float(self.grid.x[ix])
        u = "µm" if self.grid.units == "um" else "px"
        parts = [f"y = {y:.4g} {u}, x = {x:.4g} {u} (pixel {iy}, {ix})"]
        ds = self.ds
        if ds is None:
            return parts[0]
        px = ds.isel(y=iy, x=ix)
        dim = self.stack_dim
        if dim is not None and dim in px.dims:
            i = min(int(dict(at or {}).get(dim, 0)), px.sizes[dim] - 1)
            px = px.isel({dim: i})
            if dim in px.coords:
                units = px[dim].attrs.get("units", "")
                parts.append(f"{dim} {float(px[dim].values):.4g} {units}".rstrip())
        if "region" in px:
            r = int(np.asarray(px["region"].values).ravel()[0])
            parts.append("no signal" if r < 0 else f"region {r}")
        if "fit_status" in px:
            st = int(np.asarray(px["fit_status"].values).ravel()[0])
            legend = _legend_dict(ds["fit_status"].attrs.get("legend", ""))
            parts.append(f"fit: {legend.get(st, st)}".split(" (")[0])
        if "chi2_red" in px:
            parts.append(f"χ²_red {float(np.asarray(px['chi2_red'].values).ravel()[0]):.3g}")
        lines = [" · ".join(parts)]
        if self.has_fit:
            e = np.atleast_1d(np.asarray(px["peak_energy"].values, dtype=float))
            w = np.atleast_1d(np.asarray(px["peak_fwhm"].values, dtype=float))
            peaks = [
                f"peak {k}: {e[k]:.4f} eV, FWHM {1e3 * w[k]:.1f} meV"
                for k in range(e.size)
                if np.isfinite(e[k])
            ]
            if peaks:
                lines.append(" · ".join(peaks))
        return "\n".join(lines)


#: Law fitted on the fly to a stack result's pixel, by stack dim: (law, quantities tried).
_DEFAULT_LAWS = {"temperature": ("varshni", ("peak_energy",)),
                 "excitation_power": ("power_law", ("peak_area", "integrated_intensity"))}


def _stack_dim_of(ds: xr.Dataset) -> str | None:
    from ..cube import STACK_DIMS

    if ds.attrs.get("series_dim"):
        return str(ds.attrs["series_dim"])
    for name in ds.data_vars:
        for d in ds[name].dims:
            if d in STACK_DIMS and {"y", "x"} <= set(ds[name].dims):
                return str(d)
    return None


def _pixel_1d(v: xr.DataArray, iy: int, ix: int, keep: str | None, at: Mapping) -> np.ndarray:
    """The values of ``v`` at a pixel, along ``keep`` (or a scalar), other dims at ``at``/0."""
    px = v.isel(y=iy, x=ix)
    px = px.isel({d: int(at.get(d, 0)) for d in px.dims if d != keep})
    return np.asarray(px.values, dtype=float)


def series_at(ds: xr.Dataset, iy: int, ix: int, *, at: Mapping | None = None) -> dict | None:
    """The series at a pixel (quantity against the stack value, 1σ) and its law, or None.

    For a series store (:func:`pmap.series.fit_law`) the stored fit; for a result whose
    maps carry a stack dim, the default law of that dim (Varshni on ``peak_energy``
    along temperature, the power law on ``peak_area`` or ``integrated_intensity``
    along excitation power) fitted here, to this pixel only (``fitted_here``).

    Returns
    -------
    dict or None
        ``x``, ``y``, ``yerr`` (NaN without errors), ``quantity``, ``units``, ``dim``,
        ``dim_units``, ``law`` (or None), ``params`` (name → value, 1σ), ``status``,
        ``chi2_red``, ``curve_x``, ``curve_y``, ``fitted_here``, ``note``.
    """
    from ..series import LAWS, STATUS_LEGEND, evaluate_law, fit_law

    at = dict(at or {})
    dim = _stack_dim_of(ds)
    if dim is None:
        return None
    law = str(ds.attrs.get("series_law", "")) or None
    fitted_here = law is None
    if law is not None:
        quantity = str(ds.attrs.get("series_quantity", ""))
    else:
        law, cands = _DEFAULT_LAWS.get(dim, (None, ()))
        quantity = next((q for q in cands if q in ds.data_vars and dim in ds[q].dims), None)
        if quantity is None:
            quantity = next((n for n in _PRIMARY if n in ds.data_vars and dim in ds[n].dims),
                            None)
            law = None
    if quantity is None or quantity not in ds.data_vars or dim not in ds[quantity].dims:
        return None
    q = ds[quantity]
    x = np.asarray(ds[dim].values, dtype=float) if dim in ds.coords \
        else np.arange(q.sizes[dim], dtype=float)
    y = _pixel_1d(q, iy, ix, dim, at)
    err_name = f"{quantity}_err"
    yerr = _pixel_1d(ds[err_name], iy, ix, dim, at) if err_name in ds.data_vars \
        else np.full(y.shape, np.nan)
    if quantity.startswith("peak_") and "peak_status" in ds.data_vars \
            and dim in ds["peak_status"].dims:
        y = np.where(_pixel_1d(ds["peak_status"], iy, ix, dim, at) == 0, y, np.nan)
    out = {"x": x, "y": y, "yerr": yerr, "quantity": quantity,
           "units": str(q.attrs.get("units", "")), "dim": dim,
           "dim_units": str(ds[dim].attrs.get("units", "")) if dim in ds.coords else "",
           "law": law, "params": {}, "status": None, "chi2_red": float("nan"),
           "curve_x": np.array([]), "curve_y": np.array([]), "fitted_here": fitted_here,
           "note": "", "reference_power_W": ds.attrs.get("reference_power_W")}
    if law is None:
        out["note"] = f"no law for the stack dim {dim!r}"
        return out
    lw = LAWS[law]
    ref = ds.attrs.get("reference_power_W")
    if fitted_here:
        one = xr.Dataset({quantity: ((dim,), y, dict(q.attrs))},
                         coords={dim: (dim, x, dict(ds[dim].attrs) if dim in ds.coords else {})})
        if np.isfinite(yerr).any():
            one[err_name] = ((dim,), yerr, dict(q.attrs))
        try:
            fit = fit_law(one, law=law, quantity=quantity, dim=dim, keep_data=False)
        except StepError as exc:
            out["note"] = f"{law} not fitted: {exc}"
            return out
        ref = fit.attrs.get("reference_power_W")
        out["reference_power_W"] = ref
        get = {n: float(fit[n].values) for n in fit.data_vars}
    else:
        get = {}
        for n in [f"{law}_{p}" for p in lw.params] + [f"{law}_{p}_err" for p in lw.params] \
                + [f"{law}_chi2_red", f"{law}_status"]:
            if n in ds.data_vars:
                get[n] = float(_pixel_1d(ds[n], iy, ix, None, at).ravel()[0])
    vals = [get.get(f"{law}_{p}", np.nan) for p in lw.params]
    out["params"] = {p: (v, get.get(f"{law}_{p}_err", np.nan)) for p, v in zip(lw.params, vals)}
    st = get.get(f"{law}_status", np.nan)
    out["status"] = STATUS_LEGEND.get(int(st), str(st)) if np.isfinite(st) else None
    out["chi2_red"] = get.get(f"{law}_chi2_red", np.nan)
    if np.all(np.isfinite(vals)) and x.size > 1:
        fx = np.asarray(x, dtype=float)
        cx = (np.geomspace(fx.min(), fx.max(), 200) if law == "power_law"
              else np.linspace(fx.min(), fx.max(), 200))
        out["curve_x"] = cx
        out["curve_y"] = evaluate_law(law, cx, vals, reference_power_w=ref)
    return out


def _series_params(law: str) -> tuple[str, ...]:
    from ..series import LAWS

    return LAWS[law].params if law in LAWS else ()


def _legend_dict(text: Any) -> dict:
    out: dict = {}
    for item in str(text or "").split(";"):
        key, _, val = item.partition("=")
        try:
            out[int(key)] = val.strip()
        except ValueError:
            continue
    return out


def open_source(meta: Mapping) -> MapSource:
    """A :class:`MapSource` from a layer's ``metadata["pmap"]`` dict."""
    if meta.get("cube") is not None:
        return MapSource(cube=meta["cube"])
    if not meta.get("path"):
        raise StepError("layer has no pmap source path")
    return MapSource(meta["path"])


# ----------------------------------------------------------------------------- regions


def region_legend(ds: xr.Dataset) -> dict[int, str]:
    """Region number → description, from the ``region`` map's ``legend`` attr (JSON)."""
    if "region" not in ds:
        return {}
    raw = ds["region"].attrs.get("legend")
    try:
        leg = json.loads(raw) if isinstance(raw, str) else dict(raw or {})
    except (ValueError, TypeError):
        return {}
    return {int(k): str(v) for k, v in leg.items()}


def region_histograms(
    values: Any, region: Any, *, bins: int = 40, limits: tuple[float, float] | None = None
) -> tuple[np.ndarray, dict[int, np.ndarray]]:
    """Histogram of a map's values in every region (same bin edges for all).

    Parameters
    ----------
    values : array (ny, nx)
        A property map (its units).
    region : array (ny, nx) of int
        Region labels; negative labels (no signal) are left out, as are NaN values.
    bins : int
        Number of bins.
    limits : (float, float), optional
        Range of the bins; default the 0.5–99.5 percentiles of the values.

    Returns
    -------
    edges : numpy.ndarray (bins + 1,)
    counts : dict region -> numpy.ndarray (bins,)
    """
    v = np.asarray(values, dtype=float).ravel()
    r = np.asarray(region).ravel()
    if v.shape != r.shape:
        raise StepError(f"map has {v.size} pixels, region map {r.size}")
    ok = np.isfinite(v) & (r >= 0)
    lo, hi = limits if limits is not None else robust_limits(v[ok], percentiles=(0.5, 99.5))
    edges = np.linspace(lo, hi, bins + 1)
    return edges, {int(k): np.histogram(v[ok & (r == k)], bins=edges)[0] for k in np.unique(r[ok])}


def region_stats_table(ds: xr.Dataset) -> tuple[list[str], list[list[str]], list[int]]:
    """Rows of the region statistics table: (column titles, rows of text, region numbers).

    Uses the statistics stored in the result (variables with dim ``region``)
    when present, else computes them from the maps with
    :func:`pmap.decomposition.region_statistics`.
    """
    from ..decomposition import region_statistics, region_table

    if "region" not in ds:
        return [], [], []
    # result stores name the statistics' dim "region_id" (the map itself is "region")
    rdim = "region_id" if any("region_id" in ds[v].dims for v in ds.data_vars) else "region"
    stats = ds[[v for v in ds.data_vars if rdim in ds[v].dims and "y" not in ds[v].dims]]
    stats = stats.drop_vars(
        [c for c in stats.coords if "y" in stats[c].dims or "x" in stats[c].dims]
    )
    if rdim == "region_id":
        stats = stats.rename({"region_id": "region"})
    if stats.data_vars and "region" not in stats.coords:
        stats = stats.assign_coords(region=np.arange(stats.sizes["region"]))
    if not stats.data_vars:
        maps = ds[[v for v in map_names(ds) if v not in ("region", "intensity")]]
        stats = region_statistics(ds["region"].load(), maps.load())
    stats = stats.load()
    if "region_name" in stats.coords:  # Zarr v3 strings load as numpy StringDType
        names = [str(t) for t in stats["region_name"].values.tolist()]
        stats = stats.assign_coords(
            region_name=(stats["region_name"].dims, np.array(names, dtype=object)))
    df = region_table(stats)
    units = df.attrs.get("units", {})
    first = ("region_pixel_count", "region_area_um2", "region_area_pixel2", "region_fraction")
    cols = [c for c in first if c in df.columns]
    rest = [c for c in df.columns if c not in cols and "_std" not in c and c != "region_name"]
    # the physics first (peak energy, width, area, intensity), fit diagnostics last
    priority = ("peak_energy", "peak_fwhm", "peak_area", "peak_height", "integrated_intensity",
                "max_energy", "centroid_energy", "bandgap", "peak_shift")

    def rank(c: str) -> tuple[int, int]:
        for i, p in enumerate(priority):
            if c.startswith(p) and "_err" not in c:
                return (0, i)
        return (2, 0) if ("_err" in c or c.startswith(("chi2", "n_iter", "fit_status"))) else (1, 0)

    cols += sorted(rest, key=rank)
    titles = ["region", *(_column_title(c, units.get(c, "")) for c in cols)]
    rows, labels = [], []
    for reg, row in df.iterrows():
        cells = [f"{reg}: {row['region_name']}" if "region_name" in df.columns else str(reg)]
        for c in cols:
            val = row[c]
            std_col = c.replace("_mean", "_std", 1) if "_mean" in c else None
            txt = f"{val:.4g}"
            if std_col and std_col in df.columns and np.isfinite(row[std_col]):
                txt += f" ± {row[std_col]:.2g}"
            cells.append(txt)
        rows.append(cells)
        labels.append(int(reg))
    return titles, rows, labels


def _column_title(column: str, units: str) -> str:
    names = {
        "region_pixel_count": "pixels",
        "region_area_um2": "area",
        "region_area_pixel2": "area",
        "region_fraction": "fraction",
    }
    if column in names:
        u = {"um2": "µm²", "pixel2": "px²"}.get(units, _unit_text(units))
        return f"{names[column]} [{u}]" if u else names[column]
    name, _, rest = column.partition("[")
    name = name.removesuffix("_mean")
    dim, _, index = rest.rstrip("]").partition("=")
    title = map_label(name, units, dim=dim or None, index=index or None)
    return "mean " + (title[:1].lower() + title[1:] if title[1:2].islower() else title)


# ----------------------------------------------------------------------------- processing


class TaskProgress:
    """Counts finished dask tasks (local schedulers) and reports ``(done, total)``.

    Use as a context manager around a computation, e.g. :func:`pmap.process`;
    ``report`` is called after each task from the thread running the scheduler.
    The total grows as each new computation starts (a run is several computes).
    """

    def __init__(self, report):
        from dask.callbacks import Callback

        self.report = report
        self.done = 0
        self.total = 0
        outer = self

        class _CB(Callback):
            def _start_state(self, dsk, state):
                outer.total += sum(len(state[k]) for k in ("ready", "waiting", "running"))
                outer.report(outer.done, outer.total)

            def _posttask(self, key, result, dsk, state, worker_id):
                outer.done += 1
                outer.report(outer.done, max(outer.total, outer.done))

        self._cb = _CB()

    def __enter__(self) -> TaskProgress:
        self._cb.__enter__()
        return self

    def __exit__(self, *exc: Any) -> None:
        self._cb.__exit__(*exc)


def run_process(
    source: Any,
    out: str | Path,
    *,
    report=None,
    fit: bool = True,
    pipeline: Any = None,
    **options: Any,
) -> Path:
    """Run :func:`pmap.pipeline.process` on a cube path or DataArray; return the store path.

    ``report(done, total)`` receives dask task counts while it runs; ``fit=False``
    drops the pipeline's ``[fit]`` table (descriptor maps only); ``options``
    go to ``process`` (peaks, model, regions, components, overwrite).
    """
    from ..pipeline import load_pipeline, process

    pipe = load_pipeline(pipeline)
    if not fit:
        pipe.fit = None
        options.pop("peaks", None)
        options.pop("model", None)
    with TaskProgress(report or (lambda done, total: None)):
        process(source, out, pipeline=pipe, progress=False, **options)
    return Path(out)
