"""Result store: assembling per-pixel maps into one Dataset and writing it to Zarr.

A pmap *result store* is a Zarr store readable by ``xarray.open_zarr`` holding
maps with coords y, x in µm and CF ``units`` attrs. Contract (names that the
viewer, later steps and users rely on):

- ``peak_energy``, ``peak_energy_err``, ``peak_fwhm``, ``peak_fwhm_err`` (eV),
  ``peak_height``, ``peak_area``: dims (peak, y, x), peaks ascending in energy;
- ``fit_status`` (int, legend in attrs), ``chi2_red``: (y, x);
- ``max_energy``, ``centroid_energy`` (eV), ``integrated_intensity``: (y, x);
- ``region`` (y, x), ``component_spectrum``, ``component_abundance`` and region
  statistics when decomposition ran;
- attrs: ``pmap_provenance`` (JSON: pmap version, input path and fingerprint,
  every step with parameters), ``pmap_result`` (format version) and
  ``pmap_complete`` (True only once every chunk has been written).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import xarray as xr

from ._progress import TqdmProgress
from .errors import FormatError, InputFileError, OutputExistsError
from .provenance import PROVENANCE_ATTR

__all__ = [
    "RESULT_FORMAT_VERSION",
    "assemble_result",
    "write_result",
    "open_result",
    "is_result_store",
    "prepare_output",
]

RESULT_FORMAT_VERSION = 1


def assemble_result(parts: list[xr.Dataset | xr.DataArray], *, provenance_json: str) -> xr.Dataset:
    """Merge result parts (maps, fit parameters, regions) into one lazy result Dataset.

    Each part keeps its variables' attrs; the Dataset's attrs get the combined
    provenance record (``provenance_json``) and the result-format markers.
    """
    dsets = [p.to_dataset() if isinstance(p, xr.DataArray) else p for p in parts]
    ds = xr.merge(dsets, compat="override", join="exact", combine_attrs="drop")
    ds.attrs = {
        "pmap_result": RESULT_FORMAT_VERSION,
        "pmap_complete": False,
        PROVENANCE_ATTR: provenance_json,
    }
    return ds


def is_result_store(path: str | Path) -> bool:
    """True if ``path`` is a Zarr store written by pmap as a result (complete or not)."""
    p = Path(path)
    if not p.is_dir():
        return False
    try:
        import zarr

        g = zarr.open_group(str(p), mode="r")
        return "pmap_result" in g.attrs
    except Exception:  # noqa: BLE001 - anything unreadable is simply not a result store
        return False


def prepare_output(path: str | Path, *, overwrite: bool, input_paths: tuple = ()) -> Path:
    """Check that a result can be written to ``path``; remove an old result if overwrite.

    Refuses to overwrite without ``overwrite=True`` (OutputExistsError), to
    delete anything that is not a pmap result store, and to write onto an input.
    """
    p = Path(path)
    for inp in input_paths:
        if inp is not None and Path(inp).resolve() == p.resolve():
            raise OutputExistsError(f"output {p} is the input file; choose another output path")
    if p.exists():
        if not overwrite:
            raise OutputExistsError(f"{p} exists; pass --overwrite (overwrite=True) to replace it")
        if not is_result_store(p):
            raise OutputExistsError(
                f"{p} exists and is not a pmap result store; refusing to delete it"
            )
        shutil.rmtree(p)
    p.parent.mkdir(parents=True, exist_ok=True)
    return p


def _mark_complete(path: Path) -> None:
    import zarr

    g = zarr.open_group(str(path), mode="r+")
    g.attrs["pmap_complete"] = True
    zarr.consolidate_metadata(str(path))


def write_result(
    ds: xr.Dataset,
    path: str | Path,
    *,
    overwrite: bool = False,
    progress: bool = True,
    input_paths: tuple = (),
) -> Path:
    """Write a lazy result Dataset to a Zarr store chunk by chunk, then mark it complete.

    The metadata are written first with ``pmap_complete = False``; the flag is
    set only after every chunk is written, so an interrupted run never looks
    complete. Returns the store path.
    """
    p = prepare_output(path, overwrite=overwrite, input_paths=input_paths)
    ds = ds.copy()
    ds.attrs["pmap_complete"] = False
    for v in ds.variables.values():
        v.encoding.pop("chunks", None)
        v.encoding.pop("preferred_chunks", None)
    delayed = ds.to_zarr(str(p), mode="w", compute=False, consolidated=True)
    with TqdmProgress("writing result", enabled=progress):
        delayed.compute()
    _mark_complete(p)
    return p


def open_result(path: str | Path, *, require_complete: bool = True) -> xr.Dataset:
    """Open a pmap result store lazily (xarray.open_zarr).

    Raises InputFileError if missing, FormatError if not a pmap result or (with
    ``require_complete``) if the run that wrote it did not finish.
    """
    p = Path(path)
    if not p.exists():
        raise InputFileError(f"no such result store: {p}")
    if not is_result_store(p):
        raise FormatError(f"{p} is not a pmap result store")
    ds = xr.open_zarr(str(p))
    if require_complete and not bool(ds.attrs.get("pmap_complete", False)):
        raise FormatError(f"{p} is incomplete (the run that wrote it did not finish); "
                          "rerun with --resume or --overwrite")
    return ds
