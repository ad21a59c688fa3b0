"""Reading and writing PL map cubes in open formats.

Readers (all through :func:`open_cube`, format from :func:`detect_format`):

* **Zarr** v2 and v3 stores (variable ``intensity``, or the only one), lazy;
* **NetCDF4/HDF5** via h5netcdf, lazy and chunked;
* **NumPy** ``.npy``, memory-mapped and wrapped in dask;
* **multi-page TIFF**, one page per spectral channel, memory-mapped when the
  pages are stored uncompressed and contiguous, else read page by page;
* **delimited text** (.csv, .tsv, .txt): long tables (x, y, wavelength,
  intensity per row) and wide tables (x, y, one column per channel), put on
  the inferred scan grid; missing pixels are NaN. :func:`text_to_zarr`
  converts files of any size in bounded memory.

Writers: :func:`save_cube` (Zarr v3 by default, v2, or NetCDF4) and
:func:`convert`. :func:`cube_info` / :func:`format_cube_info` summarise a file.

Axis sidecar (npy and TIFF)
---------------------------
An array file carries no axes, so they come from keyword options or from a
JSON file next to it named ``<name>.axes.json`` (``sample.npy`` →
``sample.axes.json``, ``stack.tif`` → ``stack.axes.json``), or from
``sidecar=path``. Its keys are exactly the keyword options; keywords given in
the call win::

    {
      "pmap_axes": 1,                      # schema version (optional, must be 1)
      "dims": ["y", "x", "wavelength"],    # npy only: order of the array's dims
      "wavelength_nm": [500.0, 500.5, ...],          # one value per channel, or
      "wavelength_start_nm": 500.0, "wavelength_step_nm": 0.5,
      "energy_ev": [...], "energy_start_ev": ..., "energy_step_ev": ...,
      "pixel_size_um": 0.5,                # or pixel_size_x_um / pixel_size_y_um
      "x0_um": 0.0, "y0_um": 0.0,          # position of the first pixel
      "units": "counts",                   # intensity unit
      "excitation_wavelength_nm": 532.0,   # any pmap.cube.METADATA_ATTRS key
      "temperature_K": 10.0,
      "attrs": {"sample": "wafer 3"}       # free attrs
    }

Exactly one spectral axis must be given; unknown keys or invalid JSON raise
:class:`~pmap.errors.FormatError`. Without a pixel size, x and y are pixel
indices (units "pixel").
"""

from __future__ import annotations

from ._api import convert, open_cube
from ._common import (
    FORMAT_EXTENSIONS,
    FORMATS,
    SUPPORTED_FORMATS,
    FileFormat,
    detect_format,
    get_format,
    recognises,
    sidecar_path,
)
from ._info import cube_info, format_cube_info
from ._text import text_to_zarr
from ._write import save_cube

__all__ = [
    "SUPPORTED_FORMATS",
    "FORMAT_EXTENSIONS",
    "FORMATS",
    "FileFormat",
    "get_format",
    "recognises",
    "open_cube",
    "detect_format",
    "sidecar_path",
    "save_cube",
    "convert",
    "text_to_zarr",
    "cube_info",
    "format_cube_info",
]
