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


@pytest.fixture(autouse=True)
def _compiled_reader_for_small_files(monkeypatch):
    """The compiled reader takes only large files; here it reads the small test tables
    too (tests that want pandas alone say so)."""
    from pmap.io import _text

    monkeypatch.setattr(_text, "_FAST_MIN_BYTES", 0)


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


def test_european_exports_semicolon_and_decimal_comma(tmp_path, data):
    """Tables exported under a European locale: ";" between fields and "," as the
    decimal mark (pandas' decimal="," writer; common practice in spreadsheet exports).
    Read without options, long (.csv) and wide (.txt, tab) alike, with the same values."""
    csv_path = tmp_path / "m.csv"
    long_frame(data).to_csv(csv_path, index=False, sep=";", decimal=",")
    assert "0,5;" in csv_path.read_text()  # decimal commas really are in the file
    txt = tmp_path / "w.txt"
    frame = wide_frame(data)
    frame.columns = [c.replace(".", ",") for c in frame.columns]  # "602,5" channel headers
    frame.to_csv(txt, index=False, sep="\t", decimal=",")
    for path in (csv_path, txt):
        c = open_cube(path)
        np.testing.assert_array_equal(c.values, data.astype("float32"))
        np.testing.assert_allclose(c.wavelength.values, WL)
        np.testing.assert_allclose(c.x.values, (3.0 if path == csv_path else 0.0)
                                   + 0.5 * np.arange(6))


def test_stated_decimal_mark_checked(tmp_path, data):
    path = tmp_path / "m.csv"
    long_frame(data).to_csv(path, index=False)
    with pytest.raises(FormatError, match="decimal"):
        open_cube(path, decimal=";")
    with pytest.raises(FormatError, match="both"):
        open_cube(path, decimal=",")  # "," is this file's delimiter


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


# --- the compiled reader of plain tables (pmap.io._text_fast) ---------------------------------


def _store_bytes(path) -> dict[str, bytes]:
    """Every array of a Zarr store as raw bytes (dtype and shape included)."""
    g = zarr.open_group(path, mode="r")
    return {
        k: (str(g[k].dtype), g[k].shape, g[k].chunks, g[k][...].tobytes())
        for k in sorted(g.array_keys())
    }


def _pandas_only(monkeypatch):
    """Make text_to_zarr read every table with pandas (the reader before the compiled one)."""
    from pmap.io import _text

    monkeypatch.setattr(_text, "_fast_delimiter", lambda spec: None)


def _plain_long_table(path, *, seed=0, ny=7, nx=9, ns=23, drop=0.1, shuffle=True):
    """A long table written with numpy's own formatting, some pixels missing, rows
    shuffled; returns (rows as an (n, 4) float array parsed back by Python's float)."""
    rng = np.random.default_rng(seed)
    wl = 500.0 + 0.37 * np.arange(ns)
    yy, xx, ww = np.meshgrid(np.arange(ny), np.arange(nx), wl, indexing="ij")
    keep = np.repeat(rng.random(ny * nx) >= drop, ns)
    vals = rng.normal(1000.0, 300.0, yy.size)
    lines = [
        f"{x * 0.25 - 1.0:.2f},{y * 0.25 + 2.0:.2f},{w:.2f},{v:.4f}"
        for x, y, w, v, k in zip(xx.ravel(), yy.ravel(), ww.ravel(), vals, keep)
        if k
    ]
    if shuffle:
        lines = [lines[i] for i in rng.permutation(len(lines))]
    path.write_text("x_um,y_um,wavelength_nm,intensity\n" + "\n".join(lines) + "\n")
    return np.array([[float(f) for f in ln.split(",")] for ln in lines])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_conversion_matches_an_independent_reading(tmp_path, seed):
    """Every (y, x, channel) of the cube holds float32 of the row that names it (rows
    read by Python's float, positions put on the grid by hand); all other cells are
    NaN. Reference: the file's own rows (common practice)."""
    src = tmp_path / "t.csv"
    rows = _plain_long_table(src, seed=seed, shuffle=seed != 2)  # seed 2: raster order
    out = text_to_zarr(
        src, tmp_path / "t.zarr", chunk_rows=101, buffer_mib=1e-6, target_chunk_mib=2e-3
    )
    from pmap.io import _text

    assert _text.scan_text(_text.inspect_text(src)).fast is not None  # compiled reader used
    cube = open_cube(out)
    assert zarr.open_group(out)["intensity"].chunks[0] < cube.shape[0]  # several chunks
    x0, y0 = rows[:, 0].min(), rows[:, 1].min()
    ix = np.rint((rows[:, 0] - x0) / 0.25).astype(int)
    iy = np.rint((rows[:, 1] - y0) / 0.25).astype(int)
    wl = np.unique(rows[:, 2])
    ic = np.searchsorted(wl, rows[:, 2])
    expect = np.full((iy.max() + 1, ix.max() + 1, wl.size), np.nan, dtype=np.float32)
    expect[iy, ix, ic] = rows[:, 3].astype(np.float32)
    assert cube.shape == expect.shape
    np.testing.assert_array_equal(cube.values, expect)  # NaN where no row, bit for bit
    np.testing.assert_array_equal(cube.wavelength.values, wl)
    np.testing.assert_allclose(cube.x.values, x0 + 0.25 * np.arange(expect.shape[1]), atol=1e-9)


@pytest.mark.parametrize(
    "name, text, fast",
    [
        # plain tables the compiled reader takes
        ("crlf.csv", "x,y,wavelength,intensity\r\n{rows_crlf}", True),
        ("blank.csv", "x,y,wavelength,intensity\n\n{rows}\n\n", True),
        ("ws.txt", "# stage scan\nx y wavelength intensity\n{rows_ws}", True),
        ("exp.csv", "x,y,wavelength,intensity\n{rows_exp}", True),
        ("noeol.csv", "x,y,wavelength,intensity\n{rows_noeol}", True),
        # tables it leaves to pandas
        ("comment.csv", "x,y,wavelength,intensity\n{rows_comment}", False),
        ("quoted.csv", "x,y,wavelength,intensity\n{rows_quoted}", False),
        ("long_digits.csv", "x,y,wavelength,intensity\n{rows_digits}", False),
        ("padded.csv", "x,y,wavelength,intensity\n{rows_padded}", False),
    ],
)
def test_compiled_reader_gives_the_pandas_cube(tmp_path, monkeypatch, name, text, fast):
    """The same store, bit for bit, whether the compiled reader or pandas reads the
    table (pandas is the reference: the reader used before, common practice)."""
    rng = np.random.default_rng(7)
    rows = [
        (x, y, 600.0 + 0.5 * c, float(np.round(rng.uniform(0, 5e4), 3)))
        for y in range(3)
        for x in range(4)
        for c in range(6)
    ]
    csv_rows = [f"{x},{y},{w},{v}" for x, y, w, v in rows]
    parts = {
        "rows": "\n".join(csv_rows),
        "rows_crlf": "".join(r + "\r\n" for r in csv_rows),
        "rows_ws": "".join(f"  {x}\t{y}  {w} {v}  \n" for x, y, w, v in rows),
        "rows_exp": "".join(f"{x:.1e},{y}E0,{w:.6e},{v:.9e}\n" for x, y, w, v in rows),
        "rows_noeol": "\n".join(csv_rows),
        "rows_comment": "\n".join(csv_rows[:30] + ["# pause"] + csv_rows[30:]) + "\n",
        "rows_quoted": "".join(f'{x},{y},"{w}",{v}\n' for x, y, w, v in rows),
        "rows_digits": "".join(f"{x},{y},{w},{v:.12f}\n" for x, y, w, v in rows),
        "rows_padded": "".join(f"{x}, {y},{w},{v}\n" for x, y, w, v in rows),
    }
    src = tmp_path / name
    src.write_bytes(text.format(**parts).encode())
    from pmap.io import _text

    layout = _text.scan_text(_text.inspect_text(src))
    assert (layout.fast is not None) == fast
    assert layout.n_rows == len(rows)
    out_fast = text_to_zarr(src, tmp_path / "fast.zarr", chunk_rows=5, target_chunk_mib=1e-3)
    with monkeypatch.context() as m:
        _pandas_only(m)
        out_pd = text_to_zarr(src, tmp_path / "pd.zarr", chunk_rows=5, target_chunk_mib=1e-3)
    assert _store_bytes(out_fast) == _store_bytes(out_pd)
    expect = np.array([v for *_, v in rows], dtype=np.float32).reshape(3, 4, 6)
    np.testing.assert_array_equal(open_cube(out_fast).values, expect)


def test_compiled_reader_wide_table_and_float64(tmp_path, monkeypatch, data):
    """Wide tables and a float64 cube: same store as pandas gives (common practice)."""
    src = tmp_path / "w.csv"
    wide_frame(data, reverse=True).sample(frac=1.0, random_state=1).to_csv(src, index=False)
    for dtype in ("float32", "float64"):
        a = text_to_zarr(src, tmp_path / f"a{dtype}.zarr", dtype=dtype, target_chunk_mib=1e-3)
        with monkeypatch.context() as m:
            _pandas_only(m)
            b = text_to_zarr(src, tmp_path / f"b{dtype}.zarr", dtype=dtype, target_chunk_mib=1e-3)
        assert _store_bytes(a) == _store_bytes(b)
        np.testing.assert_array_equal(open_cube(a).values, data.astype(dtype))


def test_compiled_reader_names_the_duplicate(tmp_path):
    """A row given twice is named by its position (the row repeated by hand, last)."""
    src = tmp_path / "d.csv"
    rows = _plain_long_table(src, seed=4, drop=0.0, shuffle=False)
    lines = src.read_text().splitlines()
    src.write_text("\n".join(lines + [lines[5]]) + "\n")  # row 5 again, at the end
    x, y, w = rows[4, :3]
    with pytest.raises(FormatError, match="duplicate position") as err:
        text_to_zarr(src, tmp_path / "d.zarr", buffer_mib=1e-6, target_chunk_mib=1e-3)
    assert f"x={x:g}, y={y:g}, wavelength={w:g}" in str(err.value)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.one_of(
            st.floats(allow_nan=False, allow_infinity=False).map(repr),
            st.floats(-1e6, 1e6, allow_nan=False).map(lambda v: f"{v:.4f}"),
            st.floats(-1e6, 1e6, allow_nan=False).map(lambda v: f"{v:.5e}"),
            st.integers(-(10**18), 10**18).map(str),
            st.from_regex(
                r"[+-]?[0-9]{0,12}(\.[0-9]{0,10})?([eE][+-]?[0-9]{1,3})?", fullmatch=True
            ),
        ),
        min_size=1,
        max_size=40,
    )
)
def test_compiled_number_reading_is_correctly_rounded(texts):
    """Each number the compiled reader accepts is the correctly rounded double that
    Python's float gives (IEEE 754 round to nearest; W. D. Clinger, PLDI 1990: an exact
    mantissa below 2**53 scaled once by an exact power of ten up to 1e22 rounds once)."""
    from pmap.io import _text_fast as tf

    for t in texts:
        raw = np.frombuffer((t + "\n").encode(), dtype=np.uint8)
        out = np.empty((1, 1))
        status, _, n = tf.parse_block(raw, 0, raw.size, True, 44, 1, np.zeros(1, np.int64),
                                      out, 0, tf.POW10)  # fmt: skip
        if status == tf.BAIL:
            continue  # left to pandas
        assert n == (1 if t else 0)  # an empty line is a blank line, skipped
        if not t:
            continue
        assert out[0, 0].tobytes() == np.float64(float(t)).tobytes(), t


_NUMBER = st.one_of(
    st.floats(-1e6, 1e6, allow_nan=False).map(lambda v: f"{v:.3f}"),
    st.integers(-(10**6), 10**6).map(str),
    st.from_regex(r"[+-]?[0-9]{1,5}(\.[0-9]{0,4})?", fullmatch=True),
)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.booleans(), st.lists(_NUMBER, min_size=4, max_size=4)), min_size=1, max_size=30
    ),
    st.sampled_from([",", ";", "\t", " "]),
)
def test_compiled_lines_field_by_field(lines, sep):
    """Lines that often repeat the first two fields of the line before (a long table's
    x and y): every field is Python's float of its text (reference: the text itself)."""
    from pmap.io import _text_fast as tf

    fields, prev = [], None
    for repeat, f in lines:
        if repeat and prev is not None:
            f = prev[:2] + f[2:]
        fields.append(f)
        prev = f
    text = "".join(sep.join(f) + "\n" for f in fields)
    raw = np.frombuffer(text.encode(), dtype=np.uint8)
    out = np.empty((4, len(fields)))
    delim = 0 if sep == " " else ord(sep)
    status, _, n = tf.parse_block(raw, 0, raw.size, True, delim, 4, np.arange(4), out, 0, tf.POW10)
    if status == tf.BAIL:
        return  # a field it leaves to pandas
    assert n == len(fields)
    expect = np.array([[float(v) for v in f] for f in fields]).T
    assert out.tobytes() == expect.tobytes()


def _random_table(rnd) -> tuple[str, str]:
    """A small long table in a random dialect: delimiter, line ends, number formats,
    blank lines, an unused text column, missing pixels, now and then a duplicate or a
    bad value. Returns (file suffix, text)."""
    sep = rnd.choice([",", ";", "\t", " ", "  "])
    suffix = {",": ".csv", "\t": ".tsv"}.get(sep, ".txt")
    eol = rnd.choice(["\n", "\r\n"])
    extra = rnd.random() < 0.2
    fmts = [
        lambda v: f"{v:g}",
        lambda v: f"{v:.3e}",
        lambda v: repr(float(v)),
        lambda v: f"+{v}",
        lambda v: f"{v:.17f}",
        lambda v: f"{v:.2f}",
    ]
    rows = []
    for iy in range(rnd.randint(1, 4)):
        for ix in range(rnd.randint(1, 5)):
            if rnd.random() < 0.1:
                continue
            for ic in range(rnd.randint(2, 6)):
                v = rnd.choice([rnd.uniform(-1e3, 1e5), float(rnd.randint(0, 9999)), -0.0])
                vals = [1.5 * ix - 2, 0.5 * iy + 10, 600 + 0.25 * ic, v]
                rows.append([rnd.choice(fmts)(u) for u in vals] + (["abc"] if extra else []))
    if rnd.random() < 0.5:
        rnd.shuffle(rows)
    if rows and rnd.random() < 0.15:
        rows.append(list(rows[rnd.randrange(len(rows))]))
    if rows and rnd.random() < 0.15:
        rows[rnd.randrange(len(rows))][3] = rnd.choice(["", "nan", "x", "1e999", " 5"])
    pad = sep.strip() == ""
    body = [(" " if pad and rnd.random() < 0.3 else "") + sep.join(r) for r in rows] + (
        [""] if rnd.random() < 0.1 else []
    )
    header = (sep if not pad else " ").join(["x", "y", "wavelength", "intensity"])
    header += ((sep if not pad else " ") + "note") if extra else ""
    return suffix, eol.join(["# scan"] * (rnd.random() < 0.2) + [header] + body) + eol


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1))
def test_compiled_reader_and_pandas_agree_on_random_tables(tmp_path_factory, seed):
    """Whatever the dialect, the conversion gives the same store bytes, or the same
    error, with or without the compiled reader (pandas: the reference reader)."""
    import random

    from pmap.errors import PmapError
    from pmap.io import _text

    rnd = random.Random(seed)
    suffix, text = _random_table(rnd)
    d = tmp_path_factory.mktemp("rt")
    src = d / f"t{suffix}"
    src.write_bytes(text.encode())
    kw = dict(
        chunk_rows=rnd.choice([3, 1000]),
        target_chunk_mib=rnd.choice([1e-4, 64]),
        buffer_mib=rnd.choice([1e-6, 256]),
    )

    def convert_with(fast: bool, out):
        keep = _text._fast_delimiter
        if not fast:
            _text._fast_delimiter = lambda spec: None
        try:
            text_to_zarr(src, out, **kw)
            return _store_bytes(out)
        except PmapError as exc:
            return type(exc).__name__, str(exc)
        finally:
            _text._fast_delimiter = keep

    assert convert_with(True, d / "a.zarr") == convert_with(False, d / "b.zarr")


@settings(max_examples=60, deadline=None)
@given(
    body=st.text(alphabet='0123456789.,;-+eE \t\r\n#"x', max_size=300),
    header=st.sampled_from(["x,y,wavelength,intensity", "x y wavelength intensity", "x,y,1,2"]),
)
def test_compiled_reader_on_random_text(tmp_path_factory, body, header):
    """Random characters of the number grammar after a valid header: the same store or
    the same error with and without the compiled reader (pandas is the reference)."""
    from pmap.errors import PmapError
    from pmap.io import _text

    d = tmp_path_factory.mktemp("rx")
    src = d / ("t.txt" if " " in header else "t.csv")
    src.write_bytes((header + "\n" + body).encode())

    def convert_with(fast: bool, out):
        keep = _text._fast_delimiter
        if not fast:
            _text._fast_delimiter = lambda spec: None
        try:
            text_to_zarr(src, out, chunk_rows=4, target_chunk_mib=1e-4, buffer_mib=1e-6)
            return _store_bytes(out)
        except PmapError as exc:
            return type(exc).__name__, str(exc)
        finally:
            _text._fast_delimiter = keep

    assert convert_with(True, d / "a.zarr") == convert_with(False, d / "b.zarr")
