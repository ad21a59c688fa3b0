"""Region names say what a region emits (issue 12, item 3): the main peak and the other
peaks that stand out, never noise ripples on the top of a broad band.

Ground truth: spectra built here from Gaussians of stated centres and widths plus white
noise of stated s.d. (common practice). A peak "stands out" by its topographic
prominence (the height above the higher of the two lowest points separating it from a
higher peak; definition as in ``scipy.signal.peak_prominences``, common practice).
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from pmap.decomposition._emission import describe_spectrum


def _gauss(e, e0, sigma):
    return np.exp(-0.5 * ((e - e0) / sigma) ** 2)


def _positions(text: str) -> list[float]:
    return [float(v) for v in re.findall(r"(\d+\.\d+) eV", text)]


E = np.linspace(1.2, 1.7, 400)  # eV, 1.25 meV channels


@pytest.mark.parametrize("seed", range(20))
def test_broad_band_with_noise_is_one_peak(seed):
    """A main band plus a broad defect band (σ = 60 meV, 30 % of the main one) with
    noise at 1 % of the main peak: exactly two positions named, each within 15 meV (a
    quarter of the band's σ) of the noiseless spectrum's maxima (n = 20 noise draws; before the prominence rule a ripple on the broad
    band's top was named as a third peak, e.g. "1.38 eV + 1.39 eV")."""
    rng = np.random.default_rng(seed)
    y = _gauss(E, 1.50, 0.019) + 0.3 * _gauss(E, 1.38, 0.06) + rng.normal(0, 0.01, E.size)
    text, pos, _ = describe_spectrum(y, E, "energy", "eV")
    got = _positions(text)
    assert len(got) == 2, text
    clean = _gauss(E, 1.50, 0.019) + 0.3 * _gauss(E, 1.38, 0.06)
    inner = np.flatnonzero((clean[1:-1] > clean[:-2]) & (clean[1:-1] > clean[2:])) + 1
    want = sorted(E[inner], key=lambda v: -clean[np.searchsorted(E, v)])
    assert abs(got[0] - want[0]) <= 0.015 and abs(got[1] - want[1]) <= 0.015, text
    assert text.startswith("1.50 eV band")


def test_separate_lines_are_all_named():
    """Three well-separated lines of 100 %, 60 % and 40 %: all three named, strongest first."""
    y = _gauss(E, 1.45, 0.01) + 0.6 * _gauss(E, 1.30, 0.01) + 0.4 * _gauss(E, 1.60, 0.01)
    text, pos, fwhm = describe_spectrum(y, E, "energy", "eV")
    assert _positions(text) == [1.45, 1.30, 1.60], text
    assert text.startswith("1.45 eV line")
    # FWHM of a Gaussian = 2·sqrt(2 ln 2)·σ (common practice); the half-maximum crossings
    # are read on the channel grid after a σ = 1.5-channel smoothing: within 3 channels
    assert fwhm == pytest.approx(2.3548 * 0.01, abs=3 * (E[1] - E[0]))


def test_shoulder_below_a_quarter_is_not_named():
    """A second line at 15 % of the main one is below the 25 % rule: not named."""
    y = _gauss(E, 1.45, 0.01) + 0.15 * _gauss(E, 1.30, 0.01)
    text, _, _ = describe_spectrum(y, E, "energy", "eV")
    assert _positions(text) == [1.45], text


def test_regions_at_one_energy_are_told_apart_by_width():
    """Three regions emitting at 1.45 eV with FWHMs of 60, 90 and 200 meV: each name
    carries its FWHM (within 3 channels, read on the channel grid after the σ = 1.5
    channel smoothing), so a broad band is not described like the main film."""
    from pmap.decomposition._emission import region_descriptions

    fw = (0.060, 0.090, 0.200)
    means = [_gauss(E, 1.45, f / 2.3548) for f in fw]
    names = region_descriptions(means, [1.0, 1.0, 2.0], E, "energy", "eV")
    for name, f in zip(names, fw):
        got = float(re.search(r"FWHM (\d+) meV", name).group(1)) / 1000
        assert got == pytest.approx(f, abs=3 * (E[1] - E[0])), name
    assert names[2].endswith("bright") and "dim (0.5x)" in names[0]


def test_same_width_regions_differ_by_brightness_only():
    """Two regions with the same 1.45 eV band, one 4x brighter: no width in the names
    (widths agree within 15 %), and the dim one says 0.25x."""
    from pmap.decomposition._emission import region_descriptions

    m = _gauss(E, 1.45, 0.03)
    names = region_descriptions([m, 4 * m], [1.0, 4.0], E, "energy", "eV")
    assert names == ["1.45 eV band, dim (0.25x)", "1.45 eV band, bright"], names
