"""Tests of pmap.io.cube_info: value range stored, full scan or a stated chunk sample;
the quick Zarr path (no xarray/dask) against the full open_cube path.

Reference for every value: numpy's min/max of the array written to the file (or of
the chunk regions read), computed here independently of dask (common practice); for
the quick path, the dict of the full path (pmap.io.open_cube) on the same store.
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr

import pmap.cube
from pmap import _cubeinfo, make_cube
from pmap.errors import InputFileError
from pmap.io import _info, cube_info, format_cube_info, save_cube
from pmap.io._write import cube_dataset, write_zarr

WL = np.linspace(600.0, 700.0, 16)


def _plain_store(cube, path, zarr_format=3):
    """The cube as a plain Zarr store, without the statistics save_cube adds."""
    write_zarr(cube_dataset(cube), path, zarr_format=zarr_format)
    return path


@pytest.fixture
def stored(tmp_path):
    """A 24 x 30 x 16 cube in 6 x 10 pixel chunks (12 chunks), with one planted maximum."""
    rng = np.random.default_rng(7)
    data = rng.normal(100.0, 5.0, (24, 30, 16)).astype("float32")
    data[23, 29, 3] = 1e6  # in the last chunk of the grid
    data[6, 12, 5] = -1e6  # in chunk (1, 1): not among the spread sample of 2 below
    cube = make_cube(data, wavelength_nm=WL, chunks={"y": 6, "x": 10})
    return _plain_store(cube, tmp_path / "c.zarr"), data


def _full_path_info(path, monkeypatch, **kw):
    """cube_info through open_cube (the quick path switched off), read_at dropped."""
    with monkeypatch.context() as m:
        m.setattr(_cubeinfo, "quick_zarr_info", lambda *a, **k: None)
        info = cube_info(path, **kw)
    info["provenance"]["input"].pop("read_at")
    return info


def _sample_range(data, chunk_yx, n_pick):
    """Min/max over n_pick whole chunks spread evenly over the (y, x) chunk grid (numpy only)."""
    cy, cx = chunk_yx
    gy, gx = -(-data.shape[0] // cy), -(-data.shape[1] // cx)
    picks = np.unique(np.linspace(0, gy * gx - 1, n_pick).round().astype(int))
    parts = [data[(k // gx) * cy:(k // gx + 1) * cy, (k % gx) * cx:(k % gx + 1) * cx]
             for k in picks]
    return min(p.min() for p in parts), max(p.max() for p in parts), sum(p.size for p in parts)


def test_small_cube_gets_a_full_scan(stored):
    path, data = stored
    info = cube_info(path)
    assert info["value_range_source"] == "full"
    assert info["value_min"] == float(data.min()) and info["value_max"] == float(data.max())
    assert "(full scan)" in format_cube_info(info)


def test_large_cube_is_sampled_and_says_so(stored, monkeypatch):
    path, data = stored
    chunk_bytes = 6 * 10 * 16 * 4
    monkeypatch.setattr(_info, "FULL_SCAN_BYTES", 0)  # every cube counts as large
    monkeypatch.setattr(_info, "SAMPLE_BYTES", 2 * chunk_bytes)  # two chunks
    info = cube_info(path)
    lo, hi, n_read = _sample_range(data, (6, 10), 2)
    assert info["value_range_source"] == "sample"
    assert info["value_range_chunks"] == (2, 12)
    assert info["value_min"] == float(lo) and info["value_max"] == float(hi)
    assert info["value_range_sample"] == pytest.approx(n_read / data.size)
    assert info["value_max"] == 1e6 and info["value_min"] > -1e6  # the planted minimum unseen
    text = format_cube_info(info)
    assert "SAMPLE of 2 of 12 chunks" in text and "--full-range" in text
    full = cube_info(path, full_range=True)
    assert full["value_range_source"] == "full"
    assert full["value_min"] == float(data.min()) == -1e6


def test_stored_actual_range_is_used(tmp_path):
    data = np.arange(2 * 3 * 16, dtype="float32").reshape(2, 3, 16)
    # a CF actual_range (CF conventions 1.10, section 2.5.1) stated by the writer
    cube = make_cube(data, wavelength_nm=WL, attrs={"actual_range": [0.0, 95.0]})
    path = _plain_store(cube, tmp_path / "a.zarr")
    info = cube_info(path)
    assert info["value_range_source"] == "stored"
    assert (info["value_min"], info["value_max"]) == (0.0, 95.0)
    assert "actual_range" in format_cube_info(info)
    full = cube_info(path, full_range=True)
    assert full["value_range_source"] == "full" and full["value_max"] == float(data.max())


@pytest.mark.parametrize("zarr_format", [2, 3])
def test_save_cube_stores_range_and_finite_count(tmp_path, zarr_format):
    rng = np.random.default_rng(11)
    data = rng.normal(50.0, 3.0, (20, 18, 16)).astype("float32")
    data[3, 4, :] = np.nan  # a missing spectrum
    data[17, 2, 9] = np.nan
    data[11, 15, 1] = 7e5
    # a stale range carried in from an input: must not survive a write of other data
    cube = make_cube(data, wavelength_nm=WL, chunks={"y": 7, "x": 5},
                     attrs={"actual_range": [-1.0, 1.0], "pmap_finite_count": 3})
    path = save_cube(cube, tmp_path / "s.zarr", zarr_format=zarr_format)
    info = cube_info(path)
    assert info["value_range_source"] == "stored"
    assert info["value_min"] == float(np.nanmin(data)) and info["value_max"] == 7e5
    assert info["attrs"]["pmap_finite_count"] == int(np.isfinite(data).sum()) == 20 * 18 * 16 - 17
    assert f"{20 * 18 * 16 - 17:,} finite values" in format_cube_info(info)
    full = cube_info(path, full_range=True)
    assert (full["value_range_source"], full["value_min"], full["value_max"]) == (
        "full", info["value_min"], info["value_max"])
    # the data themselves are unchanged by the statistics pass
    np.testing.assert_array_equal(xr.open_zarr(path, consolidated=zarr_format == 2)["intensity"].values, data)


def test_all_nan_cube_stores_no_range(tmp_path):
    data = np.full((4, 5, 16), np.nan, dtype="float32")
    path = save_cube(make_cube(data, wavelength_nm=WL), tmp_path / "n.zarr")
    info = cube_info(path)
    assert "actual_range" not in info["attrs"] and info["value_range_source"] != "stored"


def _cube_variants(tmp_path):
    rng = np.random.default_rng(3)
    data = rng.normal(10.0, 1.0, (3, 22, 26, 16)).astype("float32")
    out = {}
    c = make_cube(data[0], wavelength_nm=WL, y_um=np.arange(22) * 0.25,
                  x_um=np.arange(26) * 0.25, chunks={"y": 8, "x": 8},
                  attrs={"temperature_K": 77.0, "sample": "A1"})
    out["v3 stats"] = save_cube(c, tmp_path / "a.zarr")
    out["v2 stats"] = save_cube(c, tmp_path / "b.zarr", zarr_format=2)
    out["v3 plain"] = _plain_store(c, tmp_path / "c.zarr")
    out["v2 plain"] = _plain_store(c, tmp_path / "d.zarr", zarr_format=2)
    e = make_cube(data[1], energy_ev=np.linspace(1.5, 1.9, 16), chunks={"y": 11, "x": 13})
    out["energy"] = _plain_store(e, tmp_path / "e.zarr")
    s = xr.concat([c, c + 1.0, c + 2.0], dim="temperature").assign_coords(
        temperature=("temperature", [10.0, 150.0, 300.0], {"units": "K"}))
    s.attrs = c.attrs
    out["stack"] = _plain_store(pmap.cube.validate_cube(s, chunks={"y": 8, "x": 8}),
                                tmp_path / "f.zarr")
    return out


def test_quick_path_gives_the_full_paths_info(tmp_path, monkeypatch):
    stores = _cube_variants(tmp_path)
    for sample_bytes in (None, 3 * 8 * 8 * 16 * 4):  # full scan; sample of 3 chunks
        if sample_bytes:
            monkeypatch.setattr(_info, "FULL_SCAN_BYTES", 0)
            monkeypatch.setattr(_info, "SAMPLE_BYTES", sample_bytes)
        for name, path in stores.items():
            quick = _cubeinfo.quick_zarr_info(
                path, full_scan_bytes=_info.FULL_SCAN_BYTES, sample_bytes=_info.SAMPLE_BYTES)
            assert quick is not None, name
            quick["provenance"]["input"].pop("read_at")
            assert quick == _full_path_info(path, monkeypatch), name
    assert quick["value_range_source"] == "sample"
    assert _cubeinfo.quick_zarr_info(stores["v3 plain"], value_range=False)["value_min"] is None


def test_quick_path_declines_what_needs_the_full_path(tmp_path, monkeypatch):
    data = np.random.default_rng(5).normal(10.0, 1.0, (6, 7, 16)).astype("float32")
    # descending wavelengths: the full path reverses the axis
    desc = xr.DataArray(data, dims=("y", "x", "wavelength"), name="intensity", coords={
        "wavelength": ("wavelength", WL[::-1], {"units": "nm"}),
        "y": ("y", np.arange(6.0), {"units": "um"}), "x": ("x", np.arange(7.0), {"units": "um"})})
    desc.to_dataset().to_zarr(tmp_path / "desc.zarr", zarr_format=3)
    # positions in nm: the full path converts them to um
    nm = desc.isel(wavelength=slice(None, None, -1)).assign_coords(
        y=("y", np.arange(6.0) * 500.0, {"units": "nm"}))
    nm.to_dataset().to_zarr(tmp_path / "nm.zarr", zarr_format=3)
    for name in ("desc", "nm"):
        assert _cubeinfo.quick_zarr_info(tmp_path / f"{name}.zarr") is None
    info = cube_info(tmp_path / "desc.zarr")
    assert (info["spectral"]["min"], info["spectral"]["max"]) == (600.0, 700.0)
    assert cube_info(tmp_path / "nm.zarr")["y"]["max"] == 2.5
    # a chunk file deleted: the full path names the missing chunks
    path = _plain_store(make_cube(data, wavelength_nm=WL, chunks={"y": 3, "x": 7}),
                        tmp_path / "gap.zarr")
    (path / "intensity" / "c" / "1" / "0" / "0").unlink()
    assert _cubeinfo.quick_zarr_info(path) is None
    with pytest.raises(InputFileError, match="1 of 2 chunks"):
        cube_info(path)


def test_cli_info_imports_neither_xarray_nor_dask(stored):
    path, data = stored
    code = ("import sys; from pmap.cli import main; rc = main(['info', sys.argv[1]]); "
            "print('HEAVY', sorted(m for m in ('xarray', 'dask', 'pandas') if m in sys.modules))")
    res = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                         text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    assert "HEAVY []" in res.stdout
    line = next(t for t in res.stdout.splitlines() if t.strip().startswith("values"))
    assert "full scan" in line and f"{data.max():.6g}" in line


def test_cli_full_range_option(stored):
    path, data = stored
    env = {**os.environ, "PYTHONWARNINGS": "ignore::DeprecationWarning"}
    res = subprocess.run([sys.executable, "-m", "pmap", "info", str(path), "--full-range"],
                         capture_output=True, text=True, env=env, timeout=300)
    assert res.returncode == 0, res.stderr
    line = next(t for t in res.stdout.splitlines() if t.strip().startswith("values"))
    assert "full scan" in line and f"{data.min():.6g}" in line
