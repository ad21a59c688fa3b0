"""Viewer logic without Qt (pmap.napari_plugin._model): pixel look-up, masks, histograms, labels."""

import numpy as np
import pytest
import xarray as xr

from pmap import _style
from pmap.napari_plugin._model import (
    Grid,
    MapSource,
    cube_layer,
    fit_settings,
    grid_of,
    map_label,
    pixel_at,
    region_histograms,
    robust_limits,
    shape_mask,
)


@pytest.fixture
def grid():
    # 6 rows × 8 columns, 0.5 µm pitch, first pixel at (10 µm, 20 µm)
    return Grid(10.0 + 0.5 * np.arange(6), 20.0 + 0.5 * np.arange(8))


def test_pixel_at_nearest_and_outside(grid):
    assert pixel_at((10.0, 20.0), grid) == (0, 0)
    assert pixel_at((11.26, 21.74), grid) == (3, 3)  # 1.26/0.5 = 2.52 -> 3 ; 1.74/0.5 = 3.48 -> 3
    assert pixel_at((99.0, 7.0, 12.6, 23.5), grid) == (5, 7)  # leading slider dims are ignored
    assert pixel_at((9.76, 20.0), grid) == (0, 0)  # inside the half-pixel border
    assert pixel_at((9.70, 20.0), grid) is None
    assert pixel_at((12.0, 24.0), grid) is None  # past the last pixel + half a pitch
    assert pixel_at((np.nan, 20.0), grid) is None


def test_rectangle_and_polygon_masks(grid):
    # rectangle with edges between pixel centres: rows 1..3, columns 2..5
    rect = np.array([[10.25, 20.75], [10.25, 22.75], [11.75, 22.75], [11.75, 20.75]])
    m = shape_mask(rect, grid, shape_type="rectangle")
    expected = np.zeros(grid.shape, bool)
    expected[1:4, 2:6] = True
    np.testing.assert_array_equal(m, expected)
    # triangle: centres with y >= 10.1, x >= 20.1 and (y - 10) + (x - 20) <= 2.1 (half-planes, by hand)
    tri = np.array([[10.1, 20.1], [10.1, 22.2], [12.2, 20.1]])
    yy, xx = np.meshgrid(grid.y, grid.x, indexing="ij")
    by_hand = (yy >= 10.1) & (xx >= 20.1) & ((yy - 10.1) + (xx - 20.1) <= 2.1)
    np.testing.assert_array_equal(shape_mask(tri, grid), by_hand)
    # ellipse given by its bounding box: centre (11.25, 21.75), semi-axes 1.0 (y), 1.6 (x)
    box = np.array([[10.25, 20.15], [10.25, 23.35], [12.25, 23.35], [12.25, 20.15]])
    ell = ((yy - 11.25) / 1.0) ** 2 + ((xx - 21.75) / 1.6) ** 2 <= 1
    np.testing.assert_array_equal(shape_mask(box, grid, shape_type="ellipse"), ell)
    assert not shape_mask(rect[:2], grid, shape_type="line").any()


def test_mean_spectrum_over_mask_equals_numpy(rng):
    data = rng.normal(100, 5, size=(6, 8, 5)).astype("float32")
    cube = xr.DataArray(
        data,
        dims=("y", "x", "energy"),
        coords={
            "y": ("y", 0.5 * np.arange(6), {"units": "um"}),
            "x": ("x", 0.5 * np.arange(8), {"units": "um"}),
            "energy": ("energy", np.linspace(1.5, 1.7, 5), {"units": "eV"}),
        },
        attrs={"units": "counts"},
        name="intensity",
    ).chunk({"y": 3, "x": 4})
    src = MapSource(cube=cube)
    mask = np.zeros((6, 8), bool)
    mask[2:5, 1:3] = True
    mask[0, 7] = True
    axis, mean, n = src.mean_spectrum(mask)
    assert n == 7
    np.testing.assert_allclose(mean, data[mask].mean(axis=0), rtol=1e-6)
    np.testing.assert_allclose(axis, np.linspace(1.5, 1.7, 5))
    assert src.mean_spectrum(np.zeros((6, 8), bool)) is None
    # the spectrum at a pixel is the cube's values there
    np.testing.assert_array_equal(src.spectrum(4, 6)[1], data[4, 6])


def test_robust_limits_are_numpy_percentiles(rng):
    v = rng.normal(size=(50, 40))
    v[0, 0] = 1e9  # an outlier does not stretch the limits
    v[1, 1] = np.nan
    lo, hi = robust_limits(v)
    ok = v[np.isfinite(v)]
    assert (lo, hi) == pytest.approx(tuple(np.percentile(ok, [1, 99])))  # numpy reference
    assert robust_limits(np.full(5, np.nan)) == (0.0, 1.0)
    assert robust_limits(np.ones(5)) == (0.5, 1.5)


def test_region_histograms_match_numpy(rng):
    vals = rng.normal(1.6, 0.02, size=(20, 30))
    reg = rng.integers(-1, 3, size=(20, 30))
    vals[3, 3] = np.nan
    edges, counts = region_histograms(vals, reg, bins=12, limits=(1.5, 1.7))
    assert sorted(counts) == [0, 1, 2]  # "no signal" (-1) is left out
    for r, c in counts.items():
        sel = vals[(reg == r) & np.isfinite(vals)]
        np.testing.assert_array_equal(c, np.histogram(sel, bins=np.linspace(1.5, 1.7, 13))[0])
    np.testing.assert_allclose(edges, np.linspace(1.5, 1.7, 13))


def test_map_labels_carry_units():
    # the viewer's layer names are the figures' titles (pmap._style.map_title)
    assert map_label("peak_energy", "eV", dim="peak", index=0) == "Peak energy (eV) — peak 0"
    assert map_label("peak_fwhm_err", "eV", dim="peak", index=1) == \
        "Peak FWHM 1σ uncertainty (eV) — peak 1"
    assert map_label("chi2_red", "1") == "Reduced χ²"
    assert map_label("region") == "Regions"
    assert map_label("peak_energy", "eV", dim="peak", index=0) == _style.map_title(
        "peak_energy", attrs={"units": "eV"}, dim="peak", index=0)


def test_grid_units_and_cube_layer(rng):
    cube = xr.DataArray(
        rng.random((2, 4, 6, 9)).astype("float32"),
        dims=("temperature", "y", "x", "wavelength"),
        coords={
            "temperature": [10.0, 300.0],
            "y": ("y", 1.0 + 0.25 * np.arange(4), {"units": "um"}),
            "x": ("x", 2.0 + 0.5 * np.arange(6), {"units": "um"}),
            "wavelength": ("wavelength", 600.0 + 2.0 * np.arange(9), {"units": "nm"}),
        },
        attrs={"units": "counts"},
        name="intensity",
    ).chunk()
    data, kw, kind = cube_layer(cube)
    assert kind == "image"
    assert data.shape == (2, 9, 4, 6)  # stack, spectral slider, y, x
    assert hasattr(data, "dask")  # stays lazy
    assert kw["scale"] == pytest.approx((1.0, 2.0, 0.25, 0.5))
    assert kw["translate"] == pytest.approx((0.0, 600.0, 1.0, 2.0))
    assert kw["axis_labels"] == ("temperature", "wavelength", "y", "x")
    assert kw["name"] == "spectra [counts]"
    assert grid_of(cube.drop_vars("x")).units == "pixel"


def test_fit_settings_from_provenance():
    import json

    ds = xr.Dataset(
        attrs={
            "pmap_provenance": json.dumps(
                {
                    "steps": [
                        {"step": "to_energy", "params": {}},
                        {"step": "fit_peaks", "params": {"model": "voigt", "peaks": 2}},
                    ],
                    "pipeline": {"fit": {"model": "voigt", "background": "linear"}},
                }
            )
        }
    )
    s = fit_settings(ds)
    assert s["model"] == "voigt" and s["background"] == "linear"
    assert fit_settings(xr.Dataset())["model"] == "gaussian"  # fit_peaks' default
