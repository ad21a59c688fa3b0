"""Throughput of the spectral steps (spectra/s) on a 1e5-spectrum cube.

Usage: python scripts/bench_spectral.py [--ny 250 --nx 400 --n 512] [--steps a,b]

The cube (float32, synthetic PL band + shot noise + cosmic spikes) lives in memory,
chunked in space. Each step's result is reduced with ``.sum()`` and computed with
dask's threaded scheduler; the baseline is the same reduction of the input cube
measured in the same run, and the ratio step/baseline is printed beside each time.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import xarray as xr

import pmap
import pmap.spectral as sp


def make_cube(ny: int, nx: int, n: int, seed: int = 0) -> xr.DataArray:
    rng = np.random.default_rng(seed)
    wl = np.linspace(700.0, 950.0, n)
    yy, xx = np.mgrid[0:ny, 0:nx]
    centre = (820 + 15 * np.sin(xx / 40.0) + 10 * np.cos(yy / 30.0)).astype(np.float32)
    data = np.empty((ny, nx, n), dtype=np.float32)
    for i in range(ny):  # row by row keeps the float64 temporaries small
        clean = 50 + 500 * np.exp(-0.5 * ((wl - centre[i, :, None]) / 20.0) ** 2)
        data[i] = rng.poisson(clean).astype(np.float32)
    k = ny * nx // 50  # one spike per 50 spectra
    data[rng.integers(0, ny, k), rng.integers(0, nx, k), rng.integers(0, n, k)] += 2000.0
    return pmap.make_cube(
        data,
        wavelength_nm=wl,
        attrs={"exposure_s": 1.0, "excitation_power_W": 1e-3, "excitation_wavelength_nm": 633.0},
    )


def timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ny", type=int, default=250)
    ap.add_argument("--nx", type=int, default=400)
    ap.add_argument("--n", type=int, default=512)
    ap.add_argument("--steps", default="")
    args = ap.parse_args()
    cube = make_cube(args.ny, args.nx, args.n)
    n_spec = args.ny * args.nx
    resp = xr.DataArray(
        np.linspace(0.5, 1.0, 600),
        dims=("wavelength",),
        coords={"wavelength": np.linspace(650, 1000, 600)},
    )
    steps = {
        "subtract_dark": lambda c: sp.subtract_dark(c, dark=40.0),
        "correct_response": lambda c: sp.correct_response(c, response=resp),
        "normalise_exposure": lambda c: sp.normalise_exposure(c, per_power=True),
        "to_vacuum": lambda c: sp.to_vacuum(c),
        "to_energy": lambda c: sp.to_energy(c),
        "to_energy_uniform": lambda c: sp.to_energy(c, resample="uniform"),
        "remove_spikes": lambda c: sp.remove_spikes(c),
        # the same with the detector stated (the cube is Poisson counts, gain 1): the noise
        # law is then known instead of fitted to each spectrum, as in `plcube process`
        "remove_spikes_stated_noise": lambda c: sp.remove_spikes(
            c.assign_attrs(units="counts", gain_e_per_count=1.0, read_noise_counts=0.0,
                           dark_level_counts=0.0)
        ),
        "mask_bad_pixels": lambda c: sp.mask_bad_pixels(c),
        "remove_baseline_constant": lambda c: sp.remove_baseline(
            c, method="constant", window=(700, 720)
        ),
        "remove_baseline_poly": lambda c: sp.remove_baseline(c, method="poly", degree=2),
        "remove_baseline_als": lambda c: sp.remove_baseline(c, method="als", lam=1e5, p=0.01),
        "smooth": lambda c: sp.smooth(c, window=7, order=2),
        "pca_denoise": lambda c: sp.pca_denoise(c, sample_size=20000, seed=0),
    }
    chosen = [s for s in args.steps.split(",") if s] or list(steps)
    # warm-up on a tiny cube (numba compilation, imports) so it is not timed
    small = make_cube(4, 5, args.n, seed=1)
    for name in chosen:
        steps[name](small).data.sum().compute()
    base = min(timed(lambda: cube.data.sum().compute()) for _ in range(3))
    print(
        f"cube {args.ny}x{args.nx}x{args.n} float32, {n_spec} spectra, chunks {cube.data.chunksize}"
    )
    print(
        f"{'baseline (sum of the cube)':28s} {base:8.3f} s {n_spec / base:12.0f} spectra/s "
        f"ratio 1.0"
    )
    for name in chosen:
        t = timed(lambda name=name: steps[name](cube).data.sum().compute())
        print(f"{name:28s} {t:8.3f} s {n_spec / t:12.0f} spectra/s ratio {t / base:6.1f}")


if __name__ == "__main__":
    main()
