"""Tests of pmap.io binary formats: Zarr v2/v3, NetCDF4, npy, TIFF; save, convert, info.

Reference for every round trip: the file is written by an outside library
(numpy.save, tifffile.imwrite, xarray/zarr, h5netcdf) or by save_cube, and the
values read back must equal the numpy array we started from bit for bit
(lossless formats; common practice).
"""

from __future__ import annotations

import json
import os
import shutil

import dask.array as da
import numpy as np
import pytest
import tifffile
import xarray as xr
from dask.callbacks import Callback

from pmap import make_cube
from pmap.errors import CubeValidationError, FormatError, InputFileError, OutputExistsError
from pmap.io import (
    SUPPORTED_FORMATS,
    convert,
    cube_info,
    detect_format,
    format_cube_info,
    open_cube,
    save_cube,
    sidecar_path,
)
from pmap.provenance import get_provenance, with_step

WL = np.linspace(600.0, 650.0, 6)


class CountComputes(Callback):
    """Dask callback counting graph executions (xarray's raise_if_dask_computes idea)."""

    def __init__(self) -> None:
        super().__init__()
        self.n = 0

    def _start(self, dsk) -> None:
        self.n += 1


@pytest.fixture
def data() -> np.ndarray:
    return np.random.default_rng(1).random((4, 5, 6)).astype("float32") * 1000


@pytest.fixture
def cube(data):
    c = make_cube(
        data,
        wavelength_nm=WL,
        y_um=np.arange(4) * 0.5,
        x_um=10 + np.arange(5) * 0.5,
        units="counts/s",
        attrs={"temperature_K": 10.0, "excitation_wavelength_nm": 532.0},
    )
    c.attrs = with_step(c.attrs, "remove_spikes", {"threshold": 6.0})
    return c


def _stat(path):
    """Bytes fingerprint and mtime of a file or every file of a directory store."""
    files = [path] if os.path.isfile(path) else sorted(p for p in path.rglob("*") if p.is_file())
    return [(f.read_bytes(), f.stat().st_mtime_ns) for f in files]


@pytest.mark.parametrize(
    "name,kw", [("c.zarr", {}), ("c2.zarr", {"zarr_format": 2}), ("c.nc", {}), ("c.h5", {})]
)
def test_save_open_round_trip(tmp_path, cube, data, name, kw):
    out = save_cube(cube, tmp_path / name, **kw)
    back = open_cube(out)
    np.testing.assert_array_equal(back.values, data)
    for dim in ("y", "x", "wavelength"):
        np.testing.assert_array_equal(back[dim].values, cube[dim].values)
        assert back[dim].attrs["units"] == cube[dim].attrs["units"]
    assert back.attrs["units"] == "counts/s"
    assert back.attrs["temperature_K"] == 10.0
    assert back.attrs["excitation_wavelength_nm"] == 532.0
    prov = get_provenance(back.attrs)
    assert [s["step"] for s in prov["steps"]] == ["remove_spikes"]
    assert prov["steps"][0]["params"] == {"threshold": 6.0}
    assert prov["input"]["path"] == str(out.resolve())
    assert prov["input"]["format"] == ("zarr" if name.endswith("zarr") else "netcdf")


@pytest.mark.parametrize("zarr_format", [2, 3])
def test_zarr_written_by_xarray_readable(tmp_path, data, zarr_format):
    # a store written by plain xarray, variable not called intensity (the only one)
    ds = xr.Dataset(
        {"pl": (("y", "x", "energy"), data)},
        coords={
            "energy": ("energy", np.linspace(1.8, 2.0, 6), {"units": "eV"}),
            "y": ("y", np.arange(4.0), {"units": "um"}),
            "x": ("x", np.arange(5.0), {"units": "um"}),
        },
    )
    path = tmp_path / f"plain_v{zarr_format}.zarr"
    ds.to_zarr(path, zarr_format=zarr_format, consolidated=False)
    back = open_cube(path)
    assert back.name == "intensity" and back.dims == ("y", "x", "energy")
    np.testing.assert_array_equal(back.values, data)


def _write_all(tmp_path, cube, data):
    paths = {
        "zarr": save_cube(cube, tmp_path / "a.zarr"),
        "netcdf": save_cube(cube, tmp_path / "a.nc"),
    }
    np.save(tmp_path / "a.npy", data)
    tifffile.imwrite(tmp_path / "a.tif", np.moveaxis(data, -1, 0))
    paths["npy"], paths["tiff"] = tmp_path / "a.npy", tmp_path / "a.tif"
    for p in (paths["npy"], paths["tiff"]):
        sidecar_path(p).write_text(json.dumps({"wavelength_nm": WL.tolist(), "pixel_size_um": 0.5}))
    return paths


def test_open_is_lazy_and_leaves_input_untouched(tmp_path, cube, data):
    paths = _write_all(tmp_path, cube, data)
    for fmt, path in paths.items():
        before = _stat(path)
        with CountComputes() as cc:
            c = open_cube(path)
            assert isinstance(c.data, da.Array), fmt
            assert cc.n == 0, f"opening {fmt} computed something"
            np.testing.assert_array_equal(c.values, data)
            assert cc.n >= 1  # the counter does see computes
        assert detect_format(path) == fmt
        del c
        assert _stat(path) == before, f"{fmt} input changed"


def test_convert_every_format_and_inputs_unchanged(tmp_path, cube, data):
    paths = _write_all(tmp_path, cube, data)
    for fmt, path in paths.items():
        before = _stat(path)
        for ext in (".zarr", ".nc"):
            out = convert(path, tmp_path / f"out_{fmt}{ext}")
            np.testing.assert_array_equal(open_cube(out).values, data)
            prov = get_provenance(open_cube(out).attrs)
            assert prov["input"]["path"] == str(out.resolve())
        assert _stat(path) == before


def test_npy_options_sidecar_and_dims(tmp_path, data):
    path = tmp_path / "s.npy"
    np.save(path, np.moveaxis(data, -1, 0))  # (channels, y, x) on disk
    c = open_cube(
        path,
        dims="wavelength,y,x",
        wavelength_start_nm=600,
        wavelength_step_nm=10,
        pixel_size_x_um=2.0,
        x0_um=5.0,
        temperature_K=77,
    )
    np.testing.assert_array_equal(c.values, data)
    np.testing.assert_allclose(c.wavelength.values, WL)
    np.testing.assert_allclose(c.x.values, 5.0 + 2.0 * np.arange(5))
    assert c.y.attrs["units"] == "pixel" and c.attrs["temperature_K"] == 77
    # energy axis from a sidecar; keywords win over the sidecar
    sidecar_path(path).write_text(
        json.dumps(
            {
                "pmap_axes": 1,
                "dims": ["energy", "y", "x"],
                "energy_ev": [2.0, 2.1, 2.2, 2.3, 2.4, 2.5],
                "pixel_size_um": 0.25,
                "attrs": {"sample": "A1"},
            }
        )
    )
    c = open_cube(path, pixel_size_um=1.0)
    assert c.dims == ("y", "x", "energy") and c.attrs["sample"] == "A1"
    np.testing.assert_allclose(c.x.values, np.arange(5.0))


def test_compressed_tiff_read_page_by_page(tmp_path, data):
    path = tmp_path / "z.tiff"
    tifffile.imwrite(path, np.moveaxis(data, -1, 0), compression="zlib")
    with CountComputes() as cc:
        c = open_cube(path, energy_start_ev=1.5, energy_step_ev=0.01)
        assert cc.n == 0
    np.testing.assert_array_equal(c.values, data)


def test_missing_unknown_and_truncated_inputs(tmp_path, cube, data):
    for name in ("none.zarr", "none.nc", "none.npy", "none.tif", "none.csv"):
        with pytest.raises(InputFileError, match="not found"):
            open_cube(tmp_path / name)
    odd = tmp_path / "map.xyz"
    odd.write_bytes(b"hello world")
    with pytest.raises(FormatError, match="supported formats") as err:
        open_cube(odd)
    assert all(f in str(err.value) for f in SUPPORTED_FORMATS)
    paths = _write_all(tmp_path, cube, data)
    for fmt in ("netcdf", "npy", "tiff"):
        raw = paths[fmt].read_bytes()
        cut = tmp_path / f"cut{paths[fmt].suffix}"
        cut.write_bytes(raw[: len(raw) * 2 // 3])
        shutil.copy(sidecar_path(paths[fmt]), sidecar_path(cut)) if fmt != "netcdf" else None
        with pytest.raises(InputFileError, match="truncated"):
            open_cube(cut)
    bad_store = tmp_path / "bad.zarr"
    shutil.copytree(paths["zarr"], bad_store)
    (bad_store / "zarr.json").unlink()
    with pytest.raises(FormatError, match="Zarr"):
        open_cube(bad_store)


def test_npy_content_detected_without_extension(tmp_path, data):
    path = tmp_path / "raw.bin"
    with open(path, "wb") as fh:
        np.save(fh, data)
    assert detect_format(path) == "npy"


@pytest.mark.parametrize(
    "sidecar,match",
    [
        ("{not json", "not valid JSON"),
        ('{"wavelength_nm": [1, 2, 3, 4, 5, 6], "colour": "red"}', "unknown key"),
        ("[1, 2, 3]", "JSON object"),
        ('{"pmap_axes": 2, "wavelength_nm": [1, 2, 3, 4, 5, 6]}', "version"),
        ('{"wavelength_nm": [1, 2, 3]}', "3 spectral values given for 6 channels"),
    ],
)
def test_bad_sidecar(tmp_path, data, sidecar, match):
    path = tmp_path / "b.npy"
    np.save(path, data)
    sidecar_path(path).write_text(sidecar)
    with pytest.raises(FormatError, match=match):
        open_cube(path)


def test_npy_without_axes_or_bad_options(tmp_path, data):
    path = tmp_path / "n.npy"
    np.save(path, data)
    with pytest.raises(FormatError, match="no spectral axis"):
        open_cube(path)
    with pytest.raises(FormatError, match="not understood"):
        open_cube(path, wavelength_nm=WL, colour="red")
    with pytest.raises(FormatError, match="exactly one"):
        open_cube(path, wavelength_nm=WL, energy_ev=WL / 100)
    with pytest.raises(CubeValidationError, match="non-positive"):
        open_cube(path, wavelength_start_nm=-10, wavelength_step_nm=1)


def test_save_refuses_overwrite_and_input(tmp_path, cube):
    out = save_cube(cube, tmp_path / "o.zarr")
    with pytest.raises(OutputExistsError, match="overwrite=True"):
        save_cube(cube, out)
    assert isinstance(OutputExistsError("x"), FileExistsError)
    back = open_cube(out)
    for derived in (back, back.copy(data=back.data * 2)):
        with pytest.raises(OutputExistsError, match="input the cube was read from"):
            save_cube(derived, out, overwrite=True)
        with pytest.raises(OutputExistsError, match="input"):
            save_cube(derived, out / "inside.zarr", overwrite=True)
    other = save_cube(cube, tmp_path / "p.nc")
    save_cube(back.copy(data=back.data * 2), other, overwrite=True)
    np.testing.assert_array_equal(open_cube(other).values, cube.values * 2)


def test_cube_info(tmp_path, cube, data):
    out = save_cube(cube, tmp_path / "i.zarr")
    info = cube_info(out)
    assert info["format"] == "zarr" and info["shape"] == [4, 5, 6]
    assert info["dims"] == ["y", "x", "wavelength"] and info["dtype"] == "float32"
    assert info["spectral"]["min"] == 600.0 and info["spectral"]["max"] == 650.0
    assert info["spectral"]["units"] == "nm"
    assert info["pixel_size_um"] == {"y": 0.5, "x": 0.5}
    assert info["extent_um"] == {"y": 2.0, "x": 2.5}
    # value range against numpy on the same array
    assert info["value_min"] == float(data.min()) and info["value_max"] == float(data.max())
    assert info["metadata"]["temperature_K"] == 10.0
    assert info["file_size_bytes"] == sum(f.stat().st_size for f in out.rglob("*") if f.is_file())
    text = format_cube_info(info)
    assert "600 .. 650 nm" in text and "remove_spikes" in text and "0.5/0.5 um" in text
    quick = cube_info(out, value_range=False)
    assert quick["value_min"] is None and "values" not in format_cube_info(quick)


def test_zarr_opened_in_processing_chunks_reads_stored_chunks_directly(tmp_path):
    """A Zarr cube is opened with the chunks it is processed in when they are whole
    multiples of the stored ones: one read task per processing chunk, no merge layer,
    the same values; a target that splits a stored chunk keeps the read-then-split path."""
    import warnings

    from pmap.io import open_cube

    rng = np.random.default_rng(3)
    data = rng.normal(100, 5, (40, 48, 32)).astype(np.float32)
    cube = make_cube(data, wavelength_nm=np.linspace(600, 700, 32))
    path = tmp_path / "c.zarr"
    cube.to_dataset(name="intensity").to_zarr(path, encoding={"intensity": {"chunks": (8, 8, 32)}})
    mib_16_tiles = 16 * 8 * 8 * 32 * 4 / 2**20  # 16 stored chunks' worth
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)  # xarray's "separate the stored chunks"
        for target, merged in ((mib_16_tiles, True), (0.002, False)):
            got = open_cube(path, target_chunk_mib=target)
            np.testing.assert_array_equal(got.values, data)
            layers = list(got.data.__dask_graph__().layers)
            cy, cx = got.data.chunks[0][0], got.data.chunks[1][0]
            if merged:
                assert cy % 8 == 0 and cx % 8 == 0 and cy * cx > 64  # several stored chunks
                assert not any(name.startswith("rechunk") for name in layers), layers
                assert got.data.npartitions == -(-40 // cy) * -(-48 // cx)
            else:  # each stored 8 x 8 chunk read once, then split
                assert cy < 8 and any(name.startswith("rechunk") for name in layers), layers
