"""No-signal detection with a known false-alarm rate (issue 12, item 2).

Cubes are drawn here from the detector model (Poisson photoelectrons / gain + normal
read noise + dark level; photon transfer, Janesick, *Photon Transfer*, SPIE 2007).
The false-alarm bound is the Bonferroni inequality (P(max_j T_j > z) ≤ Σ_j P(T_j > z),
common practice); counts of flagged pixels are compared with the binomial
expectation α·n plus 3 binomial standard errors.
"""

from __future__ import annotations

import numpy as np
import pytest

import pmap
import pmap.spectral

LAM = np.linspace(700.0, 800.0, 512)


def _cube(mu_e, gain=1.0, read=3.0, dark=100.0, seed=0):
    rng = np.random.default_rng(seed)
    counts = rng.poisson(mu_e) / gain + rng.normal(0.0, read, mu_e.shape) + dark
    return pmap.make_cube(
        counts.astype(np.float32), wavelength_nm=LAM, units="counts",
        attrs={"gain_e_per_count": gain, "read_noise_counts": read, "dark_level_counts": dark,
               "wavelength_medium": "vacuum"},
    )


@pytest.mark.parametrize("bg_e, gain, read", [(0.5, 1.0, 3.0), (20.0, 2.5, 4.0),
                                              (300.0, 1.0, 3.0)])
def test_false_alarm_rate_on_pure_noise(bg_e, gain, read):
    n = 20000
    alpha = 1e-3
    ds = pmap.spectral.detect_signal(_cube(np.full((100, 200, LAM.size), bg_e), gain, read,
                                           seed=int(bg_e)), false_alarm=alpha).compute()
    flagged = int(ds.signal.sum())
    assert flagged <= alpha * n + 3 * np.sqrt(alpha * n), flagged
    assert ds.attrs["false_alarm"] == alpha and ds.attrs["threshold_sigma"] > 4


@pytest.mark.parametrize("bg_e, fwhm_nm", [(5.0, 1.5), (5.0, 7.0), (200.0, 7.0),
                                           (50.0, 10.0)])
def test_detects_lines_of_matched_snr_8(bg_e, fwhm_nm):
    # matched-filter SNR ρ = sqrt(Σ s_i² / var_i) (Kay, Detection Theory, 1998, ch. 4):
    # the line's area is set so that ρ = 8 for the detector's variance per channel
    shape = np.exp(-0.5 * ((LAM - 752.3) / (fwhm_nm / 2.3548)) ** 2)
    shape /= shape.sum()
    var_e = bg_e + 3.0**2  # in electrons² at gain 1
    area = 8.0 / np.sqrt(np.sum(shape**2 / (var_e + 0 * shape)))
    for _ in range(3):  # include the line's own shot noise
        area = 8.0 / np.sqrt(np.sum(shape**2 / (var_e + area * shape)))
    mu = bg_e + area * shape[None, None, :] * np.ones((40, 50, 1))
    ds = pmap.spectral.detect_signal(_cube(mu, seed=7)).compute()
    n = ds.signal.size  # 2000 pixels
    rate = float(ds.signal.mean())
    assert rate >= 0.95, f"{rate:.3f} of {n} detected"


def test_option_changes_the_threshold():
    cube = _cube(np.full((4, 5, LAM.size), 10.0))
    a = pmap.spectral.detect_signal(cube, false_alarm=1e-2)
    b = pmap.spectral.detect_signal(cube, false_alarm=1e-4)
    assert a.attrs["threshold_sigma"] < b.attrs["threshold_sigma"]
    with pytest.raises(pmap.errors.StepError):
        pmap.spectral.detect_signal(cube, false_alarm=2.0)


@pytest.mark.parametrize("name", __import__("pmap.scenes", fromlist=["scene_names"]).scene_names())
def test_emitting_pixels_of_every_scene_are_found(name):
    # the scene bank's truth says which pixels emit; spikes removed and bad values
    # masked first, as in the default pipeline
    from pmap.scenes import make_scene

    sc = make_scene(name)
    c = pmap.remove_spikes(pmap.mask_bad_pixels(pmap.attach_noise_model(sc.cube)))
    det = pmap.spectral.detect_signal(c).compute()
    emit = sc.truth["signal"].values & (sc.truth["bad_pixel"].values == 0)
    assert float(det.signal.values[emit].mean()) >= 0.95


def test_false_alarm_rate_under_curved_stray_light():
    """The stated false-alarm probability on pure noise over a smooth, curved stray
    light (quadratic in the channel index, 20 to 40 e-/channel; no emission anywhere):
    flagged pixels within α·n + 3 binomial s.e. (n = 5000, α = 1e-3: at most 11).
    With a straight baseline 26.3 % were flagged; the map's continuum as baseline
    (default ``continuum="auto"``) restores the rate. More in test_detect_continuum."""
    n, alpha = 5000, 1e-3
    u = (LAM - LAM[0]) / (LAM[-1] - LAM[0])
    mu = np.broadcast_to(20.0 * (1.0 + u**2), (50, 100, LAM.size)).copy()
    ds = pmap.spectral.detect_signal(_cube(mu, seed=1), false_alarm=alpha).compute()
    flagged = int(ds.signal.sum())
    assert flagged <= alpha * n + 3 * np.sqrt(alpha * n), flagged
    assert ds.attrs["continuum_rank"] >= 1
    line = pmap.spectral.detect_signal(_cube(mu, seed=1), false_alarm=alpha, continuum="line")
    assert int(line.signal.sum().compute()) > 0.1 * n  # the straight line alone: the old gap


def test_tabled_box_scan_is_bit_identical_to_the_row_kernel():
    """box_scan_max (box terms tabled once per call) returns the statistics of the
    untabled compiled kernel bit for bit: noise and lines, several lengths and widths."""
    from _detect_reference import scan_rows

    from pmap.spectral._detect import box_scan_max, box_scan_plan

    rng = np.random.default_rng(4)
    for n in (512, 301, 64, 9, 4):
        z = rng.standard_normal((500, n))
        z[::3] += 6.0 * np.exp(-0.5 * ((np.arange(n) - n / 3) / 3.0) ** 2)
        for min_width in (2, 5):
            plan = box_scan_plan(n, min_width)
            widths = np.array([w for w, _ in plan], dtype=np.int64)
            strides = np.array([s for _, s in plan], dtype=np.int64)
            np.testing.assert_array_equal(box_scan_max(z, plan), scan_rows(z, widths, strides))
