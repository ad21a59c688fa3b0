"""Tests of pmap.io.cube_info's value range: stored, full scan, or a stated chunk sample.

Reference for every value: numpy's min/max of the array written to the file (or of
the chunk regions read), computed here independently of dask (common practice).
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from pmap import make_cube
from pmap.io import _info, cube_info, format_cube_info, save_cube

WL = np.linspace(600.0, 700.0, 16)


@pytest.fixture
def stored(tmp_path):
    """A 24 x 30 x 16 cube in 6 x 10 pixel chunks (12 chunks), with one planted maximum."""
    rng = np.random.default_rng(7)
    data = rng.normal(100.0, 5.0, (24, 30, 16)).astype("float32")
    data[23, 29, 3] = 1e6  # in the last chunk of the grid
    data[6, 12, 5] = -1e6  # in chunk (1, 1): not among the spread sample of 2 below
    cube = make_cube(data, wavelength_nm=WL, chunks={"y": 6, "x": 10})
    return save_cube(cube, tmp_path / "c.zarr"), data


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
    path = save_cube(cube, tmp_path / "a.zarr")
    info = cube_info(path)
    assert info["value_range_source"] == "stored"
    assert (info["value_min"], info["value_max"]) == (0.0, 95.0)
    assert "actual_range" in format_cube_info(info)
    full = cube_info(path, full_range=True)
    assert full["value_range_source"] == "full" and full["value_max"] == float(data.max())


def test_cli_full_range_option(stored):
    path, data = stored
    env = {**os.environ, "PYTHONWARNINGS": "ignore::DeprecationWarning"}
    res = subprocess.run([sys.executable, "-m", "pmap", "info", str(path), "--full-range"],
                         capture_output=True, text=True, env=env, timeout=300)
    assert res.returncode == 0, res.stderr
    line = next(t for t in res.stdout.splitlines() if t.strip().startswith("values"))
    assert "full scan" in line and f"{data.min():.6g}" in line
