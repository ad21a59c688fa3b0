"""Benchmark: pmap.fit_peaks against a per-pixel scipy.optimize.curve_fit loop.

Fits a synthetic cube (one Gaussian or Voigt, or two Voigt peaks, + offset,
Poisson noise) with ``fit_peaks`` and, in the same run, a per-pixel
``curve_fit`` loop on a sample of the same spectra; prints spectra/s for both,
accuracy against truth for both, and last the line ``speedup_vs_curve_fit: N``.

Steady state, so that ``--quick`` and the full run measure the same thing: both
use chunks of the same number of spectra (``--chunk``); the JIT load and one
chunk of each are run untimed first; the two rates are measured in interleaved
rounds (pmap, loop, pmap, loop, ...), each round's ratio is taken from rates
measured side by side, and the median over rounds is reported. Only the number
of spectra (10⁵ full, 2·10⁴ quick) and the loop sample size differ. Beside the
wall-clock ratio, the CPU time per spectrum of each (process CPU, all threads) and
their ratio are printed: on a shared, loaded machine the wall-clock rates say more
about the other processes than about the code, the CPU times much less.

    python scripts/bench_fit.py [--model voigt] [--peaks 2] [--quick]
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
from scipy.optimize import curve_fit

import pmap
from pmap.fitting import gaussian, voigt, voigt_widths


def make_data(n_spec, n_ch, model, rng, peaks=1):
    """(energy, spectra float32 (n_spec, n_ch), centres (n_spec, peaks), FWHMs, truth params)."""
    e = np.linspace(1.30, 1.70, n_ch)
    if peaks == 1:
        c = rng.uniform(1.45, 1.55, (n_spec, 1))
    else:  # two resolved lines ~80 meV apart, shifting by ±10 meV over the map
        c1 = rng.uniform(1.44, 1.46, n_spec)
        c = np.stack([c1, c1 + rng.uniform(0.075, 0.085, n_spec)], axis=1)
    w = rng.uniform(0.03, 0.06, (n_spec, peaks)) if peaks == 1 else rng.uniform(
        0.03, 0.045, (n_spec, peaks))
    a = rng.uniform(20.0, 60.0, (n_spec, peaks))  # counts·eV → peak heights ~ 400–1500 counts
    r = rng.uniform(0.1, 0.5, (n_spec, peaks))
    clean = np.zeros((n_spec, n_ch))
    for k in range(peaks):
        if model == "gaussian":
            clean += gaussian(e, c[:, k, None], w[:, k, None], a[:, k, None])
        else:
            fg, fl = voigt_widths(w[:, k], r[:, k])
            clean += voigt(e, c[:, k, None], fg[:, None], fl[:, None], a[:, k, None])
    y = rng.poisson(clean + 50.0).astype(np.float32)
    return e, y, c, w, (a, r)


def _start_one(e, s):
    b0 = np.percentile(s, 5)
    j = int(np.argmax(s))
    half = b0 + 0.5 * (s[j] - b0)
    above = np.flatnonzero(s > half)
    w0 = max(e[above[-1]] - e[above[0]], 0.01)
    return e[j], w0, (s[j] - b0) * w0 * 1.0645, b0


def scipy_loop(e, y, model, peaks=1, truth=None):
    """Per-pixel curve_fit; returns (n, peaks, 2) centre and FWHM (NaN where it failed).

    One peak: starting values from the spectrum (maximum, half-maximum width,
    5th percentile); two peaks: started at the truth (the loop's best case).
    """
    def f_g(x, c, w, a, b):
        return gaussian(x, c, w, a) + b

    def f_v(x, c, w, a, r, b):
        fg, fl = voigt_widths(w, r)
        return voigt(x, c, fg, fl, a) + b

    def f_vv(x, c1, w1, a1, r1, c2, w2, a2, r2, b):
        return f_v(x, c1, w1, a1, r1, 0.0) + f_v(x, c2, w2, a2, r2, b)

    out = np.full((y.shape[0], peaks, 2), np.nan)
    for i in range(y.shape[0]):
        s = y[i].astype(float)
        sig = np.sqrt(np.maximum(s, 1.0))
        c0, w0, a0, b0 = _start_one(e, s)
        try:
            if peaks == 2:
                c, w, (a, r) = truth[0][i], truth[1][i], (truth[2][0][i], truth[2][1][i])
                p0 = [c[0], w[0], a[0], r[0], c[1], w[1], a[1], r[1], b0]
                lo = [e[0], 1e-4, 0, 0] * 2 + [-np.inf]
                hi = [e[-1], 1.0, np.inf, 0.99] * 2 + [np.inf]
                p, _ = curve_fit(f_vv, e, s, p0=p0, sigma=sig, absolute_sigma=True,
                                 bounds=(lo, hi))
                out[i] = [[p[0], p[1]], [p[4], p[5]]]
            elif model == "gaussian":
                p, _ = curve_fit(f_g, e, s, p0=[c0, w0, a0, b0], sigma=sig, absolute_sigma=True)
                out[i, 0] = p[:2]
            else:
                p, _ = curve_fit(f_v, e, s, p0=[c0, w0, a0, 0.3, b0], sigma=sig,
                                 absolute_sigma=True,
                                 bounds=([e[0], 1e-4, 0, 0, -np.inf],
                                         [e[-1], 1.0, np.inf, 0.99, np.inf]))
                out[i, 0] = p[:2]
        except RuntimeError:
            pass
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", choices=["gaussian", "voigt"], default="gaussian")
    ap.add_argument("--peaks", type=int, choices=[1, 2], default=1,
                    help="peaks per spectrum (2: two Voigt lines; implies --model voigt)")
    ap.add_argument("--quick", action="store_true",
                    help="fewer spectra (2e4 instead of 1e5), same steady state (under a minute)")
    ap.add_argument("--chunk", type=int, default=5000, help="spectra per chunk (default 5000)")
    ap.add_argument("--rounds", type=int, default=3, help="interleaved timing rounds")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    model = "voigt" if args.peaks == 2 else args.model
    n_spec = 20_000 if args.quick else 100_000
    slow = {("gaussian", 1): 1, ("voigt", 1): 4, ("voigt", 2): 10}[(model, args.peaks)]
    n_loop = (100 if args.quick else 400) // slow  # per round
    n_ch = 512
    load0 = os.getloadavg()
    rng = np.random.default_rng(args.seed)
    e, y, c, w, extra = make_data(n_spec, n_ch, model, rng, args.peaks)
    nx = 100
    cube = pmap.make_cube(
        y.reshape(-1, nx, n_ch),
        energy_ev=e,
        attrs={"gain_e_per_count": 1.0, "read_noise_counts": 0.0, "dark_level_counts": 0.0},
        chunks={"y": max(1, args.chunk // nx), "x": -1},
    )
    kw = {"model": model, "peaks": args.peaks}
    # warm-up, not timed: JIT load (or compile) and one full chunk of each method
    pmap.fit_peaks(cube.isel(y=slice(0, max(1, args.chunk // nx))), **kw).compute()
    scipy_loop(e, y[:3], model, args.peaks, (c, w, extra))
    rates_p, rates_s, ratios, res, refs = [], [], [], None, []
    cpu_p, cpu_s = [], []  # process CPU seconds per spectrum (all threads)
    for r in range(args.rounds):
        t0, c0 = time.perf_counter(), time.process_time()
        res = pmap.fit_peaks(cube, **kw).compute()
        rates_p.append(n_spec / (time.perf_counter() - t0))
        cpu_p.append((time.process_time() - c0) / n_spec)
        sl = slice(r * n_loop, (r + 1) * n_loop)
        t0, c0 = time.perf_counter(), time.process_time()
        ref_r = scipy_loop(e, y[sl], model, args.peaks, (c[sl], w[sl], tuple(v[sl] for v in extra)))
        rates_s.append(n_loop / (time.perf_counter() - t0))
        cpu_s.append((time.process_time() - c0) / n_loop)
        ratios.append(rates_p[-1] / rates_s[-1])
        refs.append(ref_r)
    load1 = os.getloadavg()
    ref = np.concatenate(refs)
    n_ref = ref.shape[0]
    pc = res["peak_energy"].values.reshape(args.peaks, -1).T
    pw = res["peak_fwhm"].values.reshape(args.peaks, -1).T
    st = res["fit_status"].values.ravel()
    name = f"{args.peaks} x {model}" if args.peaks > 1 else model
    print(f"model: {name}+offset, {n_spec} spectra x {n_ch} channels, Poisson noise; "
          f"chunks of {args.chunk} spectra; {args.rounds} interleaved rounds")
    print(f"load average (1/5/15 min) at start {load0[0]:.2f}/{load0[1]:.2f}/{load0[2]:.2f}, "
          f"end {load1[0]:.2f}/{load1[1]:.2f}/{load1[2]:.2f} on {os.cpu_count()} cores")
    print(f"pmap.fit_peaks: {np.median(rates_p):.0f} spectra/s (rounds: "
          f"{', '.join(f'{v:.0f}' for v in rates_p)}), status counts "
          f"{np.bincount(st, minlength=7).tolist()}")
    print(f"curve_fit loop: {np.median(rates_s):.1f} spectra/s (rounds of {n_loop}: "
          f"{', '.join(f'{v:.1f}' for v in rates_s)})")
    rows = (("pmap", (pc, pw)), ("pmap[:n_loop]", (pc[:n_ref], pw[:n_ref])),
            ("curve_fit", (ref[..., 0], ref[..., 1])))
    for nm, (ec, ew) in rows:
        m = len(ec)
        print(f"{nm:14s} median |dcentre| = {np.nanmedian(np.abs(ec - c[:m])) * 1e3:.4f} meV, "
              f"median |dFWHM| = {np.nanmedian(np.abs(ew - w[:m])) * 1e3:.4f} meV")
    same = np.nanmedian(np.abs(pc[:n_ref] - ref[..., 0])) * 1e3
    print(f"pmap vs curve_fit on the same spectra: median |dcentre| = {same:.5f} meV")
    # CPU time per spectrum is the work done, little affected by other processes on a
    # shared machine (wall-clock rates are); it leaves out pmap's use of several cores
    print(f"CPU time per spectrum: pmap {np.median(cpu_p) * 1e6:.2f} us (all threads), "
          f"curve_fit loop {np.median(cpu_s) * 1e6:.1f} us; work ratio "
          f"{np.median(cpu_s) / np.median(cpu_p):.1f}")
    print(f"ratio per round: {', '.join(f'{v:.1f}' for v in ratios)}")
    print(f"speedup_vs_curve_fit: {np.median(ratios):.1f}")


if __name__ == "__main__":
    main()
