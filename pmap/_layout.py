"""Names and the chunking rule of the canonical cube, without xarray or dask (layer 0).

:mod:`pmap.cube` re-exports them; ``plcube info``'s quick path (:mod:`pmap._cubeinfo`)
uses them without importing xarray or dask.
"""

from __future__ import annotations

import math

#: Acquisition metadata attrs and their meaning (units are in the names).
METADATA_ATTRS = {
    "excitation_wavelength_nm": "excitation laser wavelength (nm)",
    "temperature_K": "sample temperature (K)",
    "exposure_s": "exposure time per spectrum (s)",
    "excitation_power_W": "excitation power at the sample (W)",
    "instrument_notes": "free-text notes on instrument and set-up",
    "wavelength_medium": "medium of the wavelength axis: air or vacuum",
    "saturation_counts": "detector saturation level (counts)",
    "read_noise_counts": "detector read noise, 1 sigma (counts)",
    "gain_e_per_count": "detector gain (electrons per count)",
}

#: Names accepted for extra stacking dims besides y, x and the spectral dim.
STACK_DIMS = (
    "temperature", "excitation_power", "power", "time", "stack", "sample", "polarization",
    "polarisation", "excitation_wavelength", "z", "frame", "map", "voltage", "field",
)

DEFAULT_CHUNK_MIB = 64.0


def choose_spatial_chunks(
    shape_yx: tuple[int, int],
    n_spectral: int,
    itemsize: int,
    *,
    target_mib: float = DEFAULT_CHUNK_MIB,
    align: tuple[int, int] | None = None,
) -> tuple[int, int]:
    """Spatial chunk (cy, cx) so that one chunk with the whole spectral axis is ≈ target_mib MiB.

    ``align`` is the stored (on-disk) chunk (sy, sx): chunks are then whole multiples of
    it (or an even split of one stored chunk when that alone exceeds the target), so no
    stored chunk is read by more than one task.
    """
    ny, nx = shape_yx
    per_pixel = max(1, n_spectral * itemsize)
    npix = max(1, int(target_mib * 2**20 // per_pixel))
    if npix >= ny * nx:
        return max(ny, 1), max(nx, 1)
    if align is not None:
        sy, sx = (max(1, min(int(a), n)) for a, n in zip(align, (ny, nx)))
        tiles = npix // (sy * sx)
        if tiles >= 1:
            n_tiles_x = -(-nx // sx)
            if tiles >= n_tiles_x:  # whole rows of stored tiles
                return min(ny, (tiles // n_tiles_x) * sy), nx
            side = max(1, math.isqrt(tiles))
            return min(ny, side * sy), min(nx, (tiles // side) * sx)
        # one stored tile is larger than the target: split it evenly
        parts = -(-sy * sx // npix)
        py = min(sy, max(1, math.isqrt(parts)))
        px = max(1, -(-parts // py))
        return max(1, -(-sy // py)), max(1, -(-sx // px))
    # Prefer whole rows when they fit (contiguous reads from row-major stores).
    if nx <= npix:
        return max(1, min(ny, npix // nx)), nx
    side = max(1, int(math.isqrt(npix)))
    return min(ny, side), min(nx, max(1, npix // side))
