"""The napari viewer: reader, spectrum/region/processing panels, manifest, sample data, screenshot.

Qt tests run headless under Xvfb (scripts/test.sh). A small result store is
built once per module from the demo cube with pmap's own steps (energy axis,
per-pixel Gaussian fit, descriptors, regions) following the store contract.
"""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from pmap import _style
from pmap.napari_plugin._reader import napari_get_reader
from pmap.results import is_result_store

SHAPE = (16, 24)
N_CHANNELS = 96


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """A result store made by the real pipeline: processed cube, 1-peak fit, 3 regions."""
    from pmap.io import save_cube
    from pmap.pipeline import load_pipeline, process
    from pmap.synthetic import make_demo_cube

    tmp = tmp_path_factory.mktemp("viewer")
    cube, _ = make_demo_cube(shape=SHAPE, n_channels=N_CHANNELS, seed=7)
    raw = tmp / "demo.zarr"
    save_cube(cube, raw)
    pipe = load_pipeline(None)
    pipe.regions = {"n_regions": 3, "method": "gmm", "feature_space": "shape+intensity"}
    out = tmp / "result.zarr"
    process(raw, out, pipeline=pipe, progress=False)
    return out


def _gaussian(e, center, fwhm, area):
    # area-normalised Gaussian; sigma = FWHM / (2 sqrt(2 ln 2)) (common practice)
    sigma = fwhm / (2 * np.sqrt(2 * np.log(2)))
    return area / (sigma * np.sqrt(2 * np.pi)) * np.exp(-0.5 * ((e - center) / sigma) ** 2)


def _layer(viewer, name):
    return next(lyr for lyr in viewer.layers if lyr.name == name)


def _panel(make_napari_viewer, kind, store=None):
    """A viewer with ``store`` (or the demo sample) open and one of the pmap panels."""
    from pmap.napari_plugin import _qt

    viewer = make_napari_viewer()
    if store is None:
        viewer.open_sample("plcube", "demo")
    else:
        viewer.open(str(store), plugin="plcube")
    return viewer, getattr(_qt, kind)(viewer)


def test_reader_claims_pmap_paths_only(store, tmp_path):
    assert napari_get_reader(str(store)) is not None
    assert napari_get_reader(str(store.parent / "demo.zarr")) is not None
    (tmp_path / "notes.md").write_text("not a cube")
    assert napari_get_reader(str(tmp_path / "notes.md")) is None
    assert napari_get_reader(str(tmp_path / "missing.zarr")) is None


def test_reader_layers_scale_units_regions(store):
    layers = napari_get_reader(str(store))(str(store))
    by_name = {kw["name"]: (data, kw, kind) for data, kw, kind in layers}
    ds = xr.open_zarr(store)
    data, kw, kind = by_name["Peak energy (eV) — peak 0"]
    assert kind == "image" and kw["visible"]
    assert kw["scale"] == pytest.approx((0.5, 0.5))  # demo pixel pitch, µm
    assert kw["translate"] == pytest.approx((float(ds.y[0]), float(ds.x[0])))
    assert kw["units"] == ("um", "um")
    assert kw["metadata"]["pmap"]["path"] == str(store)
    np.testing.assert_array_equal(np.asarray(data), ds.peak_energy.isel(peak=0).values)
    lo, hi = kw["contrast_limits"]
    e = ds.peak_energy.values[np.isfinite(ds.peak_energy.values)]
    assert (lo, hi) == pytest.approx(tuple(np.percentile(e, [1, 99])))
    assert by_name["Peak FWHM (eV) — peak 0"][1]["colormap"] != "gray"
    lab, kwl, kindl = by_name["Regions"]
    assert kindl == "labels"
    np.testing.assert_array_equal(lab, ds["region"].values + 2)  # -1 (no signal) -> 1, grey
    assert kwl["metadata"]["pmap"]["label_offset"] == 2
    assert kwl["colormap"][1] == _style.NAN_COLOUR
    # the processed cube is not a map layer; the raw input is a cube layer on its own
    assert not any("spectra" in n for n in by_name)
    [(cdata, ckw, ckind)] = napari_get_reader(str(store.parent / "demo.zarr"))(
        str(store.parent / "demo.zarr")
    )
    assert cdata.shape == (N_CHANNELS, *SHAPE) and ckw["axis_labels"][0] == "wavelength"


@pytest.mark.viewer
def test_click_shows_spectrum_fit_and_raw(make_napari_viewer, store):
    from pmap.io import open_cube
    from pmap.napari_plugin._qt import SpectrumPanel

    viewer = make_napari_viewer()
    viewer.open(str(store), plugin="plcube")
    layer = _layer(viewer, "Peak energy (eV) — peak 0")
    assert tuple(layer.scale) == pytest.approx((0.5, 0.5))
    assert str(layer.units[-1]) == "micrometer"
    assert _layer(viewer, "Regions").__class__.__name__ == "Labels"
    panel = SpectrumPanel(viewer)
    ds = xr.open_zarr(store)
    iy, ix = 9, 15
    y, x = float(ds.y[iy]), float(ds.x[ix])

    class Click:  # a mouse press and release without moving, as napari delivers it
        button, type, position = 1, "mouse_press", (y + 0.2, x - 0.2)

    ev = Click()
    gen = panel._on_mouse(viewer, ev)
    next(gen)
    ev.type = "mouse_release"
    with pytest.raises(StopIteration):
        next(gen)
    assert panel.current == (iy, ix)
    spec = ds.intensity.isel(y=iy, x=ix).values
    np.testing.assert_array_equal(panel.lines["spectrum"].get_ydata(), spec)
    e = ds.energy.values
    p = ds.isel(y=iy, x=ix)
    model = _gaussian(e, float(p.peak_energy[0]), float(p.peak_fwhm[0]), float(p.peak_area[0]))
    model = model + float(p.background_offset)
    np.testing.assert_allclose(panel.lines["fit"].get_ydata(), model, rtol=1e-6)
    np.testing.assert_allclose(panel.lines["peak 0"].get_ydata(), model, rtol=1e-6)
    np.testing.assert_allclose(
        panel.lines["residual"].get_ydata(), spec - model, rtol=1e-5, atol=1e-6 * np.abs(spec).max()
    )
    raw = open_cube(store.parent / "demo.zarr").isel(y=iy, x=ix).values
    np.testing.assert_array_equal(panel.lines["raw"].get_ydata(), raw[::-1])  # ascending energy
    assert "region" in panel.info.text() and f"pixel {iy}, {ix}" in panel.info.text()
    # a drag pans and selects nothing
    ev2 = Click()
    ev2.position = (float(ds.y[0]), float(ds.x[0]))
    gen = panel._on_mouse(viewer, ev2)
    next(gen)
    ev2.type = "mouse_move"
    next(gen)
    ev2.type = "mouse_release"
    with pytest.raises(StopIteration):
        next(gen)
    assert panel.current == (iy, ix)
    assert not panel.select_world((1e3, 1e3))  # outside the map


@pytest.mark.viewer
def test_pins_and_area_mean(make_napari_viewer, store):
    viewer, panel = _panel(make_napari_viewer, "SpectrumPanel", store)
    ds = xr.open_zarr(store)
    panel.select_pixel(2, 3)
    panel.pin()
    panel.select_pixel(12, 20)
    np.testing.assert_array_equal(
        panel.lines["pin 0"].get_ydata(), ds.intensity.isel(y=2, x=3).values
    )
    assert len(_layer(viewer, "selected pixels").data) == 2
    panel.draw_area()
    shapes = viewer.layers.selection.active
    y, x = ds.y.values, ds.x.values
    # rectangle with edges half-way between pixel centres: rows 4..7, columns 10..13
    rect = np.array(
        [
            [y[4] - 0.25, x[10] - 0.25],
            [y[4] - 0.25, x[13] + 0.25],
            [y[7] + 0.25, x[13] + 0.25],
            [y[7] + 0.25, x[10] - 0.25],
        ]
    )
    shapes.add_rectangles([rect])
    expected = ds.intensity.isel(y=slice(4, 8), x=slice(10, 14)).values.reshape(-1, N_CHANNELS)
    np.testing.assert_allclose(panel.lines["area 0"].get_ydata(), expected.mean(axis=0), rtol=1e-6)
    panel.clear_pins()
    assert "pin 0" not in panel.lines


@pytest.mark.viewer
def test_region_panel_table_histogram_highlight(make_napari_viewer, store):
    viewer, panel = _panel(make_napari_viewer, "RegionPanel", store)
    ds = xr.open_zarr(store)
    region = ds["region"].values
    k = int(region.max()) + 1
    assert panel.table.rowCount() == k
    # pixel counts in the table equal numpy's count of each label
    col = [panel.table.horizontalHeaderItem(j).text() for j in range(panel.table.columnCount())]
    counts = [int(panel.table.item(r, col.index("pixels")).text()) for r in range(k)]
    assert counts == [int((region == r).sum()) for r in range(k)]
    assert panel.property.currentText() == "Peak energy (eV) — peak 0"
    panel.table.selectRow(1)
    labels = _layer(viewer, "Regions")
    assert panel.selected == 1
    assert labels.visible and labels.show_selected_label and labels.selected_label == 3
    total = sum(int(np.asarray(a.get_data().values).sum()) for a in panel.hist_lines.values())
    finite = np.isfinite(ds.peak_energy.isel(peak=0).values) & (region >= 0)
    assert total <= finite.sum() and total >= 0.98 * finite.sum()  # 0.5-99.5 % bin range
    panel.select_region(None)
    assert not labels.show_selected_label


@pytest.mark.viewer
def test_process_panel_runs_in_background(make_napari_viewer, qtbot, tmp_path):
    from qtpy.QtCore import QTimer

    viewer, panel = _panel(make_napari_viewer, "ProcessPanel")
    assert panel.sources.count() == 1
    pipe = tmp_path / "maps.toml"
    pipe.write_text('[[steps]]\nstep = "to_energy"\n\n[descriptors]\n\n[fit]\n')
    panel.pipeline.setText(str(pipe))
    panel.peaks.setValue(1)
    out = tmp_path / "demo_result.zarr"
    panel.output.setText(str(out))
    ticks, progress = [], []
    timer = QTimer()
    timer.timeout.connect(lambda: ticks.append(panel.last_output is None))
    panel.progressed.connect(lambda d, t: progress.append((d, t)))
    timer.start(5)
    worker = panel.run()
    assert worker is not None
    # the worker starts inside run(): wait on the button its "finished" handler
    # re-enables (a signal wait set up after the start could miss a quick finish)
    qtbot.waitUntil(panel.run_button.isEnabled, timeout=60_000)
    timer.stop()
    assert panel.last_output == out and is_result_store(out), panel.status.text()
    assert any(ticks)  # the event loop kept running while the job worked
    assert progress and progress[-1][0] == progress[-1][1]  # all counted tasks finished
    qtbot.waitUntil(lambda: any(lyr.name.startswith("Energy of the maximum (eV)") for lyr in viewer.layers))
    assert not _layer(viewer, "demo map: spectra [counts]").visible


@pytest.mark.viewer
def test_process_panel_reports_errors(make_napari_viewer, qtbot, tmp_path):
    viewer, panel = _panel(make_napari_viewer, "ProcessPanel")
    (tmp_path / "taken").mkdir()
    (tmp_path / "taken" / "keep.txt").write_text("x")
    panel.output.setText(str(tmp_path / "taken"))
    panel.overwrite.setChecked(True)
    assert panel.run() is not None
    qtbot.waitUntil(panel.run_button.isEnabled, timeout=60_000)  # finished (see above)
    assert "not a pmap result store" in panel.status.text()
    assert (tmp_path / "taken" / "keep.txt").exists()


def test_manifest_validates():
    exe = Path(sys.executable).with_name("npe2")
    out = subprocess.run(
        [str(exe), "validate", "plcube", "--imports"], capture_output=True, text=True
    )
    assert out.returncode == 0, out.stdout + out.stderr


@pytest.mark.viewer
def test_every_manifest_widget_and_sample_opens(make_napari_viewer):
    import npe2

    viewer = make_napari_viewer()
    manifest = npe2.PluginManager.instance().get_manifest("plcube")
    names = [w.display_name for w in manifest.contributions.widgets]
    assert names == ["Spectrum at pixel", "Regions", "Process map"]
    for name in names:
        dock, widget = viewer.window.add_plugin_dock_widget("plcube", name)
        assert widget.isVisible() or dock is not None
    viewer.open_sample("plcube", "demo")
    layer = viewer.layers[-1]
    assert layer.data.shape == (256, 48, 64)  # channels, y, x
    assert tuple(layer.scale[1:]) == pytest.approx((0.5, 0.5))


def test_cli_view_missing_path_is_a_user_error(tmp_path, capsys):
    from pmap.cli import main

    assert main(["view", str(tmp_path / "nothing.zarr")]) == 2
    assert "no such file" in capsys.readouterr().err


@pytest.mark.viewer
def test_view_docks_panels_and_screenshot(make_napari_viewer, monkeypatch, qtbot, store, tmp_path):
    import napari

    import pmap.napari_plugin as plugin

    made = []

    def viewer_factory(**kw):
        made.append(make_napari_viewer(show=True))
        made[-1].window._qt_window.resize(1500, 950)
        return made[-1]

    monkeypatch.setattr(napari, "Viewer", viewer_factory)
    monkeypatch.setattr(napari, "run", lambda *a, **k: None)
    assert plugin.view(store) == 0  # what `plcube view STORE` runs
    viewer = made[0]
    docks = viewer.window.dock_widgets
    assert {"Spectrum at pixel (plcube)", "Regions (plcube)", "Process map (plcube)"} <= set(docks)
    assert any(lyr.name == "Peak energy (eV) — peak 0" for lyr in viewer.layers)
    spectrum, regions = docks["Spectrum at pixel (plcube)"], docks["Regions (plcube)"]
    spectrum.select_pixel(5, 6)
    spectrum.pin()
    spectrum.select_pixel(11, 18)
    regions.select_region(1)
    qtbot.wait(300)
    path = tmp_path / "viewer.png"
    viewer.screenshot(str(path), canvas_only=False)
    from matplotlib.image import imread

    img = imread(path)[..., :3]
    assert img.shape[0] > 500 and img.shape[1] > 1000
    assert img.std() > 0.05
    colours = np.unique((img * 255).astype(np.uint8).reshape(-1, 3), axis=0)
    assert len(colours) > 200  # maps, colour bar and plots, not a blank window
