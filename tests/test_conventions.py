"""Photon energy ↔ wavelength and unit vocabulary."""

import numpy as np
import pytest
from scipy import constants

from pmap.conventions import (
    HC_EV_NM,
    K_B_EV_PER_K,
    ev_to_nm,
    nm_to_ev,
    nm_to_wavenumber,
    normalise_intensity_unit,
    normalise_length_unit,
)
from pmap.errors import CubeValidationError


def test_hc_matches_scipy_constants():
    # hc exact under the 2019 SI; scipy.constants carries CODATA (Tiesinga et al.,
    # Rev. Mod. Phys. 93, 025010 (2021)).
    ref = constants.h * constants.c / constants.e * 1e9
    assert HC_EV_NM == pytest.approx(ref, rel=1e-12)
    assert HC_EV_NM == pytest.approx(1239.841984332, rel=1e-12)


@pytest.mark.parametrize(
    "nm, ev",
    [
        # shared/REFERENCES.md "Photon energy" check values (CODATA 2018 / 2019 SI)
        (500.0, 2.479684),
        (800.0, 1.549802),
        (870.6756, 1.424),
    ],
)
def test_nm_to_ev_check_values(nm, ev):
    assert nm_to_ev(nm) == pytest.approx(ev, abs=5e-7)
    assert ev_to_nm(ev) == pytest.approx(nm, abs=5e-4)


def test_energy_wavelength_exact_against_scipy():
    # E = hc/λ with h, c, e from scipy.constants to 1e-12 relative (CODATA, Tiesinga et al. 2021)
    lam = np.linspace(200.0, 2000.0, 1001)
    ref = constants.h * constants.c / (lam * 1e-9) / constants.e
    np.testing.assert_allclose(nm_to_ev(lam), ref, rtol=1e-12)
    np.testing.assert_allclose(ev_to_nm(nm_to_ev(lam)), lam, rtol=1e-12)


def test_790nm_is_about_1p57ev():
    # common practice: a PL maximum near 790 nm corresponds to about 1.57 eV
    assert nm_to_ev(790.0) == pytest.approx(1.57, abs=0.005)


def test_kt_at_300k():
    # kT at 300 K = 25.852 meV (CODATA via scipy.constants; shared/REFERENCES.md)
    assert K_B_EV_PER_K * 300 * 1e3 == pytest.approx(25.852, abs=1e-3)


def test_wavenumber():
    # 1e7 / λ[nm] = ν̃[cm⁻¹] (definition; common practice): 500 nm → 20000 cm⁻¹
    assert nm_to_wavenumber(500.0) == pytest.approx(20000.0)


def test_unit_vocabulary():
    assert normalise_length_unit("µm") == "um"
    assert normalise_length_unit("micron") == "um"
    assert normalise_intensity_unit("cps") == "counts/s"
    with pytest.raises(CubeValidationError, match="furlong"):
        normalise_length_unit("furlong")
    with pytest.raises(CubeValidationError, match="bananas"):
        normalise_intensity_unit("bananas")
