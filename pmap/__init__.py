"""pmap: hyperspectral photoluminescence (PL) map processor.

Importing pmap is light: the public names below are loaded on first use, and
napari, Qt and scikit-learn are never imported here.

Layers (data flow one way, lower never imports higher)::

    errors, conventions, airvac, provenance, steps, cube   (model and conventions)
    io, synthetic                                     (reading, writing, demo data)
    spectral                                          (axis, calibration, cleaning)
    fitting, decomposition                            (per-pixel fits, NMF, regions)
    results                                           (result store assembly)
    pipeline                                          (TOML pipelines, process runs)
    cli, report, napari plugin                        (edges)
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from ._version import __version__
from .errors import CubeValidationError, FormatError, InputFileError, PmapError, StepError

# public name -> module that defines it (imported on first access)
_LAZY = {
    # conventions and the cube model (dask is imported only when they are first used)
    "HC_EV_NM": "pmap.conventions",
    "nm_to_ev": "pmap.conventions",
    "ev_to_nm": "pmap.conventions",
    "make_cube": "pmap.cube",
    "validate_cube": "pmap.cube",
    # io
    "open_cube": "pmap.io",
    "save_cube": "pmap.io",
    "convert": "pmap.io",
    "cube_info": "pmap.io",
    "text_to_zarr": "pmap.io",
    # demo data
    "make_demo_cube": "pmap.synthetic",
    "write_demo_cube": "pmap.synthetic",
    # spectral axis and cleaning
    "air_to_vacuum": "pmap.spectral",
    "vacuum_to_air": "pmap.spectral",
    "to_energy": "pmap.spectral",
    "to_wavenumber": "pmap.spectral",
    "to_raman_shift": "pmap.spectral",
    "remove_spikes": "pmap.spectral",
    "calibrate_wavelength": "pmap.spectral",
    "load_calibration": "pmap.spectral",
    "WavelengthCalibration": "pmap.spectral",
    "subtract_dark": "pmap.spectral",
    "correct_response": "pmap.spectral",
    "response_from_lamp": "pmap.spectral",
    "normalise_exposure": "pmap.spectral",
    "mask_bad_pixels": "pmap.spectral",
    "remove_baseline": "pmap.spectral",
    "smooth": "pmap.spectral",
    "pca_denoise": "pmap.spectral",
    "attach_noise_model": "pmap.spectral",
    # fitting
    "fit_peaks": "pmap.fitting",
    "spectral_descriptors": "pmap.fitting",
    # decomposition
    "decompose": "pmap.decomposition",
    "segment": "pmap.decomposition",
    "region_statistics": "pmap.decomposition",
    # series of maps and absolute PL
    "fit_law": "pmap.series",
    "stack_cubes": "pmap.stack",
    "fit_planck": "pmap.planck",
    # pipeline and results
    "process": "pmap.pipeline",
    "load_pipeline": "pmap.pipeline",
    "open_result": "pmap.results",
}

__all__ = [
    "__version__",
    "PmapError",
    "CubeValidationError",
    "FormatError",
    "InputFileError",
    "StepError",
    *_LAZY,
]


def __getattr__(name: str) -> Any:
    mod = _LAZY.get(name)
    if mod is None:
        raise AttributeError(f"module 'pmap' has no attribute {name!r}")
    value = getattr(import_module(mod), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
