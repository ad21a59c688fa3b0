"""Line shapes, widths and the numba models against scipy and published values."""

import numpy as np
import pytest
from scipy import stats
from scipy.special import voigt_profile, wofz

from pmap.fitting import _kernels as K
from pmap.fitting import (
    gaussian,
    lorentzian,
    pseudo_voigt,
    pseudo_voigt_tch,
    split_gaussian,
    voigt,
    voigt_fwhm,
    voigt_widths,
)

E = np.linspace(1.2, 1.8, 601)
F2S = 1 / (2 * np.sqrt(2 * np.log(2)))


def test_gaussian_matches_scipy_norm():
    # reference: scipy.stats.norm.pdf (σ = FWHM / (2 sqrt(2 ln 2)), common practice)
    ref = 3.0 * stats.norm.pdf(E, loc=1.5, scale=0.05 * F2S)
    np.testing.assert_allclose(gaussian(E, 1.5, 0.05, 3.0), ref, rtol=1e-12)


def test_lorentzian_matches_scipy_cauchy():
    # reference: scipy.stats.cauchy.pdf with scale = HWHM
    ref = 2.0 * stats.cauchy.pdf(E, loc=1.45, scale=0.02)
    np.testing.assert_allclose(lorentzian(E, 1.45, 0.04, 2.0), ref, rtol=1e-12)


def test_voigt_matches_scipy_and_docs_value():
    # scipy docs: voigt_profile(2, 1, 1) = 0.09071519942627544
    fg = 1.0 / F2S  # σ = 1
    assert voigt(2.0, 0.0, fg, 2.0) == pytest.approx(0.09071519942627544, rel=1e-14)
    ref = voigt_profile(E - 1.5, 0.02, 0.01)
    np.testing.assert_allclose(voigt(E, 1.5, 0.02 / F2S, 0.02), ref, rtol=1e-12)


def test_voigt_fwhm_olivero_longbothum():
    # Olivero & Longbothum, JQSRT 17, 233 (1977): exact f_V = 1.637595 for f_G = f_L = 1
    assert voigt_fwhm(1.0, 1.0) == pytest.approx(1.637595, abs=1e-6)
    # their approximation 0.5346 f_L + sqrt(0.2166 f_L^2 + f_G^2) is within 0.03 % of exact
    fg, fl = np.meshgrid(np.linspace(0.05, 2, 9), np.linspace(0.0, 2, 9))
    exact = voigt_fwhm(fg, fl)
    np.testing.assert_allclose(voigt_fwhm(fg, fl, method="olivero"), exact, rtol=3e-4)
    # limits: pure Gaussian / pure Lorentzian (definition of FWHM, common practice)
    assert voigt_fwhm(0.3, 0.0) == pytest.approx(0.3, rel=1e-9)
    assert voigt_fwhm(0.0, 0.3) == pytest.approx(0.3, rel=1e-9)


def test_voigt_widths_roundtrip_total_fwhm():
    # the fit parametrisation (total FWHM, f_L/f_V) must give back the total FWHM
    # (Olivero & Longbothum 1977, within their 0.03 %)
    for rho in (0.0, 0.3, 0.7, 0.95):
        fg, fl = voigt_widths(0.05, rho)
        assert voigt_fwhm(fg, fl) == pytest.approx(0.05, rel=3e-4)


def test_pseudo_voigt_tch_values():
    # Thompson, Cox & Hastings, J. Appl. Cryst. 20, 79 (1987): Γ_G = Γ_L = 1
    big, eta = pseudo_voigt_tch(1.0, 1.0)
    assert big == pytest.approx(1.634643, abs=2e-6)
    assert eta == pytest.approx(0.682539, abs=2e-6)
    # pV built from TCH differs from the exact Voigt by ≲1.3 % of the height (TCH 1987)
    fg = fl = 0.03
    v = voigt(E, 1.5, fg, fl)
    pv = pseudo_voigt(E, 1.5, big * 0.03, eta)
    assert np.max(np.abs(pv - v)) / v.max() < 0.013


def test_split_gaussian_maximum_fwhm_area():
    # definition check: max at centre, FWHM exact, area as documented (common practice)
    e = np.linspace(1.0, 2.0, 200001)
    y = split_gaussian(e, 1.5, 0.08, -0.4, 2.0)
    assert e[np.argmax(y)] == pytest.approx(1.5, abs=1e-5)
    above = e[y >= y.max() / 2]
    assert above[-1] - above[0] == pytest.approx(0.08, abs=2e-5)
    assert np.trapezoid(y, e) == pytest.approx(2.0, rel=1e-8)
    # low-energy tail: more weight below the maximum for a < 0
    assert np.trapezoid(y[e < 1.5], e[e < 1.5]) > 1.0


def test_weideman_faddeeva_accuracy():
    # Weideman, SIAM J. Numer. Anal. 31, 1497 (1994), N = 16, against scipy.special.wofz
    zr, zi = np.meshgrid(np.linspace(-30, 30, 601), np.geomspace(1e-4, 30, 60))
    ref = wofz(zr + 1j * zi)
    got = K.faddeeva_approx(zr.ravel(), zi.ravel()).reshape(zr.shape)
    rel_to_peak = np.abs(got - ref) / np.abs(wofz(1j * zi[:, :1]))
    assert rel_to_peak.max() < 1e-6
    # the channel-vectorised form the fit uses, one row of constant Im z at a time
    for j in range(zi.shape[0]):
        wr, wi = K._faddeeva_row(zr[j], 0.0, 1.0, zi[j, 0])
        assert np.max(np.abs(wr + 1j * wi - ref[j])) < 1e-6 * np.abs(wofz(1j * zi[j, 0]))


def test_compiled_exponential_against_numpy():
    # the fit's branch-free exp(t), t <= 0, in a vectorised loop as the fit runs it,
    # against numpy's exp (libm); exact at t = k*ln2 rounded to double (IEEE-754
    # doubles: 2**k is exact for k >= -1022, common practice)
    import numba as nb

    @nb.njit(fastmath=K.FM)
    def row(t):
        out = np.empty_like(t)
        for i in range(t.size):
            out[i] = K._exp_neg(t[i])
        return out

    t = -np.concatenate([np.linspace(0.0, 708.0, 200_001), np.arange(0, 1022) * np.log(2.0)])
    got, ref = row(t), np.exp(t)
    assert np.max(np.abs(got / ref - 1.0)) < 1e-13  # the docstring's bound
    k = np.arange(0, 1022)
    assert np.max(np.abs(got[-k.size:] / 2.0 ** -k - 1.0)) < 1e-13
    assert row(np.array([-800.0]))[0] == pytest.approx(np.exp(-708.0), rel=1e-13)  # clamp


@pytest.mark.parametrize("model", list(K.MODEL_CODES))
def test_kernel_model_and_jacobian(model):
    # the numba model must equal the exact numpy/scipy definitions; Jacobian vs central
    # differences (common practice)
    code = K.MODEL_CODES[model]
    npp = K.N_PEAK_PARAMS[code]
    pk1 = [1.45, 0.05, 2.0, 0.3][:npp]
    pk2 = [1.52, 0.04, 1.0, -0.2 if model == "split_gaussian" else 0.6][:npp]
    p = np.array(pk1 + pk2 + [0.5, 1.2])
    x = np.linspace(1.3, 1.7, 300)
    f, J = np.empty(x.size), np.zeros((x.size, p.size))
    K.eval_model(code, x, 1.5, p, 2, 2, f, J, True)
    ref = 0.5 + 1.2 * (x - 1.5)
    for c, w, a, *s in (pk1, pk2):
        if model == "gaussian":
            ref = ref + gaussian(x, c, w, a)
        elif model == "lorentzian":
            ref = ref + lorentzian(x, c, w, a)
        elif model == "pseudo_voigt":
            ref = ref + pseudo_voigt(x, c, w, s[0], a)
        elif model == "split_gaussian":
            ref = ref + split_gaussian(x, c, w, s[0], a)
        else:
            ref = ref + voigt(x, c, *voigt_widths(w, s[0]), a)
    np.testing.assert_allclose(f, ref, rtol=0, atol=1e-6 * f.max())
    Jn = np.zeros_like(J)
    for j in range(p.size):
        h = 1e-6 * max(abs(p[j]), 1e-3)
        fp, fm = np.empty(x.size), np.empty(x.size)
        pp, pm = p.copy(), p.copy()
        pp[j] += h
        pm[j] -= h
        K.eval_model(code, x, 1.5, pp, 2, 2, fp, J[:0], False)
        K.eval_model(code, x, 1.5, pm, 2, 2, fm, J[:0], False)
        Jn[:, j] = (fp - fm) / (2 * h)
    assert np.max(np.abs(J - Jn)) / np.max(np.abs(J)) < 1e-5
