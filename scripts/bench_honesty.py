"""How honest are the DEFAULT ``plcube process`` error bars on cubes pmap did not make? (issue 11)

Runs the cases of ``tests/test_noise_honesty.py`` (cubes, truth and Cramér–Rao bounds from
``tests/_independent_cubes.py``, numpy/scipy only) and prints one row per case: pull s.d.
of peak energy / FWHM / area (target 1 ± 0.05), RMS error / CRB (target ≤ 1.1), the ratio
of the reported σ to the CRB, the median χ²_red (target 1 ± 0.05, units "1"), the share of
converged pixels (≥ 95 %) and n; then the load average. Not a test: a yardstick to read.

    python scripts/bench_honesty.py [--n-pix 2000] [--cases a_wl_high_gain1_stated ...]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from _independent_cubes import (  # noqa: E402
    FIT_PARAMS,
    HONESTY_CASES,
    honesty_stats,
    make_case,
    write_zarr,
)

SHORT = {"peak_energy": "E", "peak_fwhm": "FWHM", "peak_area": "area"}


def run_pmap(cube: xr.DataArray, via: str, work: Path) -> tuple[xr.Dataset, list[str]]:
    """Default pipeline through the CLI or pmap.pipeline.process; returns (result, warnings)."""
    out = work / "result.zarr"
    if via == "cli":
        src = work / "cube.zarr"
        write_zarr(cube, src)
        proc = subprocess.run(
            [sys.executable, "-m", "pmap", "process", str(src), "-o", str(out), "--no-figures",
             "-q"], capture_output=True, text=True, cwd=work,
        )
        if proc.returncode != 0:
            raise RuntimeError(f"`plcube process` exited {proc.returncode}: {proc.stderr.strip()}")
        notes = [ln for ln in proc.stderr.splitlines() if "Warning" in ln or "Notice" in ln]
    else:
        from pmap.pipeline import process

        with warnings.catch_warnings(record=True) as rec:
            warnings.simplefilter("always")
            process(cube, out, progress=False)
        notes = [f"{w.category.__name__}: {w.message}" for w in rec]
    return xr.open_zarr(out), notes


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n-pix", type=int, default=2000)
    ap.add_argument("--cases", nargs="*", default=list(HONESTY_CASES))
    args = ap.parse_args(argv)
    import pmap

    print(f"pmap {getattr(pmap, '__version__', '?')} from {Path(pmap.__file__).parent}")
    head = (f"{'case':30s} {'via':3s} {'pk cnt':>7s} | pull s.d. E/FWHM/area | "
            f"RMS/CRB E/FWHM/area | σ/CRB E/FWHM/area | {'med χ²r':>9s} {'units':>14s} | "
            f"{'conv':>6s} {'n':>5s} {'s':>5s}")
    print(head)
    print("-" * len(head))
    all_notes = {}
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.cases:
            cube, truth, bound, via, _ = make_case(name, n_pix=args.n_pix)
            work = Path(tmp) / name
            work.mkdir()
            t0 = time.perf_counter()
            try:
                res, notes = run_pmap(cube, via, work)
                s = honesty_stats(res, truth, bound)
            except Exception as exc:  # report and go on with the other cases
                print(f"{name:30s} {via:3s} {truth['peak_counts_max']:7.0f} | CRASH "
                      f"{type(exc).__name__}: {exc}")
                continue
            dt = time.perf_counter() - t0
            all_notes[name] = notes

            def trio(key, s=s):
                return "/".join(f"{s[p][key]:.2f}" for p in FIT_PARAMS)

            print(f"{name:30s} {via:3s} {truth['peak_counts_max']:7.0f} | {trio('pull_sd'):>21s} | "
                  f"{trio('rms_over_crb'):>19s} | {trio('err_over_crb'):>17s} | "
                  f"{s['chi2_median']:9.4g} {str(s['chi2_units']):>14s} | "
                  f"{s['converged']:6.1%} {s['n']:5d} {dt:5.1f}")
    for name, notes in all_notes.items():
        for n in sorted(set(notes)):
            print(f"  [{name}] {n}")
    print("targets: pull s.d. 1 ± 0.05; RMS/CRB ≤ 1.1; median χ²_red 1 ± 0.05, units '1'; "
          "≥ 95 % converged")
    la = os.getloadavg()
    print(f"load average: {la[0]:.2f} {la[1]:.2f} {la[2]:.2f} on {os.cpu_count()} cores")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
