"""Honest error bars from the DEFAULT ``pmap process`` on cubes pmap did not make (issue 11).

Cubes, truth and Cramér–Rao bounds come from ``tests/_independent_cubes.py`` (numpy and
scipy only; its docstring gives the detector model and the sources of the bound: Kay,
Estimation Theory, 1993; Mortensen et al., Nat. Methods 7, 377 (2010)). For every case
(wavelength axis at high and low counts, gain 2.5, noise attrs stated or not, an axis
linear in energy), n = 4000 pixels go through the default pipeline — one case through the
command line — and on the pixels with fit_status 0:

* the pull (fit − truth)/σ of peak_energy, peak_fwhm and peak_area has s.d.
  1 ± max(0.05, 3 s.e.), s.e. = 1/sqrt(2(n − 1)) (normal theory, common practice);
* RMS error / RMS CRB ≤ 1.1 + 3 s.e., s.e. = 1/sqrt(2n) (an efficient estimator reaches
  the bound, Kay 1993 ch. 3; 10 % allowed by the issue);
* the median χ²_red is 1 ± max(0.05, 3 s.e.) with s.e. = 1.2533·sqrt(2/ν)/sqrt(n)
  (median of χ²_ν/ν, common practice; 0.05 is the issue's target, 3 s.e. ≈ 0.005 would
  ask more than the target) and its units are "1";
* at least 95 % of the pixels converge.

With n = 4000, 3 s.e. of a pull s.d. is 0.034, so the issue's ± 0.05 is about 4.5 s.e.:
36 such checks run here, and at n = 2000 (± 0.05 ≈ 3.2 s.e.) one of them in 20 runs
would fail by chance alone (seed 11 of case a gave 1.050 at n = 2000, other seeds
0.98–1.03); n = 4000 keeps the target and makes the family of checks reliable.
"""

from __future__ import annotations

import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from scipy.optimize import curve_fit

sys.path.insert(0, str(Path(__file__).parent))
from _independent_cubes import (  # noqa: E402
    FIT_PARAMS,
    HONESTY_CASES,
    PARAMS,
    crb,
    expected_counts,
    honesty_stats,
    make_case,
    make_wavelength_cube,
    write_zarr,
)

N_PIX = 4000
CASES = list(HONESTY_CASES)


def _run_pmap(cube: xr.DataArray, via: str, work: Path) -> xr.Dataset:
    """The default pipeline, through the CLI (a Zarr cube on disk) or pmap.pipeline.process."""
    out = work / "result.zarr"
    if via == "cli":
        src = work / "cube.zarr"
        write_zarr(cube, src)
        proc = subprocess.run(
            [sys.executable, "-m", "pmap", "process", str(src), "-o", str(out), "--no-figures",
             "-q"],
            capture_output=True, text=True, timeout=600, cwd=work,
        )
        if proc.returncode != 0:
            raise RuntimeError(f"`pmap process` exited {proc.returncode}: {proc.stderr.strip()}")
    else:
        from pmap.pipeline import process

        # notices and warnings (e.g. "noise model estimated from the data") are not what is
        # tested here; the numbers are
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            process(cube, out, progress=False)
    return xr.open_zarr(out)


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    """case -> (stats, truth) or the exception pmap raised; each case runs once, lazily."""
    cache: dict = {}

    def get(name):
        if name not in cache:
            cube, truth, bound, via, level = make_case(name, n_pix=N_PIX)
            try:
                res = _run_pmap(cube, via, tmp_path_factory.mktemp(name))
                cache[name] = (honesty_stats(res, truth, bound), truth)
            except Exception as exc:  # a crash is reported by every test of the case
                cache[name] = exc
        got = cache[name]
        if isinstance(got, Exception):
            pytest.fail(f"pmap could not process case {name}: {type(got).__name__}: {got}")
        return got

    return get


@pytest.mark.parametrize("name", CASES)
def test_case_is_what_it_claims(name):
    """The yardstick itself: n, peak counts of the 'low' and 'high' cases."""
    _, truth, bound, _, level = make_case(name, n_pix=N_PIX)
    assert truth["n_pix"] >= 2000
    if level == "low":
        assert truth["peak_counts_max"] <= 50.0
    else:
        assert truth["peak_counts_max"] >= 1500.0
    for p in FIT_PARAMS:
        assert np.all(np.isfinite(bound[p])) and np.all(bound[p] > 0)


def test_crb_is_reached_by_an_independent_weighted_fit():
    """The bound is right: an independent weighted least-squares fit (scipy curve_fit with
    the true variances, asymptotically efficient — Kay 1993, §7.5) of n = 1000 noisy copies
    of one spectrum scatters by the CRB, 1 ± 3/sqrt(2(n − 1))."""
    _, truth = make_wavelength_cube(n_pix=1, area_photoelectrons=2.0e4,
                                    background_photoelectrons=10.0, gain=2.5,
                                    read_noise_counts=3.0, dark_level_counts=100.0, seed=3,
                                    vary=False)
    bound = crb(truth)
    e_lo, e_hi, g, rn, dark = (truth[k] for k in ("e_lo", "e_hi", "gain", "read_noise_counts",
                                                  "dark_level_counts"))
    theta = np.array([truth[p][0, 0] for p in PARAMS])
    mu = expected_counts(e_lo, e_hi, *theta, dark)
    sigma = np.sqrt((mu - dark) / g + rn**2)
    rng = np.random.default_rng(7)
    n = 1000
    est = np.empty((n, theta.size))
    for k in range(n):
        y = rng.poisson((mu - dark) * g) / g + rng.normal(0.0, rn, mu.size) + dark
        est[k], _ = curve_fit(lambda _, *t: expected_counts(e_lo, e_hi, *t, dark), None, y,
                              p0=theta, sigma=sigma, absolute_sigma=True)
    ratio = est.std(axis=0, ddof=1) / np.array([bound[p][0, 0] for p in PARAMS])
    np.testing.assert_allclose(ratio, 1.0, atol=3.0 / np.sqrt(2 * (n - 1)))


@pytest.mark.parametrize("param", FIT_PARAMS)
@pytest.mark.parametrize("name", CASES)
def test_pull_sd_is_one(measured, name, param):
    stats, _ = measured(name)
    tol = max(0.05, 3.0 * stats["se_sd"])
    s = stats[param]
    if param == "peak_area":  # truth is the line's total counts (∫ I dE of counts/eV)
        assert s["units"] == "counts", f"peak_area units {s['units']!r}, truth is in counts"
    assert abs(s["pull_sd"] - 1.0) <= tol, (
        f"{name}: pull s.d. of {param} = {s['pull_sd']:.3f} (mean {s['pull_mean']:+.3f}), "
        f"expected 1 ± {tol:.3f}; n = {stats['n']}"
    )


@pytest.mark.parametrize("param", FIT_PARAMS)
@pytest.mark.parametrize("name", CASES)
def test_rms_error_near_cramer_rao(measured, name, param):
    stats, _ = measured(name)
    limit = 1.1 + 3.0 * stats["se_rms"]
    r = stats[param]["rms_over_crb"]
    assert r <= limit, (
        f"{name}: RMS error of {param} = {r:.3f} × CRB, expected ≤ {limit:.3f}; "
        f"n = {stats['n']}"
    )


@pytest.mark.parametrize("name", CASES)
def test_chi2_red_is_a_reduced_chi_square(measured, name):
    stats, _ = measured(name)
    assert stats["chi2_units"] == "1", f"{name}: chi2_red units {stats['chi2_units']!r}"
    tol = max(0.05, 3.0 * stats["se_chi2_median"])
    assert abs(stats["chi2_median"] - 1.0) <= tol, (
        f"{name}: median chi2_red = {stats['chi2_median']:.4g}, expected 1 ± {tol:.3f}; "
        f"n = {stats['n']}"
    )


@pytest.mark.parametrize("name", CASES)
def test_most_pixels_converge(measured, name):
    stats, _ = measured(name)
    assert stats["converged"] >= 0.95, (
        f"{name}: {stats['converged']:.1%} of {stats['n_pixels']} pixels converged"
    )


def test_masked_channels_are_left_out_not_the_pixel():
    # three hot detector channels masked (NaN) in every spectrum, one of them on the
    # line's flank: the fit leaves those channels out and stays honest (same pull
    # criterion as above, n = 2000)
    cube, truth, bound, _, _ = make_case("c_wl_high_gain2.5_stated", n_pix=2000)
    lam = cube["wavelength"].values
    e0 = float(np.median(truth["peak_energy"]))
    flank = int(np.argmin(np.abs(lam - 1239.84198 / e0))) + 6  # hc in eV nm (CODATA 2018)
    bad = [40, flank, lam.size - 60]
    data = cube.values.copy()
    data[..., bad] = np.nan
    masked = cube.copy(data=data)
    from pmap.pipeline import process

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        import tempfile

        with tempfile.TemporaryDirectory() as tmp:
            res = process(masked, Path(tmp) / "r.zarr", progress=False).load()
    st = res.fit_status.values
    assert np.mean(st == 0) >= 0.95
    stats = honesty_stats(res, truth, bound)
    s = stats["peak_energy"]
    assert abs(s["pull_sd"] - 1.0) <= max(0.05, 3.0 * stats["se_sd"]), s
