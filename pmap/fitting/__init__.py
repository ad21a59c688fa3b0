"""Per-pixel fitting and descriptors of energy cubes.

``fit_peaks`` fits sums of line shapes plus background to every spectrum with a
batched Levenberg–Marquardt (numba); ``spectral_descriptors`` gives fast maps
without fitting; the line-shape functions are the exact definitions the fits use.
"""

from ._descriptors import spectral_descriptors
from ._fit import (
    FIT_STATUS_LEGEND,
    PEAK_STATUS_LEGEND,
    evaluate_fit,
    fit_peaks,
    model_spectrum,
)
from ._instrument import intrinsic_widths, measure_instrument_fwhm
from ._lineshapes import (
    gaussian,
    lorentzian,
    pseudo_voigt,
    pseudo_voigt_tch,
    split_gaussian,
    voigt,
    voigt_fwhm,
    voigt_widths,
)
from ._physics import band_to_band_offset_ev, bandgap_from_peak, peak_shift

__all__ = [
    "fit_peaks",
    "spectral_descriptors",
    "evaluate_fit",
    "model_spectrum",
    "FIT_STATUS_LEGEND",
    "PEAK_STATUS_LEGEND",
    "measure_instrument_fwhm",
    "intrinsic_widths",
    "band_to_band_offset_ev",
    "gaussian",
    "lorentzian",
    "voigt",
    "pseudo_voigt",
    "split_gaussian",
    "voigt_fwhm",
    "voigt_widths",
    "pseudo_voigt_tch",
    "bandgap_from_peak",
    "peak_shift",
]
