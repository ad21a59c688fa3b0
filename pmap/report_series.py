"""Figures of a series store (``plcube series``): law parameter maps and per-region series.

An edge module (layer 6) beside :mod:`pmap.report`, whose map drawing it reuses
(:func:`pmap.report.plot_map`, :func:`pmap.report.plot_labels`: titles with
units, colour maps, NaN grey, y up, scale bar). For a store written by
:func:`pmap.series.fit_law` it draws

- every parameter map ``{law}_{param}`` and its ``_err`` (converged pixels only;
  the others grey), ``{law}_chi2_red``, ``{law}_status`` with its CF flag legend,
  and ``power_law_class`` for the power law;
- per region (the store's ``region`` map when present, else the whole map) the
  fitted quantity against the stack value: mean ± standard error of the mean
  over the region's pixels at each stack value, and the law evaluated at the
  median of the region's converged parameters (:func:`region_series`).

Maps with one extra dim (``peak``) give one figure per slice.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from . import _style
from ._version import __version__
from .errors import StepError
from .report import MAX_SLICES, _label_names, plot_labels, plot_map
from .series import LAW_TITLES, LAWS, POWER_CLASS_LEGEND, evaluate_law

__all__ = ["write_series_figures", "plot_series_by_region", "region_series", "is_series_store",
           "LAW_TITLES"]

DPI = 120
_CLASS_NAMES = {-1: "no converged fit", 0: "k < 1", 1: "1 ≤ k ≤ 2", 2: "k > 2"}


def is_series_store(ds: xr.Dataset) -> bool:
    """True when ``ds`` was written by :func:`pmap.series.fit_law` (``series_law`` attr)."""
    return isinstance(ds, xr.Dataset) and str(ds.attrs.get("series_law", "")) in LAWS


def _law_of(ds: xr.Dataset) -> str:
    if not is_series_store(ds):
        raise StepError("not a series store (no 'series_law' attr): write one with plcube series")
    law = str(ds.attrs["series_law"])
    missing = [f"{law}_{p}" for p in LAWS[law].params if f"{law}_{p}" not in ds.data_vars]
    if missing or f"{law}_status" not in ds.data_vars:
        raise StepError(f"series store lacks {missing or [f'{law}_status']}")
    return law


def _slices(v: xr.DataArray) -> list[tuple[dict, str]]:
    """(isel, suffix) for each slice of a map with at most one extra dim of size > 1."""
    extra = [d for d in v.dims if d not in ("y", "x") and v.sizes[d] > 1]
    if not extra:
        return [({}, "")]
    if len(extra) > 1 or v.sizes[extra[0]] > MAX_SLICES:
        raise StepError(f"{v.name!r} has dims {v.dims}: one extra dim of at most "
                        f"{MAX_SLICES} values is drawn")
    d = extra[0]
    vals = v[d].values if d in v.coords else np.arange(v.sizes[d])
    return [({d: i}, f"{d} {val}") for i, val in enumerate(vals)]


def _stem(name: str, suffix: str) -> str:
    return name + ("_" + suffix.replace(" ", "") if suffix else "")


def _param_title(law: str, name: str, v: xr.DataArray, suffix: str) -> str:
    """The map's title as the viewer names its layer (:func:`pmap._style.map_title`)."""
    return (_style.map_title(name, attrs=v.attrs) + " — converged fits"
            + (f" — {suffix}" if suffix else ""))


def _region_groups(ds: xr.Dataset, sl: dict) -> tuple[list[tuple[int, str, np.ndarray]], str]:
    """[(code, name, boolean (y, x) mask)] and where the grouping came from."""
    q = ds[ds.attrs["series_quantity"]]
    ny, nx = q.sizes["y"], q.sizes["x"]
    if "region" in ds.data_vars:
        r = ds["region"]
        r = r.isel({k: v for k, v in sl.items() if k in r.dims})
        extra = [d for d in r.dims if d not in ("y", "x")]
        r = r.squeeze(extra) if extra and all(r.sizes[d] == 1 for d in extra) else r
        if set(r.dims) == {"y", "x"}:
            codes_map = np.asarray(r.transpose("y", "x").values, dtype=float)
            names = _region_names(r)
            codes = np.unique(codes_map[np.isfinite(codes_map)]).astype(int)
            groups = [(int(c), names.get(int(c), f"region {int(c)}"), codes_map == c)
                      for c in codes if c >= 0]
            if groups:
                return groups, "region map"
    return [(-1, "whole map", np.ones((ny, nx), bool))], "whole map (no region map)"


def _region_names(r: xr.DataArray) -> dict[int, str]:
    """Names of the regions of a region map (its names attr or CF flags), as the figures."""
    return _label_names(r, np.array([], dtype=int), None)


def region_series(ds: xr.Dataset, *, index: Mapping[str, int] | None = None) -> dict[str, Any]:
    """The quantity against the stack value per region, and the law at its median parameters.

    Parameters
    ----------
    ds : xarray.Dataset
        A series store (:func:`pmap.series.fit_law` with ``keep_data=True``).
    index : mapping, optional
        The slice of an extra dim (e.g. ``{"peak": 0}``) when the maps have one.

    Returns
    -------
    dict
        ``law``, ``quantity``, ``units`` (of the quantity), ``dim``, ``dim_units``,
        ``x`` (stack values), ``grouping`` and ``regions``: a list of dicts with
        ``code``, ``name``, ``n_px``, ``n_converged``, ``mean`` and ``sem`` (n,)
        (mean and standard error of the mean, s.d./√n with n the pixels with a
        value at that stack value; NaN where n < 2), ``n`` (n,), ``params`` (the
        median of each parameter over converged pixels; NaN when none) and
        ``curve`` (the law at ``params`` on ``x``).
    """
    law = _law_of(ds)
    quantity = str(ds.attrs.get("series_quantity", ""))
    dim = str(ds.attrs.get("series_dim", ""))
    if quantity not in ds.data_vars or dim not in ds[quantity].dims:
        raise StepError(f"series store has no fitted points ({quantity!r} along {dim!r}): "
                        "rerun plcube series (it keeps them)")
    sl = dict(index or {})
    q = ds[quantity]
    q = q.isel({k: v for k, v in sl.items() if k in q.dims})
    extra = [d for d in q.dims if d not in ("y", "x", dim)]
    if any(q.sizes[d] != 1 for d in extra):
        raise StepError(f"{quantity!r} has dims {q.dims}: choose a slice with index=")
    q = q.squeeze(extra).transpose(dim, "y", "x")
    qv = np.asarray(q.values, dtype=float)
    x = np.asarray(ds[dim].values, dtype=float) if dim in ds.coords else np.arange(qv.shape[0])
    st = ds[f"{law}_status"].isel({k: v for k, v in sl.items() if k in ds[f"{law}_status"].dims})
    ok = np.asarray(st.squeeze([d for d in st.dims if d not in ("y", "x")])
                    .transpose("y", "x").values) == 0
    pars = []
    for p in LAWS[law].params:
        v = ds[f"{law}_{p}"]
        v = v.isel({k: i for k, i in sl.items() if k in v.dims})
        pars.append(np.asarray(v.squeeze([d for d in v.dims if d not in ("y", "x")])
                               .transpose("y", "x").values, dtype=float))
    groups, grouping = _region_groups(ds, sl)
    ref = ds.attrs.get("reference_power_W")
    out_regions = []
    for code, name, mask in groups:
        vals = qv[:, mask]  # (n_stack, n_px)
        fin = np.isfinite(vals)
        n = fin.sum(axis=1)
        v0 = np.where(fin, vals, 0.0)
        with np.errstate(all="ignore"):
            mean = np.where(n > 0, v0.sum(axis=1) / n, np.nan)
            ss = np.sum(np.where(fin, (vals - mean[:, None]) ** 2, 0.0), axis=1)
            sem = np.where(n > 1, np.sqrt(ss / np.maximum(n - 1, 1)) / np.sqrt(n), np.nan)
        conv = mask & ok
        params = np.array([np.median(p[conv]) if conv.any() else np.nan for p in pars])
        curve = (evaluate_law(law, x, params, reference_power_w=ref)
                 if np.all(np.isfinite(params)) else np.full(x.shape, np.nan))
        out_regions.append({"code": code, "name": name, "n_px": int(mask.sum()),
                            "n_converged": int(conv.sum()), "mean": mean, "sem": sem, "n": n,
                            "params": params, "curve": curve})
    return {"law": law, "quantity": quantity, "units": q.attrs.get("units", ""), "dim": dim,
            "dim_units": ds[dim].attrs.get("units", "") if dim in ds.coords else "",
            "x": x, "grouping": grouping, "regions": out_regions,
            "param_names": list(LAWS[law].params), "reference_power_W": ref}


def plot_series_by_region(ds: xr.Dataset, path: str | Path, *,
                          index: Mapping[str, int] | None = None,
                          title: str | None = None) -> Path:
    """Save the per-region plot of the fitted quantity against the stack value (PNG).

    Points: mean ± standard error of the mean over each region's pixels; lines: the law
    at the median of the region's converged parameters (:func:`region_series`). Region
    colours as in the region map (:func:`pmap._style.region_colour`); log–log axes for the
    power law. The PNG's ``Description`` text chunk holds the numbers drawn (JSON).
    """
    from matplotlib.figure import Figure

    rs = region_series(ds, index=index)
    law, x = rs["law"], rs["x"]
    fig = Figure(figsize=(7.4, 4.6), layout="constrained")
    ax = fig.add_subplot()
    log = law == "power_law"
    xs = (np.geomspace(x.min(), x.max(), 200) if log else np.linspace(x.min(), x.max(), 200)) \
        if x.size > 1 else x
    info_regions = []
    for r in rs["regions"]:
        colour = (_style.region_colour(r["code"]) if r["code"] >= 0
                  else _style.CATEGORY_PALETTE[0])
        label = (f"{r['name']} ({r['code']}): {r['n_px']} px, {r['n_converged']} converged"
                 if r["code"] >= 0 else
                 f"{r['name']}: {r['n_px']} px, {r['n_converged']} converged")
        ax.errorbar(x, r["mean"], yerr=r["sem"], fmt="o", ms=4, capsize=3, color=colour,
                    label=label, zorder=3)
        if np.all(np.isfinite(r["params"])):
            ax.plot(xs, evaluate_law(law, xs, r["params"],
                                     reference_power_w=rs["reference_power_W"]),
                    color=colour, lw=1.4, zorder=2)
        info_regions.append({"code": r["code"], "name": r["name"], "n_px": r["n_px"],
                             "n_converged": r["n_converged"],
                             "mean": [float(v) for v in r["mean"]],
                             "sem": [float(v) for v in r["sem"]],
                             "median_params": dict(zip(rs["param_names"],
                                                       [float(v) for v in r["params"]])),
                             "curve": [float(v) for v in r["curve"]]})
    if log:
        ax.set_xscale("log")
        ax.set_yscale("log")
    qname = _style.map_title(rs["quantity"], rs["units"])
    dname = _style.map_title(rs["dim"], rs["dim_units"])
    ax.set_xlabel(dname)
    ax.set_ylabel(qname)
    suffix = "".join(f" — {k} {v}" for k, v in (index or {}).items())
    ax.set_title(title if title is not None else
                 f"{qname} against {dname[:1].lower() + dname[1:]}: {LAW_TITLES[law]} fit{suffix}", fontsize=10)
    ax.legend(fontsize=8, loc="best", frameon=False)
    ax.grid(alpha=0.3, lw=0.5)
    ref = LAWS[law].reference
    fig.supxlabel(f"points: mean ± s.e. of the mean over the pixels of each "
                  f"{'region' if rs['grouping'] == 'region map' else 'map'}; lines: law at the "
                  f"median of its converged fits\n{ref}", fontsize=7.5, color="0.3")
    info = {"law": law, "quantity": rs["quantity"], "units": rs["units"], "dim": rs["dim"],
            "dim_units": rs["dim_units"], "x": [float(v) for v in x],
            "grouping": rs["grouping"], "regions": info_regions, "title": ax.get_title(),
            "xlabel": ax.get_xlabel(), "ylabel": ax.get_ylabel(),
            "log_axes": log, "index": dict(index or {})}
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(p, dpi=DPI, metadata={"Software": f"pmap {__version__}",
                                      "Description": json.dumps(info)})
    return p


def write_series_figures(ds: xr.Dataset, out_dir: str | Path, *, prefix: str = "") -> list[Path]:
    """Write every figure of a series store into ``out_dir`` (PNG; returns the paths).

    Parameter maps and their 1σ maps (converged pixels only, others grey), the
    reduced χ² map, the status map with its CF flag legend, the power-law class
    map, and :func:`plot_series_by_region` (when the store keeps the fitted points).
    """
    law = _law_of(ds)
    out = Path(out_dir)
    written: list[Path] = []
    status = ds[f"{law}_status"].load()
    names = [f"{law}_{p}" for p in LAWS[law].params]
    for sel, suffix in _slices(status):
        st = status.isel(sel)
        for name in names + [n + "_err" for n in names]:
            if name not in ds.data_vars:
                continue
            v = ds[name].isel({k: i for k, i in sel.items() if k in ds[name].dims}).load()
            v = v.where(st == 0)
            if not bool(np.isfinite(v.values).any()):
                continue
            written.append(plot_map(v, out / f"{prefix}{_stem(name, suffix)}.png",
                                    title=_param_title(law, name, v, suffix)))
        chi = ds[f"{law}_chi2_red"].isel(
            {k: i for k, i in sel.items() if k in ds[f"{law}_chi2_red"].dims}).load()
        sfx = f" — {suffix}" if suffix else ""
        if bool(np.isfinite(chi.values).any()):
            written.append(plot_map(chi, out / f"{prefix}{_stem(f'{law}_chi2_red', suffix)}.png",
                                    title=_style.map_title(chi.name, attrs=chi.attrs) + sfx))
        written.append(plot_labels(st, out / f"{prefix}{_stem(f'{law}_status', suffix)}.png",
                                   title=f"{LAW_TITLES[law]} fit status{sfx}"))
        if "power_law_class" in ds.data_vars:
            c = ds["power_law_class"].isel(
                {k: i for k, i in sel.items() if k in ds["power_law_class"].dims}).load()
            written.append(plot_labels(
                c, out / f"{prefix}{_stem('power_law_class', suffix)}.png",
                names={k: _CLASS_NAMES.get(k, POWER_CLASS_LEGEND.get(k, str(k)))
                       for k in _CLASS_NAMES},
                title=f"Power-law exponent k: classes (rules of thumb){sfx}"))
        q = str(ds.attrs.get("series_quantity", ""))
        if q in ds.data_vars and str(ds.attrs.get("series_dim")) in ds[q].dims:
            written.append(plot_series_by_region(
                ds, out / f"{prefix}{_stem(f'{law}_{q}_by_region', suffix)}.png", index=sel))
    return written
