"""Benchmark: stream a large long-table text map into Zarr in bounded memory.

Generates a long table (x_um, y_um, wavelength_nm, intensity; one row per
pixel and channel) of about ``--size`` bytes, converts it with
:func:`pmap.io.text_to_zarr` in a child process, and reports the child's peak
RSS and throughput next to a baseline measured in the same run: a plain
chunked ``pandas.read_csv`` over the same file (one pass, no processing).
It does so at two sizes (``--small``, by default a quarter of ``--size``, then
``--size``) to show that peak RSS does not grow with the file, prints the load
average, and ends with ``convert_vs_pandas: N`` (conversion time / pandas read
time at ``--size``, measured in the same run).

    python scripts/bench_text_convert.py --size 2G --dir /tmp

The files and the output stores are deleted at the end unless ``--keep``.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROW_BYTES = 28  # "0012.5,0003.0,0512.25,01234\n"
N_CHANNELS = 1000


def _digits(values: np.ndarray, width: int) -> np.ndarray:
    """ASCII digits of non-negative integers, zero-padded to ``width`` (uint8, (n, width))."""
    powers = 10 ** np.arange(width - 1, -1, -1, dtype=np.int64)
    return ((values[:, None] // powers) % 10 + 48).astype(np.uint8)


def _fixed(values: np.ndarray, int_width: int, frac_width: int) -> np.ndarray:
    scaled = np.rint(values * 10**frac_width).astype(np.int64)
    whole, frac = np.divmod(scaled, 10**frac_width)
    dot = np.full((len(values), 1), ord("."), dtype=np.uint8)
    return np.hstack([_digits(whole, int_width), dot, _digits(frac, frac_width)])


def long_table_shape(size_bytes: float, n_channels: int = N_CHANNELS) -> tuple[int, int, int]:
    """(ny, nx, n_channels) of a generated long table of about ``size_bytes``."""
    pixels = max(1, int(size_bytes // ROW_BYTES // n_channels))
    nx = max(1, math.isqrt(pixels))
    return max(1, pixels // nx), nx, n_channels


def write_long_table(
    path: str | os.PathLike,
    size_bytes: float,
    *,
    n_channels: int = N_CHANNELS,
    pixel_um: float = 0.5,
    seed: int = 0,
) -> tuple[int, int, int]:
    """Write a long-table text map of about ``size_bytes`` (raster order); return its shape.

    Each pixel holds a Gaussian PL peak near 750 nm (position varying across the
    map) on a flat background plus Poisson noise, as integer counts.
    """
    ny, nx, ns = long_table_shape(size_bytes, n_channels)
    rng = np.random.default_rng(seed)
    wl = 500.0 + 0.25 * np.arange(ns)
    sep = np.full((1, 1), ord(","), dtype=np.uint8)
    nl = np.full((1, 1), ord("\n"), dtype=np.uint8)
    with open(path, "wb") as fh:
        fh.write(b"x_um,y_um,wavelength_nm,intensity\n")
        block = max(1, 500_000 // ns)
        for start in range(0, ny * nx, block):
            pix = np.arange(start, min(start + block, ny * nx))
            iy, ix = np.divmod(pix, nx)
            centre = 700.0 + 100.0 * ix / max(nx - 1, 1)
            peak = 2000.0 * np.exp(-0.5 * ((wl[None, :] - centre[:, None]) / 15.0) ** 2)
            counts = np.minimum(rng.poisson(peak + 100.0), 99999).ravel()
            n = counts.size
            cols = [
                _fixed(np.repeat(ix * pixel_um, ns), 4, 1),
                sep.repeat(n, 0),
                _fixed(np.repeat(iy * pixel_um, ns), 4, 1),
                sep.repeat(n, 0),
                _fixed(np.tile(wl, len(pix)), 4, 2),
                sep.repeat(n, 0),
                _digits(counts, 5),
                nl.repeat(n, 0),
            ]
            fh.write(np.hstack(cols).tobytes())
    return ny, nx, ns


def _rss_mib() -> float:
    """Peak resident memory of this process in MiB (VmHWM; ru_maxrss elsewhere)."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    # ru_maxrss (KiB on Linux) can carry the parent's peak across fork/exec
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _child_convert(
    src: str, out: str, chunk_rows: int, buffer_mib: float, chunk_mib: float
) -> None:
    import pmap.io

    # warm up on a tiny table so that lazily imported modules (and the compiled reader's
    # kernels, loaded once per process) count neither as time nor as growth
    from pmap.io import _text

    with tempfile.TemporaryDirectory() as tmp:
        write_long_table(Path(tmp) / "w.csv", 50_000, n_channels=50)
        min_bytes, _text._FAST_MIN_BYTES = _text._FAST_MIN_BYTES, 0
        try:
            pmap.io.text_to_zarr(Path(tmp) / "w.csv", Path(tmp) / "w.zarr", chunk_rows=chunk_rows)
        finally:
            _text._FAST_MIN_BYTES = min_bytes
    before = _rss_mib()
    t0 = time.perf_counter()
    pmap.io.text_to_zarr(
        src, out, chunk_rows=chunk_rows, buffer_mib=buffer_mib, target_chunk_mib=chunk_mib
    )
    dt = time.perf_counter() - t0
    print(json.dumps({"seconds": dt, "rss_before_mib": before, "rss_peak_mib": _rss_mib()}))


def _child_baseline(src: str, chunk_rows: int) -> None:
    import pandas as pd

    before = _rss_mib()
    t0 = time.perf_counter()
    rows = 0
    with pd.read_csv(src, chunksize=chunk_rows) as reader:
        for df in reader:
            rows += len(df)
    dt = time.perf_counter() - t0
    print(
        json.dumps(
            {"seconds": dt, "rows": rows, "rss_before_mib": before, "rss_peak_mib": _rss_mib()}
        )
    )


def run_child(*args: str) -> dict:
    """Run this script in child mode and return its JSON report."""
    cmd = [sys.executable, __file__, *args]
    res = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if res.returncode != 0:
        raise RuntimeError(f"child {args[0]} failed:\n{res.stderr[-4000:]}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def _parse_size(text: str) -> float:
    text = text.strip().upper().rstrip("B")
    mult = {"K": 1e3, "M": 1e6, "G": 1e9}.get(text[-1:], 1.0)
    return float(text[:-1] if text[-1:] in "KMG" else text) * mult


def measure(size_bytes: float, work: Path, a: argparse.Namespace) -> dict:
    """Generate a table of about ``size_bytes``, convert it and read it with pandas."""
    src, out = work / "map_long.csv", work / "map.zarr"
    t0 = time.perf_counter()
    shape = write_long_table(src, size_bytes)
    size = src.stat().st_size
    print(f"generated {size / 1e9:.2f} GB, cube {shape} in {time.perf_counter() - t0:.1f} s")
    os.sync()  # write the new file out now, not while the timed runs go
    common = [
        "--chunk-rows",
        str(a.chunk_rows),
        "--buffer-mib",
        str(a.buffer_mib),
        "--chunk-mib",
        str(a.chunk_mib),
    ]
    try:
        conv = run_child("--child", "convert", str(src), str(out), *common)
        base = run_child("--child", "baseline", str(src), *common)
    finally:
        if not a.keep:
            src.unlink(missing_ok=True)
            shutil.rmtree(out, ignore_errors=True)
    mb = size / 1e6
    ratio = conv["seconds"] / base["seconds"]
    print(
        f"  text_to_zarr : {conv['seconds']:.2f} s, {mb / conv['seconds']:.0f} MB/s, "
        f"peak RSS {conv['rss_peak_mib']:.0f} MiB (after imports {conv['rss_before_mib']:.0f}, "
        f"growth {conv['rss_peak_mib'] - conv['rss_before_mib']:.0f})"
    )
    print(
        f"  pandas read  : {base['seconds']:.2f} s, {mb / base['seconds']:.0f} MB/s, "
        f"peak RSS {base['rss_peak_mib']:.0f} MiB ({base['rows']} rows, one chunked pass)"
    )
    print(f"  ratio        : conversion takes {ratio:.2f}x the plain pandas read")
    return {"size": size, "rows": base["rows"], "ratio": ratio, "conv": conv, "base": base}


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    ap.add_argument("--size", default="2G", help="text file size, e.g. 2G, 200M (default 2G)")
    ap.add_argument(
        "--small",
        default=None,
        help="a second, smaller size measured first to show that peak RSS does not grow "
        "with the file (default: a quarter of --size; 0 to skip)",
    )
    ap.add_argument("--dir", default=tempfile.gettempdir(), help="where to write (default /tmp)")
    ap.add_argument("--chunk-rows", type=int, default=1_000_000)
    ap.add_argument("--buffer-mib", type=float, default=256.0)
    ap.add_argument("--chunk-mib", type=float, default=64.0)
    ap.add_argument("--keep", action="store_true", help="keep the generated files")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.child:
        if a.child[0] == "convert":
            _child_convert(a.child[1], a.child[2], a.chunk_rows, a.buffer_mib, a.chunk_mib)
        else:
            _child_baseline(a.child[1], a.chunk_rows)
        return
    big = _parse_size(a.size)
    small = big / 4 if a.small is None else _parse_size(a.small)
    print(f"load average at start: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")
    work = Path(tempfile.mkdtemp(prefix="pmap_bench_", dir=a.dir))
    try:
        runs = [measure(s, work, a) for s in ([small] if small > 0 else []) + [big]]
    finally:
        if not a.keep:
            shutil.rmtree(work, ignore_errors=True)
    print(f"load average at end: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")
    if len(runs) == 2:
        (s0, s1) = runs
        g0 = s0["conv"]["rss_peak_mib"] - s0["conv"]["rss_before_mib"]
        g1 = s1["conv"]["rss_peak_mib"] - s1["conv"]["rss_before_mib"]
        print(
            f"peak RSS growth: {g0:.0f} MiB at {s0['size'] / 1e9:.2f} GB, {g1:.0f} MiB at "
            f"{s1['size'] / 1e9:.2f} GB (file {s1['size'] / s0['size']:.1f}x larger)"
        )
    print(f"convert_vs_pandas: {runs[-1]['ratio']:.2f}")


if __name__ == "__main__":
    main()
