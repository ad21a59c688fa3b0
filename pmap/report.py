"""Figures of maps, histograms, spectra and region labels (PNG files).

An edge module: it only reads xarray objects that follow pmap's conventions
(``units`` and ``long_name`` attrs, y and x in µm) and writes PNG files.
matplotlib is imported inside the functions and used through its
object-oriented API (:class:`matplotlib.figure.Figure`, rendered by Agg), so
importing :mod:`pmap.report` is light and no pyplot state or GUI backend is
touched.

Maps are drawn with y increasing upwards (``origin="lower"``), axes in µm,
equal aspect, NaN in a neutral grey and a scale bar of a round length.
Each PNG carries a ``Description`` text chunk (JSON: variable, units, colour
limits, scale-bar length) and ``Software`` = ``pmap <version>``.
"""

from __future__ import annotations

import json
import math
import re
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import xarray as xr

from ._version import __version__
from .conventions import SPECTRAL_DIMS
from .errors import PmapNotice, StepError

__all__ = [
    "plot_map",
    "plot_histogram",
    "plot_spectra",
    "plot_labels",
    "write_figures",
    "summarise_result",
    "nice_scale_length",
]

DPI = 120
NAN_COLOUR = "0.62"
#: write_figures draws one map per slice of a 3-D variable only up to this many slices.
MAX_SLICES = 32
_UNIT_TEXT = {"um": "µm", "1": "", "": "", "pixel": "pixel", "counts": "counts"}


# --------------------------------------------------------------------------- helpers


def _unit_text(units: Any) -> str:
    if units is None:
        return ""
    return _UNIT_TEXT.get(str(units), str(units))


def _label(da: xr.DataArray | xr.Variable, fallback: str = "") -> str:
    """``long_name (units)`` of a variable, units omitted when dimensionless."""
    name = da.attrs.get("long_name") or getattr(da, "name", None) or fallback
    unit = _unit_text(da.attrs.get("units"))
    return f"{name} ({unit})" if unit else str(name)


def nice_scale_length(width: float) -> float:
    """Round scale-bar length (1, 2 or 5 × 10ⁿ) closest in ratio to ``width / 5``.

    Parameters
    ----------
    width : float
        Width of the map, in its length unit (µm); must be positive.

    Returns
    -------
    float
        The bar length in the same unit.
    """
    if not (width > 0 and math.isfinite(width)):
        raise StepError(f"map width must be a positive finite length, got {width!r}")
    target = width / 5.0
    exp = math.floor(math.log10(target))
    cands = [m * 10.0**e for e in (exp - 1, exp, exp + 1) for m in (1, 2, 5)]
    return min(cands, key=lambda c: abs(math.log(c / target)))


def _as_map(da: xr.DataArray, what: str = "map") -> xr.DataArray:
    """Squeeze size-1 dims and check the result is a (y, x) map."""
    if not isinstance(da, xr.DataArray):
        raise StepError(f"{what} must be an xarray DataArray, got {type(da).__name__}")
    extra = [d for d in da.dims if d not in ("y", "x") and da.sizes[d] == 1]
    da = da.squeeze(extra, drop=False) if extra else da
    if set(da.dims) != {"y", "x"}:
        raise StepError(
            f"{what} {da.name!r} must have dims (y, x) (size-1 others are squeezed), "
            f"got {dict(da.sizes)}; select one slice first"
        )
    return da.transpose("y", "x")


def _axis_values(da: xr.DataArray, dim: str) -> tuple[np.ndarray, str]:
    if dim in da.coords:
        return np.asarray(da[dim].values, dtype=float), str(da[dim].attrs.get("units", "pixel"))
    return np.arange(da.sizes[dim], dtype=float), "pixel"


def _extent(vals: np.ndarray) -> tuple[float, float]:
    step = float(np.median(np.diff(vals))) if vals.size > 1 else 1.0
    return float(vals[0] - step / 2), float(vals[-1] + step / 2)


def _robust_limits(values: np.ndarray, robust: bool) -> tuple[float, float] | None:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return None
    lo, hi = np.percentile(finite, [2, 98]) if robust else (finite.min(), finite.max())
    lo, hi = float(lo), float(hi)
    if hi <= lo:
        pad = abs(lo) * 1e-3 or 1.0
        lo, hi = lo - pad, hi + pad
    return lo, hi


def _new_figure(nrows_over_ncols: float, *, width_in: float = 6.4):
    from matplotlib.figure import Figure

    height = min(max(width_in * nrows_over_ncols * 0.85 + 1.0, 2.8), 9.0)
    return Figure(figsize=(width_in, height), layout="constrained")


def _save(fig, path: str | Path, info: Mapping[str, Any]) -> Path:
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    meta = {"Software": f"pmap {__version__}", "Description": json.dumps(dict(info))}
    fig.savefig(p, dpi=DPI, metadata=meta)
    return p


def _safe_name(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", str(text)).strip("_") or "figure"


class _MapArtists(NamedTuple):
    image: Any
    colorbar: Any
    scale_bar_um: float | None


def _draw_scale_bar(ax, x_ext, y_ext) -> float:
    from matplotlib import patheffects
    from matplotlib.patches import Rectangle

    width = x_ext[1] - x_ext[0]
    height = y_ext[1] - y_ext[0]
    length = nice_scale_length(width)
    margin = 0.04 * width
    bar_h = max(0.015 * height, 0.004 * width)
    x1 = x_ext[1] - margin
    y0 = y_ext[0] + 0.04 * height
    ax.add_patch(
        Rectangle(
            (x1 - length, y0),
            length,
            bar_h,
            facecolor="white",
            edgecolor="black",
            linewidth=0.8,
            zorder=5,
            gid="scale_bar",
        )
    )
    ax.text(
        x1 - length / 2,
        y0 + bar_h * 1.6,
        f"{length:g} µm",
        ha="center",
        va="bottom",
        color="white",
        fontsize=9,
        zorder=6,
        path_effects=[patheffects.withStroke(linewidth=2, foreground="black")],
    )
    return length


def _draw_map(
    ax, da: xr.DataArray, *, cmap=None, robust=True, scale_bar=True, norm=None, vlim=None
) -> _MapArtists:
    """Draw a (y, x) map on ``ax``: image, colour bar, scale bar. Returns the artists."""
    import matplotlib as mpl

    yv, yunit = _axis_values(da, "y")
    xv, xunit = _axis_values(da, "x")
    values = np.asarray(da.values, dtype=float)
    if yv.size > 1 and yv[1] < yv[0]:
        values, yv = values[::-1], yv[::-1]
    if xv.size > 1 and xv[1] < xv[0]:
        values, xv = values[:, ::-1], xv[::-1]
    x_ext, y_ext = _extent(xv), _extent(yv)
    if isinstance(cmap, mpl.colors.Colormap):
        cm = cmap.with_extremes(bad=NAN_COLOUR)
    elif (cmap or "viridis") in mpl.colormaps:
        cm = mpl.colormaps[cmap or "viridis"].with_extremes(bad=NAN_COLOUR)
    else:
        raise StepError(f"unknown colormap {cmap!r} (use a matplotlib colormap name)")
    kw: dict[str, Any] = {"norm": norm} if norm is not None else {}
    if norm is None:
        lim = vlim if vlim is not None else _robust_limits(values, robust)
        if lim is not None:
            kw.update(vmin=lim[0], vmax=lim[1])
    im = ax.imshow(
        np.ma.masked_invalid(values),
        origin="lower",
        cmap=cm,
        aspect="equal",
        extent=(*x_ext, *y_ext),
        interpolation="nearest",
        **kw,
    )
    ax.set_facecolor(NAN_COLOUR)
    ax.set_xlabel(f"x ({_unit_text(xunit)})")
    ax.set_ylabel(f"y ({_unit_text(yunit)})")
    cb = None
    if norm is None:
        cb = ax.figure.colorbar(im, ax=ax, shrink=0.9, extend="both" if robust else "neither")
        cb.set_label(_label(da, "value"))
    length = None
    if scale_bar and xunit == "um" and x_ext[1] > x_ext[0]:
        length = _draw_scale_bar(ax, x_ext, y_ext)
    return _MapArtists(im, cb, length)


# --------------------------------------------------------------------------- public


def plot_map(
    da: xr.DataArray,
    path: str | Path,
    *,
    title: str | None = None,
    cmap: str | None = None,
    robust: bool = True,
    scale_bar: bool = True,
) -> Path:
    """Save one 2-D map (y, x in µm) as a PNG with colour bar and scale bar.

    Parameters
    ----------
    da : xarray.DataArray
        Map with dims (y, x) (size-1 extra dims are squeezed); ``long_name``
        and ``units`` attrs label the colour bar.
    path : str or Path
        Output PNG file (parent folders are created).
    title : str, optional
        Figure title; default the variable name.
    cmap : str, optional
        matplotlib colormap name (default "viridis"); NaN is drawn grey.
    robust : bool
        Colour limits at the 2nd and 98th percentiles of the finite values
        (else min and max).
    scale_bar : bool
        Draw a scale bar of a round length near 1/5 of the width (µm maps only).

    Returns
    -------
    Path
        The PNG written (dpi 120).
    """
    da = _as_map(da)
    fig = _new_figure(da.sizes["y"] / da.sizes["x"])
    ax = fig.add_subplot()
    art = _draw_map(ax, da, cmap=cmap, robust=robust, scale_bar=scale_bar)
    ax.set_title(title if title is not None else str(da.name or ""))
    return _save(
        fig,
        path,
        {
            "variable": str(da.name),
            "units": da.attrs.get("units"),
            "clim": [float(v) for v in art.image.get_clim()],
            "colorbar_label": art.colorbar.ax.get_ylabel(),
            "scale_bar_um": art.scale_bar_um,
        },
    )


def plot_histogram(
    da: xr.DataArray,
    path: str | Path,
    *,
    bins: int = 80,
    title: str | None = None,
) -> Path:
    """Save a histogram of a map's finite values, with median and robust spread.

    The histogram spans the 0.5–99.5 percentile range (values outside are
    counted in the note). The robust spread is σ_MAD = 1.4826 × median absolute
    deviation (equal to σ for normally distributed values).

    Parameters
    ----------
    da : xarray.DataArray
        Values of any shape (a map); units from ``attrs["units"]``.
    path : str or Path
        Output PNG file.
    bins : int
        Number of bins.
    title : str, optional
        Figure title; default the variable name.

    Returns
    -------
    Path
        The PNG written.
    """
    if not isinstance(da, xr.DataArray):
        raise StepError(f"histogram input must be an xarray DataArray, got {type(da).__name__}")
    if bins < 1:
        raise StepError(f"bins must be a positive integer, got {bins}")
    values = np.asarray(da.values, dtype=float).ravel()
    finite = values[np.isfinite(values)]
    fig = _new_figure(0.6)
    ax = fig.add_subplot()
    unit = _unit_text(da.attrs.get("units"))
    info: dict[str, Any] = {
        "variable": str(da.name),
        "units": da.attrs.get("units"),
        "n": int(finite.size),
    }
    if finite.size:
        lo, hi = np.percentile(finite, [0.5, 99.5])
        if hi <= lo:
            lo, hi = lo - (abs(lo) * 1e-3 or 1.0), hi + (abs(hi) * 1e-3 or 1.0)
        ax.hist(finite, bins=bins, range=(lo, hi), color="tab:blue", alpha=0.85)
        med = float(np.median(finite))
        sig = float(1.4826 * np.median(np.abs(finite - med)))
        outside = int(np.sum((finite < lo) | (finite > hi)))
        ax.axvline(med, color="black", linestyle="--", linewidth=1)
        note = f"median = {med:.5g} {unit}\nσ_MAD = {sig:.3g} {unit}\nN = {finite.size}" + (
            f" ({outside} outside)" if outside else ""
        )
        ax.text(
            0.98,
            0.96,
            note,
            transform=ax.transAxes,
            ha="right",
            va="top",
            fontsize=9,
            bbox={"facecolor": "white", "alpha": 0.8, "edgecolor": "0.7"},
        )
        info.update(median=med, sigma_mad=sig)
    else:
        ax.text(0.5, 0.5, "no finite values", transform=ax.transAxes, ha="center")
    ax.set_xlabel(_label(da, "value"))
    ax.set_ylabel("pixels")
    info["xlabel"] = ax.get_xlabel()
    ax.set_title(title if title is not None else str(da.name or ""))
    return _save(fig, path, info)


def _spectra_list(obj: xr.DataArray, pixels) -> tuple[str, list[tuple[str, xr.DataArray]]]:
    """(spectral dim, [(label, 1-D spectrum)]) from a cube or a set of spectra."""
    from .cube import spectral_dim

    sdim = spectral_dim(obj)
    if "y" in obj.dims and "x" in obj.dims:
        ny, nx = obj.sizes["y"], obj.sizes["x"]
        if pixels is None:
            pixels = [(ny // 2, nx // 2), (ny // 4, nx // 4), (3 * ny // 4, 3 * nx // 4)]
        out = []
        for iy, ix in pixels:
            if not (-ny <= iy < ny and -nx <= ix < nx):
                raise StepError(f"pixel ({iy}, {ix}) is outside the {ny} × {nx} map")
            s = obj.isel(y=iy, x=ix)
            s = s.squeeze([d for d in s.dims if d != sdim and s.sizes[d] == 1])
            lab = (
                f"y = {float(s['y']):.4g}, x = {float(s['x']):.4g} "
                f"{_unit_text(obj['x'].attrs.get('units'))}".rstrip()
            )
            out.append((lab, s))
    else:
        other = [d for d in obj.dims if d != sdim]
        if len(other) > 1:
            raise StepError(f"spectra must be a cube or (n, {sdim}), got dims {obj.dims}")
        if not other:
            out = [(str(obj.name or "spectrum"), obj)]
        else:
            idx = range(obj.sizes[other[0]]) if pixels is None else pixels
            out = [(f"{other[0]} {i}", obj.isel({other[0]: i})) for i in idx]
    for _, s in out:
        if s.ndim != 1:
            raise StepError(f"could not reduce to single spectra: dims {s.dims} remain")
    return sdim, out


def plot_spectra(
    cube_or_spectra: xr.DataArray,
    path: str | Path,
    *,
    pixels: Sequence[tuple[int, int]] | Sequence[int] | None = None,
    reference: xr.DataArray | None = None,
    reference_label: str = "raw",
    title: str | None = None,
) -> Path:
    """Save a few spectra, optionally over a reference (e.g. raw under cleaned).

    Parameters
    ----------
    cube_or_spectra : xarray.DataArray
        A cube (y, x, S) or spectra (S,) or (n, S), S the spectral dim
        (wavelength in nm, energy in eV...).
    path : str or Path
        Output PNG file.
    pixels : sequence, optional
        (iy, ix) index pairs for a cube (default: centre and two quarter
        points), or indices along the first dim for (n, S) spectra.
    reference : xarray.DataArray, optional
        Same-shaped cube or spectra drawn underneath as thin grey lines.
    reference_label : str
        Legend label of the reference.
    title : str, optional
        Figure title.

    Returns
    -------
    Path
        The PNG written.
    """
    if not isinstance(cube_or_spectra, xr.DataArray):
        raise StepError("spectra must be an xarray DataArray (a cube or (n, S) spectra)")
    sdim, spectra = _spectra_list(cube_or_spectra, pixels)
    refs = _spectra_list(reference, pixels)[1] if reference is not None else []
    fig = _new_figure(0.55)
    ax = fig.add_subplot()
    for i, (lab, s) in enumerate(spectra):
        colour = f"C{i % 10}"
        if refs:
            r = refs[i][1]
            ax.plot(
                r[sdim].values,
                r.values,
                color="0.55",
                linewidth=0.8,
                label=reference_label if i == 0 else None,
            )
        ax.plot(s[sdim].values, s.values, color=colour, linewidth=1.1, label=lab)
    ax.set_xlabel(_label(cube_or_spectra[sdim], sdim))
    ax.set_ylabel(_label(cube_or_spectra, "intensity"))
    ax.legend(fontsize=8, loc="best")
    ax.set_title(title if title is not None else "")
    return _save(
        fig,
        path,
        {
            "variable": str(cube_or_spectra.name),
            "n_spectra": len(spectra),
            "units": cube_or_spectra.attrs.get("units"),
            "xlabel": ax.get_xlabel(),
            "ylabel": ax.get_ylabel(),
        },
    )


def _label_names(da: xr.DataArray, codes: np.ndarray, names) -> dict[int, str]:
    if names is not None:
        return {int(k): str(v) for k, v in dict(names).items()}
    fv, fm = da.attrs.get("flag_values"), da.attrs.get("flag_meanings")
    if fv is not None and fm is not None:  # CF flag convention
        return {int(k): str(v).replace("_", " ")
                for k, v in zip(np.atleast_1d(fv), str(fm).split())}
    return {int(c): str(int(c)) for c in codes}


def plot_labels(
    region_da: xr.DataArray,
    path: str | Path,
    *,
    names: Mapping[int, str] | Sequence[str] | None = None,
    title: str | None = None,
    scale_bar: bool = True,
) -> Path:
    """Save a categorical map (region labels) with one colour per label and a legend.

    Parameters
    ----------
    region_da : xarray.DataArray
        Integer (or boolean) labels, dims (y, x); NaN (float input) is drawn grey.
    path : str or Path
        Output PNG file.
    names : mapping or sequence, optional
        Label code → name (a sequence names codes 0, 1, 2...). Default: the
        CF ``flag_values``/``flag_meanings`` attrs if present, else the codes.
    title : str, optional
        Figure title.
    scale_bar : bool
        Draw a scale bar (µm maps only).

    Returns
    -------
    Path
        The PNG written.
    """
    import matplotlib as mpl
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    da = _as_map(region_da, "label map")
    vals = np.asarray(da.values)
    if vals.dtype.kind == "f":
        finite = vals[np.isfinite(vals)]
        if finite.size and not np.all(finite == np.round(finite)):
            raise StepError(f"label map {da.name!r} holds non-integer values")
    elif vals.dtype.kind not in "iub":
        raise StepError(f"label map {da.name!r} must be integer or boolean, got {vals.dtype}")
    fvals = vals.astype(float)
    codes = np.unique(fvals[np.isfinite(fvals)]).astype(int)
    if names is not None and not isinstance(names, Mapping):
        names = dict(enumerate(names))
    label_names = _label_names(da, codes, names)
    if codes.size == 0:
        codes = np.array([0])
    base = mpl.colormaps["tab10" if codes.size <= 10 else "tab20"]
    cmap = ListedColormap([base(i % base.N) for i in range(codes.size)])
    # map codes to 0..n-1 so that each gets one colour
    index = np.full(fvals.shape, np.nan)
    for i, c in enumerate(codes):
        index[fvals == c] = i
    norm = BoundaryNorm(np.arange(codes.size + 1) - 0.5, codes.size)
    fig = _new_figure(da.sizes["y"] / da.sizes["x"])
    ax = fig.add_subplot()
    mapped = da.copy(data=index)
    art = _draw_map(ax, mapped, cmap=cmap, scale_bar=scale_bar, norm=norm)
    handles = [
        Patch(
            facecolor=cmap(i),
            edgecolor="0.3",
            label=f"{label_names.get(int(c), str(int(c)))} ({int(c)})",
        )
        for i, c in enumerate(codes)
    ]
    ax.legend(
        handles=handles,
        loc="upper left",
        bbox_to_anchor=(1.02, 1.0),
        fontsize=8,
        frameon=False,
        title=_label(da, "label"),
        title_fontsize=8,
    )
    ax.set_title(title if title is not None else str(da.name or ""))
    return _save(
        fig,
        path,
        {
            "variable": str(da.name),
            "codes": codes.tolist(),
            "names": [label_names.get(int(c), str(int(c))) for c in codes],
            "scale_bar_um": art.scale_bar_um,
        },
    )


def _is_label_map(v: xr.DataArray) -> bool:
    return v.dtype.kind in "iub" or "flag_values" in v.attrs


def write_figures(
    ds: xr.Dataset,
    out_dir: str | Path,
    *,
    variables: Sequence[str] | None = None,
    prefix: str = "",
) -> list[Path]:
    """Write one PNG per map of a result Dataset, plus a histogram of ``peak_energy``.

    2-D (y, x) variables give one map each; 3-D variables (d, y, x), e.g.
    (peak, y, x), give one map per index along d, named by a ``peak_name``
    (or other string) coordinate when present, up to :data:`MAX_SLICES` slices.
    Integer, boolean and CF-flag variables are drawn as label maps. Variables
    with other dims (spectra, masks with a spectral dim) are skipped unless
    named in ``variables`` (then it is an error).

    Parameters
    ----------
    ds : xarray.Dataset
        Result with maps carrying ``units`` and ``long_name`` attrs.
    out_dir : str or Path
        Folder for the PNG files (created if missing).
    variables : sequence of str, optional
        Variables to draw (default: every map-like data variable).
    prefix : str
        Prefix of every file name.

    Returns
    -------
    list of Path
        The PNG files written, in order.
    """
    if not isinstance(ds, xr.Dataset):
        raise StepError(f"write_figures needs an xarray Dataset, got {type(ds).__name__}")
    out = Path(out_dir)
    names = list(ds.data_vars) if variables is None else list(variables)
    missing = [n for n in names if n not in ds.data_vars]
    if missing:
        raise StepError(f"variables {missing} are not in the dataset ({list(ds.data_vars)})")
    written: list[Path] = []
    for name in names:
        v = ds[name]
        extra = [d for d in v.dims if d not in ("y", "x") and v.sizes[d] > 1]
        not_map = (
            not {"y", "x"} <= set(v.dims)
            or len(extra) > 1
            or any(d in SPECTRAL_DIMS for d in extra)
            or (extra and v.sizes[extra[0]] > MAX_SLICES)
        )
        if not_map:
            if variables is not None:
                raise StepError(f"variable {name!r} with dims {v.dims} is not a map")
            continue
        if extra:
            d = extra[0]
            labels = _slice_labels(ds, v, d)
            slices = [(v.isel({d: i}), f"{name}_{lab}") for i, lab in enumerate(labels)]
        else:
            slices = [(v, name)]
        for sl, stem in slices:
            path = out / f"{prefix}{_safe_name(stem)}.png"
            if sl.dtype.kind == "f" and not bool(np.isfinite(sl.values).any()):
                warnings.warn(f"no figure of {stem}: every pixel is NaN", PmapNotice,
                              stacklevel=2)
                continue
            if _is_label_map(v):
                written.append(plot_labels(sl, path, title=stem))
            else:
                written.append(plot_map(sl, path, title=stem))
    if "peak_energy" in ds.data_vars and (variables is None or "peak_energy" in names):
        pe = ds["peak_energy"]
        extra = [d for d in pe.dims if d not in ("y", "x") and pe.sizes[d] > 1]
        if extra:
            for i, lab in enumerate(_slice_labels(ds, pe, extra[0])):
                written.append(
                    plot_histogram(
                        pe.isel({extra[0]: i}),
                        out / f"{prefix}{_safe_name(f'peak_energy_{lab}_histogram')}.png",
                        title=f"peak_energy {lab}",
                    )
                )
        else:
            written.append(plot_histogram(pe, out / f"{prefix}peak_energy_histogram.png"))
    if variables is None:
        written.extend(_spectra_figures(ds, out, prefix))
    return written


def _spectra_figures(ds: xr.Dataset, out: Path, prefix: str) -> list[Path]:
    """Component spectra (NMF/PCA) and mean spectrum per region, when the result has them."""
    written = []
    if "component_spectrum" in ds.data_vars:
        written.append(plot_spectra(ds["component_spectrum"].load(),
                                    out / f"{prefix}component_spectra.png",
                                    title="component spectra"))
    if "region_mean_spectrum" in ds.data_vars:
        m = ds["region_mean_spectrum"].load()
        rdim = next(d for d in m.dims if d.startswith("region"))
        m = m.rename({rdim: "region"}).assign_coords(region=np.arange(m.sizes[rdim]))
        written.append(plot_spectra(m, out / f"{prefix}region_mean_spectra.png",
                                    title="mean spectrum per region"))
    return written


def _slice_labels(ds: xr.Dataset, v: xr.DataArray, dim: str) -> list[str]:
    """Names of the slices along ``dim``: a string coordinate on it, else its values."""
    for cname, c in v.coords.items():
        if c.dims == (dim,) and c.dtype.kind in "OUS" and cname != dim:
            return [str(s) for s in c.values]
    if dim in v.coords:
        return [f"{dim}{val}" for val in v[dim].values]
    return [f"{dim}{i}" for i in range(v.sizes[dim])]


def summarise_result(ds: xr.Dataset) -> dict[str, float]:
    """One-row summary of a result: median and robust spread of every map.

    For each float (y, x) variable, and each slice of (d, y, x) variables,
    gives ``"<name> median (<units>)"``, ``"<name> sigma_MAD (<units>)"``
    (1.4826 × median absolute deviation) and ``"<name> finite fraction"``.
    Integer and boolean maps (labels, flags) and spectra are left out.

    Parameters
    ----------
    ds : xarray.Dataset
        A pmap result.

    Returns
    -------
    dict
        Column name → value, e.g. for a table of many results.
    """
    if not isinstance(ds, xr.Dataset):
        raise StepError(f"summarise_result needs an xarray Dataset, got {type(ds).__name__}")
    row: dict[str, float] = {}
    for name, v in ds.data_vars.items():
        extra = [d for d in v.dims if d not in ("y", "x")]
        if (
            not {"y", "x"} <= set(v.dims)
            or v.dtype.kind != "f"
            or len(extra) > 1
            or any(d in SPECTRAL_DIMS for d in extra)
            or (extra and v.sizes[extra[0]] > MAX_SLICES)
        ):
            continue
        unit = str(v.attrs.get("units", ""))
        suffix = f" ({unit})" if unit not in ("", "1") else ""
        slices = (
            [
                (v.isel({extra[0]: i}), f"{name}[{lab}]")
                for i, lab in enumerate(_slice_labels(ds, v, extra[0]))
            ]
            if extra
            else [(v, name)]
        )
        for sl, stem in slices:
            vals = np.asarray(sl.values, dtype=float).ravel()
            finite = vals[np.isfinite(vals)]
            med = float(np.median(finite)) if finite.size else float("nan")
            mad = float(1.4826 * np.median(np.abs(finite - med))) if finite.size else float("nan")
            row[f"{stem} median{suffix}"] = med
            row[f"{stem} sigma_MAD{suffix}"] = mad
            row[f"{stem} finite fraction"] = finite.size / max(vals.size, 1)
    return row
