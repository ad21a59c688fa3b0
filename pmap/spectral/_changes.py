"""Per-pixel counts of what a cleaning step did: channels it masked, values it replaced.

These lazy (…, y, x) maps let a run say what was masked and replaced (the command's
summary, the result store), computed in the same block pass as everything else.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..cube import spectral_dim
from ..errors import StepError

__all__ = ["channel_changes", "CHANGE_KINDS"]

#: kind → (variable name, long name) of the count map.
CHANGE_KINDS = {
    "masked": ("masked_channels", "channels masked (NaN) by the cleaning: bad detector "
                                  "channels, saturated or dead values"),
    "replaced": ("spike_values_replaced", "values replaced as cosmic spikes"),
}


def channel_changes(before: xr.DataArray, after: xr.DataArray, kind: str) -> xr.DataArray:
    """Count, per spectrum, the channels a step masked or replaced (lazy, int32, units "1").

    Parameters
    ----------
    before, after : xarray.DataArray
        A cube before and after one cleaning step (same shape and spectral axis).
    kind : {"masked", "replaced"}
        "masked": finite before, NaN after; "replaced": finite before and after, and
        different.

    Returns
    -------
    xarray.DataArray
        (…, y, x) counts named as in :data:`CHANGE_KINDS`, lazy where the cubes are.
    """
    if kind not in CHANGE_KINDS:
        raise StepError(f"kind must be one of {sorted(CHANGE_KINDS)}, got {kind!r}")
    sdim = spectral_dim(before)
    if before.shape != after.shape or sdim != spectral_dim(after):
        raise StepError("channel_changes needs the same cube before and after one step")
    was = np.isfinite(before)
    if kind == "masked":
        hit = was & ~np.isfinite(after)
    else:
        hit = was & np.isfinite(after) & (before != after)
    name, long_name = CHANGE_KINDS[kind]
    out = hit.sum(sdim, dtype=np.int32).astype(np.int32)
    out = out.drop_vars([c for c in out.coords if c not in out.dims and c not in ("y", "x")])
    out.name = name
    out.attrs = {"units": "1", "long_name": long_name}
    return out
