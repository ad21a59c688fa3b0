"""Multi-peak fits that say what happened (issue 11, item 5).

Spectra are made here with scipy's exact Voigt profile (scipy.special.voigt_profile),
averaged over each channel by 9-point sampling, with Poisson counts plus Gaussian read
noise: nothing of pmap's own line shapes is used to make the data.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.special import voigt_profile

import pmap

E = np.linspace(1.40, 1.80, 400)
STEP = E[1] - E[0]
EDGES = np.concatenate([[E[0] - STEP / 2], E[:-1] + STEP / 2, [E[-1] + STEP / 2]])
SUB = EDGES[:-1] + STEP * ((np.arange(9) + 0.5) / 9)[:, None]  # 9 points per channel
SIG, GAM = 0.012, 0.008  # eV: Gaussian σ and Lorentzian HWHM
# Voigt FWHM (Olivero & Longbothum, JQSRT 17, 233 (1977), 0.02 % accurate)
F_L, F_G = 2 * GAM, 2 * np.sqrt(2 * np.log(2)) * SIG
FWHM_V = 0.5346 * F_L + np.sqrt(0.2166 * F_L**2 + F_G**2)
DARK, READ = 100.0, 3.0


def _line(c, area):
    """Channel-averaged Voigt density (counts/eV) × channel width = counts per channel."""
    v = voigt_profile(SUB[None, None] - c[..., None, None], SIG, GAM).mean(axis=2)
    return area * v * STEP


def _detected(mu, rng):
    """Counts from expected photoelectrons: Poisson + dark level + Gaussian read noise."""
    counts = rng.poisson(mu) + DARK + rng.normal(0.0, READ, mu.shape)
    return pmap.make_cube(
        counts.astype(np.float32), energy_ev=E, units="counts",
        attrs={"gain_e_per_count": 1.0, "read_noise_counts": READ, "dark_level_counts": DARK},
    )


def _two_line_cube(total, frac, sep_fwhm=1.0, shape=(30, 40), seed=0):
    rng = np.random.default_rng(seed)
    c1 = 1.58 + 0.01 * rng.standard_normal(shape)
    c2 = c1 + sep_fwhm * FWHM_V
    mu = _line(c1, total * (1 - frac)) + _line(c2, total * frac) + 20.0
    return _detected(mu, rng), c1, c2


def _one_line_cube(shape, seed):
    rng = np.random.default_rng(seed)
    c1 = 1.60 + 0.005 * rng.standard_normal(shape)
    return _detected(_line(c1, 3e4) + 20.0, rng), c1


def _fit(cube, peaks):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", pmap.errors.PmapNotice)
        c = pmap.attach_noise_model(cube)
        c = pmap.to_energy(pmap.remove_baseline(c, method="constant", window="edges"))
        return pmap.fit_peaks(c, model="voigt", peaks=peaks).compute()


@pytest.mark.parametrize("total, frac", [(6e4, 0.3), (2.5e5, 0.1)])
def test_two_voigt_lines_one_fwhm_apart(total, frac):
    # issue 11 target: both ≥ 10 % of the area, moderate counts (peaks ~1000 and ~5000
    # counts here): both energies within 2 meV in ≥ 95 % of pixels, ≥ 95 % converged
    cube, c1, c2 = _two_line_cube(total, frac, seed=int(total) % 97)
    r = _fit(cube, 2)
    n = c1.size  # 1200 pixels
    st = r.fit_status.values
    assert np.mean(st == 0) >= 0.95
    pe = r.peak_energy.values
    both = (np.abs(pe[0] - c1) < 0.002) & (np.abs(pe[1] - c2) < 0.002)
    assert np.mean(both) >= 0.95, f"{np.mean(both):.3f} of {n} pixels within 2 meV"
    # and the error bars are honest: pull s.d. 1 ± 3 s.e., s.e. = 1/sqrt(2(n-1))
    tol = 3.0 / np.sqrt(2 * (n - 1))
    for k, truth in ((0, c1), (1, c2)):
        pull = (pe[k] - truth) / r.peak_energy_err.values[k]
        assert abs(np.nanstd(pull) - 1.0) <= tol, (k, np.nanstd(pull))
    assert np.all(r.peak_status.values[:, st == 0] == 0)
    assert r.chi2_red.attrs["units"] == "1"
    assert abs(np.nanmedian(r.chi2_red.values) - 1.0) < 0.05


def test_spurious_component_keeps_the_good_peak():
    # one real line fitted with two peaks: the second has nothing to fit. It must not
    # discard the real one (the pixel stays usable, the spurious peak alone is dropped).
    cube, c1 = _one_line_cube((20, 20), seed=4)
    r = _fit(cube, 2)
    pst = r.peak_status.values  # (peak, y, x)
    real = np.abs(r.peak_energy.values - c1[None]) < 0.003
    # in ≥ 95 % of pixels one peak is the real line, with a usable status and value
    usable = np.any(real & np.isin(pst, (0, 1, 2)), axis=0)
    assert np.mean(usable) >= 0.95
    # where a component was dropped (status 3 or 6), the pixel is still a fit, not NaN
    dropped = np.any(np.isin(pst, (3, 6)), axis=0)
    assert np.all(np.isin(r.fit_status.values[dropped], (0, 1, 2)))
    assert np.all(np.isfinite(np.nanmin(r.peak_energy.values, axis=0)[dropped]))


def test_bic_says_where_two_peaks_are_warranted():
    # Schwarz, Ann. Stat. 6, 461 (1978): lower BIC = preferred model
    cube2, _, _ = _two_line_cube(6e4, 0.3, shape=(15, 20), seed=3)
    b1, b2 = _fit(cube2, 1).bic.values, _fit(cube2, 2).bic.values
    assert np.mean(b2 < b1) >= 0.95
    cube1, _ = _one_line_cube((15, 20), seed=5)
    one, two = _fit(cube1, 1), _fit(cube1, 2)
    # where the two-peak fit ended with both peaks, its extra parameters must not pay
    # for themselves in most pixels (BIC penalty 4 ln n ≈ 24 against Δχ² ~ χ²_4)
    assert np.mean(one.bic.values < two.bic.values) >= 0.9
    assert one.bic.attrs["units"] == "1"


def _crossing_cube(seed=21, shape=(20, 30)):
    """Two resolved lines (2.5 FWHM apart) whose brighter one changes across the map (the
    second carries 25-75 % of the area), shifting together by ±10 meV."""
    rng = np.random.default_rng(seed)
    c1 = 1.55 + 0.010 * rng.uniform(-1.0, 1.0, shape)
    c2 = c1 + 2.5 * FWHM_V
    frac = rng.uniform(0.25, 0.75, shape)
    mu = _line(c1, 1e5 * (1 - frac)[..., None]) + _line(c2, 1e5 * frac[..., None]) + 20.0
    return _detected(mu, rng), c1, c2


def test_two_lines_whose_heights_cross():
    # the pixel's maximum jumps from one line to the other where their heights cross;
    # each line must still end on its own peak, with honest error bars. n = 600 pixels
    cube, c1, c2 = _crossing_cube()
    r = _fit(cube, 2)
    n = c1.size
    st = r.fit_status.values
    assert np.mean(st == 0) >= 0.98, np.bincount(st.ravel())
    assert np.all(r.peak_status.values[:, st == 0] == 0)
    pe = r.peak_energy.values
    both = (np.abs(pe[0] - c1) < 0.002) & (np.abs(pe[1] - c2) < 0.002)
    assert np.mean(both) >= 0.98, f"{np.mean(both):.3f} of {n} pixels within 2 meV"
    # honest error bars: pull s.d. 1 ± 3 s.e., s.e. = 1/sqrt(2(n-1))
    tol = 3.0 / np.sqrt(2 * (n - 1))
    for k, truth in ((0, c1), (1, c2)):
        pull = (pe[k] - truth) / r.peak_energy_err.values[k]
        assert abs(np.nanstd(pull) - 1.0) <= tol, (k, np.nanstd(pull))
    # started near the answer: a few Levenberg-Marquardt iterations, none at the limit
    assert np.median(r.n_iter.values) <= 8 and np.all(r.n_iter.values < 100)


def test_crossing_lines_start_close_no_wasted_refits(monkeypatch):
    # the work of a multi-peak fit is its Levenberg-Marquardt iterations, all starts and
    # refits included. The template placed by cross-correlation with linear areas starts
    # each pixel near its answer whichever line is brighter; anchoring it at the pixel's
    # maximum put it a whole line spacing off in about half the pixels (mean 42
    # iterations, 18 % at the limit of 100, then refitted). n = 600 pixels
    from pmap.fitting import _fit as F

    total = {"iters": 0, "calls": 0}
    run = F._run

    def counting(Y, spec, P0, *a, **k):
        out = run(Y, spec, P0, *a, **k)
        if P0.shape[0] > 1:  # per-pixel fits (the template fits one mean spectrum)
            total["iters"] += int(out[4].sum())
            total["calls"] += 1
        return out

    monkeypatch.setattr(F, "_run", counting)
    cube, c1, c2 = _crossing_cube(seed=22)
    r = _fit(cube, 2)
    assert np.mean(r.fit_status.values == 0) >= 0.98
    assert total["iters"] / c1.size <= 8.0, total
    pe = r.peak_energy.values
    both = (np.abs(pe[0] - c1) < 0.002) & (np.abs(pe[1] - c2) < 0.002)
    assert np.mean(both) >= 0.98
