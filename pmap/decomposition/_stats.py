"""Numbers per region: pixel counts, areas, property means and spreads, mean spectra."""

from __future__ import annotations

import os
from pathlib import Path

import dask
import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr

from ..conventions import SPECTRAL_DIMS
from ..errors import StepError
from ..provenance import PROVENANCE_ATTR, with_step
from ._common import check_spectral, finite_rows


def _spacing(coord: xr.DataArray) -> float:
    v = np.asarray(coord.values, dtype=float)
    if v.size < 2:
        return 1.0
    return float(np.median(np.abs(np.diff(v))))


def _grouped_moments(values: np.ndarray, lab: np.ndarray, k: int):
    """Per label 0..k−1: count, mean and sum of squared deviations of rows (n, m) (finite rows)."""
    ok = (lab >= 0) & finite_rows(values)
    x, lab = values[ok], lab[ok]
    n = np.bincount(lab, minlength=k)
    m = values.shape[1]
    mean = np.full((k, m), np.nan)
    m2 = np.zeros((k, m))
    if x.size == 0:
        return n, mean, m2
    order = np.argsort(lab, kind="stable")
    x, lab = x[order], lab[order]
    present = np.flatnonzero(n)
    starts = np.concatenate([[0], np.cumsum(n[present])[:-1]])
    mean[present] = np.add.reduceat(x, starts, axis=0) / n[present, None]
    dev = x - mean[lab]
    m2[present] = np.add.reduceat(dev * dev, starts, axis=0)
    return n, mean, m2


def _block_moments(block: np.ndarray, lab: np.ndarray, k: int):
    x = np.asarray(block, dtype=np.float64).reshape(-1, block.shape[-1])
    return _grouped_moments(x, np.asarray(lab).reshape(-1), k)


def _combine(a, b):
    """Chan, Golub & LeVeque (Am. Stat. 37, 242 (1983)) pairwise update of count, mean, M2."""
    na, ma, sa = a
    nb, mb, sb = b
    n = na + nb
    with np.errstate(invalid="ignore", divide="ignore"):
        fa = np.where(n > 0, na / np.maximum(n, 1), 0.0)[:, None]
        fb = np.where(n > 0, nb / np.maximum(n, 1), 0.0)[:, None]
    ma0, mb0 = np.nan_to_num(ma), np.nan_to_num(mb)
    delta = mb0 - ma0
    mean = np.where((n > 0)[:, None], ma0 * fa + mb0 * fb, np.nan)
    m2 = sa + sb + delta * delta * (na * fb[:, 0])[:, None]
    return n, mean, m2


def _spectra_stats(cube: xr.DataArray, lab: np.ndarray, k: int, ddof: int):
    arr, sdim = check_spectral(cube, "cube")
    pix = [d for d in arr.dims if d != sdim]
    if pix != ["y", "x"]:
        raise StepError(f"cube must have dims (y, x, {sdim}) to match the region map, has {pix}")
    if arr.shape[:2] != lab.shape:
        raise StepError(
            f"cube (y, x) shape {arr.shape[:2]} differs from the region map {lab.shape}"
        )
    data = arr.data
    if isinstance(data, da.Array):
        labd = da.from_array(lab, chunks=data.chunks[:2])
        parts = [
            dask.delayed(_block_moments)(xb, lb, k)
            for xb, lb in zip(data.to_delayed()[..., 0].ravel(), labd.to_delayed().ravel())
        ]
        parts = dask.compute(*parts)
    else:
        parts = [_block_moments(np.asarray(data), lab, k)]
    acc = parts[0]
    for p in parts[1:]:
        acc = _combine(acc, p)
    n, mean, m2 = acc
    with np.errstate(invalid="ignore", divide="ignore"):
        std = np.sqrt(m2 / (n - ddof)[:, None])
    std[n - ddof <= 0] = np.nan
    return arr, sdim, mean, std, n


def _region_names(attrs: dict, counts: np.ndarray, n_pixels: int, k: int):
    """"<description>, <share> %" per region from the segment attrs, or None."""
    import json

    try:
        desc = json.loads(attrs["region_descriptions"])
    except (KeyError, TypeError, ValueError):
        return None
    if not isinstance(desc, list) or len(desc) != k:
        return None
    share = 100.0 / max(n_pixels, 1)
    return np.array([f"{d}, {_share_text(c * share)}" for d, c in zip(desc, counts)],
                    dtype=object)


def _share_text(percent: float) -> str:
    """"62 %"; under 1 % with one decimal ("0.4 %"), under 0.05 % "< 0.1 %" (a small
    region is not shown as 0 %)."""
    if percent >= 1 or percent == 0:
        return f"{percent:.0f} %"
    return f"{percent:.1f} %" if percent >= 0.05 else "< 0.1 %"


def region_statistics(
    region: xr.DataArray,
    maps: xr.Dataset | None = None,
    cube: xr.DataArray | None = None,
    *,
    ddof: int = 0,
) -> xr.Dataset:
    """Pixel count, area, fraction, property mean ± std and mean spectrum of every region.

    Parameters
    ----------
    region : xarray.DataArray
        Region labels (y, x) from :func:`segment`: 0..K−1, −1 for no signal.
        K is ``region.attrs["k"]`` when present, else the largest label + 1.
    maps : xarray.Dataset, optional
        Property maps on the same grid; every variable with y and x dims is
        summarised, maps with more dims (e.g. (peak, y, x)) per entry of those dims.
        NaN values are left out of the mean and std.
    cube : xarray.DataArray, optional
        Cube (y, x, S) on the same grid, for each region's mean and std spectrum
        (pixels with any NaN channel left out); one pass over the cube.
    ddof : int
        Delta degrees of freedom of the standard deviations (0: population std).

    Returns
    -------
    xarray.Dataset
        Dim ``region``: ``region_pixel_count``, ``region_area_um2`` (µm², from the
        coordinate spacing; ``region_area_pixel2`` when y/x are pixel indices),
        ``region_fraction`` (of the pixels with signal), coordinate ``region_name``
        ("1.63 eV band, 62 %": what it emits and its share of all the map's pixels,
        when the region map comes from :func:`segment`), ``<var>_mean`` and
        ``<var>_std`` (region, *extra dims) in the map's units, and with a cube
        ``region_mean_spectrum`` / ``region_std_spectrum`` (region, S).
    """
    if not isinstance(region, xr.DataArray) or set(region.dims) != {"y", "x"}:
        raise StepError("region must be a (y, x) DataArray of integer labels (from pmap.segment)")
    region = region.transpose("y", "x")
    lab = np.asarray(region.values)
    if lab.dtype.kind not in "iu":
        raise StepError(f"region labels must be integers, got dtype {lab.dtype}")
    lab = lab.astype(np.int64)
    k = int(region.attrs.get("k", lab.max() + 1 if lab.size else 0))
    if lab.max(initial=-1) >= k:
        raise StepError(f"region label {int(lab.max())} is not below k={k}")
    counts = np.bincount(lab[lab >= 0], minlength=k)
    n_signal = int(counts.sum())
    y_units = region["y"].attrs.get("units", "pixel") if "y" in region.coords else "pixel"
    x_units = region["x"].attrs.get("units", "pixel") if "x" in region.coords else "pixel"
    in_um = y_units == "um" and x_units == "um"
    dy = _spacing(region["y"]) if "y" in region.coords else 1.0
    dx = _spacing(region["x"]) if "x" in region.coords else 1.0
    pixel_area = (
        dy * dx
        if in_um
        else (dy if y_units == "pixel" else 1.0) * (dx if x_units == "pixel" else 1.0)
    )
    area_name, area_units = (
        ("region_area_um2", "um2") if in_um else ("region_area_pixel2", "pixel2")
    )
    coords = {"region": ("region", np.arange(k), {"long_name": "region label"})}
    names = _region_names(region.attrs, counts, lab.size, k)
    if names is not None:
        coords["region_name"] = (
            "region", names,
            {"long_name": "what the region emits (from its mean spectrum) and its share of "
                          "the map's pixels"},
        )
    ds = xr.Dataset(coords=coords)
    ds["region_pixel_count"] = ("region", counts, {"units": "1", "long_name": "pixels in region"})
    ds[area_name] = ("region", counts * pixel_area, {"units": area_units, "long_name": "area"})
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = counts / n_signal if n_signal else np.full(k, np.nan)
    ds["region_fraction"] = (
        "region",
        frac,
        {"units": "1", "long_name": "fraction of the pixels with signal"},
    )

    flat_lab = lab.ravel()
    for name, var in maps.data_vars.items() if maps is not None else ():
        if not {"y", "x"} <= set(var.dims) or var.dtype.kind not in "iufb":
            continue
        var = var.transpose(..., "y", "x")
        if var.shape[-2:] != lab.shape:
            raise StepError(
                f"map {name!r} has (y, x) shape {var.shape[-2:]}, region map {lab.shape}"
            )
        lead = var.dims[:-2]
        vals = np.asarray(var.values, dtype=np.float64).reshape(-1, lab.size)
        means, stds = [], []
        for row in vals:
            n, mean, m2 = _grouped_moments(row[:, None], flat_lab, k)
            with np.errstate(invalid="ignore", divide="ignore"):
                std = np.sqrt(m2[:, 0] / (n - ddof))
            std[n - ddof <= 0] = np.nan
            means.append(mean[:, 0])
            stds.append(std)
        shape = (k, *[var.sizes[d] for d in lead])
        mean_arr = np.moveaxis(np.array(means), 0, -1).reshape(shape)
        std_arr = np.moveaxis(np.array(stds), 0, -1).reshape(shape)
        units = var.attrs.get("units", "")
        lname = var.attrs.get("long_name", name)
        dims = ("region", *lead)
        extra = {d: var[d] for d in lead if d in var.coords}
        ds[f"{name}_mean"] = xr.DataArray(
            mean_arr, dims=dims, coords=extra, attrs={"units": units, "long_name": f"mean {lname}"}
        )
        ds[f"{name}_std"] = xr.DataArray(
            std_arr,
            dims=dims,
            coords=extra,
            attrs={"units": units, "long_name": f"standard deviation of {lname} (ddof={ddof})"},
        )

    if cube is not None:
        arr, sdim, mean, std, _ = _spectra_stats(cube, lab, k, ddof)
        units = arr.attrs.get("units", "")
        ds = ds.assign_coords({sdim: arr[sdim]})
        ds["region_mean_spectrum"] = (
            ("region", sdim),
            mean,
            {"units": units, "long_name": "mean spectrum of the region"},
        )
        ds["region_std_spectrum"] = (
            ("region", sdim),
            std,
            {
                "units": units,
                "long_name": f"standard deviation of the region's spectra (ddof={ddof})",
            },
        )
    base = (
        {PROVENANCE_ATTR: region.attrs[PROVENANCE_ATTR]} if PROVENANCE_ATTR in region.attrs else {}
    )
    ds.attrs = with_step(base, "region_statistics", {"ddof": ddof}, k=k)
    ds.attrs.update(
        {
            "pixel_area": pixel_area,
            "pixel_area_units": area_units,
            "ddof": ddof,
            "n_signal_pixels": n_signal,
            "n_no_signal_pixels": int(lab.size - n_signal),
        }
    )
    if "legend" in region.attrs:
        ds.attrs["legend"] = region.attrs["legend"]
    return ds


def region_table(stats: xr.Dataset) -> pd.DataFrame:
    """One row per region with every per-region number of :func:`region_statistics`.

    The first column is ``region_name`` when the statistics carry one. Spectra are left out. Maps with extra dims give one column per entry, named
    ``<var>[<dim>=<value>]``. ``DataFrame.attrs["units"]`` maps columns to units.
    """
    if not isinstance(stats, xr.Dataset) or "region" not in stats.dims:
        raise StepError("stats must be the Dataset returned by region_statistics")
    cols: dict[str, np.ndarray] = {}
    units: dict[str, str] = {}
    for name, var in stats.data_vars.items():
        if "region" not in var.dims or any(d in SPECTRAL_DIMS for d in var.dims):
            continue
        var = var.transpose("region", ...)
        extra = [d for d in var.dims if d != "region"]
        if not extra:
            cols[name] = var.values
            units[name] = var.attrs.get("units", "")
            continue
        stacked = var.stack(_entry=extra)
        for i in range(stacked.sizes["_entry"]):
            key = ",".join(f"{d}={stacked[d].values[i]}" for d in extra)
            col = f"{name}[{key}]"
            cols[col] = stacked.values[:, i]
            units[col] = var.attrs.get("units", "")
    if "region_name" in stats.coords:
        cols = {"region_name": np.asarray(stats["region_name"].values, dtype=str), **cols}
        units["region_name"] = ""
    df = pd.DataFrame(cols, index=pd.Index(stats["region"].values, name="region"))
    df.attrs["units"] = units
    return df


def write_region_csv(stats: xr.Dataset, path: str | os.PathLike) -> Path:
    """Write :func:`region_table` to a CSV file, units in brackets in the header; return the path.

    Columns without a single value (statistics of a map that is NaN everywhere, such as a
    window ratio whose window holds no channel) are left out, as its figure is.
    """
    df = region_table(stats)
    units = df.attrs["units"]
    df = df.drop(columns=[c for c in df.columns if df[c].isna().all()])
    df = df.rename(columns={c: f"{c} [{u}]" for c, u in units.items() if u not in ("", "1")})
    out = Path(path)
    df.to_csv(out)
    return out
