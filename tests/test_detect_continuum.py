"""The emission test over the map's own continuum (issue 12, item 2; pmap.spectral._continuum).

Cubes are drawn from the detector model (Poisson photoelectrons / gain + normal read
noise + dark level; photon transfer, Janesick, *Photon Transfer*, SPIE 2007). False
alarms are counted against the binomial expectation α·n + 3 binomial s.e. (the
Bonferroni bound, common practice); detection at matched-filter SNR ρ = 8 (Kay,
*Fundamentals of Statistical Signal Processing: Detection Theory*, 1998, ch. 4).
"""

from __future__ import annotations

import numpy as np
import pytest

import pmap
import pmap.spectral
from pmap.scenes import make_scene, scene_names

LAM = np.linspace(700.0, 800.0, 512)
U = (LAM - LAM[0]) / (LAM[-1] - LAM[0])
ALPHA = 1e-3


def _cube(mu_e, gain=1.0, read=3.0, dark=100.0, seed=0):
    rng = np.random.default_rng(seed)
    counts = rng.poisson(mu_e) / gain + rng.normal(0.0, read, mu_e.shape) + dark
    return pmap.make_cube(
        counts.astype(np.float32), wavelength_nm=LAM, units="counts",
        attrs={"gain_e_per_count": gain, "read_noise_counts": read, "dark_level_counts": dark,
               "wavelength_medium": "vacuum"},
    )


def _area_for_snr8(shape, bg_e, read=3.0):
    """Line area (e-) with matched-filter SNR 8 over bg_e e-/channel, own shot noise included."""
    var = bg_e + read**2
    area = 8.0 / np.sqrt(np.sum(shape**2 / var))
    for _ in range(4):
        area = 8.0 / np.sqrt(np.sum(shape**2 / (var + area * shape)))
    return area


def _bound(n):
    return ALPHA * n + 3.0 * np.sqrt(ALPHA * n)


def test_laser_tail_that_triples_across_the_map():
    """Stray light 40·exp(−u/0.3) + 5 e-/channel whose amplitude grows ×3 from left to
    right, no emission (n = 6000): false alarms within the binomial bound; a straight
    baseline flags every pixel."""
    ny, nx = 60, 100
    amp = np.linspace(1.0, 3.0, nx)[None, :, None]
    mu = np.broadcast_to(amp * (40.0 * np.exp(-U / 0.3) + 5.0), (ny, nx, LAM.size))
    cube = _cube(mu.copy(), seed=3)
    det = pmap.spectral.detect_signal(cube, false_alarm=ALPHA).compute()
    assert int(det.signal.sum()) <= _bound(ny * nx), int(det.signal.sum())
    assert det.attrs["continuum_rank"] >= 1 and "continuum" in det.attrs["continuum_note"]
    line = pmap.spectral.detect_signal(cube, false_alarm=ALPHA, continuum="line").compute()
    assert float(line.signal.mean()) > 0.9


@pytest.mark.parametrize("fwhm_nm, found", [(3.0, 0.95), (10.0, 0.95), (20.0, 0.70)])
def test_lines_of_snr_8_are_still_found_over_stray_light(fwhm_nm, found):
    """Half of the map (n = 1500 pixels) emits a line of matched SNR 8 (FWHM 3, 10 and
    20 nm on a 100 nm window) over the same tripling laser tail: ≥ 95 % of emitters
    found up to 10 % of the window, false alarms on the other half (n = 1500) within
    the binomial bound. A 20 nm band overlaps the continuum's shape and loses part of
    its excess (measured 78.5 %; the bound 0.70 is below it by more than 3 binomial
    s.e., 0.032): it must not be taken into the continuum (it was, 0.1 % found, when
    the basis could grow from every passing spectrum)."""
    ny, nx = 30, 100
    amp = np.linspace(1.0, 3.0, nx)[None, :, None]
    bg = amp * (40.0 * np.exp(-U / 0.3) + 5.0)
    shape = np.exp(-0.5 * ((LAM - 752.3) / (fwhm_nm / 2.3548)) ** 2)
    shape /= shape.sum()
    # the SNR is set against the brightest stray light under the line (the hardest case)
    area = _area_for_snr8(shape, float(np.max(bg[..., np.argmax(shape)])))
    emit = np.zeros((ny, nx), bool)
    emit[::2] = True  # every other row: both halves see the whole stray-light range
    mu = np.broadcast_to(bg, (ny, nx, LAM.size)) + area * shape * emit[..., None]
    det = pmap.spectral.detect_signal(_cube(mu, seed=11), false_alarm=ALPHA).compute()
    sig = det.signal.values
    assert float(sig[emit].mean()) >= found, float(sig[emit].mean())
    assert int(sig[~emit].sum()) <= _bound(int((~emit).sum())), int(sig[~emit].sum())


def test_a_map_that_emits_everywhere_keeps_the_straight_baseline():
    """Every pixel emits a broad band (FWHM 20 % of the window, matched SNR 8, n = 2000):
    the quietest spectra hold the band, which is not a convex continuum, so no
    continuum is taken (it would hide the band) and ≥ 95 % are found, as with the line."""
    shape = np.exp(-0.5 * ((LAM - 750.0) / (20.0 / 2.3548)) ** 2)
    shape /= shape.sum()
    area = _area_for_snr8(shape, 10.0)
    mu = np.broadcast_to(10.0 + area * shape, (40, 50, LAM.size)).copy()
    det = pmap.spectral.detect_signal(_cube(mu, seed=5)).compute()
    assert det.attrs["continuum_rank"] == 0
    assert float(det.signal.mean()) >= 0.95, float(det.signal.mean())


def test_continuum_option_is_checked():
    cube = _cube(np.full((4, 5, LAM.size), 10.0))
    with pytest.raises(pmap.errors.StepError):
        pmap.spectral.detect_signal(cube, continuum="poly")


@pytest.mark.parametrize("name", scene_names())
@pytest.mark.parametrize("seed", [0, 4])
def test_background_of_every_scene_keeps_the_rate(name, seed):
    """On every scene of the bank (their backgrounds: laser tails, thermal glow, stray
    light that varies across the map), the true no-emission pixels are flagged within
    the binomial bound and ≥ 95 % of the emitting pixels are found. Spikes are masked
    by the scene's truth, so this checks the detection test alone (the pipeline's own
    spike removal is tested in test_spectral_spikes)."""
    sc = make_scene(name, seed=seed)
    c = pmap.mask_bad_pixels(pmap.attach_noise_model(sc.cube))
    c = c.where(~sc.truth["spike_mask"].transpose(*c.dims).values)
    det = pmap.spectral.detect_signal(c, false_alarm=ALPHA).compute()
    good = sc.truth["bad_pixel"].values == 0
    bg = (sc.truth["region"].values == 0) & good
    emit = sc.truth["signal"].values & good
    sig = det.signal.values
    assert int(sig[bg].sum()) <= _bound(int(bg.sum())), (int(sig[bg].sum()), int(bg.sum()))
    assert float(sig[emit].mean()) >= 0.95


def test_basis_scan_with_line_only_equals_the_line_scan():
    """Two implementations of the same statistic: the general basis scan with the basis
    {1, x} against the straight-line scan (closed-form hat matrix of {1, x}), on
    n = 500 noise spectra of 512 channels: equal to rounding."""
    from pmap.spectral import _continuum as C
    from pmap.spectral._detect import box_scan_max, box_scan_plan

    Z = np.random.default_rng(2).standard_normal((500, 512))
    plan = box_scan_plan(512, 2)
    w = np.array([p[0] for p in plan], dtype=np.int64)
    s = np.array([p[1] for p in plan], dtype=np.int64)
    np.testing.assert_allclose(C.scan_rows_basis(Z, C.orthonormal_basis(512), w, s),
                               box_scan_max(Z, plan), rtol=0, atol=1e-10)
