"""The noise model that travels with a cube (layer 0: plain numpy/xarray, no estimation).

A detector in counts has, per channel, the variance of a Poisson–Gaussian signal
(the photon-transfer relation, Janesick, *Photon Transfer*, SPIE Press 2007)::

    var_raw = a · μ_raw + b,     a = 1/gain (counts per electron),
                                 b = read_noise² − a · dark_level   (counts²)

where μ_raw is the expected raw reading in counts, the detector's dark level
(bias) included. Every later step is, channel by channel, an affine map of the
raw counts::

    value = s · (raw − p)

with a scale ``s`` (exposure, response, Jacobian: ``noise_scale``, a coordinate
on the spectral dim or broader) and a subtracted pedestal ``p`` in raw counts
(dark frames, baselines: ``noise_pedestal_counts``, a lazy coordinate with any of
the cube's dims). So the variance of the current value, given the expected
current value ``m`` (e.g. a fitted model), is exactly::

    var = s · a · m + s² · (a · p + b)          floored at s² · floor

Both coordinates follow the cube through slicing, reordering and arithmetic like
any xarray coordinate. Steps that mix channels or pixels (smoothing, PCA
denoising, resampling) cannot keep this diagonal form: they mark the model
``correlated``, and fits then refuse to claim Poisson statistics.

The model itself is a JSON string in ``attrs["noise_model"]`` (so NetCDF export
keeps it). Estimation from data lives in :mod:`pmap.spectral` (``attach_noise_model``).
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, replace
from typing import Any

import numpy as np
import xarray as xr

__all__ = [
    "NOISE_ATTR",
    "SCALE_COORD",
    "PEDESTAL_COORD",
    "NoiseModel",
    "get_noise_model",
    "set_noise_model",
    "noise_scaled",
    "noise_subtracted",
    "noise_correlated",
    "noise_coords",
]

NOISE_ATTR = "noise_model"
SCALE_COORD = "noise_scale"
PEDESTAL_COORD = "noise_pedestal_counts"


@dataclass(frozen=True)
class NoiseModel:
    """Poisson–Gaussian variance law of the raw counts (see the module docstring).

    Attributes
    ----------
    var_per_count : float
        a = 1/gain, the raw variance added per count of signal (counts).
    var_offset_counts2 : float
        b = read_noise² − a·dark_level (counts²): the variance at a raw reading of 0.
    floor_counts2 : float
        Smallest raw variance a channel can have (counts²), keeps weights finite.
    source : str
        Where the numbers come from ("attrs: ..." or "estimated: <method>").
    correlated : bool
        True after a step that mixed channels or pixels: the diagonal law no longer
        holds and no later step may claim Poisson statistics.
    gain_e_per_count, read_noise_counts, dark_level_counts : float or None
        The detector figures when known (stated or estimated).
    notes : tuple of str
        What later steps did to the noise (for the record).
    valid : bool
        False when the data could not determine the law (too few samples, too
        narrow a range of levels): fits then use unit weights and say why.
    """

    var_per_count: float
    var_offset_counts2: float
    floor_counts2: float
    source: str
    correlated: bool = False
    gain_e_per_count: float | None = None
    read_noise_counts: float | None = None
    dark_level_counts: float | None = None
    notes: tuple = ()
    valid: bool = True

    def to_json(self) -> str:
        """The model as a JSON string (the value of ``attrs["noise_model"]``)."""
        d = asdict(self)
        d["notes"] = list(self.notes)
        return json.dumps(d)

    @classmethod
    def from_json(cls, text: str) -> NoiseModel:
        """Inverse of :meth:`to_json`."""
        d = json.loads(text)
        d["notes"] = tuple(d.get("notes", ()))
        return cls(**{k: d[k] for k in cls.__dataclass_fields__ if k in d})

    def raw_variance(self, mu_raw_counts: Any) -> np.ndarray:
        """Variance (counts²) of a raw reading with expectation ``mu_raw_counts`` (counts)."""
        v = self.var_per_count * np.asarray(mu_raw_counts, dtype=float) + self.var_offset_counts2
        return np.maximum(v, self.floor_counts2)

    def describe(self) -> str:
        """One line for logs and attrs."""
        if self.correlated:
            return f"correlated noise ({'; '.join(self.notes)}); Poisson weights not valid"
        if not self.valid:
            return f"no usable noise law ({self.source})"
        g = 1.0 / self.var_per_count if self.var_per_count > 0 else float("inf")
        return (
            f"var = {self.var_per_count:.4g}·counts + {self.var_offset_counts2:.4g} counts² "
            f"(gain {g:.4g} e-/count; {self.source})"
        )


def get_noise_model(cube: Any) -> NoiseModel | None:
    """The cube's noise model, or None when it has none."""
    text = getattr(cube, "attrs", {}).get(NOISE_ATTR)
    if not text:
        return None
    return NoiseModel.from_json(text) if isinstance(text, str) else None


def set_noise_model(cube: xr.DataArray, model: NoiseModel) -> xr.DataArray:
    """Attach ``model`` to a raw cube in counts: scale 1, no pedestal (returns a new cube)."""
    out = cube.copy(deep=False)
    out.attrs = {**cube.attrs, NOISE_ATTR: model.to_json()}
    drop = [c for c in (SCALE_COORD, PEDESTAL_COORD) if c in out.coords]
    return out.drop_vars(drop)


def _with_model(out: xr.DataArray, model: NoiseModel) -> xr.DataArray:
    out.attrs = {**out.attrs, NOISE_ATTR: model.to_json()}
    return out


#: CF attributes of the two propagation coordinates (so other tools can say what they are).
SCALE_ATTRS = {"long_name": "noise propagation: factor from raw detector counts to this "
                            "cube's intensity units"}
PEDESTAL_ATTRS = {"long_name": "noise propagation: level subtracted so far, in raw detector "
                               "counts", "units": "counts"}


def describe_noise_coords(ds: Any) -> Any:
    """``ds`` (Dataset or DataArray) with the CF attrs of the propagation coordinates set."""
    for name, attrs in ((SCALE_COORD, SCALE_ATTRS), (PEDESTAL_COORD, PEDESTAL_ATTRS)):
        if name in ds.coords:
            ds[name].attrs = {**attrs, **ds[name].attrs}
    return ds


def _coord_variable(new: xr.DataArray, attrs: dict) -> xr.Variable:
    """The variable of ``new`` with the CF attrs of its propagation coordinate."""
    var = new.variable.copy(deep=False)
    var.attrs = dict(attrs)
    return var


def _bare(v: Any) -> xr.DataArray:
    """A scalar or DataArray as a DataArray without coordinates (dims kept)."""
    if isinstance(v, xr.DataArray):
        return v.reset_coords(drop=True).drop_vars(list(v.coords), errors="ignore")
    return xr.DataArray(float(v))


def noise_scaled(out: xr.DataArray, cube: xr.DataArray, factor: Any, why: str) -> xr.DataArray:
    """Record that ``out = cube · factor`` (factor: scalar or DataArray on the cube's dims).

    The scale coordinate is multiplied by ``factor``; the pedestal, in raw counts,
    is unchanged. No-op when ``cube`` has no noise model.
    """
    model = get_noise_model(cube)
    if model is None:
        return out
    s, _ = noise_coords(cube)
    new = (s * _bare(factor)).astype(np.float64)
    out = out.assign_coords({SCALE_COORD: _coord_variable(new, SCALE_ATTRS)})
    return _with_model(out, replace(model, notes=model.notes + (why,)))


def noise_subtracted(
    out: xr.DataArray, cube: xr.DataArray, subtracted: Any, why: str
) -> xr.DataArray:
    """Record that ``out = cube − subtracted`` (in the cube's current units).

    ``subtracted`` is a scalar or a DataArray on any of the cube's dims (lazy is
    fine). The pedestal (raw counts) grows by ``subtracted / scale``; the variance of
    the raw counts is kept. No-op when ``cube`` has no noise model.
    """
    model = get_noise_model(cube)
    if model is None:
        return out
    s, p = noise_coords(cube)
    new = (p + _bare(subtracted) / s).astype(np.float64)
    out = out.assign_coords({PEDESTAL_COORD: _coord_variable(new, PEDESTAL_ATTRS)})
    return _with_model(out, replace(model, notes=model.notes + (why,)))


def noise_correlated(out: xr.DataArray, cube: xr.DataArray, why: str) -> xr.DataArray:
    """Mark the noise of ``out`` as correlated between channels or pixels (``why``)."""
    model = get_noise_model(cube)
    if model is None:
        return out
    return _with_model(out, replace(model, correlated=True, notes=model.notes + (why,)))


def noise_coords(cube: xr.DataArray) -> tuple[xr.DataArray, xr.DataArray]:
    """(scale, pedestal) of the cube as DataArrays without coordinates (1.0 / 0.0 if absent).

    Each has a subset of the cube's dims; callers broadcast them as needed.
    """
    s = _bare(cube.coords[SCALE_COORD]) if SCALE_COORD in cube.coords else _bare(1.0)
    p = _bare(cube.coords[PEDESTAL_COORD]) if PEDESTAL_COORD in cube.coords else _bare(0.0)
    return s, p
