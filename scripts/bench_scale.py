"""Benchmark: end-to-end `plcube process` on a cube larger than the memory limit it sets.

Generates the synthetic demo cube at a chosen size (written tile by tile to Zarr),
then, each in a fresh process so that peak memory is its own:

1. the read floor: read every chunk of the cube and sum it (nothing else);
2. the whole job: read, clean (bad pixels, spikes, baseline), convert to energy,
   descriptors, one-peak fit, write the result store, under ``--memory-limit``.

Prints spectra/s, peak RSS (VmHWM) of each, and last the ratio of the end-to-end
time to the read floor measured in the same run.

    python scripts/bench_scale.py                 # ≈4 GB of float32 data (≈1.2 GB compressed on disk)
    python scripts/bench_scale.py --size 0.25 --memory-limit 1GB   # quick
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

READ = r"""
import json, sys, time, dask
import pmap
cube = pmap.open_cube(sys.argv[1])
t = time.perf_counter()
with dask.config.set(scheduler="threads"):
    total = float(cube.data.sum(dtype="float64").compute())
dt = time.perf_counter() - t
hwm = [int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM")][0]
print(json.dumps({"seconds": dt, "rss_mib": hwm / 1024, "n": int(cube.sizes["y"] * cube.sizes["x"])}))
"""

PROCESS = r"""
import json, sys, time, warnings
import pmap
warnings.simplefilter("ignore")
t = time.perf_counter()
pipe = pmap.load_pipeline(None)
if sys.argv[4] != "0":
    pipe.components = {"method": "nmf", "n_components": int(sys.argv[4])}
    pipe.regions = {"n_regions": 3, "method": "gmm", "feature_space": "shape+intensity"}
ds = pmap.process(sys.argv[1], sys.argv[2], pipeline=pipe, memory_limit=sys.argv[3],
                  progress=True)
dt = time.perf_counter() - t
st = ds.fit_status.values
hwm = [int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM")][0]
print(json.dumps({"seconds": dt, "rss_mib": hwm / 1024, "converged": float((st == 0).mean())}))
"""


def run(code: str, *args: str) -> dict:
    res = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True)
    if res.returncode:
        sys.stderr.write(res.stderr)
        raise SystemExit(f"benchmark step failed ({res.returncode})")
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=float, default=4.0,
                    help="cube size in GB of float32 data (default 4)")
    ap.add_argument("--channels", type=int, default=512)
    ap.add_argument("--memory-limit", default="1GB")
    ap.add_argument("--workdir", default=None, help="folder for the cube (default: a temp dir)")
    ap.add_argument("--keep", action="store_true", help="keep the generated files")
    ap.add_argument("--regions", action="store_true",
                    help="also NMF (3 components) and 3 regions, as `plcube demo` does")
    args = ap.parse_args()

    from pmap.synthetic import write_demo_cube

    side = int(math.sqrt(args.size * 1e9 / (4 * args.channels)))
    work = Path(args.workdir or tempfile.mkdtemp(prefix="pmap_bench_scale_"))
    work.mkdir(parents=True, exist_ok=True)
    print(f"cube: {side} x {side} x {args.channels} float32 = "
          f"{side * side * args.channels * 4 / 1e9:.2f} GB in memory; "
          f"memory limit {args.memory_limit}; load average {os.getloadavg()[0]:.1f}")
    t = time.perf_counter()
    paths = write_demo_cube(work, shape=(side, side), n_channels=args.channels, seed=1,
                            workers=os.cpu_count() or 1, overwrite=True, name="bench")
    gen = time.perf_counter() - t
    disk = sum(f.stat().st_size for f in Path(paths["cube"]).rglob("*") if f.is_file())
    n = side * side
    print(f"generated in {gen:.1f} s ({n / gen:,.0f} spectra/s), {disk / 1e9:.2f} GB on disk")

    read = run(READ, str(paths["cube"]))
    print(f"read floor:  {read['seconds']:.1f} s, {n / read['seconds']:,.0f} spectra/s, "
          f"{disk / 1e9 / read['seconds']:.2f} GB/s from disk, peak RSS {read['rss_mib']:.0f} MiB")
    out = work / "bench_result.zarr"
    shutil.rmtree(out, ignore_errors=True)
    proc = run(PROCESS, str(paths["cube"]), str(out), args.memory_limit,
               "3" if args.regions else "0")
    print(f"end to end:  {proc['seconds']:.1f} s, {n / proc['seconds']:,.0f} spectra/s, "
          f"peak RSS {proc['rss_mib']:.0f} MiB (limit {args.memory_limit}), "
          f"{100 * proc['converged']:.1f} % of fits converged")
    print(f"load average after: {os.getloadavg()[0]:.1f}")
    if not args.keep and not args.workdir:
        shutil.rmtree(work, ignore_errors=True)
    print(f"end_to_end_vs_read: {proc['seconds'] / read['seconds']:.1f}")


if __name__ == "__main__":
    main()
