"""Benchmark: pmap.fit_peaks against a per-pixel scipy.optimize.curve_fit loop.

Fits a synthetic cube (Gaussian or Voigt + offset, Poisson noise) with
``fit_peaks`` and, in the same run, a per-pixel ``curve_fit`` loop on a sample of
the same spectra; prints spectra/s for both, accuracy against truth for both,
and last the line ``speedup_vs_curve_fit: N``.

    python scripts/bench_fit.py [--model voigt] [--quick]
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
from scipy.optimize import curve_fit

import pmap
from pmap.fitting import gaussian, voigt, voigt_widths


def make_data(n_spec, n_ch, model, rng):
    e = np.linspace(1.30, 1.70, n_ch)
    c = rng.uniform(1.45, 1.55, n_spec)
    w = rng.uniform(0.03, 0.06, n_spec)
    a = rng.uniform(20.0, 60.0, n_spec)  # counts·eV → peak heights ~ 400–1500 counts
    r = rng.uniform(0.1, 0.5, n_spec)
    if model == "gaussian":
        clean = gaussian(e, c[:, None], w[:, None], a[:, None])
    else:
        fg, fl = voigt_widths(w, r)
        clean = voigt(e, c[:, None], fg[:, None], fl[:, None], a[:, None])
    y = rng.poisson(clean + 50.0).astype(np.float32)
    return e, y, c, w


def scipy_loop(e, y, model):
    def f_g(x, c, w, a, b):
        return gaussian(x, c, w, a) + b

    def f_v(x, c, w, a, r, b):
        fg, fl = voigt_widths(w, r)
        return voigt(x, c, fg, fl, a) + b

    out = np.full((y.shape[0], 2), np.nan)
    for i in range(y.shape[0]):
        s = y[i].astype(float)
        b0 = np.percentile(s, 5)
        j = int(np.argmax(s))
        half = b0 + 0.5 * (s[j] - b0)
        above = np.flatnonzero(s > half)
        w0 = max(e[above[-1]] - e[above[0]], 0.01)
        a0 = (s[j] - b0) * w0 * 1.0645
        sig = np.sqrt(np.maximum(s, 1.0))
        try:
            if model == "gaussian":
                p, _ = curve_fit(f_g, e, s, p0=[e[j], w0, a0, b0], sigma=sig, absolute_sigma=True)
            else:
                p, _ = curve_fit(
                    f_v,
                    e,
                    s,
                    p0=[e[j], w0, a0, 0.3, b0],
                    sigma=sig,
                    absolute_sigma=True,
                    bounds=([e[0], 1e-4, 0, 0, -np.inf], [e[-1], 1.0, np.inf, 0.99, np.inf]),
                )
            out[i] = p[:2]
        except RuntimeError:
            pass
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", choices=["gaussian", "voigt"], default="gaussian")
    ap.add_argument("--quick", action="store_true", help="small run (under a minute)")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    n_spec, n_loop = (10_000, 200) if args.quick else (100_000, 1000)
    load0 = os.getloadavg()[0]
    n_ch = 512
    rng = np.random.default_rng(args.seed)
    e, y, c, w = make_data(n_spec, n_ch, args.model, rng)
    ny = 100
    cube = pmap.make_cube(
        y.reshape(ny, -1, n_ch),
        energy_ev=e,
        attrs={"gain_e_per_count": 1.0, "read_noise_counts": 0.0, "dark_level_counts": 0.0},
        chunks={"y": 10, "x": -1},
    )
    # warm-up (JIT load from cache / compile) on a small cube, not timed
    pmap.fit_peaks(cube.isel(y=slice(0, 1), x=slice(0, 8)), model=args.model).compute()
    t0 = time.perf_counter()
    res = pmap.fit_peaks(cube, model=args.model).compute()
    t_pmap = time.perf_counter() - t0
    pc = res["peak_energy"].values[0].ravel()
    pw = res["peak_fwhm"].values[0].ravel()
    st = res["fit_status"].values.ravel()
    t0 = time.perf_counter()
    ref = scipy_loop(e, y[:n_loop], args.model)
    t_loop = time.perf_counter() - t0
    rate_p, rate_s = n_spec / t_pmap, n_loop / t_loop
    print(f"model: {args.model}+offset, {n_spec} spectra x {n_ch} channels, Poisson noise")
    print(
        f"load average (1 min) at start / end: {load0:.2f} / {os.getloadavg()[0]:.2f} "
        f"on {os.cpu_count()} cores"
    )
    print(
        f"pmap.fit_peaks: {rate_p:.0f} spectra/s ({t_pmap:.2f} s), status counts "
        f"{np.bincount(st, minlength=7).tolist()}"
    )
    print(f"curve_fit loop: {rate_s:.0f} spectra/s ({t_loop:.2f} s for {n_loop})")
    rows = (
        ("pmap", (pc, pw)),
        ("pmap[:n_loop]", (pc[:n_loop], pw[:n_loop])),  # the loop's own spectra
        ("curve_fit", (ref[:, 0], ref[:, 1])),
    )
    for name, (ec, ew) in rows:
        m = len(ec)
        print(
            f"{name:14s} median |dcentre| = {np.nanmedian(np.abs(ec - c[:m])) * 1e3:.4f} meV, "
            f"median |dFWHM| = {np.nanmedian(np.abs(ew - w[:m])) * 1e3:.4f} meV"
        )
    same = np.nanmedian(np.abs(pc[:n_loop] - ref[:, 0])) * 1e3
    print(f"pmap vs curve_fit on the same spectra: median |dcentre| = {same:.5f} meV")
    print(f"speedup_vs_curve_fit: {rate_p / rate_s:.1f}")


if __name__ == "__main__":
    main()
