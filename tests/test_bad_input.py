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
