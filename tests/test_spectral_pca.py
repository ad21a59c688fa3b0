"""PCA denoising against a known clean low-rank cube."""

import numpy as np
import pytest

import pmap
from pmap.errors import StepError
from pmap.spectral import choose_n_components, pca_denoise


def _low_rank(rng, ny=30, nx=40, n=120, noise=1.0):
    wl = np.linspace(600, 800, n)
    comps = np.stack(
        [np.exp(-0.5 * ((wl - c) / w) ** 2) for c, w in [(650, 10), (700, 15), (750, 8)]]
    )
    abund = rng.dirichlet(np.ones(3), size=(ny, nx)) * 100
    clean = abund @ comps
    noisy = clean + rng.normal(0, noise, clean.shape)
    cube = pmap.make_cube(noisy, wavelength_nm=wl, chunks={"y": 10, "x": 20})
    return cube, clean


def test_denoise_reduces_error(rng):
    cube, clean = _low_rank(rng)
    out = pca_denoise(cube, sample_size=600, seed=1)
    err_in = np.sqrt(np.mean((cube.values - clean) ** 2))
    err_out = np.sqrt(np.mean((out.values - clean) ** 2))
    # keeping k ≈ 3 of 120 components removes most of the white noise (common practice)
    assert err_out < 0.4 * err_in
    fixed = pca_denoise(cube, n_components=3, sample_size=600, seed=1)
    assert np.sqrt(np.mean((fixed.values - clean) ** 2)) < 0.4 * err_in


def test_marchenko_pastur_rule_counts_components(rng):
    # three components well above the Marchenko–Pastur edge of pure noise
    # (Marchenko & Pastur, Math. USSR-Sbornik 1, 457 (1967))
    cube, _ = _low_rank(rng)
    x = cube.values.reshape(-1, cube.sizes["wavelength"])
    ev = np.linalg.svd(x - x.mean(0), compute_uv=False) ** 2 / (x.shape[0] - 1)
    k = choose_n_components(ev, rule="marchenko_pastur", n_samples=x.shape[0], noise_var=1.0)
    # Dirichlet abundances sum to 100, so the mean-centred signal spans exactly 2 dimensions
    assert k == 2
    noise_only = rng.normal(0, 1, (2000, 100))
    ev0 = np.linalg.svd(noise_only - noise_only.mean(0), compute_uv=False) ** 2 / 1999
    assert choose_n_components(ev0, rule="marchenko_pastur", n_samples=2000, noise_var=1.0) == 0


def test_broken_stick():
    # the broken-stick expectation for p = 4 (Jackson 1993, from memory): 0.521, 0.271, ...
    ev = np.array([0.6, 0.3, 0.07, 0.03])
    assert choose_n_components(ev, rule="broken_stick", n_samples=100, noise_var=0) == 2


def test_seeded_and_errors(rng):
    cube, _ = _low_rank(rng, ny=8, nx=10)
    a = pca_denoise(cube, sample_size=50, seed=3).values
    b = pca_denoise(cube, sample_size=50, seed=3).values
    np.testing.assert_array_equal(a, b)
    with pytest.raises(StepError, match="rule"):
        pca_denoise(cube, rule="scree")
    with pytest.raises(StepError, match="n_components"):
        pca_denoise(cube, n_components=0)
