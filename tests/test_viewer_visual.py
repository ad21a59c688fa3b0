"""Viewer and figures speak one visual language (issue 16): region colours, orientation,
colour maps, titles; `pmap view` without a display says why and exits 2."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr
from matplotlib.colors import to_rgba
from PIL import Image

from pmap import _style, report
from pmap.napari_plugin._model import result_layers


def _coords(ny, nx, step=0.5):
    return {"y": ("y", 10.0 + np.arange(ny) * step, {"units": "um"}),
            "x": ("x", 20.0 + np.arange(nx) * step, {"units": "um"})}


def _result(ny=20, nx=30):
    """A small result: an asymmetric peak-energy map (high in the top-left quadrant:
    large y, small x) and a region map with three regions and no-signal pixels."""
    e = np.full((1, ny, nx), 1.50)
    e[0, ny // 2:, : nx // 3] = 1.70
    r = np.zeros((ny, nx), dtype=np.int32)
    r[:, nx // 2:] = 1
    r[ny // 2:, nx // 2:] = 2
    r[:2, :2] = -1
    return xr.Dataset(
        {"peak_energy": (("peak", "y", "x"), e, {"units": "eV", "long_name": "peak centre energy"}),
         "region": (("y", "x"), r, {"long_name": "region label", "units": "1",
                                    "flag_values": "[-1, 0, 1, 2]",
                                    "flag_meanings": "no_signal region_0 region_1 region_2"})},
        coords={**_coords(ny, nx), "peak": [0]})


def test_same_region_same_colour_in_figure_and_viewer_layer(tmp_path):
    from napari.layers import Labels

    ds = _result()
    path = report.plot_labels(ds["region"], tmp_path / "region.png")
    with Image.open(path) as im:
        fig_colours = dict(zip(json.loads(im.text["Description"])["codes"],
                               json.loads(im.text["Description"])["colours"]))
    [(data, kw, kind)] = [lyr for lyr in result_layers(ds) if lyr[1]["name"] == "Regions"]
    assert kind == "labels"
    layer = Labels(data, **{k: v for k, v in kw.items() if k != "units"})
    off = kw["metadata"]["pmap"]["label_offset"]
    for code in (-1, 0, 1, 2):
        want = to_rgba(fig_colours[code])
        got = layer.colormap.map(np.array([code + off]))[0]
        assert got[:3] == pytest.approx(want[:3], abs=1e-3), code
    # and the viewer's stored label data are the codes shifted by that offset
    np.testing.assert_array_equal(np.asarray(data) - off, ds["region"].values)


def test_viewer_layer_title_and_colour_map_match_the_figure(tmp_path):
    ds = _result()
    path = report.plot_map(ds["peak_energy"].isel(peak=0), tmp_path / "e.png")
    with Image.open(path) as im:
        info = json.loads(im.text["Description"])
    image = [lyr for lyr in result_layers(ds) if lyr[2] == "image"]
    [(_, kw, _)] = image
    assert kw["name"] == info["title"] == "Peak energy (eV) — peak 0"
    assert kw["colormap"] == info["cmap"] == "viridis"


def _bright_vs_dark(rgb, bright, dark, tol=0.12):
    """Row/column centroids of the pixels near the bright and the dark colour."""
    rgb = rgb[..., :3].astype(float) / (255.0 if rgb.dtype == np.uint8 else 1.0)
    out = []
    for c in (bright, dark):
        m = np.abs(rgb - np.asarray(to_rgba(c)[:3])).max(axis=-1) < tol
        assert m.sum() > 50, f"colour {c} not found"
        rows, cols = np.nonzero(m)
        out.append((rows.mean(), cols.mean()))
    return out


@pytest.mark.viewer
def test_orientation_of_figure_and_viewer_agree(make_napari_viewer, tmp_path):
    from pmap.napari_plugin import orient_y_up

    ds = _result()
    path = report.plot_map(ds["peak_energy"].isel(peak=0), tmp_path / "e.png", robust=False,
                           scale_bar=False)
    png = np.asarray(Image.open(path).convert("RGB"))
    x0, y0, x1, y1 = (int(v) for v in json.loads(Image.open(path).text["Description"])["axes_px"])
    (br, bc), (dr, dc) = _bright_vs_dark(png[y0:y1, x0:x1], "#fde725", "#440154")
    assert br < dr and bc < dc  # figure: the high values are top-left

    viewer = make_napari_viewer(show=True)
    [(data, kw, _)] = [lyr for lyr in result_layers(ds) if lyr[2] == "image"]
    kw = {**kw, "contrast_limits": (1.5, 1.7), "visible": True}
    viewer.add_image(np.asarray(data), **kw)
    orient_y_up(viewer)
    viewer.reset_view()
    shot = viewer.screenshot(canvas_only=True, flash=False)
    (vbr, vbc), (vdr, vdc) = _bright_vs_dark(shot, "#fde725", "#440154")
    assert vbr < vdr and vbc < vdc  # viewer: the same corner, not flipped


def test_pmap_view_without_display_exits_2_with_a_message(tmp_path):
    store = tmp_path / "r.zarr"
    store.mkdir()
    env = {k: v for k, v in os.environ.items()
           if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    proc = subprocess.run([sys.executable, "-m", "pmap", "view", str(store)], env=env,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    assert "needs a graphical display" in lines[0] and f"plcube report {store}" in lines[0]


def test_no_value_pixels_are_the_figures_grey_in_the_viewer():
    from pmap.napari_plugin._model import NO_VALUE_LAYER

    ds = _result()
    ds["peak_energy"][0, 3, 4] = np.nan
    layers = result_layers(ds)
    [(data, kw, kind)] = [lyr for lyr in layers if lyr[1]["name"] == NO_VALUE_LAYER]
    assert kind == "labels" and layers[0][1]["name"] == NO_VALUE_LAYER  # under every map
    np.testing.assert_array_equal(np.asarray(data) == 1,
                                  ~np.isfinite(ds["peak_energy"].values[0]))
    assert kw["colormap"][1] == _style.NAN_COLOUR


@pytest.mark.viewer
def test_viewer_colour_bar_carries_the_title_with_units(make_napari_viewer):
    from pmap.napari_plugin._qt._common import show_colorbar

    viewer = make_napari_viewer()
    [(data, kw, _)] = [lyr for lyr in result_layers(_result()) if lyr[2] == "image"]
    layer = viewer.add_image(np.asarray(data), **kw)
    show_colorbar(layer)
    assert layer.colorbar.visible
    # napari's colour bar has no label of its own: the layer title with units stands beside it
    assert layer.name_overlay.visible and str(layer.name_overlay.position).endswith("top_right")
    assert layer.name == "Peak energy (eV) — peak 0"
