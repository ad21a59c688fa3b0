"""The instrument function in the line model: a Gaussian of known FWHM convolved in.

A line seen through a spectrometer is the true line convolved with the instrument
function. For a Gaussian instrument function of FWHM f_i this is exact in closed
form for the two models it applies to (variances of Gaussians add under
convolution; the Voigt profile is a Gaussian ⊗ Lorentzian, so its Gaussian part
adds f_i in quadrature and its Lorentzian part is unchanged):

* Gaussian:  f_apparent² = f² + f_i²
* Voigt:     f_G,apparent² = f_G² + f_i²,  f_L unchanged

so :func:`fit_peaks` fits the apparent profile and reports the intrinsic width
(and Lorentzian fraction) with errors propagated from the fit's covariance. The
FWHM of the instrument comes from a pipeline key (nm or eV) or is measured from
a lamp line (:func:`measure_instrument_fwhm`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import xarray as xr
from scipy import optimize, special

from ..conventions import HC_EV_NM
from ..errors import StepError
from ._lineshapes import voigt_widths

__all__ = ["measure_instrument_fwhm", "intrinsic_widths"]

_OL_A, _OL_B = 0.5346, 0.2166  # Olivero & Longbothum, JQSRT 17, 233 (1977)
MODELS = ("gaussian", "voigt")


def intrinsic_widths(model: str, fwhm_apparent, shape_apparent, fwhm_instrument):
    """Intrinsic (FWHM, shape) from the apparent ones and a Gaussian instrument FWHM.

    Parameters
    ----------
    model : {"gaussian", "voigt"}
    fwhm_apparent, shape_apparent : array_like
        Fitted (convolved) FWHM (eV) and, for Voigt, Lorentzian fraction f_L/f_V.
    fwhm_instrument : array_like
        Instrument FWHM in the same units as the line widths (eV).

    Returns
    -------
    (fwhm, shape) : ndarrays
        Intrinsic FWHM (NaN where the line is not wider than the instrument:
        unresolved) and Lorentzian fraction (Voigt; None for Gaussian).
    """
    fa = np.asarray(fwhm_apparent, dtype=float)
    fi = np.asarray(fwhm_instrument, dtype=float)
    if model == "gaussian":
        w2 = fa * fa - fi * fi
        with np.errstate(invalid="ignore"):
            return np.where(w2 > 0, np.sqrt(np.maximum(w2, 0.0)), np.nan), None
    fg_a, fl = voigt_widths(fa, shape_apparent)
    g2 = fg_a * fg_a - fi * fi
    fg = np.sqrt(np.maximum(g2, 0.0))
    fv = _OL_A * fl + np.sqrt(_OL_B * fl * fl + fg * fg)
    resolved = (g2 > 0) | (fl > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(fv > 0, fl / fv, np.nan)
    return np.where(resolved, fv, np.nan), np.where(resolved, rho, np.nan)


def deconvolve_peak(model, fw, fw_err, shape, cov2, fi):
    """(fwhm, fwhm_err, shape, shape_err) intrinsic, errors by finite differences.

    ``cov2`` (m, 2, 2) is the covariance of (fwhm, shape) (Voigt) or (m, 1, 1).
    """
    f0, s0 = intrinsic_widths(model, fw, shape, fi)
    h = 1e-6 * np.maximum(np.abs(fw), 1e-9)
    f1, s1 = intrinsic_widths(model, fw + h, shape, fi)
    if model == "gaussian":
        err = np.abs((f1 - f0) / h) * fw_err
        return f0, err, None, None
    hs = 1e-6
    f2, s2 = intrinsic_widths(model, fw, shape + hs, fi)
    G = np.stack([np.stack([(f1 - f0) / h, (f2 - f0) / hs], -1),
                  np.stack([(s1 - s0) / h, (s2 - s0) / hs], -1)], 1)  # (m, 2, 2)
    C = np.nan_to_num(cov2)
    V = np.einsum("mij,mjk,mlk->mil", G, C, G)
    with np.errstate(invalid="ignore"):
        return f0, np.sqrt(np.maximum(V[:, 0, 0], 0)), s0, np.sqrt(np.maximum(V[:, 1, 1], 0))


def instrument_fwhm_ev(energy_ev, *, fwhm_ev=None, fwhm_nm=None):
    """Instrument FWHM in eV at ``energy_ev``: given in eV, or in nm (× E²/hc)."""
    if fwhm_ev is not None:
        return np.full(np.shape(energy_ev), float(fwhm_ev))
    e = np.asarray(energy_ev, dtype=float)
    return float(fwhm_nm) * e * e / HC_EV_NM


def _channel_gauss(edges, c, fwhm, area, offset):
    s = fwhm / (2.0 * np.sqrt(2.0 * np.log(2.0)))
    cdf = 0.5 * special.erf((edges - c) / (np.sqrt(2.0) * s))
    return area * np.diff(cdf) / np.diff(edges) + offset


def measure_instrument_fwhm(lamp: Any, *, window_fwhm: float = 6.0) -> dict:
    """Instrument FWHM (nm) from the strongest line of a lamp spectrum.

    Parameters
    ----------
    lamp : DataArray or path
        One spectrum on a wavelength axis in nm (1-D DataArray with a ``wavelength``
        coordinate, or a 2-column text file: wavelength, counts).
    window_fwhm : float
        Half-width of the fitted window around the line, in units of its rough FWHM.

    Returns
    -------
    dict
        ``fwhm_nm`` and ``fwhm_err_nm`` (1σ), ``centre_nm``, ``channel_nm``.

    Notes
    -----
    Atomic lamp lines are far narrower than a PL spectrometer's resolution (common
    practice), so the fitted width is the instrument function's. The model is a
    Gaussian averaged over each channel (erf at the channel edges) plus a constant,
    fitted with scipy's least squares (weights from the counts, floor 1).
    """
    from ..spectral._common import load_spectrum

    spec = load_spectrum(lamp, what="lamp", sdim="wavelength")
    if not isinstance(spec, xr.DataArray) or spec.ndim != 1 or "wavelength" not in spec.coords:
        raise StepError("the lamp must be one spectrum with a wavelength axis (nm)")
    x = np.asarray(spec["wavelength"].values, dtype=float)
    y = np.asarray(spec.values, dtype=float)
    order = np.argsort(x)
    x, y = x[order], y[order]
    ok = np.isfinite(y)
    if ok.sum() < 7:
        raise StepError("the lamp spectrum has too few finite channels")
    x, y = x[ok], y[ok]
    edges = np.concatenate([[x[0] - (x[1] - x[0]) / 2], 0.5 * (x[1:] + x[:-1]),
                            [x[-1] + (x[-1] - x[-2]) / 2]])
    base = float(np.median(y))
    i = int(np.argmax(y))
    half = base + 0.5 * (y[i] - base)
    lo, hi = i, i
    while lo > 0 and y[lo] > half:
        lo -= 1
    while hi < y.size - 1 and y[hi] > half:
        hi += 1
    step = float(np.median(np.diff(x)))
    fw0 = max((x[hi] - x[lo]), 1.5 * step)
    sel = np.abs(x - x[i]) <= window_fwhm * fw0
    if sel.sum() < 6:
        raise StepError("the strongest lamp line is too close to the axis edge to fit")
    xs, ys = x[sel], y[sel]
    es = edges[np.r_[np.flatnonzero(sel), np.flatnonzero(sel)[-1] + 1]]
    sigma = np.sqrt(np.maximum(ys, 1.0))

    def model(_, c, f, a, o):
        return _channel_gauss(es, c, abs(f), a, o)

    p0 = [x[i], fw0, (y[i] - base) * fw0 * 1.0645, base]
    try:
        p, cov = optimize.curve_fit(model, xs, ys, p0=p0, sigma=sigma, absolute_sigma=False,
                                    maxfev=5000)
    except (RuntimeError, ValueError) as exc:
        raise StepError(f"could not fit the lamp line at {x[i]:.3f} nm: {exc}") from None
    return {
        "fwhm_nm": float(abs(p[1])),
        "fwhm_err_nm": float(np.sqrt(cov[1, 1])) if np.isfinite(cov[1, 1]) else float("nan"),
        "centre_nm": float(p[0]),
        "channel_nm": step,
    }
