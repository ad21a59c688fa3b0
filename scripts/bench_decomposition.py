"""Benchmark: decompose (NMF) + segment (k-means) of 10^6 spectra × 512 channels.

The cube is generated lazily in spatial chunks (three emitting regions, Gaussian
lines in photon energy, Gaussian approximation of shot noise plus read noise, an
off-sample strip), then held in memory (``--no-persist`` regenerates it on every
pass instead). Baselines measured in the same run: the time to sum the whole
cube (one read pass) and to generate it. Prints each time, its ratio to the
sum pass, and the agreement with the truth (ARI, spectral correlation).

    python scripts/bench_decomposition.py [--ny 1000 --nx 1000 --channels 512] [--quick]
"""

from __future__ import annotations

import argparse
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


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ny", type=int, default=1000)
    ap.add_argument("--nx", type=int, default=1000)
    ap.add_argument("--channels", type=int, default=512)
    ap.add_argument("--sample-pixels", type=int, default=20000)
    ap.add_argument("--no-persist", action="store_true")
    ap.add_argument("--quick", action="store_true", help="200 x 250 pixels")
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
        f"{dask.system.CPU_COUNT} CPUs"
    )
    if not args.no_persist:
        cube, t_gen = timed(lambda: cube.persist())
        print(f"generate (held in memory):   {t_gen:8.2f} s")
    _, t_sum = timed(lambda: float(cube.sum().compute()), "sum")
    print(f"baseline, sum of the cube:   {t_sum:8.2f} s   (1.00 x; CPU {CPU_TIMES['sum']:.2f} s)")

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
        f"decompose + segment:         {total:8.2f} s   ({total / t_sum:.1f} x the sum pass; "
        f"{n_spec / total:,.0f} spectra/s)"
    )

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


if __name__ == "__main__":
    main()
