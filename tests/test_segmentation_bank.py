"""Segmentation by emission type on scenes with known truth (issue 12, items 3 and 4).

The scenes here are made with numpy/scipy only (never pmap's own generators or
kernels), so agreement is measured against something outside pmap. Agreement with
the truth is the adjusted Rand index (Hubert & Arabie, J. Classification 2, 193
(1985); ``sklearn.metrics.adjusted_rand_score``).

Detector model as in ``tests/_independent_cubes.py`` (common practice, Janesick,
*Photon Transfer*, SPIE Press 2007): photoelectrons per channel Poisson, read-out
counts = Poisson/gain + Normal(0, read_noise) + dark level. Lines are Gaussians in
photon energy integrated exactly over each channel (normal CDF at the channel
edges); the axis is linear in vacuum wavelength, E = hc/λ with
hc = 1239.8419843320026 eV·nm (CODATA 2018).
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy.special import erf

HC_EV_NM = 1239.8419843320026
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def _edges(c):
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[2 * c[0] - mid[0]], mid, [2 * c[-1] - mid[-1]]])


def _line(e_lo, e_hi, e0, fwhm):
    """Fraction of a unit-area Gaussian (centre e0, FWHM, eV) in each channel [e_lo, e_hi]."""
    s = np.asarray(fwhm, dtype=float) / FWHM_PER_SIGMA * np.sqrt(2.0)
    e0 = np.asarray(e0, dtype=float)
    return 0.5 * (erf((e_hi - e0) / s) - erf((e_lo - e0) / s))


def four_type_scene(
    seed: int = 0,
    *,
    shape: tuple[int, int] = (80, 100),
    n_ch: int = 256,
    brightness: float = 1.0,
) -> tuple[xr.DataArray, np.ndarray, list[str]]:
    """Four emission types on an emission-free background, with gradients and a 2 % minority.

    Types (areas in photoelectrons, lines Gaussian in energy):

    1. *matrix*: a band whose centre drifts from 1.60 to 1.64 eV across x, FWHM 90 meV,
       area 4·10⁴ × an intensity gradient from 0.5 to 1.5 along y;
    2. *low-gap domains*: a 1.50 eV line (+ 15 meV across x), FWHM 60 meV, area 3·10⁴,
       with the matrix band at 30 %;
    3. *grain boundaries*: the matrix band at 35 % plus a broad 1.35 eV defect band
       (FWHM 160 meV, area 6·10³) — differs from the matrix mostly in intensity;
    4. *minority*: discs (2 % of the pixels) with a 1.72 eV line, FWHM 30 meV,
       area 2·10⁴, over the matrix band at 50 %.

    Background: a corner strip with no emission. Everywhere: 3 e⁻/channel stray light.
    The type map is drawn on a grid 4 × finer than the pixels; each pixel emits the
    mixture of the types in its area (mixed pixels with any fraction at the borders),
    and its truth is the type covering most of it. Detector: gain 2 e⁻/count, read noise
    6 counts, dark level 500 counts. Returns (cube in raw counts, truth (y, x) with
    0 = no emission and 1..4 the types above, type names).
    """
    rng = np.random.default_rng(seed)
    ny, nx = shape
    f = 4  # sub-pixels per pixel side
    sy, sx = (np.mgrid[0 : ny * f, 0 : nx * f] + 0.5) / f - 0.5  # sub-pixel centres, pixels
    # Grains: Voronoi cells of random seeds, types 1 (matrix) and 2 (low-gap) by cell.
    n_seeds = max(6, ny * nx // 400)
    pts = rng.uniform(0, 1, (n_seeds, 2)) * [ny, nx]
    d = np.sqrt((sy[..., None] - pts[:, 0]) ** 2 + (sx[..., None] - pts[:, 1]) ** 2)
    order = np.sort(d, axis=-1)
    cell_type = np.where(rng.permutation(n_seeds) < 0.4 * n_seeds, 2, 1)
    fine = cell_type[np.argmin(d, axis=-1)]
    # Grain boundaries (type 3), 2 px wide: the two nearest seeds almost equidistant.
    fine = np.where(order[..., 1] - order[..., 0] < 2.0, 3, fine)
    # Minority discs (type 4) inside the matrix, until 2 % of the area.
    while (fine == 4).mean() < 0.02:
        cy, cx = rng.uniform(4, ny - 4), rng.uniform(4, nx - 4)
        if fine[int(cy * f), int(cx * f)] != 1:
            continue
        r = rng.uniform(2.0, 3.5)
        fine = np.where(((sy - cy) ** 2 + (sx - cx) ** 2 <= r * r) & (fine == 1), 4, fine)
    # Emission-free corner strip, whole pixels.
    strip = (np.arange(nx)[None, :] / nx + np.arange(ny)[:, None] / ny) < 0.45
    fine = np.where(np.repeat(np.repeat(strip, f, axis=0), f, axis=1), 0, fine)
    weights = np.stack([(fine == t).reshape(ny, f, nx, f).mean(axis=(1, 3)) for t in range(5)])
    truth = np.argmax(weights, axis=0).astype(np.int16)
    yy, xx = np.meshgrid(np.linspace(0, 1, ny), np.linspace(0, 1, nx), indexing="ij")

    lam = np.linspace(650.0, 1000.0, n_ch)
    edges = _edges(lam)
    e_lo, e_hi = HC_EV_NM / edges[1:], HC_EV_NM / edges[:-1]
    bright = brightness * (0.5 + yy)[..., None]
    e_mat = (1.60 + 0.04 * xx)[..., None]
    band = _line(e_lo, e_hi, e_mat, 0.090)
    spectra = [
        np.zeros_like(band),
        4e4 * band,
        3e4 * _line(e_lo, e_hi, (1.50 + 0.015 * xx)[..., None], 0.060) + 0.3 * 4e4 * band,
        0.35 * 4e4 * band + 6e3 * _line(e_lo, e_hi, 1.35, 0.160),
        2e4 * _line(e_lo, e_hi, 1.72, 0.030) + 0.5 * 4e4 * band,
    ]
    lam_pe = bright * sum(w[..., None] * s for w, s in zip(weights, spectra)) + 3.0
    gain, read, dark = 2.0, 6.0, 500.0
    counts = rng.poisson(lam_pe) / gain + rng.normal(0.0, read, lam_pe.shape) + dark
    cube = xr.DataArray(
        counts.astype(np.float32),
        dims=("y", "x", "wavelength"),
        coords={
            "y": ("y", 0.5 * np.arange(ny), {"units": "um"}),
            "x": ("x", 0.5 * np.arange(nx), {"units": "um"}),
            "wavelength": ("wavelength", lam, {"units": "nm"}),
        },
        name="intensity",
        attrs={"units": "counts", "gain_e_per_count": gain, "read_noise_counts": read,
               "dark_level_counts": dark, "wavelength_medium": "vacuum"},
    )
    names = ["no emission", "matrix band", "low-gap line", "grain boundary", "minority line"]
    return cube, truth, names


# ----------------------------------------------------------------------------- scoring


def _ari(truth, got):
    from sklearn.metrics import adjusted_rand_score

    # Hubert & Arabie, J. Classification 2, 193 (1985), via scikit-learn.
    return adjusted_rand_score(np.ravel(truth), np.ravel(got))


def background_purity(truth, got):
    """Share of the emission-free pixels (truth 0) that carry their most common label."""
    lab = np.ravel(got)[np.ravel(truth) == 0]
    return np.unique(lab, return_counts=True)[1].max() / lab.size if lab.size else 1.0


def minority_found(truth, got, m):
    """The minority's most common label is its own (no other truth region's most common
    label), holds more than half of it, and more than half of that label is the minority."""
    t, g = np.ravel(truth), np.ravel(got)
    sel = t == m
    vals, cnt = np.unique(g[sel], return_counts=True)
    lab = vals[np.argmax(cnt)]
    others = {np.unique(g[t == o], return_counts=True)[0][
        np.argmax(np.unique(g[t == o], return_counts=True)[1])] for o in np.unique(t) if o != m}
    recall = cnt.max() / sel.sum()
    precision = np.mean(t[g == lab] == m)
    return lab not in others and recall > 0.5 and precision > 0.5


#: The processing in front of the regions: the default pipeline's cleaning steps and
#: conversion, as ``pmap process`` runs them (no fit: regions do not need one).
def _pipeline():
    from pmap.pipeline import load_pipeline

    pipe = load_pipeline(None)
    pipe.fit = None
    pipe.output = {"figures": False, "keep_cube": False}
    return pipe


def _processed(cube):
    import pmap
    from pmap.pipeline import build_result

    _, proc = build_result(pmap.validate_cube(cube), _pipeline())
    return proc.compute()


# ----------------------------------------------------------------------------- tests


def test_four_types_through_process(tmp_path):
    """`pmap process --regions 4` and `--regions auto` on the four-type scene."""
    from pmap.pipeline import process

    cube, truth, _ = four_type_scene(0)
    for regions in (4, "auto"):
        out = tmp_path / f"r{regions}.zarr"
        res = process(cube, out, pipeline=_pipeline(), regions=regions, progress=False)
        got = res["region"].values
        # Targets of issue 12: ARI >= 0.95 with the true K, >= 0.9 with automatic K.
        assert _ari(truth, got) >= (0.95 if regions == 4 else 0.9)
        assert res["region"].attrs["k"] == 4
        # Among the emitting pixels alone (the measurement that found the gap: 0.57).
        em = truth > 0
        assert _ari(truth[em], got[em]) >= 0.9
        assert background_purity(truth, got) >= 0.99
        assert np.all(got[truth == 0] == -1)
        assert minority_found(truth, got, 4)
        # Names that say what each region emits, in the store and in the CSV.
        names = [str(v) for v in res["region_name"].values]
        assert all(" eV " in n and n.endswith("%") for n in names)
        assert any(n.startswith("1.72 eV") for n in names)  # the minority line
        csv = (tmp_path / f"r{regions}_regions.csv").read_text().splitlines()
        assert csv[0].split(",")[1] == "region_name"
        assert len(csv) == 5


def test_continuous_shift_is_one_region():
    """One emission type whose line drifts by twice its width across the map: one region."""
    rng = np.random.default_rng(3)
    ny, nx, n_ch = 40, 60, 200
    lam = np.linspace(650.0, 900.0, n_ch)
    edges = _edges(lam)
    e_lo, e_hi = HC_EV_NM / edges[1:], HC_EV_NM / edges[:-1]
    xx = np.linspace(0, 1, nx)[None, :, None] * np.ones((ny, 1, 1))
    centre = 1.50 + 0.16 * xx  # 160 meV drift, FWHM 80 meV
    lam_pe = 3e4 * _line(e_lo, e_hi, centre, 0.080) + 2.0
    counts = rng.poisson(lam_pe) + rng.normal(0, 4.0, lam_pe.shape) + 300.0
    cube = xr.DataArray(
        counts.astype(np.float32), dims=("y", "x", "wavelength"),
        coords={"y": ("y", np.arange(ny) * 1.0, {"units": "um"}),
                "x": ("x", np.arange(nx) * 1.0, {"units": "um"}),
                "wavelength": ("wavelength", lam, {"units": "nm"})},
        name="intensity",
        attrs={"units": "counts", "gain_e_per_count": 1.0, "read_noise_counts": 4.0,
               "dark_level_counts": 300.0, "wavelength_medium": "vacuum"},
    )
    from pmap.decomposition import segment

    region = segment(_processed(cube), n_regions="auto")
    assert region.attrs["k"] == 1
    assert np.all(region.values == 0)


def _scene_names():
    try:
        from pmap.scenes import scene_names
    except ImportError:  # the scene bank is another engineer's module
        return []
    return scene_names()


#: Scenes (name, or (name, seed)) where a target is not met yet, with the measured
#: numbers and why (see the issue-12 report): none. Marked xfail strict: a gap that
#: closes fails the run until it is taken off this list.
KNOWN_GAPS: dict[str | tuple[str, int], str] = {}

#: Seeds of the bank checked here (each scene's maps, noise and defects are redrawn).
#: 0-2: the seeds the method was developed on; 3 and 5 (and seed 4 of the QD film,
#: where the aggregates were found by a margin of 2 pixels): added after a check on
#: seeds nobody had tuned on found the QD film's 2 % aggregates missed on seed 5 (the
#: spatial-trend merge test took up a minority-vs-host difference between groups in
#: different places; see pmap.decomposition._merge.step_z). Seed 4 of the other
#: scenes and seeds 6-8 pass too (issue-12 report) but are left out for run time.
BANK_SEEDS = (0, 1, 2, 3, 5)
EXTRA_CASES = (("qd_film_size_gradient", 4),)


@pytest.fixture(scope="module")
def bank_cache():
    return {}


def _bank(name, seed, cache):
    """(processed cube, truth) of one scene, made once per module."""
    if (name, seed) not in cache:
        from pmap.scenes import make_scene

        scene = make_scene(name, seed=seed)
        cache[(name, seed)] = (_processed(scene.cube), scene.truth)
    return cache[(name, seed)]


def _regions(name, seed, n_regions, cache):
    """Region map of one scene for the true K or "auto", segmented once per module."""
    key = (name, seed, n_regions)
    if key not in cache:
        from pmap.decomposition import segment

        proc, truth = _bank(name, seed, cache)
        t = truth["region"].values
        k = len(np.unique(t[t > 0])) if n_regions == "true" else "auto"
        cache[key] = segment(proc, n_regions=k).values
    return cache[key]


def _cases():
    names = _scene_names()
    return [(n, s) for s in BANK_SEEDS for n in names] + [c for c in EXTRA_CASES if c[0] in names]


@pytest.mark.slow
@pytest.mark.parametrize(("name", "seed"), _cases())
def test_bank_scene_targets(name, seed, bank_cache, request):
    """Issue-12 targets on every scene of the bank (pmap.scenes), seeds BANK_SEEDS: ARI
    >= 0.95 with the true K and >= 0.9 with automatic K, background one label in
    >= 99 % of its pixels, every minority region (>= 2 % of the pixels) found."""
    gap = KNOWN_GAPS.get((name, seed), KNOWN_GAPS.get(name))
    if gap is not None:
        request.applymarker(pytest.mark.xfail(reason=gap, strict=True))
    truth = _bank(name, seed, bank_cache)[1]
    t = truth["region"].values
    minority = list(np.atleast_1d(truth.attrs.get("minority_regions", [])))
    for n_regions, floor in (("true", 0.95), ("auto", 0.9)):
        got = _regions(name, seed, n_regions, bank_cache)
        assert _ari(t, got) >= floor, (n_regions, _ari(t, got))
        assert background_purity(t, got) >= 0.99
        for m in minority:
            assert minority_found(t, got, int(m)), (n_regions, m)


@pytest.mark.slow
@pytest.mark.parametrize(("name", "seed"), _cases())
def test_bank_scene_floor(name, seed, bank_cache):
    """A guard against regressions even where a target is a known gap: ARI with the
    true K >= 0.75 and with automatic K >= 0.8, every minority found."""
    truth = _bank(name, seed, bank_cache)[1]
    t = truth["region"].values
    for n_regions, floor in (("true", 0.75), ("auto", 0.8)):
        got = _regions(name, seed, n_regions, bank_cache)
        assert _ari(t, got) >= floor
        for m in np.atleast_1d(truth.attrs.get("minority_regions", [])):
            assert minority_found(t, got, int(m))
