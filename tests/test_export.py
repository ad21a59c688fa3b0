"""Exports of one map (pmap.export, ``plcube export``) and figures at a chosen size and dpi.

References: the TIFF 6.0 specification (Adobe, 1992), section 8 — XResolution and
YResolution are pixels per ResolutionUnit, ResolutionUnit 3 = centimetre; 1 inch =
2.54 cm exactly (international yard and pound agreement, 1959).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import tifffile
import xarray as xr
from PIL import Image

from pmap.cli import main
from pmap.errors import StepError
from pmap.export import export_map, select_map
from pmap.results import open_result

DY_UM, DX_UM = 0.25, 0.5  # different on purpose: a swapped axis shows


@pytest.fixture
def store(tmp_path):
    rng = np.random.default_rng(7)
    ny, nx = 9, 13
    pe = 1.5 + 0.2 * rng.random((2, ny, nx))
    pe[0, 2, 3] = np.nan
    pe[1, 0, 0] = np.nan
    status = rng.integers(0, 4, size=(ny, nx)).astype(np.int8)
    ds = xr.Dataset(
        {"peak_energy": (("peak", "y", "x"), pe, {"units": "eV", "long_name": "peak energy"}),
         "integrated_intensity": (("y", "x"), 1e5 * rng.random((ny, nx)), {"units": "counts"}),
         "fit_status": (("y", "x"), status, {"units": "1", "flag_values": [0, 1, 2, 3],
                                             "flag_meanings": "a b c d"})},
        coords={"peak": [0, 1], "y": ("y", 10.0 + np.arange(ny) * DY_UM, {"units": "um"}),
                "x": ("x", -3.0 + np.arange(nx) * DX_UM, {"units": "um"})},
        attrs={"pmap_result": 1, "pmap_complete": True},
    )
    path = tmp_path / "r.zarr"
    ds.to_zarr(str(path), mode="w", consolidated=False)
    return path


def _expected(path, name, **isel):
    return open_result(path)[name].isel(isel).transpose("y", "x").load()


def test_csv_values_equal_the_store_with_units_in_the_header(store, tmp_path):
    out = tmp_path / "pe1.csv"
    assert main(["export", str(store), "peak_energy", "--peak", "1", "-o", str(out)]) == 0
    table = pd.read_csv(out)
    assert list(table.columns) == ["x (um)", "y (um)", "peak_energy (eV)"]
    ref = _expected(store, "peak_energy", peak=1)
    yy, xx = np.meshgrid(ref["y"].values, ref["x"].values, indexing="ij")
    np.testing.assert_array_equal(table["x (um)"].to_numpy(), xx.ravel())
    np.testing.assert_array_equal(table["y (um)"].to_numpy(), yy.ravel())
    # bit-for-bit (repr round-trips a float64), NaN where the store has NaN
    np.testing.assert_array_equal(table["peak_energy (eV)"].to_numpy(), ref.values.ravel())
    assert np.isnan(table["peak_energy (eV)"].to_numpy()[0])


def test_csv_of_an_integer_map(store, tmp_path):
    out = export_map(open_result(store), "fit_status", tmp_path / "st.csv")
    table = pd.read_csv(out)
    assert table.columns[-1] == "fit_status (1)"
    assert table["fit_status (1)"].dtype.kind == "i"
    np.testing.assert_array_equal(table["fit_status (1)"].to_numpy(),
                                  _expected(store, "fit_status").values.ravel())


def test_tiff_float32_values_and_pixel_size_read_back(store, tmp_path):
    out = tmp_path / "pe0.tif"
    assert main(["export", str(store), "peak_energy", "--peak", "0", "-o", str(out)]) == 0
    ref = _expected(store, "peak_energy", peak=0)
    with tifffile.TiffFile(out) as tif:
        page = tif.pages[0]
        img = page.asarray()
        xres = page.tags["XResolution"].value
        yres = page.tags["YResolution"].value
        unit = page.tags["ResolutionUnit"].value
        desc = json.loads(page.description)
    assert len(tifffile.TiffFile(out).pages) == 1
    assert img.dtype == np.float32 and img.shape == ref.shape
    # row 0 is the largest y: the image shows the map as the figures do (y up)
    np.testing.assert_array_equal(img[::-1], ref.values.astype(np.float32))
    assert int(unit) == 3  # centimetre (TIFF 6.0, ResolutionUnit)
    assert 1e4 * xres[1] / xres[0] == pytest.approx(DX_UM, rel=1e-9)  # µm per pixel along x
    assert 1e4 * yres[1] / yres[0] == pytest.approx(DY_UM, rel=1e-9)
    assert desc["units"] == "eV" and desc["variable"] == "peak_energy"
    assert desc["pixel_size"] == {"y": DY_UM, "x": DX_UM, "units": "um"}
    assert desc["origin"] == {"y": 10.0, "x": -3.0, "units": "um"}


def test_select_map_needs_a_slice_of_a_multi_peak_map(store):
    ds = open_result(store)
    with pytest.raises(StepError, match="--peak"):
        select_map(ds, "peak_energy")
    with pytest.raises(StepError, match="out of range"):
        select_map(ds, "peak_energy", index={"peak": 2})
    with pytest.raises(StepError, match="no variable"):
        select_map(ds, "nope")
    assert select_map(ds, "integrated_intensity").dims == ("y", "x")


@pytest.mark.parametrize("args, message", [
    (["peak_energy", "-o", "{d}/a.csv"], "--peak"),
    (["integrated_intensity", "-o", "{d}/a.png"], "format"),
    (["integrated_intensity", "--index", "peak", "-o", "{d}/a.csv"], "DIM=N"),
])
def test_cli_export_bad_input_one_line_exit_2(store, tmp_path, capsys, args, message):
    argv = ["export", str(store), *[a.format(d=tmp_path) for a in args]]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0]


def test_cli_export_refuses_to_overwrite(store, tmp_path, capsys):
    out = tmp_path / "ii.tif"
    assert main(["export", str(store), "integrated_intensity", "-o", str(out)]) == 0
    before = out.read_bytes()
    assert main(["export", str(store), "integrated_intensity", "-o", str(out)]) == 2
    assert out.read_bytes() == before
    assert main(["export", str(store), "integrated_intensity", "-o", str(out),
                 "--overwrite"]) == 0


def test_report_figures_at_a_chosen_size_and_dpi(store, tmp_path, capsys):
    out = tmp_path / "figs"
    assert main(["report", str(store), "-o", str(out), "--dpi", "300", "--size", "8.5x6"]) == 0
    pngs = sorted(out.glob("*.png"))
    assert pngs
    for p in pngs:
        with Image.open(p) as im:
            w, h = im.size
            dpi = im.info["dpi"]
            desc = json.loads(im.text["Description"])
        # 8.5 cm x 6 cm at 300 dots per inch, 1 in = 2.54 cm (within a pixel of rounding)
        assert abs(w - 8.5 / 2.54 * 300) <= 1.0 and abs(h - 6 / 2.54 * 300) <= 1.0, p.name
        assert dpi[0] == pytest.approx(300, abs=0.01)
        assert desc["dpi"] == 300 and desc["size_cm"] == [8.5, 6.0]
    assert main(["report", str(store), "-o", str(out), "--size", "8.5"]) == 2
    assert "WIDTHxHEIGHT in cm" in capsys.readouterr().err
