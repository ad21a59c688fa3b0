"""Spectral axis and cleaning: calibration, air/vacuum, energy axis, corrections, denoising.

Every cube → cube function here is a registered pipeline step (:mod:`pmap.steps`), lazy
over dask chunks (spectral axis whole) and recorded in the cube's provenance.
"""

from ._airvac import (
    AIR_METHODS,
    air_to_vacuum,
    refractive_index_air,
    to_air,
    to_vacuum,
    vacuum_to_air,
)
from ._axis import channel_edges, to_energy, to_raman_shift, to_wavenumber
from ._badpixels import hot_channels, mask_bad_pixels
from ._baseline import als_baseline, remove_baseline, smooth
from ._calibration import (
    CalibrationExtrapolationWarning,
    WavelengthCalibration,
    apply_calibration,
    available_line_lists,
    calibrate_wavelength,
    find_lines,
    load_calibration,
    reference_lines,
)
from ._corrections import correct_response, normalise_exposure, response_from_lamp, subtract_dark
from ._detect import detect_signal
from ._noise import attach_noise_model, estimate_noise_parameters
from ._pca import PCA_RULES, choose_n_components, pca_denoise
from ._spikes import remove_spikes, spike_candidates

__all__ = [
    # air / vacuum
    "AIR_METHODS",
    "refractive_index_air",
    "air_to_vacuum",
    "vacuum_to_air",
    "to_vacuum",
    "to_air",
    # axes
    "channel_edges",
    "to_energy",
    "to_wavenumber",
    "to_raman_shift",
    # calibration
    "reference_lines",
    "available_line_lists",
    "find_lines",
    "calibrate_wavelength",
    "WavelengthCalibration",
    "load_calibration",
    "apply_calibration",
    "CalibrationExtrapolationWarning",
    # noise model
    "attach_noise_model",
    "estimate_noise_parameters",
    "detect_signal",
    # corrections
    "subtract_dark",
    "correct_response",
    "response_from_lamp",
    "normalise_exposure",
    # cleaning
    "remove_spikes",
    "spike_candidates",
    "mask_bad_pixels",
    "hot_channels",
    "remove_baseline",
    "als_baseline",
    "smooth",
    "pca_denoise",
    "choose_n_components",
    "PCA_RULES",
]
