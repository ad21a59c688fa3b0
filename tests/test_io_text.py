"""Tests of pmap.io text maps: long/wide tables, grid inference, streaming conversion.

Reference for the values: tables are written by pandas.DataFrame.to_csv from a
known numpy cube; reading must give that cube back exactly (common practice).
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import zarr
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from pmap.errors import FormatError, InputFileError, OutputExistsError
from pmap.io import convert, cube_info, open_cube, text_to_zarr
from pmap.io._grid import infer_grid

ROOT = Path(__file__).resolve().parents[1]
WL = 600.0 + 2.5 * np.arange(8)


@pytest.fixture
def data() -> np.ndarray:
    return np.round(np.random.default_rng(2).random((5, 6, 8)) * 1000, 2)


def long_frame(
    data, *, step=0.5, jitter=0.0, seed=0, names=("x_um", "y_um", "wavelength_nm", "intensity")
):
    ny, nx, ns = data.shape
    yy, xx, ww = np.meshgrid(np.arange(ny) * step, 3.0 + np.arange(nx) * step, WL, indexing="ij")
    rng = np.random.default_rng(seed)
    # scanner jitter: one offset per pixel, shared by its channels
    jx = np.repeat(rng.uniform(-jitter, jitter, ny * nx), ns) * step
    jy = np.repeat(rng.uniform(-jitter, jitter, ny * nx), ns) * step
    return pd.DataFrame(
        {
            names[0]: xx.ravel() + jx,
            names[1]: yy.ravel() + jy,
            names[2]: ww.ravel(),
            names[3]: data.ravel(),
        }
    )


def wide_frame(data, *, step=0.5, reverse=False):
    ny, nx, ns = data.shape
    yy, xx = np.meshgrid(np.arange(ny) * step, np.arange(nx) * step, indexing="ij")
    cols = [f"{w:g}" for w in WL]
    vals = data.reshape(ny * nx, ns)
    if reverse:
        cols, vals = cols[::-1], vals[:, ::-1]
    df = pd.DataFrame(vals, columns=cols)
    df.insert(0, "y", yy.ravel())
    df.insert(0, "x", xx.ravel())
    return df


def test_long_table_round_trip(tmp_path, data):
    path = tmp_path / "m.csv"
    long_frame(data).sample(frac=1.0, random_state=3).to_csv(path, index=False)  # any row order
    c = open_cube(path, temperature_K=4.2)
    assert c.dims == ("y", "x", "wavelength") and c.shape == data.shape
    np.testing.assert_array_equal(c.values, data.astype("float32"))
    np.testing.assert_allclose(c.x.values, 3.0 + 0.5 * np.arange(6))
    np.testing.assert_allclose(c.wavelength.values, WL)
    assert c.x.attrs["units"] == "um" and c.attrs["temperature_K"] == 4.2


def test_wide_tables_tsv_and_whitespace(tmp_path, data):
    tsv = tmp_path / "w.tsv"
    wide_frame(data, reverse=True).to_csv(tsv, sep="\t", index=False)
    txt = tmp_path / "w.txt"
    with open(txt, "w") as fh:
        fh.write("# exported map\n")
        wide_frame(data).to_csv(fh, sep=" ", index=False)
    for path in (tsv, txt):
        c = open_cube(path)
        np.testing.assert_array_equal(c.values, data.astype("float32"))
        np.testing.assert_allclose(c.wavelength.values, WL)


def test_column_options_units_and_energy(tmp_path, data):
    path = tmp_path / "c.csv"
    df = long_frame(data, names=("Stage X (mm)", "Stage Y (mm)", "E (eV)", "PL"))
    df[["Stage X (mm)", "Stage Y (mm)"]] /= 1000.0  # written in mm
    df["E (eV)"] = df["E (eV)"] / 100.0
    df.to_csv(path, index=False)
    c = open_cube(
        path, x_col="Stage X (mm)", y_col="Stage Y (mm)", spectral_col="E (eV)", value_col="PL"
    )
    assert c.dims == ("y", "x", "energy")
    np.testing.assert_allclose(c.x.values, 3.0 + 0.5 * np.arange(6))  # mm -> µm
    np.testing.assert_allclose(c.energy.values, WL / 100.0)
    np.testing.assert_array_equal(c.values, data.astype("float32"))
    same = open_cube(path, columns={"x": 0, "y": 1, "spectral": 2, "value": 3})
    np.testing.assert_array_equal(same.values, c.values)


def test_partly_filled_grid_gives_nan_never_interpolated(tmp_path, data):
    df = long_frame(data)
    missing = {(0, 3.0), (2, 4.0), (4, 5.5)}  # (row index y/step, x position)
    drop = np.zeros(len(df), bool)
    for iy, x in missing:
        drop |= np.isclose(df.y_um, iy * 0.5) & np.isclose(df.x_um, x)
    path = tmp_path / "p.csv"
    df[~drop].to_csv(path, index=False)
    c = open_cube(path).values
    expect = data.astype("float32").copy()
    for iy, x in missing:
        expect[iy, int(round((x - 3.0) / 0.5))] = np.nan
    np.testing.assert_array_equal(c, expect)  # NaN exactly where missing


def test_jittered_positions_snap_to_grid(tmp_path, data):
    path = tmp_path / "j.csv"
    long_frame(data, jitter=0.08).to_csv(path, index=False)
    c = open_cube(path)
    assert c.shape == data.shape
    np.testing.assert_array_equal(c.values, data.astype("float32"))
    np.testing.assert_allclose(np.diff(c.x.values), 0.5, rtol=0.02)


def test_irregular_and_duplicate_points(tmp_path, data):
    df = long_frame(data)
    irr = df.copy()
    # columns moved to irregular positions (3.23, 3.65, ...: uniform random, seed 2)
    irregular = np.sort(3 + np.random.default_rng(2).uniform(0, 2.5, 6))
    irr["x_um"] = irregular[np.rint((df.x_um - 3.0) / 0.5).astype(int)]
    irr.to_csv(tmp_path / "irr.csv", index=False)
    with pytest.raises(FormatError, match="not on a regular grid"):
        open_cube(tmp_path / "irr.csv")
    dup = pd.concat([df, df.iloc[[17]]])
    dup.to_csv(tmp_path / "dup.csv", index=False)
    with pytest.raises(FormatError, match="duplicate position"):
        open_cube(tmp_path / "dup.csv")
    w = wide_frame(data)
    pd.concat([w, w.iloc[[3]]]).to_csv(tmp_path / "dupw.csv", index=False)
    with pytest.raises(FormatError, match="duplicate position"):
        open_cube(tmp_path / "dupw.csv")


def test_duplicates_found_across_buffer_flushes(tmp_path, data):
    df = long_frame(data)
    path = tmp_path / "late.csv"
    pd.concat([df, df.iloc[[0]]]).to_csv(path, index=False)  # duplicate of the first row, last
    with pytest.raises(FormatError, match="duplicate position"):
        text_to_zarr(
            path, tmp_path / "late.zarr", chunk_rows=7, buffer_mib=1e-6, target_chunk_mib=1e-4
        )


def test_bad_text_inputs(tmp_path, data):
    path = tmp_path / "t.csv"
    long_frame(data).to_csv(path, index=False)
    raw = path.read_bytes()
    cut = tmp_path / "cut.csv"
    cut.write_bytes(raw[: len(raw) - 9])  # ends inside the last line
    with pytest.raises(InputFileError, match="truncated"):
        open_cube(cut)
    bad = tmp_path / "bad.csv"
    bad.write_text(raw.decode().replace("\n3.5,", "\nthree,", 1))
    with pytest.raises(FormatError, match="cannot parse"):
        open_cube(bad)
    odd = tmp_path / "odd.csv"
    odd.write_text("x,y,colour,size\n0,0,red,1\n")
    with pytest.raises(FormatError, match="neither a spectral"):
        open_cube(odd)
    noxy = tmp_path / "noxy.csv"
    noxy.write_text("a,b,wavelength,intensity\n0,0,500,1\n")
    with pytest.raises(FormatError, match="x and y columns"):
        open_cube(noxy)
    empty = tmp_path / "empty.csv"
    empty.write_text("x,y,wavelength,intensity\n")
    with pytest.raises(FormatError, match="no data rows"):
        open_cube(empty)


def test_streaming_conversion_matches_in_memory(tmp_path, data):
    path = tmp_path / "s.csv"
    long_frame(data).sample(frac=1.0, random_state=5).to_csv(path, index=False)
    before = (path.read_bytes(), path.stat().st_mtime_ns)
    # tiny blocks, chunks and buffer: every chunk is evicted and merged many times
    out = text_to_zarr(
        path,
        tmp_path / "s.zarr",
        chunk_rows=13,
        buffer_mib=1e-6,
        target_chunk_mib=1e-4,
        zarr_format=2,
    )
    c = open_cube(out)
    assert zarr.open_group(out)["intensity"].chunks[0] < data.shape[0]  # really several chunks
    np.testing.assert_array_equal(c.values, data.astype("float32"))
    with pytest.raises(OutputExistsError):
        text_to_zarr(path, out)
    conv = convert(path, tmp_path / "s.nc", chunk_rows=50)
    np.testing.assert_array_equal(open_cube(conv).values, data.astype("float32"))
    assert (path.read_bytes(), path.stat().st_mtime_ns) == before
    info = cube_info(path)
    assert info["layout"] == "long table" and info["shape"] == list(data.shape)
    assert info["rows"] == data.size and info["value_max"] == data.max()


@settings(max_examples=40, deadline=None)
@given(
    origin=st.floats(-1e3, 1e3),
    step=st.floats(0.05, 50.0),
    m=st.integers(25, 60),
    drops=st.sets(st.integers(1, 58), max_size=12),
    seed=st.integers(0, 2**16),
)
def test_infer_grid_recovers_indices(origin, step, m, drops, seed):
    # a scan of m lines, some missing (never the last), jitter up to 5 % of a step
    idx = np.array([i for i in range(m) if i not in drops or i == m - 1])
    # a grid whose lines are all multiples of 2 steps apart is a grid of twice the step
    assume(np.gcd.reduce(np.diff(idx)) == 1)
    jitter = np.random.default_rng(seed).uniform(-0.05, 0.05, idx.size) * step
    pos = origin + idx * step + jitter
    g = infer_grid(pos)
    np.testing.assert_allclose(g.step, step, rtol=0.01)
    k = g.index(pos, tolerance=0.15, axis="x")
    np.testing.assert_array_equal(k, idx - idx[0])


def test_streaming_memory_bound(tmp_path):
    """Peak RSS growth of a conversion stays far below the file size (child process)."""
    spec = importlib.util.spec_from_file_location(
        "bench", ROOT / "scripts" / "bench_text_convert.py"
    )
    bench = importlib.util.module_from_spec(spec)
    sys.modules["bench_text_convert"] = bench
    spec.loader.exec_module(bench)
    src = tmp_path / "big.csv"
    shape = bench.write_long_table(src, 150e6)
    size = src.stat().st_size
    rep = bench.run_child(
        "--child",
        "convert",
        str(src),
        str(tmp_path / "big.zarr"),
        "--chunk-rows",
        "50000",
        "--buffer-mib",
        "2",
        "--chunk-mib",
        "0.5",
    )
    growth = (rep["rss_peak_mib"] - rep["rss_before_mib"]) * 2**20
    assert growth < size / 4, f"peak RSS grew {growth / 2**20:.0f} MiB for {size / 2**20:.0f} MiB"
    c = open_cube(tmp_path / "big.zarr")
    assert c.shape == shape
    assert float(c.isel(y=0, x=0).max()) > 1000  # the generated peak is there
