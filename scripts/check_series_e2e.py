"""End to end: maps shifted by known sub-pixel amounts → stack (registered) → process → series.

Each temperature map is rendered from the same continuous scene (Gaussian blobs of
emission) displaced by a known sub-pixel shift, with a GaAs Varshni peak energy
(Vurgaftman, Meyer & Ram-Mohan, J. Appl. Phys. 89, 5815 (2001): 1.519 eV,
0.5405 meV/K, 204 K), Poisson counts through a detector of stated gain and read
noise. The script prints the registration error, and for the law fit the pull
s.d. of E0, α, β (error / reported 1σ, n pixels), the mean and median χ²_red of the
law fits, and the same numbers for unshifted maps (control).

    python scripts/check_series_e2e.py [--seeds 1 2] [--size 40x48] [--scenes]

With ``--scenes`` the emission pattern is instead each scene of :mod:`pmap.scenes` (its
integrated-intensity image, scaled to 0.15–1.65), displaced by the Fourier shift theorem
(exact for a band-limited periodic image).

Measured (2 cores, 2026-12-02): blobs 40 × 48, seeds 1–3: registration error ≤ 0.03 px, law
χ²_red mean 0.95–1.02 and pull s.d. of E0, α, β 0.97–1.03 (n = 1512–1575 series); every
scene of the bank, seeds 1–2: registration error ≤ 0.09 px, χ²_red mean 0.99–1.03, pull
s.d. 0.98–1.04 (n = 1800–2596 series each).
"""

from __future__ import annotations

import argparse
import tempfile
import warnings
from pathlib import Path

import numpy as np
import xarray as xr

E0, ALPHA, BETA = 1.519, 0.5405e-3, 204.0
T = np.array([20.0, 60, 100, 140, 180, 220, 260, 300])


def scene(ny, nx, rng, shift=(0.0, 0.0)):
    """Blobs (2–4 px wide) evaluated at (y − dy, x − dx): an exact sub-pixel displacement."""
    yy, xx = np.mgrid[0:ny, 0:nx].astype(float)
    yy -= shift[0]
    xx -= shift[1]
    img = np.full((ny, nx), 0.15)
    for _ in range(int(ny * nx / 120)):
        cy, cx = rng.uniform(0, ny), rng.uniform(0, nx)
        w = rng.uniform(2, 4)
        img += rng.uniform(0.5, 1.5) * np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * w * w))
    return img


def _scene_image(name, seed):
    from pmap.scenes import make_scene

    cube = make_scene(name, seed=seed).cube
    sdim = cube.dims[-1]
    img = np.asarray(cube.sum(sdim).transpose("y", "x").values, dtype=float)
    lo, hi = np.percentile(img, [1, 99])
    return 0.15 + 1.5 * np.clip((img - lo) / (hi - lo), 0, 1)


def _fourier_shifted(img, d):
    from scipy import ndimage

    return np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(img), d)).real


def make_maps(seed, ny, nx, shifted=True, scene_name=None):
    rng = np.random.default_rng(seed)
    energy = np.linspace(1.33, 1.60, 180)
    shifts = [(0.0, 0.0)] + [tuple(rng.uniform(-2.5, 2.5, 2)) for _ in T[1:]]
    if not shifted:
        shifts = [(0.0, 0.0)] * len(T)
    state = rng.bit_generator.state
    base = _scene_image(scene_name, seed) if scene_name else None
    if base is not None:
        ny, nx = base.shape
    cubes = []
    for t, d in zip(T, shifts):
        rng_s = np.random.default_rng()
        rng_s.bit_generator.state = state  # the same blobs for every map
        img = (np.maximum(_fourier_shifted(base, d), 0.05) if base is not None
               else scene(ny, nx, rng_s, d))
        e = E0 - ALPHA * t * t / (t + BETA)  # Varshni (1967)
        spec = np.exp(-0.5 * ((energy - e) / 0.010) ** 2)
        mu = 3000.0 * img[:, :, None] * spec + 30.0  # counts (electrons at gain 1)
        raw = rng.poisson(mu) + rng.normal(size=mu.shape) * 2.0 + 100.0  # dark level 100
        cubes.append(xr.DataArray(
            raw.astype(np.float32), dims=("y", "x", "energy"), name="intensity",
            coords={"y": ("y", np.arange(ny) * 0.5, {"units": "um"}),
                    "x": ("x", np.arange(nx) * 0.5, {"units": "um"}),
                    "energy": ("energy", energy, {"units": "eV"})},
            attrs={"units": "counts", "temperature_K": float(t), "gain_e_per_count": 1.0,
                   "read_noise_counts": 2.0, "dark_level_counts": 100.0}))
    return cubes, shifts


def pulls(out, name, true):
    p = ((out[name] - true) / out[name + "_err"]).values.ravel()
    return p[np.isfinite(p)]


def run(seed, ny, nx, shifted, tmp, scene_name=None):
    from pmap.pipeline import process
    from pmap.series import fit_law
    from pmap.stack import stack_cubes

    cubes, shifts = make_maps(seed, ny, nx, shifted, scene_name)
    stack = stack_cubes(cubes, along="temperature")
    est = np.array(stack.attrs["stack_shifts_px"])
    reg_err = np.abs(est - np.array(shifts)).max()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = process(stack, Path(tmp) / f"r{scene_name or 0}{seed}{int(shifted)}.zarr", progress=False, peaks=1)
    pe = res["peak_energy"].isel(peak=0)
    pull_pe = ((pe - (E0 - ALPHA * res["temperature"] ** 2 / (res["temperature"] + BETA)))
               / res["peak_energy_err"].isel(peak=0)).values.ravel()
    pull_pe = pull_pe[np.isfinite(pull_pe)]
    out = fit_law(res, law="varshni").compute()
    ok = (out["varshni_status"] == 0).values
    out = out.where(ok)
    chi = out["varshni_chi2_red"].values.ravel()
    chi = chi[np.isfinite(chi)]
    row = {"scene": scene_name or "blobs", "seed": seed, "shifted": shifted, "max_reg_err_px": float(reg_err),
           "fit_chi2_red_median": float(np.nanmedian(res["chi2_red"].values))
           if "chi2_red" in res else float("nan"),
           "uncertainty_method": res["peak_energy_err"].attrs.get("uncertainty_method",
                                                                  res.attrs.get(
                                                                      "uncertainty_method", ""))[:60],
           "peak_energy_pull_sd": float(pull_pe.std()), "n_points": int(pull_pe.size),
           "n_series": int(ok.sum()), "law_chi2_red_mean": float(chi.mean()),
           "law_chi2_red_median": float(np.median(chi))}
    for name, true in (("varshni_e0", E0), ("varshni_alpha", ALPHA), ("varshni_beta", BETA)):
        p = pulls(out, name, true)
        row[f"{name}_pull_mean"] = float(p.mean())
        row[f"{name}_pull_sd"] = float(p.std())
        row[f"{name}_median_err"] = float(np.nanmedian(out[name + "_err"].values))
        row[f"{name}_median_abs_dev"] = float(np.nanmedian(np.abs(out[name].values - true)))
    return row


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--size", default="40x48")
    ap.add_argument("--scenes", action="store_true", help="every scene of pmap.scenes, shifted")
    args = ap.parse_args()
    ny, nx = (int(v) for v in args.size.split("x"))
    with tempfile.TemporaryDirectory() as tmp:
        if args.scenes:
            from pmap.scenes import scene_names

            for name in scene_names():
                for seed in args.seeds:
                    row = run(seed, ny, nx, True, tmp, name)
                    print("  ".join(f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}"
                                    for k, v in row.items()), flush=True)
            return
        for seed in args.seeds:
            for shifted in (True, False):
                row = run(seed, ny, nx, shifted, tmp)
                print("  ".join(f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}"
                                for k, v in row.items()), flush=True)


if __name__ == "__main__":
    main()
