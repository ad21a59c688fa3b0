"""The visual language of the figures (issue 16): titles with units, discrete colour bars,
the region palette, NaN rule, orientation, histogram statistics beside the bars, spike figure."""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr
from matplotlib.colors import to_rgb
from PIL import Image

from pmap import _style, report


def _png(path):
    with Image.open(path) as im:
        im.load()
        return json.loads(im.text["Description"]), np.asarray(im.convert("RGB"))


def _coords(ny, nx, step=0.5):
    return {"y": ("y", np.arange(ny) * step, {"units": "um"}),
            "x": ("x", np.arange(nx) * step, {"units": "um"})}


def _pixel_of(info, arr, y, x):
    """PNG pixel (RGB 0–1) at map position (y, x) in µm, from the axes box and extent."""
    x0, y0, x1, y1 = info["axes_px"]
    ex0, ex1, ey0, ey1 = info["extent"]
    col = x0 + (x - ex0) / (ex1 - ex0) * (x1 - x0)
    row = y1 - (y - ey0) / (ey1 - ey0) * (y1 - y0)  # y up: larger y is higher in the image
    return arr[int(round(row)), int(round(col))] / 255.0


def asymmetric_map(ny=20, nx=30):
    """Low everywhere, high in the top-left quadrant (large y, small x), NaN in the top-right corner."""
    d = np.full((ny, nx), 1.0)
    d[ny // 2:, : nx // 2] = 2.0
    d[-3:, -3:] = np.nan
    return xr.DataArray(d, dims=("y", "x"), coords=_coords(ny, nx), name="peak_energy",
                        attrs={"units": "eV", "long_name": "peak centre energy"})


def test_orientation_y_up_origin_lower_left(tmp_path):
    da = asymmetric_map()
    info, arr = _png(report.plot_map(da, tmp_path / "m.png", robust=False))
    assert info["origin"] == "lower"
    hi = np.asarray(to_rgb("#fde725"))  # viridis top colour (value 2.0)
    lo = np.asarray(to_rgb("#440154"))  # viridis bottom colour (value 1.0)
    top_left = _pixel_of(info, arr, y=8.0, x=2.0)
    bottom_left = _pixel_of(info, arr, y=1.0, x=2.0)
    assert np.abs(top_left - hi).max() < 0.05, top_left
    assert np.abs(bottom_left - lo).max() < 0.05, bottom_left
    # NaN pixels (largest y and x: upper right) are the one neutral grey
    grey = _pixel_of(info, arr, y=9.0, x=14.0)
    assert np.abs(grey - np.asarray(to_rgb(_style.NAN_COLOUR))).max() < 0.02
    assert info["n_no_value"] == 9


def test_titles_carry_units(tmp_path):
    ny, nx = 6, 8
    ds = xr.Dataset(
        {"peak_energy": (("peak", "y", "x"), np.linspace(1.5, 1.6, 48).reshape(1, ny, nx),
                         {"units": "eV", "long_name": "peak centre energy"}),
         "integrated_intensity": (("y", "x"), np.linspace(1, 9, 48).reshape(ny, nx),
                                  {"units": "counts", "long_name": "integrated intensity"}),
         "component_abundance": (("component", "y", "x"), np.ones((2, ny, nx)),
                                 {"units": "counts/eV", "long_name": "component amplitude"})},
        coords={**_coords(ny, nx), "peak": [0], "component": [0, 1]})
    titles = {p.name: _png(p)[0].get("title") for p in report.write_figures(ds, tmp_path)}
    assert titles["peak_energy.png"] == "Peak energy (eV) — peak 0"
    assert titles["integrated_intensity.png"] == "Integrated intensity (counts)"
    assert titles["component_abundance_component1.png"] == \
        "Component amplitude (counts/eV) — component 1"
    assert not any("_" in t for t in titles.values() if t)


def test_integer_map_gets_a_discrete_colour_bar(tmp_path):
    ny, nx = 10, 12
    n_iter = np.tile(np.array([2.0, 3.0, 3.0, 5.0]), (ny, nx // 4))
    n_iter[0, 0] = np.nan  # float storage with NaN for no fit, as in result stores
    da = xr.DataArray(n_iter, dims=("y", "x"), coords=_coords(ny, nx), name="n_iter",
                      attrs={"units": "1", "long_name": "Levenberg-Marquardt iterations"})
    info, arr = _png(report.plot_map(da, tmp_path / "n.png"))
    assert info["discrete_levels"] == [2, 3, 5]
    assert info["colorbar_ticklabels"] == ["2", "3", "5"]
    # exactly three map colours (plus the NaN grey) inside the map
    x0, y0, x1, y1 = (int(v) for v in info["axes_px"])
    inner = arr[y0 + 3 : y1 - 3, x0 + 3 : x1 - 3].reshape(-1, 3)
    colours, counts = np.unique(inner, axis=0, return_counts=True)
    assert (counts > 0.05 * inner.shape[0]).sum() == 3
    # a continuous map of the same name is not discrete
    info2, _ = _png(report.plot_map(da + 0.25, tmp_path / "c.png"))
    assert info2["discrete_levels"] is None


def test_status_map_colour_bar_tokens(tmp_path):
    codes = np.array([[0, 0, 3], [6, 0, 3]], dtype=np.int8)
    da = xr.DataArray(codes, dims=("y", "x"), coords=_coords(2, 3), name="n_status",
                      attrs={"units": "1", "flag_values": "[0, 3, 6]",
                             "flag_meanings": "converged no_signal implausible"})
    info, _ = _png(report.plot_map(da, tmp_path / "s.png"))
    assert info["colorbar_ticklabels"] == ["converged", "no signal", "implausible"]


def region_map():
    r = np.zeros((12, 16), dtype=np.int32)
    r[:, 8:] = 1
    r[6:, 8:] = 2
    r[:3, :3] = -1
    return xr.DataArray(r, dims=("y", "x"), coords=_coords(12, 16), name="region",
                        attrs={"long_name": "region label", "units": "1",
                               "flag_values": "[-1, 0, 1, 2]",
                               "flag_meanings": "no_signal region_0 region_1 region_2",
                               "region_names": json.dumps({"-1": "no emission", "0": "A",
                                                           "1": "B", "2": "C"})})


def test_region_colours_from_the_palette_in_map_legend_and_spectra(tmp_path):
    info, arr = _png(report.plot_labels(region_map(), tmp_path / "r.png"))
    assert info["legend"] == ["no emission (-1)", "A (0)", "B (1)", "C (2)"]
    assert info["colours"] == [_style.NAN_COLOUR, *(_style.region_colour(c) for c in (0, 1, 2))]
    for (y, x), code in {(5.0, 1.0): 0, (1.0, 6.0): 1, (5.0, 6.0): 2, (0.2, 0.2): -1}.items():
        got = _pixel_of(info, arr, y=y, x=x)
        assert np.abs(got - np.asarray(to_rgb(_style.region_colour(code)))).max() < 0.02, code
    # colour-blind-safe palette: no two of the first three regions close in lightness and hue
    rgb = np.array([to_rgb(_style.region_colour(c)) for c in range(3)])
    assert min(np.abs(a - b).sum() for i, a in enumerate(rgb) for b in rgb[i + 1:]) > 0.5
    # mean spectra per region use the same colours
    e = np.linspace(1.4, 1.8, 50)
    ds = xr.Dataset(
        {"region": region_map(),
         "region_mean_spectrum": (("region_id", "energy"), np.random.default_rng(0).random((3, 50)),
                                  {"units": "counts/eV"})},
        coords={"region_id": [0, 1, 2], "energy": ("energy", e, {"units": "eV"}),
                "region_name": ("region_id", ["A", "B", "C"])})
    paths = report.write_figures(ds, tmp_path / "f")
    spec = next(p for p in paths if p.name == "region_mean_spectra.png")
    sinfo, _ = _png(spec)
    assert sinfo["colours"] == [_style.region_colour(c) for c in (0, 1, 2)]
    assert sinfo["legend"] == ["A (0)", "B (1)", "C (2)"]


def test_histogram_statistics_beside_the_bars(tmp_path):
    rng = np.random.default_rng(1)
    v = rng.normal(1.6, 0.02, 5000)
    v[:20] = 1.2  # far outliers (0.4 %), beyond the drawn range
    da = xr.DataArray(v.reshape(50, 100), dims=("y", "x"), name="peak_energy",
                      attrs={"units": "eV", "long_name": "peak centre energy"})
    info, _ = _png(report.plot_histogram(da, tmp_path / "h.png"))
    stats_box, axes_box = info["stats_bbox_px"], info["axes_bbox_px"]
    assert stats_box[0] > axes_box[2]  # the text starts right of the bars' axes
    assert info["outside_below"] >= 20 and info["outside_above"] > 0  # 0.5–99.5 % range
    assert info["xlabel"] == "Peak energy (eV)"


def test_raw_vs_cleaned_has_zoom_and_residual(tmp_path):
    e = np.linspace(600, 1000, 400)
    band = 600 + 400 * np.exp(-0.5 * ((e - 760) / 20) ** 2)
    clean = np.stack([band, band * 0.9])
    raw = clean.copy()
    raw[0, 300] += 15000
    raw[1, 100] += 3000
    mk = lambda a: xr.DataArray(a, dims=("pixel", "wavelength"), name="intensity",  # noqa: E731
                                coords={"wavelength": ("wavelength", e, {"units": "nm"})},
                                attrs={"units": "counts", "long_name": "PL intensity"})
    info, _ = _png(report.plot_spectra(mk(clean), tmp_path / "s.png", reference=mk(raw),
                                       reference_label="raw"))
    assert info["panels"] == ["whole range", "zoom", "residual"]
    assert info["full_ylim"][1] > 15000
    lo, hi = info["zoom_ylim"]
    assert 950 < hi < 1100 and lo > 500  # the band fills the zoom, spikes are cut
    assert info["legend"] == ["pixel 0", "pixel 1", "raw", "cleaned"]
    assert len(set(info["colours"])) == 2


@pytest.mark.parametrize("name,cmap", [("peak_energy", "viridis"), ("peak_fwhm", "plasma"),
                                       ("integrated_intensity", "magma"),
                                       ("peak_energy_err", "cividis")])
def test_perceptually_uniform_colour_maps(name, cmap):
    assert _style.colormap_for(name) == cmap
    assert all(_style.colormap_for(n) not in ("turbo", "jet", "rainbow", "hsv", "nipy_spectral")
               for n in ("peak_energy", "max_energy", "peak_wavelength", "centroid_energy"))


def test_status_map_no_signal_is_the_nan_grey_in_figure_and_viewer(tmp_path):
    from pmap.napari_plugin._model import result_layers

    codes = np.array([[0, 0, 3, 3], [6, 0, 3, 1]], dtype=np.int8)
    attrs = {"units": "1", "long_name": "fit status", "flag_values": "[0, 1, 3, 6]",
             "flag_meanings": "converged iteration_limit no_signal implausible"}
    da = xr.DataArray(codes, dims=("y", "x"), coords=_coords(2, 4), name="fit_status",
                      attrs=attrs)
    info, _ = _png(report.plot_labels(da, tmp_path / "s.png"))
    fig = dict(zip(info["codes"], info["colours"]))
    assert fig[3] == _style.NAN_COLOUR
    assert fig[0] == _style.CATEGORY_PALETTE[0] and len({fig[0], fig[1], fig[6]}) == 3
    [(data, kw, kind)] = result_layers(xr.Dataset({"fit_status": da}))
    off = kw["metadata"]["pmap"]["label_offset"]
    assert kind == "labels"
    assert {c: kw["colormap"][c + off] for c in (0, 1, 3, 6)} == fig
