"""Tests of pmap.decomposition.decompose and component_count_curve (PCA and NMF).

References named beside the checks: NMF, Lee & Seung, Nature 401, 788 (1999);
unmixing scores (spectral angle, abundance RMSE) after Bioucas-Dias et al.,
IEEE JSTARS 5, 354 (2012); scikit-learn and scipy as reference implementations.
"""

from __future__ import annotations

import json
import subprocess
import sys
import warnings

import dask
import numpy as np
import pytest
import xarray as xr
from conftest import ComputeCounter
from scipy.optimize import linear_sum_assignment, nnls

import pmap
from pmap.decomposition import component_count_curve, decompose
from pmap.errors import PmapNotice, StepError

CENTRES_EV = (1.40, 1.46, 1.52)
SIGMA_EV = 0.017
PIXEL_UM = 0.5


def toy_cube(*, ny=30, nx=36, n_channels=64, height=100.0, read_noise=2.0, seed=0, chunks=None):
    """Three emitting regions (stripes) inside an off-sample border.

    Each region emits one Gaussian line in photon energy (centres CENTRES_EV,
    s.d. SIGMA_EV) of peak ``height`` counts; Poisson shot noise plus Gaussian
    read noise (dark already subtracted). Returns (cube, truth_region, spectra, energy).
    """
    rng = np.random.default_rng(seed)
    energy = np.linspace(1.30, 1.62, n_channels)
    spectra = np.exp(-0.5 * ((energy[None, :] - np.array(CENTRES_EV)[:, None]) / SIGMA_EV) ** 2)
    region = np.full((ny, nx), -1)
    y0, y1 = 3, ny - 3
    edges = np.linspace(3, nx - 3, 4).astype(int)
    for r in range(3):
        region[y0:y1, edges[r] : edges[r + 1]] = r
    expected = np.where(region[..., None] >= 0, height * spectra[np.clip(region, 0, None)], 0.0)
    data = rng.poisson(expected) + rng.normal(0.0, read_noise, expected.shape)
    cube = pmap.make_cube(
        data.astype(np.float32),
        energy_ev=energy,
        y_um=np.arange(ny) * PIXEL_UM,
        x_um=np.arange(nx) * PIXEL_UM,
        chunks=chunks,
    )
    return cube, region, spectra, energy


def _as_numpy(cube):
    return cube.copy(data=np.asarray(cube.values))


def _valid_rows(cube):
    x = np.asarray(cube.values, dtype=np.float64).reshape(-1, cube.shape[-1])
    return x[np.isfinite(x).all(axis=1)]


def _corr(a, b):
    return float(np.corrcoef(a, b)[0, 1])


# ----------------------------------------------------------------------------- NMF


def test_nmf_spectra_match_true_emission():
    cube, _, spectra, energy = toy_cube()
    ds = decompose(cube, method="nmf", n_components=3, seed=0)
    got = ds["component_spectrum"].values
    # Components are emission spectra (Lee & Seung 1999): each matches one true line,
    # correlation >= 0.98 (threshold from the task brief), ordered by peak energy.
    for k in range(3):
        assert _corr(got[k], spectra[k]) >= 0.98
    peaks = ds["component_peak"].values
    assert np.all(np.diff(peaks) > 0)
    step = energy[1] - energy[0]
    np.testing.assert_allclose(peaks, CENTRES_EV, atol=1.5 * step)
    assert ds["component_spectrum"].attrs["units"] == "1"
    assert ds["component_abundance"].attrs["units"] == "counts"
    assert ds.attrs["init"] == "nndsvda" and ds.attrs["solver"] == "cd"
    assert ds.attrs["method"] == "nmf" and ds.attrs["seed"] == 0
    # Shares of the summed intensity: three equal-area lines over equal-size regions.
    np.testing.assert_allclose(ds["explained_variance"].sum(), 1.0, atol=0.05)


def test_nmf_equals_sklearn_on_same_data():
    from sklearn.decomposition import NMF

    cube, *_ = toy_cube()
    cube = _as_numpy(cube)
    ds = decompose(cube, method="nmf", n_components=3, sample_pixels=None, seed=3)
    x = np.clip(_valid_rows(cube), 0.0, None)
    ref = NMF(n_components=3, init="nndsvda", solver="cd", max_iter=500, random_state=3).fit(x)
    comps = ref.components_ / ref.components_.max(axis=1, keepdims=True)
    comps = comps[np.argsort(np.argmax(comps, axis=1))]
    # scikit-learn run directly on the same in-memory data gives the same components.
    np.testing.assert_allclose(ds["component_spectrum"].values, comps, rtol=1e-10, atol=1e-12)
    # Abundances are the non-negative least-squares solution for those spectra:
    # scipy.optimize.nnls (Lawson & Hanson 1974) on a few pixels...
    ab = ds["component_abundance"].values.reshape(3, -1).T
    for i in (0, 100, 400, 700, 1000):
        w_ref, _ = nnls(comps.T, np.clip(cube.values.reshape(-1, cube.shape[-1])[i], 0, None))
        np.testing.assert_allclose(ab[i], w_ref, rtol=1e-7, atol=1e-8)
    # ...and scikit-learn's own transform (coordinate descent, tol 1e-4) within its tolerance.
    w_sk = ref.transform(x) * ref.components_.max(axis=1)
    w_sk = w_sk[:, np.argsort(np.argmax(ref.components_, axis=1))]
    np.testing.assert_allclose(ab, w_sk, atol=2e-3 * w_sk.max())


def test_known_abundance_unmixing():
    """Linear mixing, Dirichlet abundances; spectral angle and abundance RMSE.

    Protocol after Bioucas-Dias et al., IEEE JSTARS 5, 354 (2012).
    """
    rng = np.random.default_rng(7)
    n_channels, ny, nx = 80, 40, 40
    energy = np.linspace(1.30, 1.62, n_channels)
    centres, widths = (1.38, 1.46, 1.54), (0.025, 0.02, 0.03)
    end = np.array([np.exp(-0.5 * ((energy - c) / w) ** 2) for c, w in zip(centres, widths)])
    abund = rng.dirichlet((1.0, 1.0, 1.0), size=ny * nx)
    scale = 400.0
    data = rng.poisson(scale * abund @ end).reshape(ny, nx, n_channels).astype(np.float32)
    cube = pmap.make_cube(data, energy_ev=energy, chunks={"y": 16, "x": 16})
    ds = decompose(cube, method="nmf", n_components=3, seed=0, max_iter=2000)
    got = ds["component_spectrum"].values
    cosang = (got @ end.T) / np.outer(np.linalg.norm(got, axis=1), np.linalg.norm(end, axis=1))
    angles = np.arccos(np.clip(cosang, -1, 1))
    rows, cols = linear_sum_assignment(angles)
    # Spectral angle of each recovered endmember < 0.1 rad (common practice: a few degrees).
    assert angles[rows, cols].max() < 0.1
    w = ds["component_abundance"].values.reshape(3, -1).T[:, rows]
    a_est = w / w.sum(axis=1, keepdims=True)
    rmse = np.sqrt(np.mean((a_est - abund[:, cols]) ** 2))
    # Abundance RMSE < 0.05 (common practice for well-conditioned synthetic mixtures).
    assert rmse < 0.05


def test_negative_values_clipped_and_recorded():
    cube, *_ = toy_cube(height=20.0, read_noise=4.0)
    ds = decompose(cube, method="nmf", n_components=3)
    frac = float(np.mean(_valid_rows(cube) < 0))
    assert frac > 0.1
    # The recorded fraction is that of the fitted sample (here every pixel).
    assert ds.attrs["negative_fraction"] == pytest.approx(frac)
    assert "clipped to 0" in ds.attrs["negative_policy"]
    ab = ds["component_abundance"].values
    assert np.all(ab >= 0)


# ----------------------------------------------------------------------------- PCA


def test_pca_equals_sklearn_on_same_data():
    from sklearn.decomposition import PCA

    cube, *_ = toy_cube()
    cube = _as_numpy(cube)
    ds = decompose(cube, method="pca", n_components=4, sample_pixels=None, seed=1)
    x = _valid_rows(cube)
    ref = PCA(n_components=4, svd_solver="full").fit(x)
    got = ds["component_spectrum"].values
    sign = np.sign(np.sum(got * ref.components_, axis=1))
    # Same loadings as scikit-learn (up to the sign convention we fix), same ratios, scores.
    np.testing.assert_allclose(got * sign[:, None], ref.components_, atol=1e-10)
    np.testing.assert_allclose(
        ds["explained_variance"].values, ref.explained_variance_ratio_, rtol=1e-10
    )
    scores = ds["component_abundance"].values.reshape(4, -1).T
    np.testing.assert_allclose(scores * sign, ref.transform(x), atol=1e-8)
    np.testing.assert_allclose(ds["mean_spectrum"].values, ref.mean_, rtol=1e-12)
    # Our sign rule: the largest-magnitude entry of each loading is positive.
    big = got[np.arange(4), np.argmax(np.abs(got), axis=1)]
    assert np.all(big > 0)


# ----------------------------------------------------------------------------- scale paths


@pytest.mark.parametrize("method", ["nmf", "pca"])
def test_sampled_dask_path_equals_numpy_path(method):
    cube, *_ = toy_cube(chunks={"y": 8, "x": 10})
    assert len(cube.chunks[0]) > 1
    a = decompose(cube, method=method, n_components=3, sample_pixels=300, seed=5)
    b = decompose(_as_numpy(cube), method=method, n_components=3, sample_pixels=300, seed=5)
    assert a.attrs["n_fit_pixels"] == b.attrs["n_fit_pixels"] == 300
    np.testing.assert_allclose(a["component_spectrum"], b["component_spectrum"], rtol=1e-12)
    np.testing.assert_allclose(
        a["component_abundance"].values, b["component_abundance"].values, rtol=1e-9, atol=1e-9
    )


def test_sample_agrees_with_all_pixels():
    cube, *_ = toy_cube()
    full = decompose(_as_numpy(cube), method="nmf", n_components=3, sample_pixels=None)
    part = decompose(cube, method="nmf", n_components=3, sample_pixels=400, seed=2)
    for k in range(3):
        assert _corr(full["component_spectrum"][k], part["component_spectrum"][k]) > 0.995


def test_incremental_agrees_with_in_memory():
    cube, *_ = toy_cube(chunks={"y": 8, "x": 12})
    full = decompose(_as_numpy(cube), method="pca", n_components=3, sample_pixels=None)
    inc = decompose(cube, method="pca", n_components=3, incremental=True, batch_pixels=150)
    assert inc.attrs["n_fit_pixels"] == cube.sizes["y"] * cube.sizes["x"]
    # IncrementalPCA (Ross et al., IJCV 77, 125 (2008)) reproduces batch PCA's leading loadings.
    for k in range(3):
        assert abs(_corr(full["component_spectrum"][k], inc["component_spectrum"][k])) > 0.999
    nmf_full = decompose(_as_numpy(cube), method="nmf", n_components=3, sample_pixels=None)
    nmf_inc = decompose(
        cube, method="nmf", n_components=3, incremental=True, batch_pixels=128, max_iter=3
    )
    assert "MiniBatchNMF" in nmf_inc.attrs["solver"]
    for k in range(3):
        assert _corr(nmf_full["component_spectrum"][k], nmf_inc["component_spectrum"][k]) > 0.98


def test_reproducible_with_seed():
    cube, *_ = toy_cube(chunks={"y": 10, "x": 12})
    a = decompose(cube, method="nmf", n_components=3, sample_pixels=250, seed=11)
    b = decompose(cube, method="nmf", n_components=3, sample_pixels=250, seed=11)
    c = decompose(cube, method="nmf", n_components=3, sample_pixels=250, seed=12)
    np.testing.assert_array_equal(a["component_spectrum"], b["component_spectrum"])
    assert not np.array_equal(a["component_spectrum"], c["component_spectrum"])


def test_nan_and_masked_pixels_skipped():
    cube, *_ = toy_cube()
    data = np.asarray(cube.values).copy()
    data[4, 5, 10] = np.nan
    data[10, 10, :] = np.nan
    cube = cube.copy(data=data).chunk({"y": 10})
    mask = xr.zeros_like(cube.isel(energy=0), dtype=bool).compute()
    mask[20, 20] = True
    ds = decompose(cube, method="nmf", n_components=3, sample_pixels=None, mask=mask)
    ab = ds["component_abundance"].values
    assert ds.attrs["n_fit_pixels"] == cube.sizes["y"] * cube.sizes["x"] - 3
    for y, x in ((4, 5), (10, 10), (20, 20)):
        assert np.all(np.isnan(ab[:, y, x]))
    assert np.isfinite(ab).sum() == 3 * (cube.sizes["y"] * cube.sizes["x"] - 3)


def test_abundances_are_lazy():
    cube, *_ = toy_cube(chunks={"y": 10, "x": 12})
    counter = ComputeCounter(forbid=False)
    with dask.config.set(scheduler=counter):
        ds = decompose(cube, method="nmf", n_components=3, sample_pixels=200)
    # One compute: gathering the pixel sample. The abundance maps are a graph.
    assert counter.count == 1
    assert isinstance(ds["component_abundance"].data, dask.array.Array)
    assert ds["component_abundance"].data.numblocks[1:] == cube.data.numblocks[:2]


# ----------------------------------------------------------------------------- count curve


def test_component_count_curve_pca_matches_sklearn():
    from sklearn.decomposition import PCA

    cube, *_ = toy_cube()
    curve = component_count_curve(cube, "pca", counts=range(1, 6), sample_pixels=None)
    ref = PCA(n_components=5, svd_solver="full").fit(_valid_rows(cube))
    # Relative residual of a rank-k PCA = sqrt(1 - cumulative explained-variance ratio).
    expect = np.sqrt(1 - np.cumsum(ref.explained_variance_ratio_))
    np.testing.assert_allclose(curve["reconstruction_error"].values, expect, rtol=1e-8)


def test_component_count_curve_nmf_drops_at_true_count():
    from sklearn.decomposition import NMF

    cube, *_ = toy_cube()
    curve = component_count_curve(cube, "nmf", counts=[1, 2, 3, 4], sample_pixels=None)
    err = curve["reconstruction_error"].values
    assert np.all(np.diff(err) < 0)
    # Three emitting species: the curve flattens after 3 (elbow, common practice).
    assert (err[1] - err[2]) > 5 * (err[2] - err[3])
    x = np.clip(_valid_rows(cube), 0, None)
    ref = NMF(n_components=2, init="nndsvda", max_iter=500, random_state=0).fit(x)
    assert err[1] == pytest.approx(ref.reconstruction_err_ / np.linalg.norm(x), rel=1e-10)


# ----------------------------------------------------------------------------- contract


def test_bad_input_raises_step_error():
    cube, *_ = toy_cube(ny=10, nx=12)
    with pytest.raises(StepError, match="method"):
        decompose(cube, method="ica")
    with pytest.raises(StepError, match="exceeds"):
        decompose(cube, n_components=500)
    with pytest.raises(StepError, match="DataArray"):
        decompose(np.zeros((3, 3, 3)))
    with pytest.raises(StepError, match="spectral"):
        decompose(cube.rename(energy="channel"))
    with pytest.raises(StepError, match="valid pixels"):
        decompose(cube * np.nan, n_components=2)


def test_registered_step_and_light_import():
    from pmap.steps import get_step

    assert get_step("decompose").func is decompose
    assert get_step("segment").func is pmap.decomposition.segment
    code = (
        "import sys, pmap, pmap.decomposition; pmap.decompose; "
        "assert 'sklearn' not in sys.modules, 'scikit-learn imported'"
    )
    subprocess.run([sys.executable, "-c", code], check=True)


def test_results_round_trip_through_zarr(tmp_path):
    from pmap.decomposition import segment

    cube, *_ = toy_cube(ny=12, nx=14, chunks={"y": 6})
    ds = decompose(cube, method="nmf", n_components=2)
    region = segment(cube, n_regions=2)
    ds.to_zarr(tmp_path / "dec.zarr", consolidated=False)
    region.to_dataset().to_zarr(tmp_path / "reg.zarr", consolidated=False)
    back = xr.open_zarr(tmp_path / "dec.zarr", consolidated=False)
    np.testing.assert_allclose(back["component_abundance"], ds["component_abundance"])
    assert back.attrs["negative_policy"] == ds.attrs["negative_policy"]
    reg = xr.open_zarr(tmp_path / "reg.zarr", consolidated=False)["region"]
    np.testing.assert_array_equal(reg, region)
    assert reg.attrs["scores"] == region.attrs["scores"]


# ----------------------------------------------------------------------------- meaning


def _drifting_line_cube(seed=0, ny=24, nx=40, n_channels=160):
    """One Gaussian line (FWHM 80 meV, energy axis) whose centre drifts linearly across x
    from 1.50 to 1.66 eV (twice its FWHM); Poisson counts, numpy only."""
    rng = np.random.default_rng(seed)
    energy = np.linspace(1.30, 1.86, n_channels)
    centre = 1.50 + 0.16 * np.linspace(0, 1, nx)[None, :] * np.ones((ny, 1))
    sigma = 0.080 / (2 * np.sqrt(2 * np.log(2)))
    expected = 400.0 * np.exp(-0.5 * ((energy - centre[..., None]) / sigma) ** 2)
    data = rng.poisson(expected).astype(np.float32)
    return pmap.make_cube(data, energy_ev=energy), centre, energy


def test_shifting_line_is_flagged_and_aligned():
    from pmap.errors import PmapNotice

    cube, centre, energy = _drifting_line_cube()
    with pytest.warns(PmapNotice, match="shifting continuously"):
        ds = decompose(cube, method="nmf", n_components=2)
    pairs = json.loads(ds.attrs["shifting_line_pairs"])
    assert [p["components"] for p in pairs] == [[0, 1]]
    assert "peak-energy map" in ds.attrs["component_notice"]
    assert len(ds["component_spectrum"].attrs["sharp_edge"]) == 2
    # Shift-aware: one component of the aligned spectra, the shift as a map that follows
    # the true centre up to the reference (the median peak). About 9700 counts per line of
    # sigma 34 meV: Cramer-Rao bound of the centre sigma/sqrt(N) ~ 0.35 meV (Kay,
    # Estimation Theory, 1993, for a Poisson line); allow 3x that as the scatter.
    al = decompose(cube, method="nmf", n_components=1, align="peak")
    err = al["component_shift"].values - (centre - np.median(centre))
    err -= np.median(err)
    assert np.std(err) < 0.001 and np.max(np.abs(err)) < 0.004
    assert al["component_shift"].attrs["units"] == "eV"
    # The aligned component is the line itself: FWHM 80 meV within 10 % (half-maximum
    # crossings of the spectrum, common practice).
    spec = al["component_spectrum"].values[0]
    above = energy[spec >= 0.5 * spec.max()]
    assert abs((above.max() - above.min()) - 0.080) < 0.008
    assert al.attrs["component_notice"] == "none"


def test_distinct_phases_are_not_flagged():
    cube, *_ = toy_cube()
    with warnings.catch_warnings():
        warnings.simplefilter("error", category=PmapNotice)
        ds = decompose(cube, method="nmf", n_components=3)
    assert ds.attrs["component_notice"] == "none"
    assert json.loads(ds.attrs["shifting_line_pairs"]) == []
    assert ds["component_spectrum"].attrs["sharp_edge"] == [0, 0, 0]


def test_edges_sharper_than_the_instrument():
    """A component with a step edge is flagged against a stated instrument FWHM."""
    from pmap.decomposition._components import sharp_edges

    energy = np.linspace(1.4, 1.8, 200)
    smooth = np.exp(-0.5 * ((energy - 1.6) / 0.03) ** 2)
    cut = np.where(energy < 1.6, smooth, 0.0)  # a line cut at its maximum
    sample = np.tile(smooth, (50, 1))
    flag, slope, data, inst = sharp_edges(
        np.stack([smooth, cut]), sample, energy, {"instrument_fwhm_ev": 0.02}, "energy"
    )
    assert flag.tolist() == [False, True]
    # A Gaussian of FWHM w has a steepest slope of exp(-1/2)/sigma relative to its maximum.
    assert inst[0] == pytest.approx(np.exp(-0.5) / (0.02 / (2 * np.sqrt(2 * np.log(2)))))


def test_compiled_clipped_nnls_equals_numpy_nnls():
    """The one-pass abundances (products of the clipped rows in a compiled pass) equal
    nnls_rows on the clipped finite rows to rounding (relative to the largest abundance,
    n = 4000 rows, k = 1..4 components incl. supports with zeros), with the same zero
    pattern, NaN exactly for rows holding NaN or inf, float32 input as float64; and
    scipy.optimize.nnls (Lawson & Hanson 1974) on a few rows."""
    from pmap.decomposition._nnls import nnls_clipped_rows, nnls_rows

    rng = np.random.default_rng(5)
    c = 300
    u = np.arange(c)
    for k in (1, 2, 3, 4):
        spectra = np.array([np.exp(-0.5 * ((u - 40 - 60 * j) / 15.0) ** 2) for j in range(k)])
        w = rng.uniform(0, 50, (4000, k)) * (rng.random((4000, k)) > 0.3)
        x = w @ spectra + rng.normal(0, 2.0, (4000, c))
        x[7, 3] = np.nan
        x[9, 100] = -np.inf
        for arr in (x, x.astype(np.float32)):
            got = nnls_clipped_rows(arr, spectra)
            x64 = arr.astype(np.float64)
            ok = np.isfinite(x64).all(axis=1)
            want = np.full_like(got, np.nan)
            want[ok] = nnls_rows(np.clip(x64[ok], 0.0, None), spectra)
            np.testing.assert_array_equal(np.isnan(got), ~ok[:, None] & np.ones(k, bool))
            assert np.nanmax(np.abs(got - want)) <= 1e-10 * np.nanmax(want)
            np.testing.assert_array_equal(got[ok] == 0, want[ok] == 0)
        for i in range(10, 15):
            ref, _ = nnls(spectra.T, np.clip(x[i], 0, None))
            np.testing.assert_allclose(nnls_clipped_rows(x[i:i + 1], spectra)[0], ref,
                                       rtol=1e-7, atol=1e-8 * ref.max())
