"""Benchmark pmap.series.fit_law: series/s per law against a per-pixel
scipy.optimize.curve_fit loop on a sample, measured in the same run.

    python scripts/bench_series.py [--pixels 200000] [--quick]

Last line: ``speedup_vs_curve_fit: N`` (geometric mean over the laws).
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import xarray as xr
from scipy.optimize import curve_fit

from pmap.series import K_B_EV, fit_law

LAWS = {
    "varshni": ("temperature", np.linspace(10, 300, 30), (1.519, 5.405e-4, 204.0), 3e-4,
                lambda t, e0, a, b: e0 - a * t**2 / (t + b)),
    "bose_einstein": ("temperature", np.linspace(10, 400, 30), (1.521, 3.0, 0.0267), 3e-4,
                      lambda t, e0, s, w: e0 - 2 * s * w / np.expm1(w / (K_B_EV * t))),
    "linewidth": ("temperature", np.linspace(10, 400, 40), (3e-3, 1e-5, 2e-2, 0.036), 2e-4,
                  lambda t, g0, g, gl, el: g0 + g * t + gl / np.expm1(el / (K_B_EV * t))),
    "arrhenius": ("temperature", np.linspace(10, 300, 30), (1e4, 300.0, 0.05), None,
                  lambda t, i0, c, ea: i0 / (1 + c * np.exp(-ea / (K_B_EV * t)))),
    "power_law": ("excitation_power", np.geomspace(1e-6, 1e-3, 12), (2e3, 1.5), None,
                  lambda p, a, k: a * (p / 3.16e-5) ** k),
}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--pixels", type=int, default=200_000)
    ap.add_argument("--quick", action="store_true", help="20 000 pixels")
    args = ap.parse_args()
    n = 20_000 if args.quick else args.pixels
    ny = 200
    nx = n // ny
    rng = np.random.default_rng(0)
    ratios = []
    print(f"load average {os.getloadavg()[0]:.2f}, {os.cpu_count()} cpus, {ny * nx} series per law")
    for law, (dim, x, p, s, f) in LAWS.items():
        y0 = f(x, *p)
        sig = np.full_like(y0, s) if s else np.sqrt(y0) + 5
        noisy = y0[:, None, None] + rng.normal(size=(x.size, ny, nx)) * sig[:, None, None]
        name = "peak_energy" if law in ("varshni", "bose_einstein") else (
            "peak_fwhm" if law == "linewidth" else "peak_area")
        ds = xr.Dataset({name: ((dim, "y", "x"), noisy),
                         f"{name}_err": ((dim, "y", "x"),
                                         np.broadcast_to(sig[:, None, None], noisy.shape))},
                        coords={dim: x}).chunk({"y": 50})
        t0 = time.perf_counter()
        out = fit_law(ds, law=law).compute()
        t_pmap = (time.perf_counter() - t0) / (ny * nx)
        conv = float((out[f"{law}_status"] == 0).mean())
        m = 200
        t0 = time.perf_counter()
        flat = noisy.reshape(x.size, -1)
        for i in range(m):
            try:
                curve_fit(f, x, flat[:, i], p0=p, sigma=sig, absolute_sigma=True, maxfev=2000)
            except RuntimeError:
                pass
        t_cf = (time.perf_counter() - t0) / m
        ratios.append(t_cf / t_pmap)
        print(f"{law:14s} converged {conv:.3f}  {1 / t_pmap:9.0f} series/s "
              f"({t_pmap * 1e6:.0f} s per 10^6)  curve_fit loop (started at the truth) "
              f"{1 / t_cf:7.0f} series/s  ratio {t_cf / t_pmap:.1f}")
    print(f"speedup_vs_curve_fit: {np.exp(np.mean(np.log(ratios))):.1f}")


if __name__ == "__main__":
    main()
