"""Benchmark: decompose (NMF) + segment (k-means) of 10^6 spectra × 512 channels.

The cube is generated lazily in spatial chunks (three emitting regions, Gaussian
lines in photon energy, Gaussian approximation of shot noise plus read noise, an
off-sample strip), then held in memory (``--no-persist`` regenerates it on every
pass instead). Baselines measured in the same run: the time to sum the whole
cube (one read pass) and to generate it. Prints each time, its ratio to the
sum pass, and the agreement with the truth (ARI, spectral correlation); then the
median ratio of the wall times and of the CPU seconds (this process, all threads:
steadier when other work shares the cores).

    python scripts/bench_decomposition.py [--ny 1000 --nx 1000 --channels 512] [--quick]
        [--repeat N] [--from-zarr [DIR]]

``--from-zarr`` also writes the cube to a Zarr store and measures the read floor the
way a user reads a stored cube (``xarray.open_zarr(...).sum().compute()``) and the
same work on the cube read from the store; both ratios are printed, each against a
baseline measured in the same repeat.
"""

from __future__ import annotations

import argparse
import os
import time

import dask
import dask.array as da
import numpy as np

import pmap
from pmap.decomposition import decompose, segment

CENTRES_EV = (1.40, 1.46, 1.52)


def truth_region(y0, y1, x0, x1, ny, nx):
    yy, xx = np.mgrid[y0:y1, x0:x1]
    region = (3 * xx) // nx
    return np.where(yy < ny // 10, -1, region)


def make_block(block_info=None, *, ny, nx, energy, seed):
    (y0, y1), (x0, x1), _ = block_info[None]["array-location"]
    loc = block_info[None]["chunk-location"]
    rng = np.random.default_rng([seed, *loc])
    spectra = np.exp(-0.5 * ((energy[None, :] - np.array(CENTRES_EV)[:, None]) / 0.02) ** 2)
    reg = truth_region(y0, y1, x0, x1, ny, nx)
    expected = np.where(reg[..., None] >= 0, 200.0 * spectra[np.clip(reg, 0, None)], 0.0)
    noise = rng.standard_normal(expected.shape, dtype=np.float32)
    return (expected + noise * np.sqrt(expected + 4.0)).astype(np.float32)


CPU_TIMES: dict[str, float] = {}


def timed(fn, name=""):
    """(result, wall seconds); the CPU seconds of this process go to CPU_TIMES[name]."""
    t0, c0 = time.perf_counter(), time.process_time()
    out = fn()
    CPU_TIMES[name] = time.process_time() - c0
    return out, time.perf_counter() - t0


def run_once(cube, args, n_spec, t_sum, label):
    """decompose + segment once; prints each time and its ratio to ``t_sum``; returns
    (total seconds, labels, dataset, abundances, total CPU seconds of this process)."""
    ds, t_fit = timed(
        lambda: decompose(
            cube, method="nmf", n_components=3, sample_pixels=args.sample_pixels, seed=0
        )
    )
    cpu_fit = CPU_TIMES[""]
    ab, t_ab = timed(lambda: ds["component_abundance"].compute())
    cpu_dec = cpu_fit + CPU_TIMES[""]
    t_dec = t_fit + t_ab
    print(
        f"decompose NMF k=3: fit {t_fit:.2f} s + abundances {t_ab:.2f} s = {t_dec:8.2f} s "
        f"({t_dec / t_sum:.1f} x; CPU {cpu_dec:.2f} s)"
    )
    region, t_sfit = timed(lambda: segment(cube, n_regions=3, sample_pixels=args.sample_pixels))
    cpu_sfit = CPU_TIMES[""]
    lab, t_lab = timed(lambda: region.compute())
    t_seg = t_sfit + t_lab
    cpu_seg = cpu_sfit + CPU_TIMES[""]
    print(
        f"segment k-means k=3: fit {t_sfit:.2f} s + labels {t_lab:.2f} s = {t_seg:8.2f} s "
        f"({t_seg / t_sum:.1f} x; CPU {cpu_seg:.2f} s)"
    )
    total = t_dec + t_seg
    print(
        f"decompose + segment:         {total:8.2f} s   ({total / t_sum:.1f} x {label}; "
        f"{n_spec / total:,.0f} spectra/s)"
    )
    return total, lab, ds, ab, cpu_dec + cpu_seg


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ny", type=int, default=1000)
    ap.add_argument("--nx", type=int, default=1000)
    ap.add_argument("--channels", type=int, default=512)
    ap.add_argument("--sample-pixels", type=int, default=20000)
    ap.add_argument("--no-persist", action="store_true")
    ap.add_argument("--quick", action="store_true", help="200 x 250 pixels")
    ap.add_argument("--repeat", type=int, default=1,
                    help="measure the baseline and decompose + segment this many times")
    ap.add_argument("--from-zarr", nargs="?", const="", default=None, metavar="DIR",
                    help="also write the cube to a Zarr store (in DIR, default a temporary "
                    "folder) and measure the read floor xarray.open_zarr(...).sum().compute() "
                    "and decompose + segment on the cube read from that store")
    args = ap.parse_args()
    ny, nx = (200, 250) if args.quick else (args.ny, args.nx)
    energy = np.linspace(1.30, 1.62, args.channels)
    cy = max(1, (64 * 2**20) // (nx * args.channels * 4))
    chunks = ((cy,) * (ny // cy) + ((ny % cy,) if ny % cy else ()), (nx,), (args.channels,))
    data = da.map_blocks(
        make_block, chunks=chunks, dtype=np.float32, ny=ny, nx=nx, energy=energy, seed=0
    )
    cube = pmap.make_cube(
        data,
        energy_ev=energy,
        y_um=np.arange(ny) * 0.5,
        x_um=np.arange(nx) * 0.5,
        chunks={"y": cy, "x": nx},
    )
    n_spec = ny * nx
    print(
        f"cube: {ny} x {nx} = {n_spec} spectra x {args.channels} channels, "
        f"{cube.nbytes / 2**30:.2f} GiB float32, {cube.data.npartitions} chunks, "
        f"{dask.system.CPU_COUNT} CPUs; load average {os.getloadavg()[0]:.2f}"
    )
    if not args.no_persist:
        cube, t_gen = timed(lambda: cube.persist())
        print(f"generate (held in memory):   {t_gen:8.2f} s")
    ratios, cpu_ratios, lab, ds, ab = [], [], None, None, None
    for rep in range(args.repeat):
        if args.repeat > 1:
            print(f"--- repeat {rep + 1} of {args.repeat} (load average {os.getloadavg()[0]:.2f})")
        _, t_sum = timed(lambda: float(cube.sum().compute()), "sum")
        print(f"baseline, sum of the cube:   {t_sum:8.2f} s   (1.00 x; CPU {CPU_TIMES['sum']:.2f} s)")
        total, lab, ds, ab, cpu = run_once(cube, args, n_spec, t_sum, "the sum pass")
        ratios.append(total / t_sum)
        cpu_ratios.append(cpu / CPU_TIMES["sum"])

    from sklearn.metrics import adjusted_rand_score

    truth = truth_region(0, ny, 0, nx, ny, nx)
    spectra = np.exp(-0.5 * ((energy[None, :] - np.array(CENTRES_EV)[:, None]) / 0.02) ** 2)
    corr = [np.corrcoef(ds["component_spectrum"].values[k], spectra[k])[0, 1] for k in range(3)]
    print(
        f"accuracy: ARI {adjusted_rand_score(truth.ravel(), lab.values.ravel()):.4f}, "
        f"NMF spectra correlation min {min(corr):.5f}, "
        f"no-signal pixels {int((lab.values == -1).sum())} (truth {int((truth == -1).sum())}), "
        f"abundances finite {bool(np.isfinite(ab.values).all())}"
    )
    print(f"decompose_segment_vs_sum: {np.median(ratios):.2f} "
          f"(median of {len(ratios)}: {', '.join(f'{r:.2f}' for r in ratios)}; cube in memory)")
    # CPU seconds of this process (all its threads) over those of the sum pass: steadier
    # than wall time when other work shares the cores
    print(f"decompose_segment_cpu_vs_sum: {np.median(cpu_ratios):.2f} "
          f"(median of {len(cpu_ratios)}: {', '.join(f'{r:.2f}' for r in cpu_ratios)})")
    if args.from_zarr is not None:
        zarr_ratios(cube, args, n_spec)
    print(f"load average at the end: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")


def zarr_ratios(cube, args, n_spec):
    """The cube written to a Zarr store (zarr's default codec); the read floor and
    decompose + segment on the cube read back from it, each repeat side by side."""
    import shutil
    import tempfile

    import xarray as xr

    base = tempfile.mkdtemp(prefix="bench_decomposition_", dir=args.from_zarr or None)
    path = f"{base}/cube.zarr"
    try:
        _, t_w = timed(lambda: cube.to_dataset(name="intensity").to_zarr(path, mode="w"))
        size = sum(f.stat().st_size for f in __import__("pathlib").Path(path).rglob("*")
                   if f.is_file())
        print(f"--- from Zarr: written in {t_w:.1f} s, {size / 2**30:.2f} GiB on disk")
        ratios, vs_mem = [], []
        for _rep in range(args.repeat):
            _, t_mem = timed(lambda: float(cube.sum().compute()))
            _, t_read = timed(lambda: float(xr.open_zarr(path)["intensity"].sum().compute()))
            print(f"read floor, xarray.open_zarr(...).sum().compute(): {t_read:.2f} s "
                  f"(sum in memory {t_mem:.2f} s; load average {os.getloadavg()[0]:.2f})")
            zcube = xr.open_zarr(path)["intensity"]
            total, *_ = run_once(zcube, args, n_spec, t_read, "the Zarr read floor")
            ratios.append(total / t_read)
            vs_mem.append(total / t_mem)
        print(f"decompose_segment_vs_zarr_read: {np.median(ratios):.2f} "
              f"(median of {len(ratios)}: {', '.join(f'{r:.2f}' for r in ratios)}; the same "
              f"runs over the in-memory sum: {', '.join(f'{r:.1f}' for r in vs_mem)})")
    finally:
        shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    main()
