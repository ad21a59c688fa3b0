"""Result store: assembling per-pixel maps into one Dataset and writing it to Zarr.

A pmap *result store* is a Zarr store readable by ``xarray.open_zarr`` holding
maps with coords y, x in µm and CF ``units`` attrs. Contract (names that the
viewer, later steps and users rely on):

- ``peak_energy``, ``peak_energy_err``, ``peak_fwhm``, ``peak_fwhm_err`` (eV),
  ``peak_height``, ``peak_area``: dims (peak, y, x), peaks ascending in energy;
- ``fit_status`` (int, legend in attrs), ``chi2_red`` (dimensionless, with a noise
  model; ``residual_variance`` without one), ``bic``: (y, x); ``peak_status``
  (peak, y, x);
- ``max_energy``, ``centroid_energy`` (eV), ``integrated_intensity``: (y, x);
- ``region`` (y, x), ``component_spectrum``, ``component_abundance`` and region
  statistics when decomposition ran;
- attrs: ``pmap_provenance`` (JSON: pmap version, input path and fingerprint,
  every step with parameters), ``pmap_result`` (format version) and
  ``pmap_complete`` (True only once every chunk has been written).
"""

from __future__ import annotations

import json
import os
import shutil
import sys
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .conventions import SPECTRAL_DIMS
from .errors import FormatError, InputFileError, OutputExistsError
from .io._write import partial_name
from .noise import describe_noise_coords
from .provenance import PROVENANCE_ATTR

__all__ = [
    "RESULT_FORMAT_VERSION",
    "assemble_result",
    "write_result",
    "open_result",
    "is_result_store",
    "prepare_output",
    "mark_complete",
    "append_stage",
    "fit_summary",
]

RESULT_FORMAT_VERSION = 1


def assemble_result(
    parts: list[xr.Dataset | xr.DataArray], *, provenance_json: str, coords_from=None
) -> xr.Dataset:
    """Merge result parts (maps, fit parameters, regions) into one lazy result Dataset.

    Each part keeps its variables' attrs; the Dataset's attrs get each part's
    attrs (stage settings), the combined provenance record (``provenance_json``)
    and the result-format markers. ``coords_from`` (the cube) supplies the y, x
    coordinates with their units.
    """
    dsets = [p.to_dataset() if isinstance(p, xr.DataArray) else p for p in parts]
    ds = xr.merge(dsets, compat="override", join="exact", combine_attrs="override")
    ds = _uniform_spatial_chunks(ds)  # blocks must align and be uniform for region writes
    kept: dict = {}
    for part in dsets:  # settings of each stage (fit model, NMF solver...), provenance aside
        kept.update({k: v for k, v in part.attrs.items() if k != PROVENANCE_ATTR})
    ds.attrs = {
        **kept,
        "pmap_result": RESULT_FORMAT_VERSION,
        "pmap_complete": False,
        PROVENANCE_ATTR: provenance_json,
    }
    if coords_from is not None:  # y, x (and stack) coords with their units attrs
        for c in ("y", "x"):
            if c in ds.coords and c in coords_from.coords:
                ds = ds.assign_coords({c: coords_from[c]})
    ds.attrs["Conventions"] = "CF-1.10"
    ds = describe_noise_coords(ds)
    # No CF ``axis`` X/Y on the stage coordinates: CF (and its reference checker, IOOS
    # compliance-checker §4, §5.6) reads axis X/Y as the horizontal axes of the Earth and
    # then demands true latitude and longitude. y, x carry units and long_name instead.
    for c in ("x", "y"):
        if c in ds.coords and "axis" in ds[c].attrs:
            ds[c].attrs = {k: v for k, v in ds[c].attrs.items() if k != "axis"}
    return ds


def _uniform_spatial_chunks(ds: xr.Dataset) -> xr.Dataset:
    """Give every spatial variable the same, uniform (y, x) chunks (the first variable's)."""
    ds = ds.unify_chunks()
    sizes = ds.chunksizes
    if not sizes or "y" not in sizes or "x" not in sizes:
        return ds
    target = {d: max(sizes[d]) for d in ("y", "x")}
    uniform = all(len(set(sizes[d][:-1])) <= 1 and sizes[d][-1] <= sizes[d][0]
                  for d in ("y", "x"))
    return ds if uniform else ds.chunk(target)


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


def _is_complete(path: Path) -> bool:
    try:
        import zarr

        return bool(zarr.open_group(str(path), mode="r").attrs.get("pmap_complete", False))
    except Exception:  # unreadable metadata: not a complete result
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
            if is_result_store(p) and not _is_complete(p):
                raise OutputExistsError(
                    f"{p} is an incomplete result (an interrupted run): use --resume to "
                    "continue it or --overwrite to start again")
            raise OutputExistsError(f"{p} exists; pass --overwrite (overwrite=True) to replace it")
        if not is_result_store(p):
            raise OutputExistsError(
                f"{p} exists and is not a pmap result store; refusing to delete it"
            )
        shutil.rmtree(p)
    p.parent.mkdir(parents=True, exist_ok=True)
    return p


def mark_complete(path: str | Path) -> None:
    """Flag a result store as complete (every block and stage written)."""
    import zarr

    g = zarr.open_group(str(path), mode="r+")
    if DONE_ARRAY in g:  # (a store written in one go, without blocks, has none)
        if not g.attrs.get(BLOCKS_WRITTEN_ATTR):
            raise FormatError(f"{path}: not every block is written; the store cannot be "
                              "marked complete")
        del g[DONE_ARRAY]
    with warnings.catch_warnings():
        # consolidated metadata is not (yet) in the Zarr v3 spec; xarray and zarr-python read it
        warnings.simplefilter("ignore")
        zarr.consolidate_metadata(str(path))
    # the flag last: a kill before this line leaves an incomplete store that --resume
    # finishes; setting a root attr keeps the consolidated metadata (Zarr v3)
    zarr.open_group(str(path), mode="r+").attrs["pmap_complete"] = True


def append_stage(path: str | Path, stage: xr.Dataset, step: dict[str, Any]) -> None:
    """Add a later stage's variables (regions, their statistics...) to an incomplete store.

    ``stage`` holds the new variables on the store's dims (y, x coordinates are taken
    from the store, not written again); ``step`` ({"step", "params", "results"}) is
    appended to the store's provenance. The store stays incomplete: the caller marks it
    complete (:func:`mark_complete`) once every stage is written.
    """
    import zarr

    p = Path(path)
    if _is_complete(p):
        raise FormatError(f"{p} is complete; stages are added before completion")
    g = zarr.open_group(str(p), mode="r")
    attrs = dict(g.attrs)
    known = set(g.array_keys())
    stage = stage.drop_vars([c for c in ("y", "x") if c in stage.coords and c in known])
    stage.to_zarr(str(p), mode="a", consolidated=False)
    prov = json.loads(attrs.get(PROVENANCE_ATTR) or "{}") or {"steps": []}
    # a resumed run writes the stage again: its record replaces the first one
    steps = [s for s in prov.get("steps", []) if s.get("step") != step.get("step")]
    prov["steps"] = [*steps, step]
    attrs[PROVENANCE_ATTR] = json.dumps(prov)
    zarr.open_group(str(p), mode="r+").attrs.update(attrs)


def _spatial_blocks(ds: xr.Dataset) -> list[tuple[slice, slice]]:
    """Aligned (y, x) slices of the result's spatial chunks."""
    chunks = ds.chunksizes
    ys = chunks.get("y", (ds.sizes["y"],))
    xs = chunks.get("x", (ds.sizes["x"],))
    yb = np.cumsum((0, *ys))
    xb = np.cumsum((0, *xs))
    return [(slice(int(yb[i]), int(yb[i + 1])), slice(int(xb[j]), int(xb[j + 1])))
            for i in range(len(ys)) for j in range(len(xs))]


#: Target size of one written block of result maps (bytes). Maps are small next to
#: the cube (a few numbers per pixel), so one write block spans several compute
#: chunks: fewer, larger Zarr writes and fewer scheduler round trips.
WRITE_BLOCK_BYTES = 16 * 2**20


def _grow_write_blocks(ds: xr.Dataset, spatial: list[str], *, strips: bool = True) -> xr.Dataset:
    """Rechunk the spatial maps to blocks of whole compute chunks, ≈ WRITE_BLOCK_BYTES each:
    full-width strips (streaming) or square-ish tiles (bounded batches)."""
    sizes = ds.chunksizes
    if not spatial or "y" not in sizes or "x" not in sizes:
        return ds
    per_px = 0
    for k in spatial:
        v = ds[k]
        per_px += v.dtype.itemsize * int(np.prod([v.sizes[d] for d in v.dims
                                                   if d not in ("y", "x")] or [1]))
    cy, cx = sizes["y"][0], sizes["x"][0]
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    k = max(1, int(WRITE_BLOCK_BYTES // max(per_px * cy * cx, 1)))
    if k == 1:
        return ds
    nbx = -(-nx // cx)
    if cx >= nx or (strips and k >= nbx):  # strips of whole chunk rows
        new = {"y": min(ny, cy * (k // nbx)), "x": nx}
    elif strips:  # part of one chunk row (a very wide map)
        new = {"y": cy, "x": min(nx, cx * k)}
    else:  # square-ish tiles
        side = max(1, int(np.sqrt(k)))
        new = {"y": min(ny, cy * side), "x": min(nx, cx * max(1, k // side))}
    return ds.chunk(new)


def _block_name(ys: slice, xs: slice) -> str:
    return f"y{ys.start}-{ys.stop}_x{xs.start}-{xs.stop}"


_DONE_KEY = "pmap-block-done-"


#: zstd level of the spectra kept in a result (the processed cube): noisy float32
#: spectra compress by ~8 % at level 1 and ~11 % at the default level 3, which costs
#: 4x the CPU time (46 vs 11 ms per 8 MiB chunk), about 5 % of a whole run. Lossless:
#: the values are the same.
SPECTRA_ZSTD_LEVEL = 1


def _fast_codec_for_spectra(ds: xr.Dataset) -> None:
    """Set a fast lossless compressor (zstd, SPECTRA_ZSTD_LEVEL) on the variables with a
    spectral dim (in place); the maps keep the default. Zarr v3 stores only."""
    import zarr

    if int(zarr.config.get("default_zarr_format", 3)) != 3:
        return
    for v in ds.data_vars.values():
        if any(d in SPECTRAL_DIMS for d in v.dims) and "compressors" not in v.encoding \
                and "compressor" not in v.encoding:
            v.encoding["compressors"] = (zarr.codecs.ZstdCodec(level=SPECTRA_ZSTD_LEVEL),)


def _metadata_template(ds: xr.Dataset) -> xr.Dataset:
    """``ds`` with every dask variable replaced by zeros of the same chunks: writing it with
    ``compute=False`` creates the Zarr arrays without building a store graph of the real maps."""
    import dask.array as da

    out = ds.copy()
    for k, v in ds.data_vars.items():
        if isinstance(v.data, da.Array):
            out[k] = v.copy(data=da.zeros(v.shape, dtype=v.dtype, chunks=v.data.chunks))
            out[k].encoding = dict(v.encoding)
    return out


#: Array inside a result store that records which write blocks are on disk (one element,
#: and one Zarr chunk, per block, so blocks mark themselves done without touching each
#: other); removed when the store is complete.
DONE_ARRAY = "pmap_blocks_done"
#: Store attr set once every block is on disk (before the done-record is removed).
BLOCKS_WRITTEN_ATTR = "pmap_blocks_written"


def _create_done_array(path: Path, names: list[str]) -> None:
    """Create the done-record of a fresh store: one 0/1 chunk per write block."""
    import zarr

    g = zarr.open_group(str(path), mode="r+")
    arr = g.create_array(DONE_ARRAY, shape=(len(names),), chunks=(1,), dtype="uint8",
                         fill_value=0, dimension_names=["pmap_write_block"])
    arr.attrs["blocks"] = list(names)
    arr.attrs["long_name"] = "write block on disk (1) or not yet (0); removed when complete"


def _done_blocks(path: Path, names: list[str]) -> set[str]:
    """Names of the blocks an interrupted run wrote completely (its done-record)."""
    import zarr

    g = zarr.open_group(str(path), mode="r")
    if g.attrs.get(BLOCKS_WRITTEN_ATTR):  # every block was on disk before the record went
        return set(names)
    if DONE_ARRAY not in g:
        raise FormatError(f"{path} has no record of its written blocks (written by an older "
                          "pmap?); start again with --overwrite")
    arr = g[DONE_ARRAY]
    if list(arr.attrs.get("blocks", [])) != list(names):
        raise FormatError(f"{path} was written on a different block grid; it cannot be "
                          "resumed (start again with --overwrite)")
    flags = np.asarray(arr[:])
    return {n for n, f in zip(names, flags, strict=True) if f}


def _has_done_record(path: Path) -> bool:
    """True when a store's metadata was written completely (its done-record exists)."""
    import zarr

    try:
        g = zarr.open_group(str(path), mode="r")
        return bool(g.attrs.get(BLOCKS_WRITTEN_ATTR)) or DONE_ARRAY in g
    except Exception:  # metadata cut short by a kill: nothing of it can be trusted
        return False


def _write_block(path: str, index: int, blocks: dict) -> int:
    """Write one block of every map into the store's Zarr arrays, then mark it done.

    ``blocks`` maps a variable name to a list of (index tuple, computed values). Runs as
    one task; the block's element of the done-record is set only after every variable
    of the block is on disk, so a kill at any moment leaves it 0 or the block complete.
    """
    import zarr

    g = zarr.open_group(path, mode="r+")
    for name, pieces in blocks.items():
        arr = g[name]
        for idx, values in pieces:
            arr[idx] = np.asarray(values, dtype=arr.dtype)
    g[DONE_ARRAY][index] = 1
    return index


def _write_tasks(path: str, todo: list, pieces: dict, maps: dict) -> list | None:
    """One Delayed per write block, all in one graph layer built at once.

    The same tasks as ``dask.delayed(_write_block)(path, i, pieces[name])`` per block,
    without merging and culling the whole map graph once per block (1.4 s of serial
    time before the compute on a 64-block map). None when dask lacks the task spec.
    """
    try:
        from dask._task_spec import Dict, List, Task, TaskRef, Tuple
        from dask.delayed import Delayed
        from dask.highlevelgraph import HighLevelGraph
    except ImportError:
        return None
    import dask

    def ref(v):
        return TaskRef(v.key) if isinstance(v, Delayed) else v

    layer, keys = {}, []
    for i, ys, xs in todo:
        name = _block_name(ys, xs)
        key = f"{_DONE_KEY}{name}"
        blocks = Dict({k: List(*[Tuple(idx, ref(v)) for idx, v in lst])
                       for k, lst in pieces[name].items()})
        layer[key] = Task(key, _write_block, path, i, blocks)
        keys.append(key)
    deps = [v.data for v in maps.values() if dask.is_dask_collection(v.data)]
    layer_name = f"{_DONE_KEY}layer-{os.getpid()}"
    graph = HighLevelGraph.from_collections(layer_name, layer, dependencies=deps)
    return [Delayed(k, graph, layer=layer_name) for k in keys]


def _block_pieces(maps: dict, blocks: list[tuple[slice, slice]]) -> dict:
    """Per write block, per variable: the (region index, chunk) pieces inside it.

    Dask-backed variables are cut into their chunks as Delayed objects of the one
    shared graph (no per-block graph optimisation); in-memory ones are sliced.
    """
    import dask

    lazy = {k: v for k, v in maps.items() if dask.is_dask_collection(v.data)}
    pieces: dict = {_block_name(ys, xs): {} for ys, xs in blocks}
    by_start = {(ys.start, xs.start): _block_name(ys, xs) for ys, xs in blocks}
    y_starts = np.unique([ys.start for ys, _ in blocks])  # the blocks form a grid
    x_starts = np.unique([xs.start for _, xs in blocks])

    def owner(y0, x0):
        iy = np.searchsorted(y_starts, y0, side="right") - 1
        ix = np.searchsorted(x_starts, x0, side="right") - 1
        return by_start[(int(y_starts[iy]), int(x_starts[ix]))]

    for k, v in maps.items():
        ay, ax = v.dims.index("y"), v.dims.index("x")
        if k not in lazy:
            for ys, xs in blocks:
                idx = tuple(ys if d == "y" else xs if d == "x" else slice(None) for d in v.dims)
                pieces[_block_name(ys, xs)].setdefault(k, []).append((idx, v.data[idx]))
            continue
        arr = v.data
        bounds = [np.cumsum((0, *c)) for c in arr.chunks]
        delayed = arr.to_delayed(optimize_graph=False)
        for ij in np.ndindex(delayed.shape):
            idx = tuple(slice(int(b[i]), int(b[i + 1])) for b, i in zip(bounds, ij, strict=True))
            name = owner(idx[ay].start, idx[ax].start)
            pieces[name].setdefault(k, []).append((idx, delayed[ij]))
    return pieces


def write_result(
    ds: xr.Dataset,
    path: str | Path,
    *,
    overwrite: bool = False,
    resume: bool = False,
    progress: bool = True,
    input_paths: tuple = (),
    concurrency: int | None = None,
    client=None,
    complete: bool = True,
    streaming: bool = True,
) -> Path:
    """Write a lazy result Dataset to Zarr block by block, resumable, then mark it complete.

    Metadata (and the small non-spatial variables) are written first with
    ``pmap_complete = False``; then each aligned spatial block is computed and written
    into its region of the Zarr arrays by one task, which then sets the block's element
    of the done-record inside the store (array ``pmap_blocks_done``, one chunk per
    block). All blocks form one graph, so
    chunks that neighbouring blocks share are computed once. ``resume=True`` on an
    existing incomplete store recomputes only the blocks not marked done.
    ``concurrency`` is the number of threads; ``client`` is a dask.distributed Client
    to run the blocks on a cluster.

    ``streaming`` (the default) writes full-width strips from one graph, which keeps a
    few rows of processed chunks in memory (a chunk's lower neighbours wait for the
    next strip); ``streaming=False`` (wide maps or a tight memory limit, decided by
    :func:`pmap.pipeline.process`) writes square tiles, ``concurrency`` at a time:
    memory stays bounded and chunks on tile borders are read more than once. A
    ``client`` always gets every block at once.
    """
    p = Path(path)
    fresh = not (resume and p.exists())
    if not fresh and is_result_store(p) and not _has_done_record(p):
        # interrupted while its metadata was written: nothing was computed, start afresh
        fresh, overwrite = True, True
    if fresh:
        p = prepare_output(p, overwrite=overwrite, input_paths=input_paths)
    elif not is_result_store(p):
        raise OutputExistsError(f"{p} exists and is not a pmap result store; cannot resume it")
    ds = ds.copy()
    ds.attrs["pmap_complete"] = False
    for v in ds.variables.values():
        v.encoding.pop("chunks", None)
        v.encoding.pop("preferred_chunks", None)
    if fresh:
        _fast_codec_for_spectra(ds)
    spatial = [k for k, v in ds.data_vars.items() if "y" in v.dims and "x" in v.dims]
    streaming = streaming or client is not None
    ds = _grow_write_blocks(ds, spatial, strips=streaming)
    others = [k for k in ds.data_vars if k not in spatial]
    blocks = _spatial_blocks(ds)
    names = [_block_name(ys, xs) for ys, xs in blocks]
    if fresh:  # metadata built under a temporary name: the store exists whole or not at all
        for stale in p.parent.glob(f".{p.name}.partial-*"):  # left by an earlier kill
            shutil.rmtree(stale, ignore_errors=True)
        tmp = partial_name(p)
        base = ds[others] if others else xr.Dataset()
        base.attrs = dict(ds.attrs)
        base.to_zarr(str(tmp), mode="w", consolidated=False)  # small global variables, in full
        _metadata_template(ds[spatial]).to_zarr(str(tmp), mode="a", compute=False,
                                                consolidated=False)
        _create_done_array(tmp, names)
        if p.exists():  # an earlier attempt's metadata, cut short (see above)
            shutil.rmtree(p)
        os.replace(tmp, p)
    done = _done_blocks(p, names)
    maps = {k: ds[k].variable for k in spatial}
    todo = [(i, ys, xs) for i, (ys, xs) in enumerate(blocks)
            if names[i] not in done]
    total = len(names)
    from tqdm import tqdm

    bar = tqdm(total=total, initial=total - len(todo), desc="blocks", unit="block",
               file=sys.stderr, disable=not progress, dynamic_ncols=True, mininterval=0.5)
    import dask

    pieces = _block_pieces(maps, blocks)

    def task(i, ys, xs):
        name = _block_name(ys, xs)
        return dask.delayed(_write_block)(str(p), i, pieces[name],
                                          dask_key_name=f"{_DONE_KEY}{name}")

    try:
        try:  # dask's task spec is not public API: any change there falls back
            tasks = _write_tasks(str(p), todo, pieces, maps)
        except (TypeError, AttributeError, ValueError):
            tasks = None
        if tasks is None:  # no task-spec API in this dask: one Delayed call per block
            tasks = [task(i, ys, xs) for i, ys, xs in todo]
        if client is not None:
            from distributed import as_completed

            for _ in as_completed(client.compute(tasks)):
                bar.update(1)
        else:
            # Streaming: one graph for all blocks, so a chunk that neighbouring blocks
            # share (the 1-pixel halo of spike removal) is read and cleaned once; the
            # scheduler's ordering works through the strips in turn. Otherwise tiles,
            # a few at a time.
            from dask.callbacks import Callback

            class _Ticks(Callback):
                def _posttask(self, key, result, dsk, state, worker_id):
                    if isinstance(key, str) and key.startswith(_DONE_KEY):
                        bar.update(1)

            n = max(1, concurrency or os.cpu_count() or 1)
            batch = len(tasks) if streaming else n
            with _Ticks():
                for i in range(0, len(tasks), max(batch, 1)):
                    dask.compute(*tasks[i:i + batch], num_workers=n)
    finally:
        bar.close()
    import zarr

    g = zarr.open_group(str(p), mode="r+")
    if np.asarray(g[DONE_ARRAY][:]).all() if DONE_ARRAY in g else False:
        g.attrs[BLOCKS_WRITTEN_ATTR] = True
    if complete:
        mark_complete(p)
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
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # incomplete stores are not consolidated
        ds = xr.open_zarr(str(p))
    if require_complete and not bool(ds.attrs.get("pmap_complete", False)):
        raise FormatError(f"{p} is incomplete (the run that wrote it did not finish); "
                          "rerun with --resume or --overwrite")
    return ds


#: likely cause and remedy of each non-converged fit status (for :func:`fit_summary`)
_STATUS_CAUSES = {
    1: "the iteration limit: raise [fit] max_iter, or fit fewer peaks / a simpler model",
    2: "user-set bounds: widen [fit] bounds",
    5: "solver failures: check the input for NaN or infinite values and the model choice",
    6: "implausible fits (centre at the edge of the energy window, width at its limit or "
       "area <= 0): more peaks than the data support, or the line outside "
       "[fit] energy_range_ev (compare the bic map between runs with different peaks)",
}
_STATUS_WORDS = {0: "converged", 1: "iteration limit", 2: "at a user bound", 3: "no signal",
                 4: "masked/NaN", 5: "solver failure", 6: "implausible"}


def _share(n: int, total: int) -> str:
    pct = 100.0 * n / max(total, 1)
    return f"{pct:.2g} %" if pct < 1 else f"{pct:.1f} %"


def run_summary(ds: xr.Dataset) -> list[str]:
    """What the cleaning and the absolute-PL fit did, for the end of a run (lines).

    From the small count maps ``masked_channels`` and ``spike_values_replaced`` (see
    :func:`pmap.pipeline.build_result`): how many values were masked or replaced, in
    how many pixels, and the most in one pixel; from ``planck_status`` and
    ``planck_chi2_red``: how many Planck fits converged and their median χ²_red.
    """
    lines = []
    words = {"masked_channels": ("masked", " (bad detector channels, saturated or dead "
                                           "values; left out of every fit)"),
             "spike_values_replaced": ("replaced as cosmic spikes", "")}
    for name, (what, why) in words.items():
        if name not in ds:
            continue
        c = np.asarray(ds[name].values)
        hit = int(np.sum(c > 0))
        total = int(c.sum())
        if total == 0:
            lines.append(f"cleaning: no value {what}")
            continue
        lines.append(f"cleaning: {total} values {what}{why}, in {hit} pixel{'s' * (hit != 1)} "
                     f"({_share(hit, c.size)}; at most {int(c.max())} in one pixel)")
    if "planck_status" in ds:
        st = np.asarray(ds["planck_status"].values).ravel()
        ok = int(np.sum(st == 0))
        med = float("nan")
        if "planck_chi2_red" in ds:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                med = float(np.nanmedian(np.asarray(ds["planck_chi2_red"].values)))
        lines.append(f"planck: {st.size} pixels: converged {ok} ({_share(ok, st.size)})"
                     + (f", median reduced chi-square {med:.3g}" if np.isfinite(med) else ""))
    return lines


def fit_summary(ds: xr.Dataset, *, min_converged: float = 0.8) -> tuple[list[str], str | None]:
    """What the fit did, for the end of a run: (summary lines, warning or None).

    Counts of every ``fit_status`` (pixels and %), dropped peaks per peak index
    (``peak_status``), the median reduced χ² (or that there is no noise model),
    and a warning naming the likely cause when fewer than ``min_converged`` of
    the pixels with signal (status other than 3 and 4) converged, or when the
    median χ²_red is far from 1. Reads only the small status and χ² maps.
    """
    if "fit_status" not in ds:
        return [], None
    st = np.asarray(ds["fit_status"].values).ravel().astype(np.int64)
    n = st.size
    counts = np.bincount(np.clip(st, 0, 6), minlength=7)
    parts = [f"{_STATUS_WORDS[k]} {counts[k]} ({100.0 * counts[k] / max(n, 1):.1f} %)"
             for k in range(7) if counts[k]]
    lines = [f"fit: {n} pixels: " + ", ".join(parts)]
    if "peak_status" in ds and ds.sizes.get("peak", 1) > 1:
        pst = np.asarray(ds["peak_status"].values).reshape(ds.sizes["peak"], -1)
        fitted = np.isin(st, (0, 1, 2))
        drops = [int(np.sum(np.isin(pst[k], (3, 6)) & fitted)) for k in range(pst.shape[0])]
        lines.append("fit: peaks dropped where the pixel converged (not detected or "
                     "implausible), by peak (ascending energy): "
                     + ", ".join(f"#{k} {d}" for k, d in enumerate(drops)))
    warning = None
    med = None
    if "chi2_red" in ds:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            med = float(np.nanmedian(np.asarray(ds["chi2_red"].values)))
        if np.isfinite(med):
            lines.append(f"fit: median reduced chi-square {med:.3g} (1 when the model and "
                         "the noise model describe the data)")
    elif "weighted_residual_variance" in ds:
        lines.append("fit: correlated noise or no reliable noise law: weights from the "
                     "noise model's shape, errors scaled by each pixel's residual")
    elif "residual_variance" in ds:
        lines.append("fit: no noise model: errors are scaled by each pixel's residual "
                     "(see the attr uncertainty_method)")
    signal = int(np.sum(~np.isin(st, (3, 4))))
    conv = int(counts[0])
    if not signal:
        warning = ("no pixel had enough signal to fit (every pixel is 'no signal' or masked): "
                   "check the spectral window, the units and the bad-pixel masking")
    elif conv / signal < min_converged:
        bad = {k: int(counts[k]) for k in (1, 2, 5, 6) if counts[k]}
        worst = max(bad, key=bad.get) if bad else None
        cause = _STATUS_CAUSES.get(worst, "unknown")
        warning = (f"only {100.0 * conv / signal:.0f} % of the {signal} pixels with signal "
                   f"converged; most of the rest hit {cause}")
    elif med is not None and np.isfinite(med) and not 0.8 <= med <= 1.25:
        warning = (f"median reduced chi-square is {med:.3g}, not ~1: the line model or the "
                   "noise model does not describe the data, so the error bars are off by "
                   f"about a factor {np.sqrt(med):.2g}")
    return lines, warning
