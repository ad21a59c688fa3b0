"""Cheaper drawing of the figures gives the same pixels (issue 14): maps sampled before
they are coloured, histograms as one outline, PNGs as RGB at a low zlib level."""

import matplotlib
import matplotlib.axes
import numpy as np
import pytest
import xarray as xr
from PIL import Image

from pmap import _style, report


def _map(ny, nx, seed=0):
    rng = np.random.default_rng(seed)
    v = rng.permutation(np.resize(np.linspace(-0.1, 1.1, 260), ny * nx)).reshape(ny, nx)
    v[rng.random((ny, nx)) < 0.05] = np.nan
    da = xr.DataArray(v, dims=("y", "x"), name="q", attrs={"units": "eV"},
                      coords={"y": np.arange(ny) * 0.5, "x": np.arange(nx) * 0.5})
    da.y.attrs["units"] = da.x.attrs["units"] = "um"
    return da


def _drawn(fig):
    report._render(fig)
    return np.array(fig.canvas.buffer_rgba())


@pytest.mark.skipif(tuple(int(v) for v in matplotlib.__version__.split(".")[:2]) < (3, 11),
                    reason="compared on matplotlib 3.11")
@pytest.mark.parametrize("shape", [(37, 53), (300, 310), (1100, 900)])
def test_map_sampled_then_coloured_gives_the_pixels_of_colouring_every_value(shape):
    """Every colour map pmap picks, at magnifications above and below 1 (and with the
    map sampled to every k-th pixel), plus a discrete map: the same pixels as
    matplotlib's colouring of every value before sampling."""
    da = _map(*shape)
    cmaps = {c for _, c in _style._CMAP_RULES} | {"viridis"}
    for cmap in sorted(cmaps):
        fig = report._new_figure(shape[0] / shape[1], map_layout=True)
        ax = fig.add_subplot()
        fig.get_layout_engine().ax = ax
        art = report._draw_map(ax, da, cmap=cmap, vlim=(0.0, 1.0))
        assert art.image.get_interpolation_stage() == "data"
        ours = _drawn(fig)
        art.image.set_interpolation_stage("rgba")
        assert np.array_equal(ours, _drawn(fig)), cmap
    levels = da.copy(data=np.where(np.isfinite(da.values), np.round(da.values * 5), np.nan))
    levels.attrs = {"units": "1"}  # whole and dimensionless: discrete colours
    fig = report._new_figure(shape[0] / shape[1], map_layout=True)
    ax = fig.add_subplot()
    fig.get_layout_engine().ax = ax
    art = report._draw_map(ax, levels)
    assert art.levels is not None
    ours = _drawn(fig)
    art.image.set_interpolation_stage("rgba")
    assert np.array_equal(ours, _drawn(fig))


def test_histogram_outline_has_the_pixels_of_one_bar_per_bin(tmp_path, monkeypatch):
    rng = np.random.default_rng(1)
    values = np.concatenate([rng.normal(0, 1, 300), rng.normal(8, 0.2, 50)])  # a gap
    da = xr.DataArray(values, dims=("n",), name="peak_energy", attrs={"units": "eV"})
    hist = matplotlib.axes.Axes.hist

    def bars_hist(self, *a, **k):
        return hist(self, *a, **{**k, "histtype": "bar"})

    for log in (False, True):
        ours = np.asarray(Image.open(report.plot_histogram(da, tmp_path / "a.png", log=log)))
        with monkeypatch.context() as m:
            m.setattr(matplotlib.axes.Axes, "hist", bars_hist)
            bars = np.asarray(Image.open(report.plot_histogram(da, tmp_path / "b.png", log=log)))
        assert np.array_equal(ours, bars)


def test_png_is_rgb_with_the_drawing_pixels(tmp_path, monkeypatch):
    """An opaque figure is written as RGB (the alpha it drops is 255 everywhere)."""
    drawn = []
    save = report._save

    def keep(fig, path, info):
        out = save(fig, path, info)
        drawn.append(np.array(fig.canvas.buffer_rgba()))
        return out

    monkeypatch.setattr(report, "_save", keep)
    path = report.plot_map(_map(40, 60), tmp_path / "m.png")
    with Image.open(path) as im:
        assert im.mode == "RGB"
        pixels = np.asarray(im)
    assert (drawn[0][..., 3] == 255).all()
    assert np.array_equal(pixels, drawn[0][..., :3])


def test_figures_do_not_keep_their_maps(tmp_path):
    """A saved figure lets go of its map at once: with the garbage collector off (figures
    are reference cycles), drawing three 1000 x 1000 maps of a Dataset leaves less than
    one map's worth of memory allocated (each figure's own objects: ~0.4 MB), not a copy
    of the map per figure (issue 14: memory flat in the map size)."""
    import gc
    import tracemalloc

    ds = xr.Dataset({f"m{i}": _map(1000, 1000, seed=i) for i in range(3)})
    report.write_figures(ds.isel(y=slice(0, 20), x=slice(0, 20)), tmp_path / "warm")
    one_map = ds["m0"].nbytes  # 8 MB
    gc.collect()
    gc.disable()
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        written = report.write_figures(ds, tmp_path / "figs")
        kept = tracemalloc.get_traced_memory()[0] - before
    finally:
        tracemalloc.stop()
        gc.enable()
    assert len(written) == 3
    assert kept < one_map, f"{kept / 2**20:.1f} MiB still allocated after drawing"
