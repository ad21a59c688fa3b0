"""Delimited text maps (.csv, .tsv, .txt): long and wide tables, streamed.

Two layouts, told apart by the header line:

* **long**: one row per pixel and channel, columns x, y, spectral value and
  intensity (e.g. ``x_um,y_um,wavelength_nm,intensity``);
* **wide**: one row per pixel, columns x, y, then one column per channel whose
  header is the channel value (e.g. ``x,y,600.0,600.5,601.0``).

Column roles are recognised from their names (x; y; wavelength, lambda, energy;
intensity, counts, value, signal), units from a suffix (``x_um``, ``energy_ev``)
or brackets (``x (mm)``, ``wavelength [nm]``); ``x_col=``, ``y_col=``,
``spectral_col=``, ``value_col=`` (names or 0-based indices) override them.
Lines starting with ``#`` before the header and elsewhere are ignored.

Reading is two streaming passes: the first collects the distinct positions and
channel values and infers the grid (:mod:`pmap.io._grid`); the second scatters
values into Zarr chunks held in a bounded buffer (least recently used chunks are
written out first), so memory stays near ``buffer_mib`` + one block of rows
whatever the file size. Spectral values must repeat exactly (same text) for every
pixel.

A plain numeric table (one delimiter, numbers only, no quotes or comments) of at
least 32 MiB is read by a compiled reader (:mod:`pmap.io._text_fast`, two threads) that gives the same
float64 values as pandas; for a long table its first pass also writes the rows to a
nameless temporary file beside the output, as runs (x, y and first spectral value
numbers of a pixel's consecutive channels) and values (4 bytes a row for float32
in pixel order, up to 20 in random order), which the second pass reads instead of
the text.
Any other table is read with ``pandas.read_csv(chunksize=...)`` in both passes.
"""

from __future__ import annotations

import csv
import io
import os
import re
import tempfile
from collections import OrderedDict
from collections.abc import Iterator, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr
import zarr

from ..conventions import CUBE_NAME, SPECTRAL_DIMS, length_to_um_factor, normalise_length_unit
from ..cube import DEFAULT_CHUNK_MIB, validate_cube
from ..errors import CubeValidationError, FormatError, InputFileError
from ..provenance import with_input
from ._common import META_OPTIONS, check_input, check_options, metadata_attrs
from ._grid import DEFAULT_TOLERANCE, Grid, infer_grid
from ._write import cube_dataset, prepare_output, write_zarr

TEXT_OPTIONS = (
    "x_col",
    "y_col",
    "spectral_col",
    "value_col",
    "columns",
    "delimiter",
    "decimal",
    "layout",
    "spectral_dim",
    "spectral_units",
    "xy_units",
    "pixel_size_um",
    "pixel_size_x_um",
    "pixel_size_y_um",
    "grid_tolerance",
    "min_fill",
    "dtype",
    *META_OPTIONS,
)

_X_NAMES = {"x", "xpos", "x_pos", "x_position", "pos_x", "posx", "position_x"}
_Y_NAMES = {"y", "ypos", "y_pos", "y_position", "pos_y", "posy", "position_y"}
_SPEC_NAMES = {
    "wavelength": {"wavelength", "lambda", "wl", "wave"},
    "energy": {"energy", "e", "photon_energy"},
}
_VALUE_NAMES = {"intensity", "counts", "count", "value", "signal", "i", "pl", "cps", "int"}
_UNIT_SUFFIX = re.compile(r"^(.*?)[ _](um|µm|μm|nm|mm|ev|mev|pixel|px)$")
_BRACKET_UNIT = re.compile(r"^(.*?)\s*[\(\[]\s*([^\)\]]*)\s*[\)\]]\s*$")
_MAX_CHANNELS = 200_000


@dataclass
class TextSpec:
    """How to read one text file: delimiter, header, column roles and units."""

    path: Path
    delimiter: str
    skiprows: int
    names: list[str]
    layout: str
    x: int
    y: int
    spectral: int | None = None
    value: int | None = None
    channel_cols: list[int] = field(default_factory=list)
    channel_values: np.ndarray | None = None
    spectral_dim: str = "wavelength"
    spectral_units: str = "nm"
    xy_units: str = "um"
    #: decimal mark of the numbers ("." or "," as in exports made under a European locale)
    decimal: str = "."


@dataclass
class TextLayout:
    """What the first pass learned: grids, channel values, row count, value range."""

    y: Grid
    x: Grid
    spectral: np.ndarray
    n_rows: int
    value_min: float | None = None
    value_max: float | None = None
    #: hash sets of the distinct x, y and spectral values when the compiled reader was used
    fast: Any = field(default=None, repr=False, compare=False)


def _split_name(name: str) -> tuple[str, str | None]:
    """Normalised base name and unit of a header field ("X (mm)" -> ("x", "mm"))."""
    s = name.strip().strip('"').strip("'")
    m = _BRACKET_UNIT.match(s)
    if m:
        return m.group(1).strip().lower().replace(" ", "_"), m.group(2).strip()
    low = s.lower().replace(" ", "_")
    m = _UNIT_SUFFIX.match(low)
    if m:
        return m.group(1), m.group(2)
    return low, None


def _split_fields(line: str, delimiter: str) -> list[str]:
    if delimiter == r"\s+":
        return line.split()
    return next(csv.reader(io.StringIO(line), delimiter=delimiter))


_DECIMAL_COMMA = re.compile(r"^\s*[-+]?\d+,\d+([eE][-+]?\d+)?\s*$")
_PLAIN_NUMBER = re.compile(r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$")


def _read_header(
    path: Path, delimiter: str | None, decimal: str | None = None
) -> tuple[str, int, list[str], str]:
    """Delimiter, number of lines up to and including the header, the header fields and
    the decimal mark.

    Without a stated delimiter, the one of tab, ";" and "," that splits the header and
    the first data row into the same number (≥ 3) of fields, most fields first (the
    file's extension breaks ties: "," for .csv, tab for .tsv), else runs of blanks.
    Without a stated decimal mark, "," when the delimiter is not "," and every field of
    the first data row that is a number with a comma reads as one ("0,5"; exports made
    under a European locale), else ".".
    """
    with open(path, encoding="utf-8", errors="replace", newline="") as fh:
        n = 0
        for line in fh:
            n += 1
            if line.strip() and not line.lstrip().startswith("#"):
                break
        else:
            raise FormatError(f"{path.name}: no header line found (empty text file)")
        data = next((ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")), "")
    line, data = line.rstrip("\r\n"), data.rstrip("\r\n")
    if delimiter is None:
        ext = path.suffix.lower()
        prefer = {".csv": ",", ".tsv": "\t"}.get(ext)
        counts = {}
        for d in ("\t", ";", ","):
            nh = len(_split_fields(line, d))
            if nh >= 3 and (not data or len(_split_fields(data, d)) == nh):
                counts[d] = nh
        if counts:
            best = max(counts.values())
            tied = [d for d in counts if counts[d] == best]
            delimiter = prefer if prefer in tied else tied[0]
        elif prefer is not None and len(_split_fields(line, prefer)) >= 3:
            delimiter = prefer
        else:
            delimiter = r"\s+"
    elif delimiter in ("tab", "\\t"):
        delimiter = "\t"
    elif delimiter in ("whitespace", "space", " "):
        delimiter = r"\s+"
    fields = [f.strip() for f in _split_fields(line, delimiter)]
    if len(fields) < 3:
        raise FormatError(
            f"{path.name}: header has {len(fields)} field(s) with delimiter {delimiter!r}; "
            "a map table needs x, y and spectral columns (state the delimiter with "
            "delimiter=';' or delimiter=tab)"
        )
    if decimal is None:
        decimal = "."
        if delimiter != "," and data:
            cells = [c for c in _split_fields(data, delimiter) if c.strip()]
            comma = [bool(_DECIMAL_COMMA.match(c)) for c in cells]
            if any(comma) and all(c or _PLAIN_NUMBER.match(v) for c, v in zip(comma, cells)):
                decimal = ","
    elif decimal not in (".", ","):
        raise FormatError(f"decimal must be '.' or ',', got {decimal!r}")
    if decimal == delimiter:
        raise FormatError(f"{path.name}: the decimal mark and the delimiter are both {decimal!r}")
    return delimiter, n, fields, decimal


def _find_col(fields: list[str], bases: list[str], given: Any, role: str, path: Path) -> int | None:
    if given is not None:
        if isinstance(given, int | np.integer):
            if not 0 <= int(given) < len(fields):
                raise FormatError(f"{path.name}: {role} column index {given} out of range")
            return int(given)
        if str(given) in fields:
            return fields.index(str(given))
        if str(given).isdigit() and int(given) < len(fields):
            return int(given)
        raise FormatError(f"{path.name}: no column named {given!r} for {role} (columns: {fields})")
    return None


def inspect_text(path: str | os.PathLike, **options: Any) -> TextSpec:
    """Read the header of a text map and decide layout, column roles and units."""
    p = check_input(path)
    delimiter, skip, fields, decimal = _read_header(
        p, options.get("delimiter"), options.get("decimal"))
    if len(set(fields)) != len(fields):
        dup = sorted({f for f in fields if fields.count(f) > 1})
        raise FormatError(f"{p.name}: duplicate column name(s) {dup} in the header")
    bases, units = zip(*(_split_name(f) for f in fields), strict=True)
    cols = dict(options.get("columns") or {})
    unknown = set(cols) - {"x", "y", "spectral", "value"}
    if unknown:
        raise FormatError(f"columns= keys must be x, y, spectral, value; got {sorted(unknown)}")
    pick = {
        r: _find_col(fields, list(bases), options.get(f"{r}_col", cols.get(r)), r, p)
        for r in ("x", "y", "spectral", "value")
    }

    def by_name(names: set[str]) -> int | None:
        hits = [i for i, b in enumerate(bases) if b in names]
        return hits[0] if hits else None

    ix = pick["x"] if pick["x"] is not None else by_name(_X_NAMES)
    iy = pick["y"] if pick["y"] is not None else by_name(_Y_NAMES)
    if ix is None or iy is None:
        raise FormatError(
            f"{p.name}: cannot find the x and y columns in header {fields}; "
            "name them with x_col= and y_col="
        )
    isp, sdim = pick["spectral"], options.get("spectral_dim")
    if isp is None:
        for dim, names in _SPEC_NAMES.items():
            hit = by_name(names)
            if hit is not None:
                isp, sdim = hit, sdim or dim
                break
    elif sdim is None:
        energy = bases[isp] in _SPEC_NAMES["energy"] or str(units[isp]).lower() in ("ev", "mev")
        sdim = "energy" if energy else "wavelength"
    ival = pick["value"] if pick["value"] is not None else by_name(_VALUE_NAMES)
    rest = [i for i in range(len(fields)) if i not in (ix, iy)]
    layout = options.get("layout")
    if layout is None:
        if isp is not None and ival is None and len(rest) == 2:
            ival = next(i for i in rest if i != isp)
        layout = "long" if isp is not None and ival is not None else "wide"
    if layout not in ("long", "wide"):
        raise FormatError(f"layout must be 'long' or 'wide', got {layout!r}")
    xy_units = options.get("xy_units") or units[ix] or "um"
    try:
        xy_units = normalise_length_unit(xy_units)
    except CubeValidationError as exc:
        raise FormatError(f"{p.name}: {exc}") from exc
    spec = TextSpec(p, delimiter, skip, fields, layout, ix, iy, xy_units=xy_units,
                    decimal=decimal)
    if layout == "long":
        if isp is None or ival is None:
            raise FormatError(
                f"{p.name}: long table needs a spectral and an intensity column (header {fields}); "
                "name them with spectral_col= and value_col="
            )
        spec.spectral, spec.value = isp, ival
        spec.spectral_dim = sdim or "wavelength"
        spec.spectral_units = options.get("spectral_units") or units[isp] or ""
    else:
        vals = []
        for i in rest:
            base = re.sub(r"\s*(nm|ev|mev|cm-1)$", "", fields[i].strip().lower())
            try:
                vals.append(float(base.replace(",", ".") if decimal == "," else base))
            except ValueError:
                raise FormatError(
                    f"{p.name}: cannot read the table layout: column {fields[i]!r} is neither a "
                    "spectral/intensity column (long table) nor a channel value (wide table); "
                    "expected x,y,wavelength,intensity or x,y,<channel values...>"
                ) from None
        order = np.argsort(vals, kind="stable")
        spec.channel_cols = [rest[i] for i in order]
        spec.channel_values = np.asarray(vals)[order]
        if np.any(np.diff(spec.channel_values) == 0):
            raise FormatError(f"{p.name}: duplicate channel values in the header")
        spec.spectral_dim = sdim or "wavelength"
        spec.spectral_units = options.get("spectral_units") or ""
    if spec.spectral_dim not in SPECTRAL_DIMS:
        raise FormatError(f"spectral_dim must be one of {list(SPECTRAL_DIMS)}")
    spec.spectral_units = spec.spectral_units or SPECTRAL_DIMS[spec.spectral_dim]
    _check_tail(spec)
    return spec


def _check_tail(spec: TextSpec) -> None:
    """Raise InputFileError when the last line is cut short (truncated file)."""
    size = spec.path.stat().st_size
    with open(spec.path, "rb") as fh:
        fh.seek(max(0, size - 65536))
        tail = fh.read()
    if tail.endswith(b"\n"):
        return
    last = tail.rsplit(b"\n", 1)[-1].decode("utf-8", errors="replace")
    if not last.strip() or last.lstrip().startswith("#"):
        return
    n = len(last.split()) if spec.delimiter == r"\s+" else len(last.split(spec.delimiter))
    if n < len(spec.names):
        raise InputFileError(
            f"{spec.path.name} looks truncated: its last line has {n} of {len(spec.names)} fields"
        )


def _blocks(spec: TextSpec, cols: list[int], chunk_rows: int) -> Iterator[tuple[int, np.ndarray]]:
    """Yield (first row number, float array of the chosen columns) blocks of the table."""
    names = [f"c{i}" for i in range(len(spec.names))]
    want = [names[i] for i in cols]
    try:
        reader = pd.read_csv(
            spec.path,
            sep=spec.delimiter,
            decimal=spec.decimal,
            header=None,
            names=names,
            usecols=sorted(set(want)),
            skiprows=spec.skiprows,
            comment="#",
            dtype=np.float64,
            chunksize=chunk_rows,
            engine="c",
            skip_blank_lines=True,
        )
        row = 0
        with reader:
            for df in reader:
                arr = df[want].to_numpy()
                yield row, arr
                row += len(arr)
    except (ValueError, pd.errors.ParserError) as exc:
        raise FormatError(f"{spec.path.name}: cannot parse the table ({exc})") from exc


def _bad_rows(block: np.ndarray, row0: int, spec: TextSpec, what: str) -> None:
    bad = ~np.isfinite(block)
    if np.any(bad):
        r = int(np.flatnonzero(bad.any(axis=1))[0])
        raise FormatError(
            f"{spec.path.name}: data row {row0 + r + 1} has a missing or non-numeric {what} "
            "(truncated or corrupt file?)"
        )


def _grid_step(options: Mapping[str, Any], dim: str, unit: str) -> float | None:
    step = options.get(f"pixel_size_{dim}_um", options.get("pixel_size_um"))
    if step is None:
        return None
    if unit == "pixel":
        return float(step)
    return float(step) / length_to_um_factor(unit)


def scan_text(
    spec: TextSpec, *, chunk_rows: int = 1_000_000, value_range: bool = False, **options: Any
) -> TextLayout:
    """First pass: distinct positions and channel values, grids, rows, value range.

    A plain numeric table is read by the compiled reader (:mod:`pmap.io._text_fast`);
    anything else (quotes, comments, missing or non-numeric values...) by pandas.
    """
    return _scan(spec, chunk_rows, value_range, options)


def _layout(
    spec: TextSpec, ux: np.ndarray, uy: np.ndarray, spectral: np.ndarray, n: int,
    vmin: float, vmax: float, value_range: bool, options: Mapping[str, Any],
) -> TextLayout:  # fmt: skip
    """Grids from the distinct positions; the TextLayout of a finished first pass."""
    tol = float(options.get("grid_tolerance", DEFAULT_TOLERANCE))
    fill = float(options.get("min_fill", 0.5))
    gx = infer_grid(
        ux, step=_grid_step(options, "x", spec.xy_units), tolerance=tol, min_fill=fill, axis="x"
    )
    gy = infer_grid(
        uy, step=_grid_step(options, "y", spec.xy_units), tolerance=tol, min_fill=fill, axis="y"
    )
    return TextLayout(
        gy,
        gx,
        spectral,
        n,
        vmin if value_range and np.isfinite(vmin) else None,
        vmax if value_range and np.isfinite(vmax) else None,
    )


def _scan_pandas(
    spec: TextSpec, chunk_rows: int, value_range: bool, options: Mapping[str, Any]
) -> TextLayout:
    """First pass with pandas.read_csv (any table pandas reads)."""
    xs: list[np.ndarray] = []
    ys: list[np.ndarray] = []
    sv = np.empty(0)
    n = 0
    vmin, vmax = np.inf, -np.inf
    long = spec.layout == "long"
    cols = [spec.x, spec.y] + ([spec.spectral] if long else [])
    if value_range:
        cols += [spec.value] if long else spec.channel_cols
    ux, uy = np.empty(0), np.empty(0)
    for row0, block in _blocks(spec, cols, chunk_rows):
        _bad_rows(block[:, : 3 if long else 2], row0, spec, "position or spectral value")
        xs.append(np.unique(block[:, 0]))
        ys.append(np.unique(block[:, 1]))
        if long:
            sv = np.union1d(sv, np.unique(block[:, 2]))
            if sv.size > _MAX_CHANNELS:
                raise FormatError(
                    f"{spec.path.name}: more than {_MAX_CHANNELS} distinct spectral values; "
                    "the spectral column must repeat the same channel values for every pixel"
                )
        if value_range:
            v = block[:, 3 if long else 2 :]
            if np.isfinite(v).any():
                vmin, vmax = min(vmin, float(np.nanmin(v))), max(vmax, float(np.nanmax(v)))
        if len(xs) > 16:  # keep the lists short
            ux, uy = np.unique(np.concatenate([ux, *xs])), np.unique(np.concatenate([uy, *ys]))
            xs, ys = [], []
        n += len(block)
    if n == 0:
        raise FormatError(f"{spec.path.name}: the table has a header but no data rows")
    ux = np.unique(np.concatenate([ux, *xs]))
    uy = np.unique(np.concatenate([uy, *ys]))
    spectral = sv if long else np.asarray(spec.channel_values)
    return _layout(spec, ux, uy, spectral, n, vmin, vmax, value_range, options)


# ---- compiled reader for plain numeric tables ---------------------------------------------

#: Bytes read from the file at a time by the compiled reader.
_FAST_READ_BYTES = 8 << 20
#: Smaller files are read with pandas: loading the compiled kernels (about 0.6 s the
#: first time in a process) costs more than it saves below a few tens of MB.
_FAST_MIN_BYTES = 32 << 20
_NOT_DELIMITERS = set(b'0123456789+-.eE"#\r\n')


class _NotPlain(Exception):
    """The table is not plain numeric text: read it with pandas instead."""


def _fast_delimiter(spec: TextSpec) -> int | None:
    """Delimiter byte for the compiled reader (0: runs of blanks), None if it cannot read it
    (or the file is too small for it to pay)."""
    try:
        if spec.path.stat().st_size < _FAST_MIN_BYTES:
            return None
    except OSError:
        return None
    if spec.decimal != ".":  # decimal commas: pandas reads them
        return None
    if spec.delimiter == r"\s+":
        return 0
    d = spec.delimiter.encode("utf-8", errors="replace")
    if len(d) != 1 or d[0] in _NOT_DELIMITERS or d == b" ":
        return None
    return d[0]


def _fast_blocks(
    spec: TextSpec, cols: list[int], chunk_rows: int, *, by_row: bool
) -> Iterator[tuple[int, np.ndarray]]:
    """Yield (first row number, values) blocks parsed by the compiled reader.

    ``values[k, i]`` is column ``cols[k]`` of row i (float64; rows contiguous in memory
    when ``by_row``). Arrays are reused: use a block before asking for the next.
    Each read of the file is cut at a line end into two halves parsed by two threads.
    Raises _NotPlain at the first line the reader does not take.
    """
    from . import _text_fast as tf

    delim = _fast_delimiter(spec)
    if delim is None or len(set(cols)) != len(cols):
        raise _NotPlain
    ncols = len(spec.names)
    slot = np.full(ncols, -1, dtype=np.int64)
    slot[cols] = np.arange(len(cols))
    nthreads = 2 if (os.cpu_count() or 1) > 1 else 1
    cap = max(1, min(int(chunk_rows), _FAST_READ_BYTES // nthreads // (2 * ncols) + 1))
    outs = [
        np.empty((cap, len(cols))).T if by_row else np.empty((len(cols), cap))
        for _ in range(nthreads)
    ]
    helper = ThreadPoolExecutor(1) if nthreads > 1 else None
    try:
        with open(spec.path, "rb") as fh:
            for _ in range(spec.skiprows):
                line = fh.readline()
                if b'"' in line or b"\r" in line.rstrip(b"\n").removesuffix(b"\r"):
                    raise _NotPlain
            buf = np.empty(_FAST_READ_BYTES, dtype=np.uint8)
            carry, row = 0, 0
            while True:
                if carry == buf.size:  # one line longer than the buffer
                    buf = np.concatenate([buf, np.empty_like(buf)])
                got = fh.readinto(memoryview(buf)[carry:])
                eof = not got
                end = carry + got
                cuts = [0, end]
                if helper is not None and end > 1 << 20:
                    mid = end // 2
                    k = bytes(buf[mid:end]).find(b"\n")
                    if k >= 0:
                        cuts.insert(1, mid + k + 1)
                spans = [(a, b, eof and b == end) for a, b in zip(cuts[:-1], cuts[1:])]

                def parse(i: int, pos: int, buf=buf, spans=spans) -> tuple[int, int, int]:
                    _a, b, final = spans[i]
                    return tf.parse_block(
                        buf, pos, b, final, delim, ncols, slot, outs[i], 0, tf.POW10
                    )

                later = [helper.submit(parse, i, spans[i][0]) for i in range(1, len(spans))]
                done = [parse(0, spans[0][0])] + [f.result() for f in later]
                pos = 0
                for i, (status, pos, n) in enumerate(done):
                    while True:
                        if status == tf.BAIL:
                            raise _NotPlain
                        if n:
                            yield row, outs[i][:, :n]
                            row += n
                        if status == tf.DONE:
                            break
                        status, pos, n = parse(i, pos)
                if eof:
                    break
                carry = end - pos
                buf[:carry] = buf[pos:end]
    finally:
        if helper is not None:
            helper.shutdown(wait=True)


def _bits(values: np.ndarray) -> np.ndarray:
    """The int64 bit patterns of a row of float64 values (contiguous copy if needed)."""
    return np.ascontiguousarray(values).view(np.int64)


class _Interner:
    """Distinct float64 values numbered in order of first appearance (hash table by bit
    pattern, -0.0 taken as 0.0)."""

    def __init__(self, size: int = 1 << 12) -> None:
        from . import _text_fast as tf

        self.tf = tf
        self._alloc(size)

    def _alloc(self, size: int) -> None:
        self.table = np.full(size, self.tf.EMPTY, dtype=np.int64)
        self.ids = np.zeros(size, dtype=np.int64)
        self.order = np.empty(size // 2, dtype=np.int64)
        self.count = np.zeros(1, dtype=np.int64)

    def add(self, bits: np.ndarray, out: np.ndarray) -> None:
        """Number the values (``out[i]``: the number of bits[i]), adding new ones."""
        start = 0
        while True:
            start = self.tf.intern(
                bits, bits.size, self.table, self.ids, self.order, self.count, out, start
            )
            if start == bits.size:
                return
            keys = self.order[: self.n].copy()
            self._alloc(2 * self.table.size)
            scratch = np.empty(keys.size, dtype=np.int32)
            self.tf.intern(
                keys, keys.size, self.table, self.ids, self.order, self.count, scratch, 0
            )

    def lookup(self, bits: np.ndarray, out: np.ndarray) -> None:
        """``out[i]``: the number of bits[i], -1 where it is not known."""
        self.tf.lookup(bits, bits.size, self.table, self.ids, out)

    @property
    def n(self) -> int:
        return int(self.count[0])

    def keys(self) -> np.ndarray:
        """The values, in the order they are numbered."""
        return self.order[: self.n].view(np.float64)


def _scan(
    spec: TextSpec,
    chunk_rows: int,
    value_range: bool,
    options: Mapping[str, Any],
    spill: Any = None,
    spill_dtype: Any = None,
) -> TextLayout:
    """First pass by the compiled reader when it takes the table, else by pandas.

    With ``spill`` (a binary file) and a long table read by the compiled reader, every
    row is also written there as numbers of its x, y and spectral values and its value
    (``spill_dtype``), so that the second pass reads that instead of the text.
    """
    if _fast_delimiter(spec) is not None:
        try:
            return _scan_fast(spec, chunk_rows, value_range, options, spill, spill_dtype)
        except _NotPlain:
            if spill is not None:
                spill.seek(0)
                spill.truncate()
    return _scan_pandas(spec, chunk_rows, value_range, options)


def _scan_fast(
    spec: TextSpec,
    chunk_rows: int,
    value_range: bool,
    options: Mapping[str, Any],
    spill: Any = None,
    spill_dtype: Any = None,
) -> TextLayout:
    """First pass with the compiled reader; raises _NotPlain for tables it does not take.

    Every column the second pass needs is parsed here, so that a table taken by this
    pass is taken by the second one too.
    """
    long = spec.layout == "long"
    cols = [spec.x, spec.y] + ([spec.spectral, spec.value] if long else spec.channel_cols)
    nv = 3 if long else 2
    sets = [_Interner() for _ in range(nv)]
    ids = np.empty((nv, 0), dtype=np.int32)
    runs = np.empty((4, 0), dtype=np.int32)
    n = 0
    vmin, vmax = np.inf, -np.inf
    spill = spill if long else None
    for _row0, block in _fast_blocks(spec, cols, chunk_rows, by_row=not long):
        m = block.shape[1]
        if ids.shape[1] < m:
            ids = np.empty((nv, m), dtype=np.int32)
        for k in range(nv):
            sets[k].add(_bits(block[k]), ids[k, :m])
        if long and sets[2].n > _MAX_CHANNELS:
            raise FormatError(
                f"{spec.path.name}: more than {_MAX_CHANNELS} distinct spectral values; "
                "the spectral column must repeat the same channel values for every pixel"
            )
        if value_range and m:
            v = block[nv:]
            vmin, vmax = min(vmin, float(v.min())), max(vmax, float(v.max()))
        if spill is not None:
            if runs.shape[1] < m:
                runs = np.empty((4, m), dtype=np.int32)
            nr = sets[0].tf.encode_runs(ids[0], ids[1], ids[2], m, *runs)
            spill.write(np.array([m, nr], dtype=np.int64).tobytes())
            for k in range(4):
                spill.write(runs[k, :nr])
            spill.write(np.ascontiguousarray(block[nv], dtype=spill_dtype))
        n += m
    if n == 0:
        raise FormatError(f"{spec.path.name}: the table has a header but no data rows")
    ux, uy = np.unique(sets[0].keys()), np.unique(sets[1].keys())
    spectral = np.unique(sets[2].keys()) if long else np.asarray(spec.channel_values)
    layout = _layout(spec, ux, uy, spectral, n, vmin, vmax, value_range, options)
    layout.fast = sets
    return layout


def _spilled(spill: Any, dtype: Any) -> Iterator[tuple[np.ndarray, ...]]:
    """Blocks written by _scan_fast: runs (x, y, first spectral number, length; see
    ``_text_fast.encode_runs``) and the rows' values."""
    spill.seek(0)
    while True:
        head = spill.read(16)
        if len(head) < 16:
            return
        m, nr = (int(v) for v in np.frombuffer(head, dtype=np.int64))
        parts = [np.empty(nr, dtype=np.int32) for _ in range(4)] + [np.empty(m, dtype=dtype)]
        for a in parts:
            if spill.readinto(memoryview(a).cast("B")) != a.nbytes:
                raise InputFileError("the conversion's temporary file was cut short")
        yield tuple(parts)


def _fill_fast(
    spec: TextSpec,
    layout: TextLayout,
    array: zarr.Array,
    *,
    chunk_rows: int,
    tolerance: float,
    buffer_mib: float,
    spill: Any = None,
    spill_dtype: Any = None,
) -> None:
    """Second pass: values into a pool of whole chunks, from ``spill`` (long tables) or
    the text again (compiled reader).

    The pool holds ``buffer_mib`` of chunks (at least one); when a row needs a chunk
    not in it, the least recently used one is written out, and a chunk written
    before is read back when needed again. A cell given twice raises FormatError.
    """
    from . import _text_fast as tf

    long = spec.layout == "long"
    sets = layout.fast
    xmap = layout.x.index(sets[0].keys(), tolerance=tolerance, axis="x")
    ymap = layout.y.index(sets[1].keys(), tolerance=tolerance, axis="y")
    smap = np.searchsorted(layout.spectral, sets[2].keys()) if long else np.zeros(1, np.int64)
    cy, cx, ns = array.chunks
    ny, nx, _ = array.shape
    nbx, nby = -(-nx // cx), -(-ny // cy)
    chunk_bytes = cy * cx * ns * array.dtype.itemsize
    n_slots = int(max(1, min(nby * nbx, int(buffer_mib * 2**20) // chunk_bytes)))
    pool = np.empty((n_slots, cy, cx, ns), dtype=array.dtype)
    slot_of = np.full(nby * nbx, -1, dtype=np.int64)
    key_of = np.full(n_slots, -1, dtype=np.int64)
    stamp = np.zeros(n_slots, dtype=np.int64)
    clock = np.ones(1, dtype=np.int64)
    res = np.zeros(3, dtype=np.int64)
    written: set[int] = set()

    def where(key: int) -> tuple[slice, slice]:
        by, bx = divmod(key, nbx)
        return slice(by * cy, min((by + 1) * cy, ny)), slice(bx * cx, min((bx + 1) * cx, nx))

    def evict(s: int) -> None:
        key = int(key_of[s])
        ys, xs = where(key)
        array[ys, xs, :] = pool[s, : ys.stop - ys.start, : xs.stop - xs.start]
        written.add(key)
        slot_of[key], key_of[s] = -1, -1

    def load(key: int) -> None:
        free = np.flatnonzero(key_of < 0)
        s = int(free[0]) if free.size else int(np.argmin(stamp))
        if key_of[s] >= 0:
            evict(s)
        pool[s] = np.nan
        if key in written:
            ys, xs = where(key)
            pool[s, : ys.stop - ys.start, : xs.stop - xs.start] = array[ys, xs, :]
        slot_of[key], key_of[s] = s, key

    def describe(iy: int, ix: int, ic: int | None) -> str:
        at = f"x={layout.x.values[ix]:g}, y={layout.y.values[iy]:g}"
        if ic is not None:
            at += f", {spec.spectral_dim}={layout.spectral[ic]:g}"
        return f"{spec.path.name}: duplicate position ({at} {spec.xy_units}): two rows give it"

    def reparsed() -> Iterator[tuple[np.ndarray, ...]]:
        cols = [spec.x, spec.y] + ([spec.spectral, spec.value] if long else spec.channel_cols)
        nv = 3 if long else 2
        ids = np.empty((nv, 0), dtype=np.int32)
        for _row0, block in _fast_blocks(spec, cols, chunk_rows, by_row=not long):
            m = block.shape[1]
            if ids.shape[1] < m:
                ids = np.empty((nv, m), dtype=np.int32)
            for k in range(nv):
                sets[k].lookup(_bits(block[k]), ids[k, :m])
            sid = ids[2, :m] if long else ids[2:, :0].ravel()
            yield ids[0, :m], ids[1, :m], sid, block[nv:]

    try:
        vpos = np.zeros(1, dtype=np.int64)
        for rx, ry, rs, rl, vals in _spilled(spill, spill_dtype) if spill is not None else ():
            vpos[0], start = 0, 0
            while True:
                status, start = tf.scatter_runs(
                    rx, ry, rs, rl, rx.size, start, vals, vpos, xmap, ymap, smap,
                    cy, cx, nbx, slot_of, pool, stamp, clock, res,
                )  # fmt: skip
                if status == tf.DONE:
                    break
                if status == tf.NEED_CHUNK:
                    load(int(res[0]))
                else:
                    raise FormatError(describe(int(res[0]), int(res[1]), int(res[2])))
        for xid, yid, sid, vals in reparsed() if spill is None else ():
            n = xid.size
            start = 0
            while True:
                status, start = tf.scatter(
                    xid, yid, sid, vals, n, start, xmap, ymap, smap,
                    cy, cx, nbx, slot_of, pool, stamp, clock, res,
                )  # fmt: skip
                if status == tf.DONE:
                    break
                if status == tf.NEED_CHUNK:
                    load(int(res[0]))
                elif status == tf.DUPLICATE:
                    ic = int(res[2])
                    raise FormatError(describe(int(res[0]), int(res[1]), ic if ic >= 0 else None))
                else:
                    raise _NotPlain
    except _NotPlain:
        raise FormatError(
            f"{spec.path.name}: the file changed between the two passes of the conversion"
        ) from None
    # the chunks still in the pool: encoded and written by two threads at once
    left = [s for s in range(n_slots) if key_of[s] >= 0]
    if len(left) > 1 and (os.cpu_count() or 1) > 1:
        with ThreadPoolExecutor(2) as writers:
            list(writers.map(evict, left))
    else:
        for s in left:
            evict(s)


class _ChunkBuffer:
    """Scatter values into a Zarr array through a bounded buffer of whole chunks.

    Chunks are kept in memory until the buffer exceeds ``budget`` bytes, then the
    least recently touched ones are written; a chunk touched again later is read
    back and merged. A cell written twice raises FormatError (duplicate point).
    """

    def __init__(self, array: zarr.Array, budget: int, describe) -> None:
        self.array = array
        self.cy, self.cx, self.ns = array.chunks
        self.ny, self.nx, _ = array.shape
        self.nbx = -(-self.nx // self.cx)
        self.budget = max(budget, 1)
        self.buf: OrderedDict[int, np.ndarray] = OrderedDict()
        self.written: set[int] = set()
        self.describe = describe
        self.nbytes = 0

    def _slices(self, key: int) -> tuple[slice, slice]:
        by, bx = divmod(key, self.nbx)
        return (
            slice(by * self.cy, min((by + 1) * self.cy, self.ny)),
            slice(bx * self.cx, min((bx + 1) * self.cx, self.nx)),
        )

    def put(self, iy: np.ndarray, ix: np.ndarray, ic: np.ndarray | None, vals: np.ndarray) -> None:
        """Write values at pixel (iy, ix), channel ic (or all channels when ic is None)."""
        keys = (iy // self.cy) * self.nbx + ix // self.cx
        order = np.argsort(keys, kind="stable")
        keys, iy, ix, vals = keys[order], iy[order], ix[order], vals[order]
        if ic is not None:
            ic = ic[order]
        starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
        ends = np.r_[starts[1:], len(keys)]
        for s, e in zip(starts, ends):
            key = int(keys[s])
            chunk = self.buf.get(key)
            if chunk is None:
                ys, xs = self._slices(key)
                chunk = np.full(
                    (ys.stop - ys.start, xs.stop - xs.start, self.ns),
                    np.nan,
                    dtype=self.array.dtype,
                )
                self.buf[key] = chunk
                self.nbytes += chunk.nbytes
            self.buf.move_to_end(key)
            ly, lx = iy[s:e] % self.cy, ix[s:e] % self.cx
            if ic is None:
                taken = ~np.all(np.isnan(chunk[ly, lx, :]), axis=-1)
            else:
                taken = ~np.isnan(chunk[ly, lx, ic[s:e]])
            if np.any(taken):
                j = s + int(np.flatnonzero(taken)[0])
                raise FormatError(self.describe(iy[j], ix[j], None if ic is None else ic[j]))
            if ic is None:
                chunk[ly, lx, :] = vals[s:e]
            else:
                chunk[ly, lx, ic[s:e]] = vals[s:e]
        while self.nbytes > self.budget and len(self.buf) > 1:
            self._evict(next(iter(self.buf)))

    def _evict(self, key: int) -> None:
        chunk = self.buf.pop(key)
        self.nbytes -= chunk.nbytes
        ys, xs = self._slices(key)
        if key in self.written:
            old = self.array[ys, xs, :]
            both = ~np.isnan(old) & ~np.isnan(chunk)
            if np.any(both):
                ly, lx, c = (int(v[0]) for v in np.nonzero(both))
                raise FormatError(self.describe(ys.start + ly, xs.start + lx, c))
            chunk = np.where(np.isnan(chunk), old, chunk)
        self.array[ys, xs, :] = chunk
        self.written.add(key)

    def flush(self) -> None:
        while self.buf:
            self._evict(next(iter(self.buf)))


def _first_duplicate(flat: np.ndarray) -> int | None:
    s = np.sort(flat, kind="stable")
    d = np.flatnonzero(s[1:] == s[:-1])
    return None if d.size == 0 else int(s[d[0]])


def _skeleton(
    spec: TextSpec, layout: TextLayout, attrs: dict, dtype: str, target_chunk_mib: float
) -> xr.DataArray:
    """Lazy all-NaN cube with the text map's coordinates, validated (µm, units...)."""
    shape = (layout.y.n, layout.x.n, layout.spectral.size)
    data = da.full(shape, np.nan, dtype=dtype, chunks=(-1, -1, -1))
    sdim = spec.spectral_dim
    coords = {
        "y": ("y", layout.y.values, {"units": spec.xy_units}),
        "x": ("x", layout.x.values, {"units": spec.xy_units}),
        sdim: (sdim, layout.spectral, {"units": spec.spectral_units}),
    }
    arr = xr.DataArray(data, dims=("y", "x", sdim), coords=coords, name=CUBE_NAME, attrs=attrs)
    try:
        return validate_cube(arr, target_chunk_mib=target_chunk_mib, rechunk=True)
    except CubeValidationError as exc:
        raise CubeValidationError(f"{spec.path.name}: {exc}") from exc


def _fill(
    spec: TextSpec,
    layout: TextLayout,
    array: zarr.Array,
    *,
    chunk_rows: int,
    tolerance: float,
    buffer_mib: float,
) -> None:
    """Second pass: read the values and scatter them into the Zarr array."""
    ns = layout.spectral.size

    def describe(iy: int, ix: int, ic: int | None) -> str:
        where = f"x={layout.x.values[ix]:g}, y={layout.y.values[iy]:g}"
        if ic is not None and spec.layout == "long":
            where += f", {spec.spectral_dim}={layout.spectral[ic]:g}"
        return f"{spec.path.name}: duplicate position ({where} {spec.xy_units}): two rows give it"

    buf = _ChunkBuffer(array, int(buffer_mib * 2**20), describe)
    long = spec.layout == "long"
    cols = [spec.x, spec.y] + ([spec.spectral, spec.value] if long else spec.channel_cols)
    for row0, block in _blocks(spec, cols, chunk_rows):
        _bad_rows(block[:, : 3 if long else 2], row0, spec, "position or spectral value")
        ix = layout.x.index(block[:, 0], tolerance=tolerance, axis="x")
        iy = layout.y.index(block[:, 1], tolerance=tolerance, axis="y")
        if long:
            ic = np.searchsorted(layout.spectral, block[:, 2])
            ic = np.minimum(ic, ns - 1)
            if not np.array_equal(layout.spectral[ic], block[:, 2]):
                raise FormatError(f"{spec.path.name}: spectral values changed between passes")
            flat = (iy * layout.x.n + ix) * ns + ic
            vals = block[:, 3]
        else:
            ic = None
            flat = iy * layout.x.n + ix
            vals = block[:, 2:]
        dup = _first_duplicate(flat)
        if dup is not None:
            pix, c = divmod(dup, ns) if long else (dup, None)
            raise FormatError(describe(*divmod(pix, layout.x.n), c))
        buf.put(iy, ix, ic, vals)
    buf.flush()


def text_to_zarr(
    path: str | os.PathLike,
    out: str | os.PathLike | zarr.abc.store.Store,
    *,
    chunk_rows: int = 1_000_000,
    overwrite: bool = False,
    zarr_format: int = 3,
    target_chunk_mib: float = DEFAULT_CHUNK_MIB,
    buffer_mib: float = 256.0,
    **options: Any,
) -> Path | zarr.abc.store.Store:
    """Convert a text map (long or wide table) to a Zarr cube in bounded memory.

    Parameters
    ----------
    path : str or path-like
        The .csv/.tsv/.txt table (any size).
    out : str, path-like or zarr Store
        Output Zarr store (must not exist unless ``overwrite``).
    chunk_rows : int
        Most rows parsed per block (memory ≈ chunk_rows × columns × 8 bytes × a few);
        the compiled reader parses at most 8 MiB of text at a time.
    overwrite : bool
        Replace an existing output.
    zarr_format : {2, 3}
        Zarr format version.
    target_chunk_mib : float
        Size of one spatial chunk of the cube in MiB (spectral axis whole).
    buffer_mib : float
        Memory for chunks being filled, in MiB.
    **options
        Text read options: ``x_col``, ``y_col``, ``spectral_col``, ``value_col``,
        ``columns``, ``delimiter``, ``layout`` ("long"/"wide"), ``spectral_dim``,
        ``spectral_units``, ``xy_units``, ``pixel_size_um``, ``grid_tolerance``
        (fraction of a step, default 0.15), ``min_fill`` (default 0.5), ``dtype`` (default
        float32), ``units`` and metadata such as ``excitation_wavelength_nm``.

    Returns
    -------
    pathlib.Path or zarr Store
        Where the cube was written. Pixels absent from the table are NaN.

    Raises
    ------
    FormatError
        Unreadable layout, points off a regular grid, duplicate positions.
    InputFileError
        Missing or truncated file.
    """
    check_options(options, TEXT_OPTIONS, "text")
    spec = inspect_text(path, **options)
    attrs = with_input(metadata_attrs(options), spec.path, fmt=f"text-{spec.layout}")
    target: Any = out
    if isinstance(out, str | os.PathLike):
        target = prepare_output(out, overwrite=overwrite, attrs=attrs)
    dtype = str(options.get("dtype", "float32"))
    try:
        plain = np.dtype(dtype) in (np.float32, np.float64)
    except TypeError:
        plain = False
    # a long table read by the compiled reader is parsed once: the first pass writes
    # its rows as numbers to a nameless temporary file (4-20 bytes a row) that the
    # second pass reads instead of the text
    spill = None
    if plain and spec.layout == "long" and _fast_delimiter(spec) is not None:
        where = Path(target).parent if isinstance(target, Path) else None
        spill = tempfile.TemporaryFile(prefix="pmap-text-", dir=where)
    try:
        layout = _scan(spec, chunk_rows, False, options, spill, np.dtype(dtype) if plain else None)
        skel = _skeleton(spec, layout, attrs, dtype, target_chunk_mib)
        write_zarr(cube_dataset(skel), target, zarr_format=zarr_format, compute=False)
        # every chunk is stored, all-NaN ones too (a missing chunk then means a damaged store)
        with zarr.config.set({"array.write_empty_chunks": True}):
            array = zarr.open_group(target, mode="r+")[CUBE_NAME]
            # grids and channel values ascend, so validate_cube kept the index order
            tolerance = float(options.get("grid_tolerance", DEFAULT_TOLERANCE))
            if layout.fast is not None and array.dtype in (np.float32, np.float64):
                _fill_fast(
                    spec,
                    layout,
                    array,
                    chunk_rows=chunk_rows,
                    tolerance=tolerance,
                    buffer_mib=buffer_mib,
                    spill=spill if spill is not None and spill.tell() > 0 else None,
                    spill_dtype=np.dtype(dtype) if plain else None,
                )
            else:
                _fill(
                    spec,
                    layout,
                    array,
                    chunk_rows=chunk_rows,
                    tolerance=tolerance,
                    buffer_mib=buffer_mib,
                )
    finally:
        if spill is not None:
            spill.close()
    return target
