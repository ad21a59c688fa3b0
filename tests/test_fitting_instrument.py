"""The instrument function in the model (issue 11, item 4).

Data are made here from scipy only: a line convolved with a Gaussian instrument
function is, exactly, a Gaussian of variance σ² + σ_i² (Gaussian line) or a Voigt
profile with Gaussian σ² + σ_i² and the same Lorentzian width (Voigt line) —
convolution adds the variances of Gaussians (common practice; any probability
text). Channel averages come from scipy.integrate.quad over each channel.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy import integrate, special

import pmap
from pmap.errors import StepError

F2S = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))
E = np.linspace(1.50, 1.70, 201)  # 1 meV channels
EDGES = np.concatenate([[E[0] - 5e-4], 0.5 * (E[1:] + E[:-1]), [E[-1] + 5e-4]])


def _channel_average(f):
    return np.array([integrate.quad(f, a, b, epsabs=0, epsrel=1e-10)[0] / (b - a)
                     for a, b in zip(EDGES[:-1], EDGES[1:])])


def _cube(values):
    return pmap.make_cube(np.broadcast_to(values, (2, 2, E.size)).astype(np.float64),
                          energy_ev=E, units="counts/eV")


@pytest.mark.parametrize("fwhm_line, fwhm_instr", [(0.010, 0.004), (0.004, 0.004),
                                                   (0.003, 0.006)])
def test_gaussian_line_through_gaussian_instrument(fwhm_line, fwhm_instr):
    s = np.hypot(fwhm_line, fwhm_instr) * F2S
    y = _channel_average(lambda e: 1e3 * np.exp(-0.5 * ((e - 1.6012) / s) ** 2)
                         / (s * np.sqrt(2 * np.pi)))
    r = pmap.fit_peaks(_cube(y), noise="residual", background="none",
                       instrument_fwhm_ev=fwhm_instr).compute().isel(peak=0, y=0, x=0)
    assert float(r.peak_fwhm) == pytest.approx(fwhm_line, rel=0.01)
    assert float(r.peak_fwhm_apparent) == pytest.approx(np.hypot(fwhm_line, fwhm_instr),
                                                        rel=0.005)
    assert float(r.peak_area) == pytest.approx(1e3, rel=0.005)


def test_voigt_line_through_gaussian_instrument():
    sig, gam, fi = 0.003, 0.002, 0.005  # eV
    si = fi * F2S
    y = _channel_average(lambda e: 1e3 * special.voigt_profile(e - 1.6, np.hypot(sig, si), gam))
    r = pmap.fit_peaks(_cube(y), model="voigt", noise="residual", background="none",
                       instrument_fwhm_ev=fi).compute().isel(peak=0, y=0, x=0)
    # intrinsic Voigt FWHM (Olivero & Longbothum, JQSRT 17, 233 (1977), 0.02 %)
    fl, fg = 2 * gam, sig / F2S
    fv = 0.5346 * fl + np.sqrt(0.2166 * fl**2 + fg**2)
    assert float(r.peak_fwhm) == pytest.approx(fv, rel=0.01)
    assert float(r.peak_shape) == pytest.approx(fl / fv, rel=0.03)


def test_instrument_fwhm_in_nm_and_from_a_lamp():
    # a lamp line far narrower than the instrument, seen through a 0.30 nm Gaussian
    # instrument on 0.1 nm channels (counts per channel: channel integrals via erf)
    lam = np.arange(690.0, 710.0, 0.1)
    ed = np.concatenate([[lam[0] - 0.05], lam[:-1] + 0.05, [lam[-1] + 0.05]])
    s = 0.30 * F2S
    counts = 5e4 * np.diff(0.5 * special.erf((ed - 700.03) / (np.sqrt(2) * s))) + 20.0
    lamp = xr.DataArray(counts, dims=("wavelength",), coords={"wavelength": lam})
    m = pmap.fitting.measure_instrument_fwhm(lamp)
    assert m["fwhm_nm"] == pytest.approx(0.30, rel=0.01)
    # the same instrument in nm at a PL line at 700 nm: f_eV = f_nm·E²/hc
    hc = 1239.8419843320026  # eV nm, CODATA 2018
    e0 = hc / 700.0
    fi_ev = 0.30 * e0**2 / hc
    sl = np.hypot(0.006, fi_ev) * F2S
    # the line made on E (centred at 1.6 eV), then the axis shifted to put it at e0
    y = _channel_average(lambda e: 1e3 * np.exp(-0.5 * ((e - 1.6) / sl) ** 2)
                         / (sl * np.sqrt(2 * np.pi)))
    cube = pmap.make_cube(np.broadcast_to(y, (1, 2, E.size)).astype(np.float64),
                          energy_ev=E + (e0 - 1.6), units="counts/eV")
    for kw in ({"instrument_fwhm_nm": 0.30}, {"instrument_lamp": lamp}):
        r = pmap.fit_peaks(cube, noise="residual", background="none", **kw).compute()
        assert float(r.peak_fwhm.isel(peak=0, y=0, x=0)) == pytest.approx(0.006, rel=0.01)


def test_instrument_refused_for_lorentzian():
    with pytest.raises(StepError, match="voigt"):
        pmap.fit_peaks(_cube(np.ones(E.size)), model="lorentzian", instrument_fwhm_ev=0.004)
