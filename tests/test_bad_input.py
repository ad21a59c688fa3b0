"""Bad input stopped at the door, nothing half-written (issue 13, item 4, first part).

Each case gives one line on stderr and exit 2 (usage and data errors) before any
output exists; a bug inside pmap gives exit 1 and says "internal error" (common
practice for command-line tools: distinct exit codes for usage errors and failures).
"""

from __future__ import annotations

import numpy as np
import pytest

import pmap
from pmap import cli


@pytest.fixture()
def cube_path(tmp_path):
    rng = np.random.default_rng(0)
    lam = np.linspace(700.0, 800.0, 64)
    data = rng.poisson(50 + 500 * np.exp(-0.5 * ((lam - 750) / 5) ** 2), (6, 7, 64))
    cube = pmap.make_cube(data.astype(np.float32), wavelength_nm=lam, units="counts",
                          attrs={"wavelength_medium": "air", "gain_e_per_count": 1.0,
                                 "read_noise_counts": 0.0, "dark_level_counts": 0.0})
    p = tmp_path / "c.zarr"
    pmap.save_cube(cube, p)
    return p


def _run(capsys, *argv):
    code = cli.main(list(argv))
    err = capsys.readouterr().err.strip().splitlines()
    return code, err


def test_config_typo_is_found_before_anything_is_written(cube_path, tmp_path, capsys):
    cfg = tmp_path / "p.toml"
    cfg.write_text('[fit]\nmodle = "voigt"\n')
    out = tmp_path / "r.zarr"
    code, err = _run(capsys, "process", str(cube_path), "-o", str(out), "--config", str(cfg))
    assert code == 2 and "did you mean 'model'" in err[-1]
    assert not out.exists()


@pytest.mark.parametrize("args, words", [(["--regions", "0"], ">= 1"),
                                         (["--memory-limit", "1KB"], "below")])
def test_bad_options_refused_before_output(cube_path, tmp_path, capsys, args, words):
    out = tmp_path / "r.zarr"
    code, err = _run(capsys, "process", str(cube_path), "-o", str(out), *args)
    assert code == 2 and words in err[-1] and len(err) == 1
    assert not out.exists()


def test_all_nan_cube_refused(tmp_path, capsys):
    lam = np.linspace(700.0, 800.0, 32)
    cube = pmap.make_cube(np.full((4, 4, 32), np.nan, dtype=np.float32), wavelength_nm=lam,
                          units="counts", attrs={"wavelength_medium": "air"})
    p = tmp_path / "nan.zarr"
    pmap.save_cube(cube, p)
    out = tmp_path / "r.zarr"
    code, err = _run(capsys, "process", str(p), "-o", str(out), "-q")
    assert code == 2 and "no finite values" in err[-1]
    assert not out.exists()


@pytest.mark.parametrize("case, words", [("constant", "every sampled spectrum is constant"),
                                         ("short", "too short")])
def test_unestimable_noise_says_why(tmp_path, capsys, case, words):
    """A blank cube (every spectrum constant) or spectra of 8 channels: the noise model
    cannot be estimated, and the message says why (not a bare sample count)."""
    n = 8 if case == "short" else 64
    lam = np.linspace(700.0, 800.0, n)
    data = (np.zeros((4, 4, n)) if case == "constant"
            else np.random.default_rng(1).poisson(100, (4, 4, n)))
    cube = pmap.make_cube(data.astype(np.float32), wavelength_nm=lam, units="counts",
                          attrs={"wavelength_medium": "air"})
    p = tmp_path / "c.zarr"
    pmap.save_cube(cube, p)
    out = tmp_path / "r.zarr"
    code, err = _run(capsys, "process", str(p), "-o", str(out), "-q")
    assert code == 2 and words in err[-1] and "gain_e_per_count" in err[-1], err
    assert not out.exists()


def test_incomplete_store_points_to_resume(cube_path, tmp_path, capsys):
    out = tmp_path / "r.zarr"
    assert _run(capsys, "process", str(cube_path), "-o", str(out), "-q", "--no-figures")[0] == 0
    import zarr

    zarr.open_group(str(out), mode="r+").attrs["pmap_complete"] = False
    code, err = _run(capsys, "process", str(cube_path), "-o", str(out), "-q")
    assert code == 2 and "--resume" in err[-1] and "--overwrite" in err[-1]


def test_internal_error_is_not_a_user_error(cube_path, tmp_path, capsys, monkeypatch):
    import pmap.pipeline

    def boom(*a, **k):
        raise TypeError("unexpected keyword in an internal call")

    monkeypatch.setattr(pmap.pipeline, "process", boom)
    code, err = _run(capsys, "process", str(cube_path), "-o", str(tmp_path / "r.zarr"))
    assert code == 1 and "internal error" in err[-1] and "--debug" in err[-1]


def _chunked_store(tmp_path):
    rng = np.random.default_rng(1)
    lam = np.linspace(700.0, 800.0, 32)
    cube = pmap.make_cube((rng.random((16, 16, 32)) * 100).astype(np.float32),
                          wavelength_nm=lam, units="counts",
                          attrs={"wavelength_medium": "air", "gain_e_per_count": 1.0,
                                 "read_noise_counts": 1.0, "dark_level_counts": 0.0})
    p = tmp_path / "c.zarr"
    pmap.save_cube(cube.chunk({"y": 8, "x": 8}), p)
    chunks = sorted(f for f in (p / "intensity").rglob("*") if f.is_file() and f.name != "zarr.json"
                    and not f.name.startswith("."))
    return p, chunks


def test_missing_chunk_is_refused_naming_the_pixels(tmp_path, capsys):
    p, chunks = _chunked_store(tmp_path)
    chunks[1].unlink()
    code, err = _run(capsys, "process", str(p), "-o", str(tmp_path / "r.zarr"), "-q")
    assert code == 2 and "1 of 4 chunks" in err[-1] and "y " in err[-1]
    assert not (tmp_path / "r.zarr").exists()
    # with the explicit option the rest is read and the missing pixels are counted
    code, err = _run(capsys, "process", str(p), "-o", str(tmp_path / "r.zarr"), "-q",
                     "--no-figures", "-O", "allow_missing_chunks=true")
    assert code == 0 and any("missing" in ln for ln in err)


def test_corrupt_chunk_is_a_data_error(tmp_path, capsys):
    p, chunks = _chunked_store(tmp_path)
    b = chunks[2].read_bytes()
    chunks[2].write_bytes(b[: len(b) // 2])
    code, err = _run(capsys, "process", str(p), "-o", str(tmp_path / "r.zarr"), "-q")
    assert code == 2 and "cannot be decoded" in err[-1] and len(err) == 1


def _long_table(path, n_bad_row=None):
    """A long text table (x, y, wavelength, intensity), 4 x 3 pixels x 40 channels; with
    ``n_bad_row`` that data row holds a word instead of a number."""
    lam = np.linspace(600.0, 700.0, 40)
    rows = ["x,y,wavelength,intensity"]
    for y in range(3):
        for x in range(4):
            rows += [f"{x},{y},{w:.3f},{100 + x + y + i}" for i, w in enumerate(lam)]
    if n_bad_row is not None:
        parts = rows[n_bad_row].split(",")
        rows[n_bad_row] = ",".join(parts[:3] + ["n/a?"])
    path.write_text("\n".join(rows) + "\n")
    return path


def _leftovers(folder):
    return sorted(p.name for p in folder.iterdir() if ".partial" in p.name)


def test_failed_text_conversion_leaves_nothing(tmp_path, capsys):
    """A conversion that fails midway leaves no store under the output name (and no
    temporary one): issue 13, "written to a temporary name and renamed when complete"."""
    src = _long_table(tmp_path / "scan.csv", n_bad_row=300)
    out = tmp_path / "scan.zarr"
    assert cli.main(["convert", str(src), str(out)]) == 2
    assert "error" in capsys.readouterr().err
    assert not out.exists() and _leftovers(tmp_path) == []
    # and a good file then converts without --overwrite: nothing blocks the rerun
    _long_table(src)
    assert cli.main(["convert", str(src), str(out), "-O", "wavelength_medium=air"]) == 0
    assert pmap.open_cube(out).shape == (3, 4, 40)


def test_failed_overwrite_keeps_the_old_output(tmp_path, capsys):
    """With --overwrite, the old output is replaced only by a complete new one."""
    good = _long_table(tmp_path / "good.csv")
    out = tmp_path / "cube.zarr"
    assert cli.main(["convert", str(good), str(out), "-O", "wavelength_medium=air"]) == 0
    before = pmap.open_cube(out).values.copy()
    bad = _long_table(tmp_path / "bad.csv", n_bad_row=200)
    assert cli.main(["convert", str(bad), str(out), "--overwrite"]) == 2
    np.testing.assert_array_equal(pmap.open_cube(out).values, before)
    assert _leftovers(tmp_path) == []


def test_interrupted_cube_save_leaves_nothing(tmp_path, monkeypatch):
    """save_cube interrupted while writing (Ctrl-C in the middle of the chunks): no output
    under the final name, no temporary store left."""
    from pmap.io import _write

    cube = pmap.make_cube(np.ones((4, 5, 16), np.float32), wavelength_nm=np.arange(16) + 500.0)

    def broken(ds, out, **kw):
        out.mkdir()
        (out / "zarr.json").write_text("{}")
        raise KeyboardInterrupt

    monkeypatch.setattr(_write, "write_zarr", broken)
    with pytest.raises(KeyboardInterrupt):
        pmap.save_cube(cube, tmp_path / "c.zarr")
    assert list(tmp_path.iterdir()) == []


def test_regions_on_a_stack_cube_refused_before_output(tmp_path):
    """Regions are made on one map: a stack cube with --regions is refused with a line that
    names the stack dim, and nothing is written."""
    import xarray as xr

    lam = np.linspace(600.0, 700.0, 32)
    maps = [pmap.make_cube(np.random.default_rng(i).poisson(50, (4, 5, 32)).astype(np.float32),
                           wavelength_nm=lam) for i in range(2)]
    stack = xr.concat(maps, dim="temperature").assign_coords(
        temperature=("temperature", [10.0, 300.0], {"units": "K"}))
    out = tmp_path / "r.zarr"
    with pytest.raises(pmap.errors.StepError, match="temperature"):
        pmap.process(stack, out, regions=2, progress=False)
    assert not out.exists()
