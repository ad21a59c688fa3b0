"""Spike removal on every scene of the bank (issue 12, item 5): one row per scene and seed.

For each scene of ``pmap.scenes`` (synthetic, with truth) and each seed this runs
``remove_spikes`` on the raw cube and prints

* ``recall``: share of spike values ≥ 10 σ above the clean truth (good pixels) that are
  replaced *and* restored within 5 σ of the clean truth;
* ``false``: replaced values among clean values (no spike) of good pixels, per value;
* ``dA max``: the largest |area change| of a real single-pixel emitter (window ±4
  (instrument + line FWHM) around it, spike channels left out), relative to its area;
* ``F2 false``, ``F3 false`` (and recall): the same scene acquired as 2 and 3 frames (a
  ``frame`` dim): every frame re-rendered from the clean truth with its own noise (the
  scene's detector: Poisson photoelectrons, read noise), each of the scene's spiky
  pixels' spikes put into one random frame.

and the cost of remove_spikes on the scene against summing the cube in the same run
(``x sum``) and per spectrum (``us/spec``, wall time of the whole call on the scene).
Not a test: a table to read.

    python scripts/bench_spikes.py [--scenes NAME ...] [--seeds 0 1 2] [--no-frames]
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np


def _sigma(cube, exp):
    a = 1.0 / float(cube.attrs["gain_e_per_count"])
    dark = float(cube.attrs["dark_level_counts"])
    return np.sqrt(a * np.maximum(exp - dark, 0.0) + float(cube.attrs["read_noise_counts"]) ** 2)


def _map_metrics(sc, remove_spikes):
    cube, tr = sc.cube, sc.truth
    t0 = time.perf_counter()
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    after = cleaned.values.astype(float)
    dt = time.perf_counter() - t0
    raw = cube.values.astype(float)
    exp = tr.expected.values.astype(float)
    sd = _sigma(cube, exp)
    sp = tr.spike_mask.values
    good = (tr.bad_pixel.values == 0)[..., None] & np.ones_like(sp)
    big = sp & ((raw - exp) / sd >= 10) & good
    ok = m & (np.abs(after - exp) <= 5 * sd)
    recall = (ok & big).sum() / max(big.sum(), 1)
    nbig = int(big.sum())
    det = (m & big).sum() / max(big.sum(), 1)
    line = exp - float(cube.attrs["dark_level_counts"]) - tr.background.values.astype(float)
    top = big & (line >= 0.5 * line.max(axis=-1, keepdims=True)) & (line > 3 * sd)
    top_recall = (ok & top).sum() / max(top.sum(), 1)
    clean = ~sp & good
    false = (m & clean).sum() / clean.sum()
    # emitters
    from pmap.conventions import HC_EV_NM

    sdim = cube.dims[-1]
    ax = cube[sdim].values
    fw = cube.attrs.get("instrument_fwhm_nm", cube.attrs.get("instrument_fwhm_ev"))
    names = [str(v) for v in tr.line_name.values]
    worst = 0.0
    for iy, ix in zip(*np.nonzero(tr.narrow_line.values)):
        for li, ln in enumerate(names):
            e0 = tr.line_energy_ev.values[li, iy, ix]
            if "emitter" not in ln or not np.isfinite(e0):
                continue
            pos = HC_EV_NM / e0 if sdim == "wavelength" else e0
            width = tr.line_fwhm_ev.values[li, iy, ix] * (pos**2 / HC_EV_NM
                                                          if sdim == "wavelength" else 1.0)
            win = (np.abs(ax - pos) < 4 * (fw + width)) & ~sp[iy, ix]
            change = (after[iy, ix] - raw[iy, ix])[win].sum()
            worst = max(worst, abs(change) / tr.line_area_counts.values[li, iy, ix])
    return recall, nbig, false, int(clean.sum()), worst, dt, det, top_recall, int(top.sum())


def _frames(sc, n_frames, seed):
    """The scene as ``n_frames`` acquisitions of the same exposure: (cube, spike mask, expected)."""
    import xarray as xr

    cube, tr = sc.cube, sc.truth
    rng = np.random.default_rng(1000 + seed * 10 + n_frames)
    exp = tr.expected.values.astype(float)
    g = float(cube.attrs["gain_e_per_count"])
    dark = float(cube.attrs["dark_level_counts"])
    rn = float(cube.attrs["read_noise_counts"])
    sat = float(cube.attrs["saturation_counts"])
    good = tr.bad_pixel.values == 0
    raw = cube.values.astype(float)
    sp = tr.spike_mask.values
    spike = np.where(sp, raw - exp, 0.0)  # each spike's excess over the truth
    frames, masks = [], []
    owner = rng.integers(n_frames, size=sp.shape[:2])
    for f in range(n_frames):
        r = rng.poisson(np.maximum(exp - dark, 0.0) * g) / g + rng.normal(dark, rn, exp.shape)
        mine = (owner == f)[..., None] & sp
        r = r + np.where(mine, spike, 0.0)
        # bad pixels as in the scene (same values in every frame: a fixed defect)
        r[~good] = raw[~good]
        frames.append(np.clip(np.rint(r), 0, sat).astype(np.float32))
        masks.append(mine)
    arr = xr.concat([cube.copy(data=fr) for fr in frames], dim="frame")
    return arr, np.stack(masks), exp


def _frame_metrics(sc, n_frames, seed, remove_spikes):
    arr, sp, exp = _frames(sc, n_frames, seed)
    cleaned, mask = remove_spikes(arr, return_mask=True)
    m = mask.values
    after = cleaned.values.astype(float)
    raw = arr.values.astype(float)
    sd = _sigma(sc.cube, exp)[None]
    good = np.broadcast_to((sc.truth.bad_pixel.values == 0)[None, ..., None], sp.shape)
    big = sp & ((raw - exp[None]) / sd >= 10) & good
    ok = m & (np.abs(after - exp[None]) <= 5 * sd)
    clean = ~sp & good
    return (ok & big).sum() / max(big.sum(), 1), (m & clean).sum() / clean.sum(), int(
        clean.sum())


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenes", nargs="*", default=None)
    ap.add_argument("--seeds", nargs="*", type=int, default=[0, 1, 2])
    ap.add_argument("--no-frames", action="store_true")
    ap.add_argument("--threshold", type=float, default=None)
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    import pmap
    from pmap.scenes import make_scene, scene_names

    def rs(c, **kw):
        if args.threshold is not None:
            kw["threshold"] = args.threshold
        return pmap.remove_spikes(c, **kw)

    names = args.scenes or scene_names()
    print(f"load average at start: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    head = (f"{'scene':28s} {'seed':>4s} {'recall':>7s} {'n>=10sd':>7s} {'found':>7s} {'top rec':>7s} {'n top':>6s} {'false':>9s} "
            f"{'dA max':>7s} {'F2 rec':>7s} {'F2 false':>9s} {'F3 rec':>7s} {'F3 false':>9s} "
            f"{'x sum':>6s} {'us/spec':>7s}")
    print(head)
    print("-" * len(head))
    tot = {"top": 0, "thit": 0.0, "big": 0, "hit": 0.0, "fm": 0.0, "fn": 0, "f2": 0.0,
           "f3": 0.0, "fn2": 0, "fn3": 0}
    _ = rs(make_scene(names[0], seed=0).cube.isel(y=slice(0, 4), x=slice(0, 4))).values
    for name in names:
        for seed in args.seeds:
            sc = make_scene(name, seed=seed)
            t0 = time.perf_counter()
            _ = sc.cube.sum().values
            base = time.perf_counter() - t0
            rec, nbig, false, nclean, worst, dt, det, trec, ntop = _map_metrics(sc, rs)
            tot["top"] += ntop
            tot["thit"] += trec * ntop
            tot["big"] += nbig
            tot["hit"] += rec * nbig
            tot["fm"] += false * nclean
            tot["fn"] += nclean
            row = (f"{name:28s} {seed:4d} {rec:7.4f} {nbig:7d} {det:7.4f} {trec:7.4f} {ntop:6d} {false:9.2e} {100 * worst:6.2f}%")
            if not args.no_frames:
                for nf in (2, 3):
                    r, f, nc = _frame_metrics(sc, nf, seed, rs)
                    tot[f"f{nf}"] += f * nc
                    tot[f"fn{nf}"] += nc
                    row += f" {r:7.4f} {f:9.2e}"
            row += f" {dt / max(base, 1e-9):6.0f} {1e6 * dt / (sc.cube.sizes['y'] * sc.cube.sizes['x']):7.1f}"
            print(row, flush=True)
    print(f"pooled: recall {tot['hit'] / max(tot['big'], 1):.4f} (n={tot['big']}), on tops "
          f"{tot['thit'] / max(tot['top'], 1):.4f} (n={tot['top']}), false "
          f"{tot['fm'] / tot['fn']:.2e} ({int(tot['fm'])} of {tot['fn']})", end="")
    if not args.no_frames:
        for nf in (2, 3):
            print(f", F{nf} false {tot[f'f{nf}'] / tot[f'fn{nf}']:.2e} "
                  f"({int(round(tot[f'f{nf}']))} of {tot[f'fn{nf}']})", end="")
    print()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
