"""One format registry (issue 13, item 5): open_cube, convert, save_cube, the folder scan of
the command line and the napari reader all take their formats from pmap.io.FORMATS, and
the napari reader claims only files whose content pmap recognises."""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

import pmap
from pmap import cli
from pmap.io import FORMATS, detect_format, get_format, recognises
from pmap.io._write import WRITE_FORMATS, output_format
from pmap.napari_plugin._reader import napari_get_reader


def _cube():
    lam = np.linspace(600.0, 700.0, 16)
    data = np.random.default_rng(0).poisson(50, (3, 4, 16)).astype(np.float32)
    return pmap.make_cube(data, wavelength_nm=lam, attrs={"wavelength_medium": "air"})


def test_every_format_has_a_reader_and_known_endings():
    for f in FORMATS.values():
        assert callable(f.function("reader")), f.name
        assert all(e.startswith(".") and e == e.lower() for e in f.extensions)
    endings = [e for f in FORMATS.values() for e in f.extensions]
    assert len(endings) == len(set(endings))  # one ending selects one format
    assert set(WRITE_FORMATS) == {"zarr", "netcdf"}
    with pytest.raises(pmap.errors.FormatError, match="supported"):
        get_format("spc")


@pytest.mark.parametrize("name", ["zarr", "netcdf"])
def test_writers_and_readers_round_trip_through_the_registry(tmp_path, name):
    cube = _cube()
    out = tmp_path / f"c{FORMATS[name].extensions[0]}"
    assert output_format(out, None) == name
    pmap.save_cube(cube, out)
    assert detect_format(out) == name and recognises(out)
    np.testing.assert_array_equal(pmap.open_cube(out).values, cube.values)


def test_content_is_sniffed_when_the_name_says_nothing(tmp_path):
    a = tmp_path / "scan.bin"
    np.save(tmp_path / "x.npy", np.zeros((2, 2, 4), np.float32))
    a.write_bytes((tmp_path / "x.npy").read_bytes())
    assert detect_format(a) == "npy"


def test_napari_reader_claims_only_recognised_content(tmp_path):
    # an ordinary RGB photograph saved as TIFF: not a cube, left to other readers
    photo = tmp_path / "photo.tif"
    tifffile.imwrite(photo, np.zeros((32, 48, 3), np.uint8), photometric="rgb")
    assert napari_get_reader(str(photo)) is None
    # a table that is not a spectral map (no position or spectral columns)
    table = tmp_path / "budget.csv"
    table.write_text("item,cost\nlaser,12000\noptics,3000\n")
    assert napari_get_reader(str(table)) is None
    # a .tif that claims the name but holds something else
    fake = tmp_path / "fake.tif"
    fake.write_text("not a tiff at all")
    assert napari_get_reader(str(fake)) is None
    # a multi-page TIFF cube with its axis sidecar, a Zarr cube, a long text table: claimed
    stack = tmp_path / "cube.tif"
    tifffile.imwrite(stack, np.ones((16, 3, 4), np.float32), photometric="minisblack")
    (tmp_path / "cube.axes.json").write_text(json.dumps(
        {"pmap_axes": 1, "wavelength_start_nm": 600.0, "wavelength_step_nm": 1.0}))
    assert napari_get_reader(str(stack)) is not None
    z = tmp_path / "cube.zarr"
    pmap.save_cube(_cube(), z)
    assert napari_get_reader(str(z)) is not None
    long = tmp_path / "scan.csv"
    rows = ["x,y,wavelength,intensity"] + [f"{x},{y},{600 + c},{c}" for y in range(2)
                                           for x in range(2) for c in range(5)]
    long.write_text("\n".join(rows) + "\n")
    assert napari_get_reader(str(long)) is not None


def test_folder_scan_uses_the_registry_endings(tmp_path, capsys):
    folder = tmp_path / "maps"
    folder.mkdir()
    pmap.save_cube(_cube(), folder / "a.nc4")  # an ending the old hard-coded list missed
    (folder / "notes.md").write_text("not a cube")
    found = cli._expand_inputs([str(folder)])
    assert [p.name for p in found] == ["a.nc4"]
