"""Baseline removal (ALS, polynomial, constant) and Savitzky–Golay smoothing."""

import numpy as np
import pytest
from pybaselines.whittaker import asls
from scipy.signal import savgol_coeffs, savgol_filter

import pmap
from pmap.errors import StepError
from pmap.spectral import als_baseline, remove_baseline, smooth


def _spectra(rng, n=300, m=6):
    x = np.linspace(0, 1, n)
    base = 200 + 80 * x - 60 * x**2
    peaks = 500 * np.exp(-0.5 * ((x - rng.uniform(0.3, 0.7, (m, 1))) / 0.03) ** 2)
    return x, base, base + peaks + rng.normal(0, 2, (m, n))


@pytest.mark.parametrize(("lam", "p"), [(1e5, 0.01), (1e7, 0.001), (1e3, 0.05)])
def test_als_matches_pybaselines(rng, lam, p):
    # Eilers & Boelens (2005); reference implementation pybaselines.whittaker.asls
    _, _, y = _spectra(rng)
    ours = als_baseline(y, lam=lam, p=p)
    for row, b in zip(y, ours):
        ref, _ = asls(row, lam=lam, p=p)
        np.testing.assert_allclose(b, ref, rtol=1e-7, atol=1e-7 * np.abs(ref).max())


def test_als_step_recovers_baseline(rng):
    x, base, y = _spectra(rng)
    cube = pmap.make_cube(y[None].astype("float32"), wavelength_nm=500 + 100 * x)
    out = remove_baseline(cube, method="als", lam=1e5, p=0.01).values[0]
    est = y - out  # the baseline that was removed
    away = np.abs(y - base).max(axis=0) < 10  # channels without peaks
    # ALS with small p sits slightly under the noise: within 3 noise s.d. (common practice)
    assert np.abs(est[:, away] - base[away]).mean() < 3 * 2.0


def test_poly_window_and_constant(rng):
    x = np.linspace(500, 600, 201)
    base = 10 + 0.5 * (x - 500) + 0.01 * (x - 500) ** 2
    sig = 300 * np.exp(-0.5 * ((x - 550) / 5) ** 2)
    cube = pmap.make_cube((base + sig)[None, None, :], wavelength_nm=x)
    out = remove_baseline(cube, method="poly", degree=2, window=[[500, 520], [580, 600]])
    # a quadratic minus its exact least-squares fit on signal-free windows is the signal
    np.testing.assert_allclose(out.values[0, 0], sig, atol=1e-6 * sig.max() + 1e-3)
    flat = pmap.make_cube((7.5 + sig)[None, None, :], wavelength_nm=x)
    c = remove_baseline(flat, method="constant", window=(500, 520))
    np.testing.assert_allclose(c.values[0, 0], sig, atol=1e-5)  # window holds a 1e-6 tail


def test_poly_iterative_below_signal(rng):
    x = np.linspace(0, 1, 300)
    base = 100 + 30 * x
    sig = 400 * np.exp(-0.5 * ((x - 0.5) / 0.02) ** 2)
    cube = pmap.make_cube((base + sig)[None, None, :], wavelength_nm=500 + 100 * x)
    out = remove_baseline(cube, method="poly", degree=1, max_iter=200).values[0, 0]
    np.testing.assert_allclose(out, sig, atol=1.0)


def test_baseline_errors():
    cube = pmap.make_cube(np.ones((1, 1, 20)), wavelength_nm=np.arange(20) + 500.0)
    with pytest.raises(StepError, match="window"):
        remove_baseline(cube, method="constant")
    with pytest.raises(StepError, match="unknown baseline method"):
        remove_baseline(cube, method="snip")
    with pytest.raises(StepError, match="p must be"):
        remove_baseline(cube, p=1.5)


def test_savgol_coefficients_published():
    # Savitzky & Golay, Anal. Chem. 36, 1627 (1964): 5-point quadratic ×35 = [-3, 12, 17, 12, -3]
    np.testing.assert_allclose(savgol_coeffs(5, 2) * 35, [-3, 12, 17, 12, -3], atol=1e-12)
    # and pmap's smooth applies exactly that filter in the interior
    y = np.random.default_rng(0).normal(size=50)
    cube = pmap.make_cube(y[None, None, :], wavelength_nm=np.arange(50) + 400.0)
    out = smooth(cube, window=5, order=2).values[0, 0]
    interior = np.convolve(y, np.array([-3, 12, 17, 12, -3]) / 35, mode="valid")
    np.testing.assert_allclose(out[2:-2], interior, atol=1e-12)
    np.testing.assert_allclose(out, savgol_filter(y, 5, 2), atol=1e-12)


def test_smooth_errors():
    cube = pmap.make_cube(np.ones((1, 1, 20)), wavelength_nm=np.arange(20) + 500.0)
    with pytest.raises(StepError, match="odd"):
        smooth(cube, window=4)
