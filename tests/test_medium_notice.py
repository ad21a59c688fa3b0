"""The wavelength medium is never silent: stated (data, sidecar, option) or assumed with a note."""

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr

from pmap.errors import StepError
from pmap.io import convert, cube_info, format_cube_info, open_cube
from pmap.spectral._airvac import (
    assumed_medium_notice,
    medium_shift_mev,
    sample_peak_wavelength_nm,
)

NOTE = "wavelength medium not stated"
HC_EV_NM = 1239.841984  # h·c in eV·nm (CODATA 2018, from memory)
WL = np.linspace(700.0, 800.0, 201)


def run_cli(*args):
    """Run ``python -m pmap`` in a fresh process, as a user would."""
    env = {**os.environ, "PYTHONWARNINGS": "ignore::DeprecationWarning"}
    return subprocess.run([sys.executable, "-m", "pmap", *map(str, args)], capture_output=True,
                          text=True, env=env, timeout=300)


def _write_npy(d, *, sidecar_extra=None, centre=750.0, shape=(12, 14)):
    """A Gaussian-peak map as .npy + .axes.json; peak centres scatter ±1 nm around ``centre``."""
    rng = np.random.default_rng(3)
    c = centre + rng.uniform(-1.0, 1.0, (*shape, 1))
    arr = (1000.0 * np.exp(-0.5 * ((WL - c) / 6.0) ** 2) + 20.0).astype("float32")
    np.save(d / "map.npy", arr)
    side = {"wavelength_nm": WL.tolist(), "pixel_size_um": 1.0, **(sidecar_extra or {})}
    (d / "map.axes.json").write_text(json.dumps(side))
    return d / "map.npy"


def _notes(stderr):
    return [ln for ln in stderr.splitlines() if NOTE in ln]


# ------------------------------------------------------------------ the size of the shift
def test_shift_at_750nm_against_refractivity_of_air():
    # Standard air at 750 nm: n − 1 ≈ 2.76e-4 (Ciddor, Appl. Opt. 35, 1566 (1996); from memory).
    # Reading a vacuum axis as air lowers E = hc/λ by about E·(n − 1).
    e = HC_EV_NM / 750.0
    expected_mev = e * 2.76e-4 * 1e3  # ≈ 0.456 meV
    assert medium_shift_mev(750.0) == pytest.approx(expected_mev, rel=0.02)
    assert medium_shift_mev(750.0) == pytest.approx(0.45, abs=0.01)


def test_shift_at_500nm_against_published_refractivity():
    # (n − 1)·1e8 = 27897.38 at 500 nm, Ciddor, Appl. Opt. 35, 1566 (1996); ΔE = E·(n − 1)/n
    n1 = 27897.38e-8
    expected_mev = HC_EV_NM / 500.0 * n1 / (1 + n1) * 1e3
    assert medium_shift_mev(500.0) == pytest.approx(expected_mev, rel=0.01)


def test_shift_is_positive_array_and_refuses_bad_wavelengths():
    s = medium_shift_mev(np.array([400.0, 750.0, 1500.0]))
    assert s.shape == (3,) and np.all(s > 0) and np.all(np.diff(s) < 0)
    for bad in (0.0, -5.0, np.nan):
        with pytest.raises(StepError):
            medium_shift_mev(bad)


# ------------------------------------------------------------------ the median peak
def test_sample_peak_finds_the_maximum_and_reads_few_chunks():
    import dask.array as da

    read = []

    def block(block_info=None):
        info = block_info[None]
        read.append(tuple(info["chunk-location"]))
        shape = info["chunk-shape"]
        return np.broadcast_to(np.exp(-0.5 * ((WL - 742.0) / 6.0) ** 2), shape).astype("f4")

    data = da.map_blocks(block, chunks=((3, 3, 3, 3), (3, 3, 3, 3, 2), (WL.size,)),
                         dtype="f4")
    cube = xr.DataArray(data, dims=("y", "x", "wavelength"), coords={"wavelength": WL})
    assert sample_peak_wavelength_nm(cube, max_chunks=4) == pytest.approx(742.0, abs=0.5)
    assert 1 <= len(set(read)) <= 4  # of 20 chunks


def test_sample_peak_falls_back_to_axis_centre_on_empty_spectra():
    import pmap

    cube = pmap.make_cube(np.full((4, 4, WL.size), np.nan), wavelength_nm=WL)
    assert sample_peak_wavelength_nm(cube) == pytest.approx(750.0)


# ------------------------------------------------------------------ where the medium came from
def test_sources_recorded_on_open(tmp_path):
    path = _write_npy(tmp_path)
    cube = open_cube(path)
    assert (cube.attrs["wavelength_medium"], cube.attrs["wavelength_medium_source"]) == (
        "air", "assumed")
    inp = json.loads(cube.attrs["pmap_provenance"])["input"]
    assert inp["wavelength_medium_source"] == "assumed"
    msg = assumed_medium_notice(cube)
    assert NOTE in msg and "750 nm" in msg and "0.455 meV" in msg
    opt = open_cube(path, wavelength_medium="vacuum")
    assert (opt.attrs["wavelength_medium"], opt.attrs["wavelength_medium_source"]) == (
        "vacuum", "option")
    assert assumed_medium_notice(opt) is None
    side = _write_npy(tmp_path, sidecar_extra={"wavelength_medium": "vacuum"})
    assert open_cube(side).attrs["wavelength_medium_source"] == "sidecar"


def test_stored_attr_is_data_and_assumed_stays_assumed(tmp_path):
    path = _write_npy(tmp_path)
    stated = open_cube(path, wavelength_medium="air")
    ds = stated.to_dataset()
    ds["intensity"].attrs = {"wavelength_medium": "vacuum", "units": "counts"}
    ds.to_zarr(tmp_path / "stated.zarr", consolidated=False)
    assert open_cube(tmp_path / "stated.zarr").attrs["wavelength_medium_source"] == "data"
    out = convert(path, tmp_path / "assumed.zarr")
    back = open_cube(out)
    assert back.attrs["wavelength_medium_source"] == "assumed"
    # an option on the way in overrides what the file says
    over = open_cube(out, wavelength_medium="vacuum")
    assert over.attrs["wavelength_medium"] == "vacuum"
    assert over.attrs["wavelength_medium_source"] == "option"


def test_text_convert_records_assumed_or_option(tmp_path):
    rows = ["x,y,wavelength,intensity"]
    for y in range(3):
        for x in range(4):
            for w in WL[::10]:
                rows.append(f"{x},{y},{w},{np.exp(-0.5 * ((w - 750) / 8) ** 2):.6f}")
    csv = tmp_path / "map.csv"
    csv.write_text("\n".join(rows) + "\n")
    for fmt in (2, 3):
        out = convert(csv, tmp_path / f"a{fmt}.zarr", zarr_format=fmt)
        assert open_cube(out).attrs["wavelength_medium_source"] == "assumed"
    out = convert(csv, tmp_path / "b.zarr", wavelength_medium="vacuum")
    cube = open_cube(out)
    assert (cube.attrs["wavelength_medium"], cube.attrs["wavelength_medium_source"]) == (
        "vacuum", "option")
    assert open_cube(csv).attrs["wavelength_medium_source"] == "assumed"


def test_energy_axis_cube_has_no_medium_source(tmp_path):
    e = np.linspace(1.5, 1.8, 50)
    np.save(tmp_path / "e.npy", np.ones((2, 3, 50), dtype="float32"))
    cube = open_cube(tmp_path / "e.npy", energy_ev=e.tolist(), pixel_size_um=1.0)
    assert "wavelength_medium_source" not in cube.attrs
    assert assumed_medium_notice(cube) is None


# ------------------------------------------------------------------ info
def test_info_shows_medium_and_whether_assumed(tmp_path):
    path = _write_npy(tmp_path)
    info = cube_info(path, value_range=False)
    assert info["medium"] == {"medium": "air", "source": "assumed"}
    assert "ASSUMED" in format_cube_info(info)
    info = cube_info(path, value_range=False, wavelength_medium="vacuum")
    assert info["medium"] == {"medium": "vacuum", "source": "option"}
    text = format_cube_info(info)
    assert "vacuum wavelengths (stated by an option)" in text
    assert "wavelength_medium_source" not in text
    res = run_cli("info", path, "--no-range")
    assert res.returncode == 0, res.stderr
    assert "medium        air wavelengths (ASSUMED" in res.stdout


# ------------------------------------------------------------------ the command line
def test_convert_notes_once_when_assumed_and_not_when_stated(tmp_path):
    path = _write_npy(tmp_path)
    res = run_cli("convert", path, tmp_path / "a.zarr")
    assert res.returncode == 0, res.stderr
    notes = _notes(res.stderr)
    assert len(notes) == 1, res.stderr
    assert "assuming air" in notes[0] and "750 nm" in notes[0] and "0.45" in notes[0]
    res = run_cli("convert", path, tmp_path / "b.zarr", "--medium", "vacuum")
    assert res.returncode == 0, res.stderr
    assert not _notes(res.stderr), res.stderr
    cube = open_cube(tmp_path / "b.zarr")
    assert cube.attrs["wavelength_medium"] == "vacuum"
    assert cube.attrs["wavelength_medium_source"] == "option"
    side = _write_npy(tmp_path, sidecar_extra={"wavelength_medium": "air"})
    res = run_cli("convert", side, tmp_path / "c.zarr")
    assert res.returncode == 0 and not _notes(res.stderr), res.stderr


def test_conflicting_medium_options_are_one_line_error(tmp_path):
    path = _write_npy(tmp_path)
    res = run_cli("convert", path, tmp_path / "a.zarr", "--medium", "air",
                  "-O", "wavelength_medium=vacuum")
    assert res.returncode == 2
    assert "Traceback" not in res.stderr
    assert [ln for ln in res.stderr.splitlines() if ln.strip()] == [
        "plcube: error: --medium air contradicts -O wavelength_medium=vacuum"]


DESCRIPTORS_ONLY = """
[[steps]]
step = "to_energy"

[descriptors]

[output]
figures = false
"""


def test_process_notes_once_when_assumed_and_not_when_stated(tmp_path):
    path = _write_npy(tmp_path)
    cfg = tmp_path / "p.toml"
    cfg.write_text(DESCRIPTORS_ONLY)
    res = run_cli("process", path, "-o", tmp_path / "r.zarr", "--config", cfg, "-q")
    assert res.returncode == 0, res.stderr
    notes = _notes(res.stderr)
    assert len(notes) == 1, res.stderr
    assert "750 nm" in notes[0] and "0.45" in notes[0]
    res = run_cli("process", path, "-o", tmp_path / "s.zarr", "--config", cfg, "-q",
                  "--medium", "air")
    assert res.returncode == 0, res.stderr
    assert not _notes(res.stderr), res.stderr
    prov = json.loads(xr.open_zarr(tmp_path / "s.zarr").attrs["pmap_provenance"])
    assert prov["input"]["wavelength_medium_source"] == "option"


def test_medium_vacuum_raises_peak_energies_by_the_air_shift(tmp_path):
    # E·(n − 1) with n − 1 ≈ 2.76e-4 at 750 nm (Ciddor, Appl. Opt. 35, 1566 (1996); from memory)
    path = _write_npy(tmp_path, shape=(6, 6))
    maps = {}
    for medium in ("air", "vacuum"):
        out = tmp_path / f"{medium}.zarr"
        res = run_cli("process", path, "-o", out, "--medium", medium, "-q", "--no-figures")
        assert res.returncode == 0, res.stderr
        assert not _notes(res.stderr), res.stderr
        maps[medium] = xr.open_zarr(out)["peak_energy"].isel(peak=0).values
    diff_mev = np.median(maps["vacuum"] - maps["air"]) * 1e3
    expected = HC_EV_NM / 750.0 * 2.76e-4 * 1e3
    assert diff_mev == pytest.approx(expected, rel=0.03)
