"""Line shapes on the photon-energy axis, parametrised by centre, FWHM and area.

Every line shape here is normalised to unit area, so ``area`` is the integrated
intensity of the band (intensity·eV) and ``centre``/``fwhm`` are in eV. These are
the exact numpy/scipy definitions; the fitting kernels in :mod:`._kernels` use
the same definitions (the Voigt through a rational Faddeeva approximation).
"""

from __future__ import annotations

import numpy as np
from scipy.special import voigt_profile, wofz

from ..errors import StepError

__all__ = [
    "gaussian",
    "lorentzian",
    "voigt",
    "pseudo_voigt",
    "split_gaussian",
    "voigt_fwhm",
    "voigt_widths",
    "pseudo_voigt_tch",
    "FWHM_TO_SIGMA",
]

#: σ = FWHM · FWHM_TO_SIGMA for a Gaussian (1 / (2 sqrt(2 ln 2))).
FWHM_TO_SIGMA = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))
# Olivero & Longbothum (1977) coefficients.
_OL_A, _OL_B = 0.5346, 0.2166


def gaussian(energy_ev, center_ev, fwhm_ev, area=1.0):
    """Area-normalised Gaussian: area/(σ√(2π))·exp(−(E−E0)²/(2σ²)), σ = FWHM/(2√(2 ln 2)).

    Parameters
    ----------
    energy_ev : array_like
        Photon energies (eV).
    center_ev, fwhm_ev : float or array_like
        Centre and full width at half maximum (eV).
    area : float or array_like
        Integrated intensity (intensity·eV).
    """
    sigma = np.asarray(fwhm_ev, dtype=float) * FWHM_TO_SIGMA
    u = (np.asarray(energy_ev, dtype=float) - center_ev) / sigma
    return area * np.exp(-0.5 * u * u) / (sigma * np.sqrt(2.0 * np.pi))


def lorentzian(energy_ev, center_ev, fwhm_ev, area=1.0):
    """Area-normalised Lorentzian (Cauchy): area/π · γ/((E−E0)² + γ²), γ = FWHM/2 (eV)."""
    g = 0.5 * np.asarray(fwhm_ev, dtype=float)
    d = np.asarray(energy_ev, dtype=float) - center_ev
    return area * g / (np.pi * (d * d + g * g))


def voigt(energy_ev, center_ev, fwhm_g_ev, fwhm_l_ev, area=1.0):
    """Exact area-normalised Voigt profile (Gaussian ⊗ Lorentzian) via the Faddeeva function.

    Parameters
    ----------
    fwhm_g_ev, fwhm_l_ev : float
        FWHM of the Gaussian and of the Lorentzian components (eV).
    """
    sigma = np.asarray(fwhm_g_ev, dtype=float) * FWHM_TO_SIGMA
    gamma = 0.5 * np.asarray(fwhm_l_ev, dtype=float)
    return area * voigt_profile(np.asarray(energy_ev, dtype=float) - center_ev, sigma, gamma)


def pseudo_voigt(energy_ev, center_ev, fwhm_ev, eta, area=1.0):
    """Pseudo-Voigt: area·[η·L(E; E0, Γ) + (1−η)·G(E; E0, Γ)], both with FWHM Γ (eV), 0 ≤ η ≤ 1.

    Use :func:`pseudo_voigt_tch` to get Γ and η that approximate a Voigt
    (Thompson, Cox & Hastings, J. Appl. Cryst. 20, 79 (1987)).
    """
    return eta * lorentzian(energy_ev, center_ev, fwhm_ev, area) + (1.0 - eta) * gaussian(
        energy_ev, center_ev, fwhm_ev, area
    )


def split_gaussian(energy_ev, center_ev, fwhm_ev, asymmetry, area=1.0):
    """Asymmetric (split) Gaussian for band tails, area-normalised.

    Two Gaussian halves joined at the maximum ``center_ev``: the low-energy half
    has half width at half maximum ``fwhm/2·(1 − a)``, the high-energy half
    ``fwhm/2·(1 + a)``, with ``a = asymmetry`` in (−1, 1). So ``center_ev`` is the
    energy of the maximum and ``fwhm_ev`` the full width at half maximum, exactly;
    a < 0 gives a low-energy tail (e.g. a band tail), a > 0 a high-energy tail.
    Area = height·FWHM·√(π/(4 ln 2)), as for a Gaussian.
    """
    e = np.asarray(energy_ev, dtype=float)
    a = np.asarray(asymmetry, dtype=float)
    s = np.where(e < center_ev, 1.0 - a, 1.0 + a) * np.asarray(fwhm_ev, dtype=float) * FWHM_TO_SIGMA
    height = area / (np.asarray(fwhm_ev, dtype=float) * np.sqrt(np.pi / (4.0 * np.log(2.0))))
    u = (e - center_ev) / s
    return height * np.exp(-0.5 * u * u)


def voigt_fwhm(fwhm_g_ev, fwhm_l_ev, *, method="exact"):
    """FWHM of a Voigt profile from its Gaussian and Lorentzian FWHMs (eV).

    Parameters
    ----------
    fwhm_g_ev, fwhm_l_ev : float or array_like
        Component FWHMs (eV), non-negative.
    method : {"exact", "olivero"}
        "exact" solves V(x) = V(0)/2 numerically (bisection on the Faddeeva
        function, ~1e-12 relative); "olivero" uses Olivero & Longbothum (1977),
        f_V ≈ 0.5346 f_L + sqrt(0.2166 f_L² + f_G²), within 0.02 %.

    References
    ----------
    Olivero & Longbothum, J. Quant. Spectrosc. Radiat. Transfer 17, 233 (1977).
    """
    fg = np.asarray(fwhm_g_ev, dtype=float)
    fl = np.asarray(fwhm_l_ev, dtype=float)
    if np.any(fg < 0) or np.any(fl < 0):
        raise StepError("Voigt component widths must be non-negative")
    approx = _OL_A * fl + np.sqrt(_OL_B * fl * fl + fg * fg)
    if method == "olivero":
        return approx
    if method != "exact":
        raise StepError(f"unknown method {method!r} (use 'exact' or 'olivero')")
    fg, fl = np.broadcast_arrays(fg, fl)
    sigma = fg * FWHM_TO_SIGMA
    gamma = 0.5 * fl
    peak = _voigt0(sigma, gamma)
    lo = np.zeros_like(approx)
    hi = approx.copy()  # half width < approx (the approximation is within 0.02 %)
    hi = np.where(hi > 0, hi, 1.0)
    # bracket: make sure V(hi) < V(0)/2
    for _ in range(60):
        bad = _voigt_x(hi, sigma, gamma) >= 0.5 * peak
        if not np.any(bad & (approx > 0)):
            break
        hi = np.where(bad, hi * 2.0, hi)
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        above = _voigt_x(mid, sigma, gamma) >= 0.5 * peak
        lo = np.where(above, mid, lo)
        hi = np.where(above, hi, mid)
    out = lo + hi  # twice the half width
    return np.where(approx > 0, out, 0.0)


def _voigt0(sigma, gamma):
    return _voigt_x(np.zeros_like(sigma), sigma, gamma)


def _voigt_x(x, sigma, gamma):
    with np.errstate(divide="ignore", invalid="ignore"):
        pure_l = sigma <= 0
        s = np.where(pure_l, 1.0, sigma)
        z = (x + 1j * gamma) / (s * np.sqrt(2.0))
        v = wofz(z).real / (s * np.sqrt(2.0 * np.pi))
        g = np.where(gamma > 0, gamma, 1.0)
        lor = g / (np.pi * (x * x + g * g))
    return np.where(pure_l, lor, v)


def voigt_widths(fwhm_ev, lorentz_fraction):
    """Gaussian and Lorentzian FWHMs (eV) of a Voigt with total FWHM ``fwhm_ev``.

    ``lorentz_fraction`` ρ = f_L / f_V in [0, 1): f_L = ρ·f_V and f_G from
    inverting Olivero & Longbothum (1977): f_G = sqrt((f_V − 0.5346 f_L)² − 0.2166 f_L²).
    This is the parametrisation :func:`fit_peaks` uses for ``model="voigt"``.
    """
    f = np.asarray(fwhm_ev, dtype=float)
    r = np.asarray(lorentz_fraction, dtype=float)
    fl = r * f
    fg = f * np.sqrt(np.maximum((1.0 - _OL_A * r) ** 2 - _OL_B * r * r, 0.0))
    return fg, fl


def pseudo_voigt_tch(fwhm_g_ev, fwhm_l_ev):
    """Pseudo-Voigt FWHM Γ (eV) and Lorentzian fraction η approximating a Voigt.

    Thompson, Cox & Hastings, J. Appl. Cryst. 20, 79 (1987):
    Γ⁵ = Γ_G⁵ + 2.69269Γ_G⁴Γ_L + 2.42843Γ_G³Γ_L² + 4.47163Γ_G²Γ_L³ + 0.07842Γ_GΓ_L⁴ + Γ_L⁵,
    η = 1.36603q − 0.47719q² + 0.11116q³ with q = Γ_L/Γ.

    Returns
    -------
    (fwhm_ev, eta) : tuple of float or ndarray
    """
    g = np.asarray(fwhm_g_ev, dtype=float)
    lo = np.asarray(fwhm_l_ev, dtype=float)
    big = (
        g**5
        + 2.69269 * g**4 * lo
        + 2.42843 * g**3 * lo**2
        + 4.47163 * g**2 * lo**3
        + 0.07842 * g * lo**4
        + lo**5
    ) ** 0.2
    q = lo / big
    eta = 1.36603 * q - 0.47719 * q * q + 0.11116 * q**3
    return big, eta


def weideman_coefficients(n_terms: int = 32) -> tuple[np.ndarray, float]:
    """Coefficients of Weideman's rational approximation of the Faddeeva function.

    Weideman, SIAM J. Numer. Anal. 31, 1497 (1994): w(z) ≈ 2 p(Z)/(L − iz)² +
    1/(√π (L − iz)), Z = (L + iz)/(L − iz), p a polynomial of degree N − 1.
    Returns (a, L) with ``a`` highest power first (for Horner evaluation).
    """
    m = 2 * n_terms
    m2 = 2 * m
    k = np.arange(-m + 1, m)
    L = np.sqrt(n_terms / np.sqrt(2.0))
    theta = k * np.pi / m
    t = L * np.tan(theta / 2.0)
    f = np.exp(-t * t) * (L * L + t * t)
    f = np.concatenate([[0.0], f])
    a = np.real(np.fft.fft(np.fft.fftshift(f))) / m2
    a = a[1 : n_terms + 1][::-1].copy()
    return a, float(L)
