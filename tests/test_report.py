"""Tests of pmap.report: PNG figures with units, robust limits and scale bars."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import xarray as xr
from PIL import Image
from scipy import stats

from pmap import _style, report
from pmap.errors import PmapNotice, StepError
from pmap.synthetic import make_demo_cube


def png_info(path):
    """Image size and the pmap Description text chunk of a PNG."""
    with Image.open(path) as im:
        im.load()
        assert im.format == "PNG"
        return im.size, json.loads(im.text["Description"]), np.asarray(im)


def energy_map(ny=30, nx=40, *, outlier=None, seed=0):
    rng = np.random.default_rng(seed)
    data = 1.60 + 0.05 * rng.random((ny, nx))
    data[0, :3] = np.nan
    if outlier is not None:
        data[ny // 2, nx // 2] = outlier
    return xr.DataArray(
        data,
        dims=("y", "x"),
        name="peak_energy",
        coords={
            "y": ("y", np.arange(ny) * 0.5, {"units": "um"}),
            "x": ("x", np.arange(nx) * 0.5, {"units": "um"}),
        },
        attrs={"units": "eV", "long_name": "peak energy"},
    )


@pytest.fixture(scope="module")
def tiny_demo():
    return make_demo_cube(shape=(16, 24), seed=0)


def test_plot_map_writes_png_with_units(tmp_path):
    path = report.plot_map(energy_map(), tmp_path / "sub" / "map.png", title="E")
    assert path.exists() and path.stat().st_size > 5_000
    size, info, pixels = png_info(path)
    assert size[0] > 300 and size[1] > 200
    assert info["colorbar_label"].startswith("Peak energy (eV)")
    assert pixels.std() > 10  # not a blank image


def test_robust_limits_ignore_outlier_and_nan(tmp_path):
    da = energy_map(outlier=1e6)
    _, info, _ = png_info(report.plot_map(da, tmp_path / "robust.png"))
    finite = da.values[np.isfinite(da.values)]
    # 2nd–98th percentile colour limits (common practice), numpy as reference
    np.testing.assert_allclose(info["clim"], np.percentile(finite, [2, 98]), rtol=1e-12)
    assert info["clim"][1] < 1.7
    _, info_full, _ = png_info(report.plot_map(da, tmp_path / "full.png", robust=False))
    assert info_full["clim"] == [pytest.approx(finite.min()), pytest.approx(1e6)]


@pytest.mark.parametrize("width", [0.37, 3.0, 19.5, 48.0, 95.5, 1234.0])
def test_scale_bar_length_is_round(width):
    length = report.nice_scale_length(width)
    mantissa = length / 10 ** math.floor(math.log10(length) + 1e-9)
    assert round(mantissa, 9) in (1.0, 2.0, 5.0)
    # closest 1-2-5 step to a fifth of the width: within sqrt(2.5) of it
    assert 1 / math.sqrt(2.5) <= length / (width / 5) <= math.sqrt(2.5)


def test_scale_bar_drawn_on_map(tmp_path):
    from matplotlib.figure import Figure

    da = energy_map(ny=64, nx=96)  # 48 µm wide
    _, info, _ = png_info(report.plot_map(da, tmp_path / "bar.png"))
    assert info["scale_bar_um"] == 10.0
    fig = Figure()
    ax = fig.add_subplot()
    art = report._draw_map(ax, da)
    bars = [p for p in ax.patches if p.get_gid() == "scale_bar"]
    assert len(bars) == 1 and bars[0].get_width() == pytest.approx(10.0)
    assert any(t.get_text() == "10 µm" for t in ax.texts)
    from matplotlib.colors import to_rgb

    assert art.image.cmap.get_bad()[:3] == pytest.approx(to_rgb(_style.NAN_COLOUR))  # NaN grey
    assert ax.get_aspect() == 1.0
    # no scale bar for maps in pixel units
    ax2 = Figure().add_subplot()
    px = da.assign_coords(x=("x", np.arange(96.0), {"units": "pixel"}))
    assert report._draw_map(ax2, px).scale_bar_um is None


def test_plot_histogram_median_and_spread(tmp_path):
    rng = np.random.default_rng(1)
    da = xr.DataArray(
        rng.normal(1.62, 0.01, (50, 60)),
        dims=("y", "x"),
        name="peak_energy",
        attrs={"units": "eV", "long_name": "peak energy"},
    )
    da[0, 0] = np.nan
    _, info, _ = png_info(report.plot_histogram(da, tmp_path / "h.png"))
    finite = da.values[np.isfinite(da.values)]
    assert info["n"] == finite.size
    assert info["median"] == pytest.approx(np.median(finite), rel=1e-12)
    # 1.4826·MAD: scipy.stats.median_abs_deviation(scale="normal") as the reference
    ref = stats.median_abs_deviation(finite, scale="normal")
    assert info["sigma_mad"] == pytest.approx(ref, rel=1e-4)
    assert "(eV)" in info["xlabel"]


def test_plot_spectra_with_reference(tmp_path, tiny_demo):
    cube, _ = tiny_demo
    path = report.plot_spectra(
        cube, tmp_path / "s.png", pixels=[(8, 12), (2, 20)], reference=cube + 5.0
    )
    _, info, _ = png_info(path)
    assert info["n_spectra"] == 2
    assert "(nm)" in info["xlabel"] and "(counts)" in info["ylabel"]
    _, info_default, _ = png_info(report.plot_spectra(cube, tmp_path / "d.png"))
    assert info_default["n_spectra"] == 3
    with pytest.raises(StepError, match="outside"):
        report.plot_spectra(cube, tmp_path / "bad.png", pixels=[(99, 0)])


def test_plot_labels_legend_names(tmp_path, tiny_demo):
    _, truth = tiny_demo
    _, info, _ = png_info(report.plot_labels(truth["region"], tmp_path / "r.png"))
    present = sorted(int(v) for v in np.unique(truth["region"].values))
    assert info["codes"] == present
    # CF flag_meanings tokens, drawn with blanks for underscores
    tokens = truth["region"].attrs["flag_meanings"].split()
    names = dict(zip([-1, 0, 1, 2], [t.replace("_", " ") for t in tokens]))
    assert info["names"] == [names[c] for c in present]
    lab = xr.DataArray(np.array([[0, 1], [1, 2]]), dims=("y", "x"), name="cluster")
    _, info2, _ = png_info(report.plot_labels(lab, tmp_path / "c.png", names=["a", "b", "c"]))
    assert info2["names"] == ["a", "b", "c"] and info2["scale_bar_um"] is None
    with pytest.raises(StepError, match="non-integer"):
        report.plot_labels(lab.astype(float) + 0.5, tmp_path / "x.png")


def test_write_figures_on_result_dataset(tmp_path, tiny_demo):
    _, truth = tiny_demo
    paths = report.write_figures(truth, tmp_path / "figs")
    names = {p.name for p in paths}
    assert {
        "region.png",
        "peak_energy_band_edge.png",
        "peak_area_defect.png",
        "peak_energy_band_edge_histogram.png",
    } <= names
    assert not any(n.startswith("spike_mask") for n in names)  # has a spectral dim
    assert all(p.stat().st_size > 1_000 for p in paths)
    assert len(paths) == len(set(paths))
    with pytest.raises(StepError, match="not a map"):
        report.write_figures(truth, tmp_path / "x", variables=["spike_mask"])
    with pytest.raises(StepError, match="not in the dataset"):
        report.write_figures(truth, tmp_path / "x", variables=["nope"])


def test_bad_map_input(tmp_path, tiny_demo):
    cube, _ = tiny_demo
    with pytest.raises(StepError, match=r"dims \(y, x\)"):
        report.plot_map(cube, tmp_path / "c.png")
    with pytest.raises(StepError, match="colormap"):
        report.plot_map(energy_map(), tmp_path / "m.png", cmap="no-such-map")
    with pytest.raises(StepError, match="DataArray"):
        report.plot_map(np.zeros((3, 3)), tmp_path / "n.png")


def test_summarise_result_matches_numpy(tiny_demo):
    _, truth = tiny_demo
    row = report.summarise_result(truth)
    e = truth["peak_energy"].values[0]
    finite = e[np.isfinite(e)]
    assert row["peak_energy[band_edge] median (eV)"] == pytest.approx(np.median(finite))
    # 1.4826·MAD: scipy.stats.median_abs_deviation(scale="normal") as the reference
    assert row["peak_energy[band_edge] sigma_MAD (eV)"] == pytest.approx(
        stats.median_abs_deviation(finite, scale="normal"), rel=1e-4
    )
    assert row["peak_energy[band_edge] finite fraction"] == pytest.approx(finite.size / e.size)
    assert not any(k.startswith(("region", "spike_mask", "dead_pixel")) for k in row)


def test_all_nan_map_is_skipped_with_a_note(tmp_path):
    # a map with no finite pixel says nothing: no figure, a note instead (issue 16)
    ds = xr.Dataset({"window_ratio": (("y", "x"), np.full((3, 4), np.nan),
                                      {"units": "1", "long_name": "window ratio"}),
                     "max_energy": (("y", "x"), np.linspace(1.5, 1.6, 12).reshape(3, 4),
                                    {"units": "eV", "long_name": "energy of the maximum"})},
                    coords={"y": ("y", np.arange(3.0), {"units": "um"}),
                            "x": ("x", np.arange(4.0), {"units": "um"})})
    with pytest.warns(PmapNotice, match="every pixel is NaN"):
        paths = report.write_figures(ds, tmp_path)
    assert [p.name for p in paths] == ["max_energy.png"]


def test_histogram_log_axis_for_values_spanning_decades(tmp_path):
    """log=True: equal-ratio bins over the 0.5–99.5 percentiles of the positive values."""
    rng = np.random.default_rng(3)
    vals = np.concatenate([10 ** rng.normal(0.0, 0.6, 3000), [-1.0, 0.0, np.nan]])
    da = xr.DataArray(vals.reshape(1, -1), dims=("y", "x"), name="chi2_red",
                      attrs={"units": "1"})
    _, info, pixels = png_info(report.plot_histogram(da, tmp_path / "h.png", log=True))
    pos = vals[np.isfinite(vals) & (vals > 0)]
    lo, hi = np.percentile(pos, [0.5, 99.5])  # reference: numpy on the same values
    assert info["log"] is True
    assert info["range"] == pytest.approx([lo, hi], rel=1e-12)
    finite = vals[np.isfinite(vals)]
    assert info["outside_below"] == int(np.sum(finite < lo))  # the two values <= 0 included
    assert info["outside_above"] == int(np.sum(finite > hi))
    assert info["n"] == finite.size and info["n_no_value"] == 1
    assert pixels.std() > 10


def test_slices_along_a_stack_dim_are_named_in_the_title(tmp_path):
    """A map on (temperature, y, x) gives one figure per temperature, titled with its value."""
    t = np.array([20.0, 300.0])
    ds = xr.Dataset(
        {"peak_energy": (("temperature", "y", "x"), 1.5 + np.zeros((2, 4, 5)) + t[:, None, None]
                         * 1e-4, {"units": "eV"})},
        coords={"temperature": ("temperature", t, {"units": "K"}),
                "y": ("y", np.arange(4.0), {"units": "um"}),
                "x": ("x", np.arange(5.0), {"units": "um"})})
    paths = [p for p in report.write_figures(ds, tmp_path) if "histogram" not in p.name]
    titles = [png_info(p)[1]["title"] for p in paths]
    assert titles == ["Peak energy (eV) — temperature 20 K", "Peak energy (eV) — temperature 300 K"]


def test_figures_drawn_in_two_processes_are_the_same_files(tmp_path, tiny_demo, monkeypatch):
    """write_figures in forked processes (Linux) writes the same PNG bytes, in the same
    order, as drawing every figure in this process (the reference)."""
    import hashlib
    import sys

    _, truth = tiny_demo
    import os

    digests = {}
    forks = []
    os_fork = os.fork
    for n in ("1", "2"):
        monkeypatch.setenv("PMAP_FIGURE_PROCESSES", n)
        if n == "2":
            monkeypatch.setattr(os, "fork", lambda: (forks.append(1), os_fork())[1])
        paths = report.write_figures(truth, tmp_path / n)
        digests[n] = [(p.name, hashlib.sha256(p.read_bytes()).hexdigest()) for p in paths]
    assert len(digests["1"]) >= report.FORK_MIN_FIGURES
    assert digests["2"] == digests["1"]
    can_fork = sys.platform.startswith("linux") and len(os.sched_getaffinity(0)) >= 2
    assert len(forks) == (1 if can_fork else 0) * len(list(report._map_groups(
        truth, [n for n in truth.data_vars if {"y", "x"} <= set(truth[n].dims)
                and not set(truth[n].dims) & {"energy", "wavelength"}])))


def test_a_failed_forked_drawer_is_redrawn_here(tmp_path, monkeypatch):
    """A figure job that fails in the forked copy is drawn again by this process: every
    file is written, by this process (its pid in the file)."""
    import os
    import sys

    if not (sys.platform.startswith("linux") and len(os.sched_getaffinity(0)) >= 2):
        pytest.skip("figures are drawn in one process here")
    monkeypatch.setenv("PMAP_FIGURE_PROCESSES", "2")

    def job(path):
        if getattr(report._SAVES, "in_child", False):
            raise RuntimeError("fails in the forked copy")
        path.write_text(str(os.getpid()))
        return path

    paths = [tmp_path / f"f{i}.txt" for i in range(6)]
    done = report._draw_jobs([(p, (job, (p,), {})) for p in paths])
    assert done == paths
    assert [p.read_text() for p in paths] == [str(os.getpid())] * 6


def test_a_map_larger_than_its_axes_is_drawn_from_every_kth_pixel(tmp_path, monkeypatch):
    """A map with over twice as many pixels as its axes is drawn from every k-th pixel:
    at the centre of each 40 x 40-pixel block the colour is the one drawn from the whole
    map (the reference: the same figure with sampling turned off), the image holds the
    sampled values, and the figure's statistics come from the whole map."""
    n, b = 1320, 40
    rng = np.random.default_rng(3)
    levels = rng.permutation(np.linspace(1.5, 1.7, (n // b) ** 2)).reshape(n // b, n // b)
    v = np.kron(levels, np.ones((b, b)))
    v[:b, :b] = np.nan
    da = xr.DataArray(v, dims=("y", "x"), name="peak_energy",
                      attrs={"units": "eV", "long_name": "peak energy"},
                      coords={"y": ("y", np.arange(n) * 0.5, {"units": "um"}),
                              "x": ("x", np.arange(n) * 0.5, {"units": "um"})})
    shapes = []
    cls = report._map_layout()
    real = cls._decimate

    def spy(self, w_px, h_px):
        real(self, w_px, h_px)
        shapes.append(self.image.get_array().shape)

    monkeypatch.setattr(cls, "_decimate", spy)
    _, info_s, a = png_info(report.plot_map(da, tmp_path / "sampled.png"))
    monkeypatch.setattr(cls, "_decimate", lambda self, w_px, h_px: None)
    _, info_f, f = png_info(report.plot_map(da, tmp_path / "full.png"))
    x0, y0, x1, y1 = info_s["axes_px"]
    assert info_f["axes_px"] == info_s["axes_px"]
    k = int(n // (x1 - x0))
    assert k >= 2 and shapes[-1] == (-(-n // k), -(-n // k))
    for key in ("clim", "n_no_value", "n_value", "colorbar_label", "extent"):
        assert info_s[key] == info_f[key]
    assert info_s["n_no_value"] == b * b
    a, f = a[..., :3], f[..., :3]
    centres = (np.arange(n // b) + 0.5) / (n // b)
    cols = np.round(x0 + centres * (x1 - x0)).astype(int)
    rows = np.round(y1 - centres * (y1 - y0)).astype(int)  # y up
    assert np.array_equal(a[np.ix_(rows, cols)], f[np.ix_(rows, cols)])
    assert len(np.unique(f[np.ix_(rows, cols)].reshape(-1, 3), axis=0)) > 100


def test_a_drawer_is_forked_only_onto_an_idle_core(monkeypatch):
    """Unless PMAP_FIGURE_PROCESSES says otherwise, a second drawing process starts only
    when a core is idle (a copy costs CPU that only an idle core repays)."""
    import os
    import sys

    if not (sys.platform.startswith("linux") and len(os.sched_getaffinity(0)) >= 2):
        pytest.skip("figures are drawn in one process here")
    monkeypatch.delenv("PMAP_FIGURE_PROCESSES", raising=False)
    for idle, expected in ((0, 1), (1, 2), (5, report.FIGURE_PROCESSES)):
        monkeypatch.setattr(report, "_idle_cores", lambda cores, k=idle: k)
        assert report._figure_processes(20) == expected
    assert report._figure_processes(report.FORK_MIN_FIGURES - 1) == 1
    monkeypatch.setattr(report, "_idle_cores", lambda cores: 0)
    monkeypatch.setenv("PMAP_FIGURE_PROCESSES", "2")  # stated: whatever the load
    assert report._figure_processes(20) == 2
