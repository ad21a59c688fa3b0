"""Tests of region_statistics, region_table and write_region_csv against numpy computed directly.

Reference: numpy's mean / nanmean / nanstd on the same pixels (common practice);
areas = pixel count × pixel pitch² from the coordinates.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from test_decomposition import PIXEL_UM, toy_cube

from pmap.decomposition import region_statistics, region_table, write_region_csv
from pmap.errors import StepError


@pytest.fixture(scope="module")
def setup():
    cube, truth, _, energy = toy_cube(chunks={"y": 7, "x": 11})
    rng = np.random.default_rng(2)
    region = xr.DataArray(
        truth.astype(np.int32),
        dims=("y", "x"),
        coords={"y": cube["y"], "x": cube["x"]},
        attrs={"k": 3},
    )
    pe = rng.normal(1.45, 0.01, (2, *truth.shape))
    pe[0, 4, 4] = np.nan
    fwhm = rng.normal(0.04, 0.003, truth.shape)
    maps = xr.Dataset(
        {
            "peak_energy": (("peak", "y", "x"), pe, {"units": "eV", "long_name": "peak energy"}),
            "peak_fwhm": (("y", "x"), fwhm, {"units": "eV"}),
        },
        coords={"peak": [0, 1], "y": cube["y"], "x": cube["x"]},
    )
    return cube, truth, region, maps


def test_counts_areas_fractions(setup):
    cube, truth, region, maps = setup
    st = region_statistics(region, maps)
    counts = np.array([(truth == r).sum() for r in range(3)])
    np.testing.assert_array_equal(st["region_pixel_count"], counts)
    # Area = count × (0.5 µm)², from the coordinate spacing.
    np.testing.assert_allclose(st["region_area_um2"], counts * PIXEL_UM**2, rtol=1e-12)
    assert st["region_area_um2"].attrs["units"] == "um2"
    np.testing.assert_allclose(st["region_fraction"], counts / (truth >= 0).sum(), rtol=1e-12)
    assert st.attrs["n_no_signal_pixels"] == (truth < 0).sum()


def test_map_means_and_stds_against_numpy(setup):
    cube, truth, region, maps = setup
    st = region_statistics(region, maps)
    for r in range(3):
        sel = truth == r
        for p in range(2):
            vals = maps["peak_energy"].values[p][sel]
            assert st["peak_energy_mean"].values[r, p] == pytest.approx(np.nanmean(vals), rel=1e-12)
            assert st["peak_energy_std"].values[r, p] == pytest.approx(np.nanstd(vals), rel=1e-9)
        vals = maps["peak_fwhm"].values[sel]
        assert st["peak_fwhm_mean"].values[r] == pytest.approx(vals.mean(), rel=1e-12)
        assert st["peak_fwhm_std"].values[r] == pytest.approx(vals.std(), rel=1e-9)
    assert st["peak_energy_mean"].dims == ("region", "peak")
    assert st["peak_energy_mean"].attrs["units"] == "eV"
    st1 = region_statistics(region, maps, ddof=1)
    vals = maps["peak_fwhm"].values[truth == 1]
    assert st1["peak_fwhm_std"].values[1] == pytest.approx(vals.std(ddof=1), rel=1e-9)


def test_mean_spectra_against_numpy_on_chunked_cube(setup):
    cube, truth, region, maps = setup
    assert len(cube.chunks[0]) > 1
    st = region_statistics(region, maps, cube)
    x = np.asarray(cube.values, dtype=np.float64)
    for r in range(3):
        sel = x[truth == r]
        np.testing.assert_allclose(
            st["region_mean_spectrum"].values[r], sel.mean(axis=0), rtol=1e-10, atol=1e-10
        )
        np.testing.assert_allclose(
            st["region_std_spectrum"].values[r], sel.std(axis=0), rtol=1e-8, atol=1e-10
        )
    assert st["region_mean_spectrum"].dims == ("region", "energy")
    assert st["region_mean_spectrum"].attrs["units"] == "counts"


def test_empty_region_and_pixel_coordinates():
    lab = np.array([[0, 0, -1], [2, 2, -1]], dtype=np.int32)
    region = xr.DataArray(lab, dims=("y", "x"), attrs={"k": 3})
    st = region_statistics(region)
    np.testing.assert_array_equal(st["region_pixel_count"], [2, 0, 2])
    np.testing.assert_array_equal(st["region_area_pixel2"], [2, 0, 2])
    np.testing.assert_allclose(st["region_fraction"], [0.5, 0.0, 0.5])


def test_table_and_csv(setup, tmp_path):
    cube, truth, region, maps = setup
    st = region_statistics(region, maps, cube)
    df = region_table(st)
    assert list(df.index) == [0, 1, 2]
    assert "peak_energy_mean[peak=1]" in df.columns and "peak_fwhm_std" in df.columns
    assert not any("spectrum" in c for c in df.columns)
    assert df.attrs["units"]["region_area_um2"] == "um2"
    path = write_region_csv(st, tmp_path / "regions.csv")
    back = pd.read_csv(path, index_col=0)
    assert "region_area_um2 [um2]" in back.columns
    np.testing.assert_allclose(back["peak_fwhm_mean [eV]"], df["peak_fwhm_mean"], rtol=1e-9)


def test_csv_leaves_out_maps_without_a_value(setup, tmp_path):
    """A map that is NaN everywhere (a window ratio whose window holds no channel) gets no
    empty columns in the CSV (issue 16: the figure is skipped, and so is the column)."""
    cube, truth, region, maps = setup
    maps = maps.assign(window_ratio=maps["peak_fwhm"] * np.nan)
    st = region_statistics(region, maps, cube)
    assert "window_ratio_mean" in region_table(st).columns
    back = pd.read_csv(write_region_csv(st, tmp_path / "r.csv"), index_col=0)
    assert not any(c.startswith("window_ratio") for c in back.columns)
    assert not back.isna().all().any() and "peak_fwhm_mean [eV]" in back.columns


def test_bad_input(setup):
    cube, truth, region, maps = setup
    with pytest.raises(StepError, match="labels"):
        region_statistics(region.astype(float))
    with pytest.raises(StepError, match="shape"):
        region_statistics(region, maps.isel(x=slice(0, 5)))
    with pytest.raises(StepError, match="differs"):
        region_statistics(region, None, cube.isel(y=slice(0, 5)))
    with pytest.raises(StepError, match="y, x"):
        region_statistics(region.expand_dims(time=2))
