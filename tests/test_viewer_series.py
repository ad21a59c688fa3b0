"""The viewer with stacks and series: napari's slider for the stack dim, the per-pixel series
with its law in the spectrum panel, integer maps in discrete colours as in the figures.

Qt tests run under Xvfb (``xvfb-run -a python -m pytest tests/test_viewer_series.py``).
Truth: GaAs Varshni parameters of Vurgaftman, Meyer & Ram-Mohan, J. Appl. Phys. 89, 5815
(2001) (/work/shared/REFERENCES.md).
"""

import json
import os
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from matplotlib.colors import to_rgba
from PIL import Image

from pmap import _style, report
from pmap.napari_plugin._model import discrete_colours, result_layers, series_at
from pmap.series import fit_law

E0, ALPHA, BETA = 1.519, 0.5405e-3, 204.0
T = np.array([20.0, 60, 100, 140, 180, 220, 260, 300])
SHOTS = Path(os.environ.get("PMAP_SHOTS", "/tmp/pmap_viewer_shots"))


@pytest.fixture(scope="module")
def stack_result(tmp_path_factory):
    """A temperature stack cube processed by the real pipeline (spectra kept)."""
    from pmap.io import save_cube
    from pmap.pipeline import process

    tmp = tmp_path_factory.mktemp("stack")
    rng = np.random.default_rng(3)
    e_true = E0 - ALPHA * T**2 / (T + BETA)  # Varshni (1967)
    energy = np.linspace(1.35, 1.60, 200)
    spec = 2000 * np.exp(-0.5 * ((energy[None] - e_true[:, None]) / 0.008) ** 2) + 20
    data = rng.poisson(np.broadcast_to(spec[:, None, None, :], (8, 6, 7, 200))).astype(float)
    cube = xr.DataArray(
        data, dims=("temperature", "y", "x", "energy"), name="intensity",
        coords={"temperature": ("temperature", T, {"units": "K"}),
                "energy": ("energy", energy, {"units": "eV"}),
                "y": ("y", np.arange(6.0) * 0.5, {"units": "um"}),
                "x": ("x", np.arange(7.0) * 0.5, {"units": "um"})},
        attrs={"units": "counts", "gain_e_per_count": 1.0, "read_noise_counts": 0.0,
               "dark_level_counts": 0.0})
    save_cube(cube, tmp / "stack.zarr")
    res_path = tmp / "stack_result.zarr"
    res = process(tmp / "stack.zarr", res_path, progress=False, peaks=1)
    series = fit_law(res, law="varshni")
    series.attrs["pmap_result"] = 1
    series.to_zarr(str(tmp / "series.zarr"), mode="w", consolidated=False)
    from pmap.results import mark_complete

    mark_complete(tmp / "series.zarr")
    return {"cube": tmp / "stack.zarr", "result": res_path, "series": tmp / "series.zarr",
            "data": data}


# ----------------------------------------------------------------------- no Qt


def test_series_at_stored_and_fitted_here(stack_result):
    from pmap.results import open_result

    res = open_result(stack_result["result"])
    ser = open_result(stack_result["series"])
    stored = series_at(ser, 2, 3)
    here = series_at(res, 2, 3)
    assert not stored["fitted_here"] and here["fitted_here"]
    assert stored["law"] == here["law"] == "varshni" and stored["dim"] == "temperature"
    np.testing.assert_array_equal(stored["x"], T)
    np.testing.assert_allclose(stored["y"], res["peak_energy"].isel(peak=0, y=2, x=3).transpose("temperature").values)
    np.testing.assert_allclose(stored["yerr"], res["peak_energy_err"].isel(peak=0, y=2, x=3).transpose("temperature").values)
    # the same weighted fit: the whole-map fit at that pixel and the one-pixel fit here
    for p in ("e0", "alpha", "beta"):
        want = float(ser[f"varshni_{p}"].isel(peak=0, y=2, x=3))
        assert stored["params"][p][0] == pytest.approx(want, rel=1e-12)
        assert here["params"][p][0] == pytest.approx(want, rel=1e-6)
    # and E0 is GaAs's within 4 of its 1-sigma (one pixel; from memory: honest pulls,
    # tests/test_series.py)
    e0, e0_err = stored["params"]["e0"]
    assert abs(e0 - E0) < 4 * e0_err
    # the curve is the law at the stored parameters (Varshni 1967)
    a, b = stored["params"]["alpha"][0], stored["params"]["beta"][0]
    cx = stored["curve_x"]
    np.testing.assert_allclose(stored["curve_y"], e0 - a * cx**2 / (cx + b), rtol=1e-12)


def _status_ds():
    st = np.zeros((6, 8), np.int8)
    st[0, :3] = 4
    st[5, 5:] = 6
    n_iter = np.full((6, 8), 5.0)
    n_iter[2:, :] = 9.0
    n_iter[0, 0] = np.nan
    return xr.Dataset(
        {"varshni_status": (("y", "x"), st, {"units": "1", "flag_values": [0, 1, 4, 5, 6],
                                              "flag_meanings": "converged iteration_limit "
                                              "masked_or_nan solver_failure implausible"}),
         "n_iter": (("y", "x"), n_iter, {"units": "1"}),
         "peak_energy": (("y", "x"), np.full((6, 8), 1.5), {"units": "eV"})},
        coords={"y": ("y", np.arange(6.0), {"units": "um"}),
                "x": ("x", np.arange(8.0), {"units": "um"})})


def test_integer_maps_get_the_figures_discrete_colours(tmp_path):
    from napari.layers import Labels

    ds = _status_ds()
    layers = {kw["name"]: (d, kw, k) for d, kw, k in result_layers(ds)}
    # status (CF flags): the figure's label colours (pmap.report.plot_labels)
    path = report.plot_labels(ds["varshni_status"], tmp_path / "s.png")
    with Image.open(path) as im:
        info = json.loads(im.text["Description"])
    fig = dict(zip(info["codes"], info["colours"]))
    data, kw, kind = layers[_style.map_title("varshni_status", attrs=ds["varshni_status"].attrs)]
    assert kind == "labels"
    lab = Labels(data, **{k: v for k, v in kw.items() if k != "units"})
    off = kw["metadata"]["pmap"]["label_offset"]
    for code in (0, 4, 6):
        got = lab.colormap.map(np.array([code + off]))[0]
        assert got[:3] == pytest.approx(to_rgba(fig[code])[:3], abs=1e-3), code
    assert fig[4] == _style.NAN_COLOUR  # "masked or nan": no value, grey in both
    # n_iter (float, whole values, NaN): the figure's sampled colour map (pmap.report.plot_map)
    path = report.plot_map(ds["n_iter"], tmp_path / "n.png")
    with Image.open(path) as im:
        info = json.loads(im.text["Description"])
    assert info["discrete_levels"] == [5, 9]
    data, kw, kind = layers["Fit iterations"]
    assert kind == "labels"
    import matplotlib as mpl

    base = mpl.colormaps[_style.colormap_for("n_iter")]
    lab = Labels(data, **{k: v for k, v in kw.items() if k != "units"})
    for i, lv in enumerate((5, 9)):
        got = lab.colormap.map(np.array([lv + kw["metadata"]["pmap"]["label_offset"]]))[0]
        # napari stores label colours in 8 bits: 1/255 apart at most
        assert got[:3] == pytest.approx(base(i / 1)[:3], abs=1.01 / 255)
    assert data[0, 0] == 0  # NaN: label 0, transparent over the no-value grey
    # a physical quantity stays continuous even when whole
    assert discrete_colours("peak_energy", ds["peak_energy"]) is None
    assert layers["Peak energy (eV)"][2] == "image"


# ----------------------------------------------------------------------- Qt


def _shot(viewer, qtbot, name):
    qtbot.wait(300)
    SHOTS.mkdir(parents=True, exist_ok=True)
    path = SHOTS / name
    viewer.screenshot(str(path), canvas_only=False)
    return path


@pytest.mark.viewer
def test_stack_result_slider_and_series_panel(make_napari_viewer, qtbot, stack_result):
    from pmap.napari_plugin import orient_y_up
    from pmap.napari_plugin._qt import SpectrumPanel

    viewer = make_napari_viewer(show=True)
    viewer.window._qt_window.resize(1500, 950)
    viewer.open(str(stack_result["result"]), plugin="plcube")
    orient_y_up(viewer)
    pe = next(lyr for lyr in viewer.layers if lyr.name == "Peak energy (eV) — peak 0")
    assert pe.ndim == 3 and tuple(pe.axis_labels) == ("temperature", "y", "x")
    assert viewer.dims.nsteps[0] == len(T)  # napari's own slider along temperature
    panel = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(panel, name="spectrum")
    panel.select_pixel(2, 3)
    assert {"spectrum", "fit", "series", "law"} <= set(panel.lines)
    assert panel.series["fitted_here"]
    viewer.dims.set_current_step(0, 5)
    qtbot.wait(100)
    assert panel.stack_at() == {"temperature": 5}
    from pmap.results import open_result

    res = open_result(stack_result["result"])
    want = res["intensity"].isel(temperature=5, y=2, x=3).values
    np.testing.assert_allclose(panel.lines["spectrum"].get_ydata(), want)
    assert "temperature 220 K" in panel.info.text() and "Varshni: e0 = " in panel.info.text()
    # the raw input (provenance) at the same temperature (energies ascending on both)
    np.testing.assert_allclose(panel.lines["raw"].get_ydata(), stack_result["data"][5, 2, 3])
    path = _shot(viewer, qtbot, "stack_result.png")
    assert Image.open(path).size[0] > 1000


@pytest.mark.viewer
def test_series_store_panel(make_napari_viewer, qtbot, stack_result):
    from pmap.napari_plugin import orient_y_up
    from pmap.napari_plugin._qt import SpectrumPanel

    viewer = make_napari_viewer(show=True)
    viewer.window._qt_window.resize(1500, 950)
    viewer.open(str(stack_result["series"]), plugin="plcube")
    orient_y_up(viewer)
    top = [lyr for lyr in viewer.layers if lyr.visible and lyr.name.startswith("Varshni e0")]
    assert top, [lyr.name for lyr in viewer.layers]
    status = next(lyr for lyr in viewer.layers if lyr.name.startswith("Varshni fit status"))
    assert type(status).__name__ == "Labels"
    panel = SpectrumPanel(viewer)
    viewer.window.add_dock_widget(panel, name="spectrum")
    panel.select_pixel(4, 1)
    assert {"series", "law", "residual"} <= set(panel.lines)
    assert not panel.series["fitted_here"]
    resid = panel.lines["residual"].get_ydata()
    assert resid.size == len(T) and np.all(np.abs(resid) < 5)  # pulls of one pixel's points
    path = _shot(viewer, qtbot, "series_store.png")
    assert Image.open(path).size[0] > 1000


@pytest.mark.viewer
def test_stack_cube_slider(make_napari_viewer, qtbot, stack_result):
    from pmap.napari_plugin._qt import SpectrumPanel

    viewer = make_napari_viewer(show=True)
    viewer.open(str(stack_result["cube"]), plugin="plcube")
    [layer] = list(viewer.layers)
    assert tuple(layer.axis_labels) == ("temperature", "energy", "y", "x")
    assert viewer.dims.nsteps[0] == len(T)
    panel = SpectrumPanel(viewer)
    viewer.dims.set_current_step(0, 3)
    panel.select_pixel(1, 2)
    assert panel.stack_at() == {"temperature": 3}
    np.testing.assert_allclose(panel.lines["spectrum"].get_ydata(),
                               stack_result["data"][3, 1, 2])
    _shot(viewer, qtbot, "stack_cube.png")
