"""Pipelines: a cube's processing described in TOML, run end to end into a result store.

A pipeline file (keep it with the data) lists cube → cube steps in order, then
the result-producing stages::

    [[steps]]                 # any registered step, in order (pmap.steps)
    step = "remove_spikes"
    threshold = 6.0

    [[steps]]
    step = "to_energy"

    [descriptors]             # fast per-pixel descriptors (no fitting)
    window_ev = [1.3, 1.9]

    [fit]                     # per-pixel peak fit; omit the table to skip fitting
    model = "gaussian"
    peaks = 1
    background = "constant"

    [properties]              # maps derived from the fit (optional)
    reference_energy_ev = 1.60        # -> peak_shift (eV, positive = blue shift)
    exciton_binding_ev = 0.0          # -> bandgap_estimate (eV), with its caveat
    material_gap = "direct"           # "indirect": the PL peak is phonon-assisted, not the gap
    # exciton_binding_err_ev, stokes_shift_err_ev: 1σ (eV) -> bandgap_estimate_err with the
    #   fit's peak_energy_err, in quadrature; band_to_band_temperature_K = 300: band-to-band
    #   emission, the maximum's offset ≈ kT/2 above the gap is subtracted (not with E_b > 0)

    [components]              # NMF/PCA decomposition (optional)
    method = "nmf"
    n_components = 3

    [regions]                 # clustering into regions (optional)
    n_regions = "auto"

    [output]
    figures = true
    keep_cube = "auto"        # store the processed cube beside the maps (true/false/"auto")

``plcube process --print-config`` prints the default pipeline as a starting point.
"""

from __future__ import annotations

import json
import os
import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .cube import rechunk_cube, spectral_dim, spread_blocks, validate_cube
from .errors import PmapNotice, StepError
from .noise import get_noise_model
from .provenance import get_provenance
from .results import (
    DONE_ARRAY,
    append_stage,
    assemble_result,
    is_result_store,
    mark_complete,
    open_result,
    prepare_output,
    write_result,
)
from .steps import WHOLE_MAP_KEYWORD, WholeMapPass, get_step

__all__ = [
    "DEFAULT_PIPELINE_TOML",
    "Pipeline",
    "load_pipeline",
    "build_result",
    "add_regions",
    "parse_memory",
    "process",
]

DEFAULT_PIPELINE_TOML = """\
# pmap default pipeline: clean, convert to photon energy, describe, fit one peak.
[[steps]]
step = "mask_bad_pixels"

[[steps]]
step = "remove_spikes"

[[steps]]
step = "remove_baseline"
method = "constant"
window = "edges"

[[steps]]
step = "to_energy"

[descriptors]

[fit]
model = "gaussian"
peaks = 1
background = "constant"

[output]
figures = true
keep_cube = "auto"
"""

_TOP_KEYS = {"pipeline", "steps", "descriptors", "fit", "properties", "components", "regions",
             "planck", "output"}
_PROPERTY_KEYS = {"reference_energy_ev", "exciton_binding_ev", "material_gap", "stokes_shift_ev",
                  "exciton_binding_err_ev", "stokes_shift_err_ev", "band_to_band_temperature_K"}
_OUTPUT_KEYS = {"figures", "keep_cube", "chunk_mib"}
_KEEP_CUBE_AUTO_BYTES = 512 * 2**20


@dataclass
class Pipeline:
    """A parsed pipeline: ordered cube steps and the result stages (None = skipped)."""

    steps: list[tuple[str, dict]] = field(default_factory=list)
    descriptors: dict | None = field(default_factory=dict)
    fit: dict | None = None
    properties: dict | None = None
    components: dict | None = None
    regions: dict | None = None
    planck: dict | None = None
    output: dict = field(default_factory=lambda: {"figures": True, "keep_cube": "auto"})
    source: str = "<default>"

    def as_dict(self) -> dict:
        """Plain-dict form (for provenance)."""
        return {
            "steps": [{"step": n, **p} for n, p in self.steps],
            "descriptors": self.descriptors,
            "fit": self.fit,
            "properties": self.properties,
            "components": self.components,
            "regions": self.regions,
            "planck": self.planck,
            "output": self.output,
            "source": self.source,
        }


def load_pipeline(source: str | Path | None = None) -> Pipeline:
    """Parse a pipeline TOML file (path) or TOML text; None gives the default pipeline.

    Raises StepError naming an unknown table, key or step.
    """
    if source is None:
        text, origin = DEFAULT_PIPELINE_TOML, "<default>"
    elif isinstance(source, Path) or (isinstance(source, str) and "\n" not in source
                                       and source.endswith(".toml")):
        p = Path(source)
        if not p.is_file():
            raise StepError(f"pipeline file not found: {p}")
        text, origin = p.read_text(encoding="utf-8"), str(p)
    else:
        text, origin = str(source), "<text>"
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StepError(f"pipeline {origin}: invalid TOML: {exc}") from None
    unknown = set(raw) - _TOP_KEYS
    if unknown:
        raise StepError(f"pipeline {origin}: unknown table(s) {sorted(unknown)}; "
                        f"known: {sorted(_TOP_KEYS)}")
    steps = []
    for i, entry in enumerate(raw.get("steps", [])):
        if not isinstance(entry, dict) or "step" not in entry:
            raise StepError(f"pipeline {origin}: [[steps]] entry {i + 1} has no 'step' name")
        params = dict(entry)
        name = params.pop("step")
        _check_keys(origin, f"[[steps]] {name!r}", get_step(name).func, params)
        steps.append((name, params))
    props = raw.get("properties")
    if props is not None:
        bad = set(props) - _PROPERTY_KEYS
        if bad:
            raise StepError(f"pipeline {origin}: unknown [properties] key(s) {sorted(bad)}; "
                            f"known: {sorted(_PROPERTY_KEYS)}")
        if "fit" not in raw:
            raise StepError(f"pipeline {origin}: [properties] needs a [fit] table")
    from .decomposition import decompose, segment
    from .fitting import fit_peaks, spectral_descriptors

    for table, func in (("descriptors", spectral_descriptors), ("fit", fit_peaks),
                        ("components", decompose), ("regions", segment)):
        if isinstance(raw.get(table), dict):
            _check_keys(origin, f"[{table}]", func, raw[table])
    if isinstance(raw.get("planck"), dict):
        from .planck import fit_planck

        _check_keys(origin, "[planck]", fit_planck, raw["planck"])
    if isinstance(raw.get("regions"), dict):
        _check_regions(raw["regions"].get("n_regions", "auto"))
    output = {"figures": True, "keep_cube": "auto"}
    output.update(raw.get("output", {}))
    bad = set(output) - _OUTPUT_KEYS
    if bad:
        raise StepError(f"pipeline {origin}: unknown [output] key(s) {sorted(bad)}")
    return Pipeline(
        steps=steps,
        descriptors=raw.get("descriptors"),
        fit=raw.get("fit"),
        properties=props,
        components=raw.get("components"),
        regions=raw.get("regions"),
        planck=raw.get("planck"),
        output=output,
        source=origin,
    )


def _check_keys(origin: str, where: str, func: Any, params: dict) -> None:
    """Refuse keys that ``func`` does not take, with a "did you mean" suggestion."""
    import difflib
    import inspect

    sig = inspect.signature(func)
    if any(p.kind is p.VAR_KEYWORD for p in sig.parameters.values()):
        return
    known = [n for i, (n, p) in enumerate(sig.parameters.items())
             if i > 0 and p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD)
             and n != WHOLE_MAP_KEYWORD]  # set by the runner, never by a pipeline file
    for key in params:
        if key not in known:
            close = difflib.get_close_matches(str(key), known, n=1)
            hint = f"; did you mean {close[0]!r}?" if close else f"; known: {', '.join(known)}"
            raise StepError(f"pipeline {origin}: unknown key {key!r} in {where}{hint}")


def _check_regions(n: Any) -> None:
    """``n_regions`` must be "auto" or an integer ≥ 1 (checked before any output exists)."""
    if n == "auto":
        return
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise StepError(f"the number of regions must be 'auto' or an integer >= 1, got {n!r}")


#: Smallest memory limit the command line accepts: the interpreter, numpy, numba and
#: dask alone hold about BASE_MEMORY_BYTES before the first chunk (the API takes any
#: limit, which tests use to force tiny chunks).
MIN_MEMORY_BYTES = 256 * 2**20


def _pipeline_hash(pipe: Pipeline) -> str:
    """sha256 of the resolved pipeline (its tables, not where it was read from)."""
    import hashlib

    d = {k: v for k, v in pipe.as_dict().items() if k != "source"}
    return hashlib.sha256(json.dumps(d, sort_keys=True, default=str).encode()).hexdigest()[:16]


def _source_fingerprint(source: Any) -> str | None:
    if isinstance(source, xr.DataArray):
        return None
    from .provenance import fingerprint_path

    return fingerprint_path(source)


def _check_resumable(recorded: dict, source: Any, pipe_hash: str, out: Path) -> None:
    """Refuse to resume when the input or the pipeline differ from the interrupted run."""
    fp = _source_fingerprint(source)
    if fp is not None and recorded.get("input_fingerprint") not in (None, fp):
        raise StepError(f"cannot resume {out}: the input is not the one of the interrupted run "
                        f"(fingerprint {recorded['input_fingerprint']}, now {fp}); use "
                        "--overwrite to start again")
    if recorded.get("pipeline_sha256") != pipe_hash:
        raise StepError(f"cannot resume {out}: the pipeline differs from the interrupted run's; "
                        "use the same pipeline, or --overwrite to start again")


def _refuse_empty(cube: xr.DataArray) -> None:
    """StepError when the cube holds no finite value (checked before any output exists).

    Up to four chunks spread over the map are read one at a time, an inner one first,
    until one holds a finite value; only when they are all empty is the whole cube
    scanned, so a normal cube costs one chunk read.
    """
    import dask.array as da

    data = cube.data
    blocks = spread_blocks(data, 4)
    for b in blocks[1:2] + blocks[:1] + blocks[2:]:  # the map's inside, then its corners
        if np.isfinite(np.asarray(b.compute() if isinstance(b, da.Array) else b)).any():
            return
    if not (isinstance(data, da.Array) and bool(da.isfinite(data).any().compute())):
        raise StepError("the cube holds no finite values (all NaN or empty): nothing to process")


def _run_step(name: str, cube: xr.DataArray, params: dict,
              whole_map: WholeMapPass | None = None) -> Any:
    """Run one registered step; a step that takes ``whole_map`` gets the run's pass."""
    return _call(get_step(name).func, name, cube, params, whole_map)


def _call(func: Any, name: str, cube: xr.DataArray, params: dict,
          whole_map: WholeMapPass | None) -> Any:
    import inspect

    if WHOLE_MAP_KEYWORD in params:
        raise StepError(f"{WHOLE_MAP_KEYWORD!r} is set by pmap, not by a pipeline file")
    extra = ({WHOLE_MAP_KEYWORD: whole_map} if whole_map is not None
             and WHOLE_MAP_KEYWORD in inspect.signature(func).parameters else {})
    try:
        return func(cube, **params, **extra)
    except TypeError as exc:
        raise StepError(f"step {name!r}: {exc}") from None


#: Cleaning steps whose per-pixel effect is counted into the result (pmap.spectral._changes).
_CLEANING_COUNTS = {"mask_bad_pixels": "masked", "remove_spikes": "replaced"}


def build_result(cube: xr.DataArray, pipeline: Pipeline) -> tuple[xr.Dataset, xr.DataArray]:
    """Build the lazy per-pixel result Dataset for ``cube`` (computes no map).

    Runs the cube steps, descriptors, fit and decomposition. Small reductions over
    the whole map that steps need (hot channels, saturation level, the mean
    spectrum seeding multi-peak fits, PCA/NMF bases fitted on a pixel sample) are
    computed now, once, in phase one: each step gets the run's
    :class:`pmap.steps.WholeMapPass` and computes them through it, and their values go
    into the result's provenance (``whole_map_pass``). Every block of the result then
    depends only on its own chunks; the maps stay lazy. Regions, which need the whole
    map, are made afterwards from the written store (:func:`add_regions`).
    The result also counts, per pixel, the channels ``mask_bad_pixels`` masked
    (``masked_channels``) and the values ``remove_spikes`` replaced
    (``spike_values_replaced``), for the run's summary.
    Returns (result, processed_cube).
    """
    from .spectral._changes import channel_changes

    whole_map = WholeMapPass()
    counts: dict[str, xr.DataArray] = {}  # per-pixel counts of what the cleaning did
    named = any(n == "attach_noise_model" for n, _ in pipeline.steps)
    if not named and cube.attrs.get("units") == "counts" and get_noise_model(cube) is None:
        # raw counts: the noise model starts here and follows every step (pmap.noise)
        cube = _run_step("attach_noise_model", cube, {})
    for name, params in pipeline.steps:
        if name == "remove_baseline" and pipeline.planck is not None:
            warnings.warn("absolute PL (planck): the remove_baseline step is skipped, since it "
                          "would subtract part of the absolute photon flux the Planck fit "
                          "needs (the peak fit's constant background takes any offset)",
                          PmapNotice, stacklevel=2)
            continue
        out = _run_step(name, cube, params, whole_map)
        if not isinstance(out, xr.DataArray):
            raise StepError(f"step {name!r} does not return a cube; put it in its own table")
        kind = _CLEANING_COUNTS.get(name)
        if kind is not None and out.shape == cube.shape:  # what the step masked or replaced
            counts[kind] = channel_changes(cube, out, kind)
        cube = out
    prov = get_provenance(cube.attrs)
    parts: list[xr.Dataset | xr.DataArray] = [
        v.to_dataset(promote_attrs=False) for v in counts.values()]
    stages = (("descriptors", "spectral_descriptors"), ("fit", "fit_peaks"),
              ("components", "decompose"))
    for attr, step in stages:
        params = getattr(pipeline, attr)
        if params is None:
            continue
        part = _run_step(step, cube, dict(params), whole_map)
        parts.append(part)
        prov["steps"].append({"step": step, "params": params})
        if step == "fit_peaks" and pipeline.properties:
            parts.append(_derived_properties(part, pipeline.properties))
            prov["steps"].append({"step": "properties", "params": pipeline.properties})
    if pipeline.planck is not None:  # absolute PL: generalized Planck law (pmap.planck)
        from .planck import fit_planck

        parts.append(_call(fit_planck, "planck", cube, dict(pipeline.planck), whole_map))
        prov["steps"].append({"step": "planck", "params": pipeline.planck})
    keep = pipeline.output.get("keep_cube", "auto")
    if keep == "auto":
        keep = cube.nbytes <= _KEEP_CUBE_AUTO_BYTES
    if keep:
        parts.append(cube.rename("intensity").to_dataset())
    if not parts:
        raise StepError("the pipeline produces nothing: add [descriptors], [fit] or more")
    prov["pipeline"] = pipeline.as_dict()
    prov["whole_map_pass"] = whole_map.records  # phase one's quantities and their values
    ds = assemble_result(parts, provenance_json=json.dumps(prov), coords_from=cube)
    return ds, cube


def _derived_properties(fit: xr.Dataset, props: dict) -> xr.Dataset:
    """Peak shift from a reference and a bandgap estimate, from the fitted peak energies."""
    from .fitting import bandgap_from_peak, peak_shift

    out = xr.Dataset()
    pe = fit["peak_energy"]
    if "reference_energy_ev" in props:
        out["peak_shift"] = peak_shift(pe, float(props["reference_energy_ev"]))
    gap_keys = _PROPERTY_KEYS - {"reference_energy_ev"}
    if gap_keys & set(props):
        kw = {k: props[k] for k in gap_keys if k in props}
        if "peak_energy_err" in fit:  # -> bandgap_estimate_err (eV), errors in quadrature
            gap, err = bandgap_from_peak(pe, peak_energy_err=fit["peak_energy_err"], **kw)
            out["bandgap_estimate"], out["bandgap_estimate_err"] = gap, err
        else:
            out["bandgap_estimate"] = bandgap_from_peak(pe, **kw)
    return out


def add_regions(store: str | Path, cube: xr.DataArray, params: dict, *, csv: bool = True) -> None:
    """Segment the map into regions from a written (incomplete) store and append them.

    Adds ``region`` (y, x) and the region statistics to the store, and writes the
    statistics table as CSV beside it (``NAME_regions.csv``).
    """
    from .decomposition import region_statistics, segment, write_region_csv

    store = Path(store)
    maps = xr.open_zarr(str(store), consolidated=False)
    # the maps of the block pass only: not the done-record, nor the regions of an earlier,
    # interrupted attempt at this stage (a resumed run computes them again)
    maps = maps.drop_vars([v for v in maps.data_vars if v in ("region", DONE_ARRAY)
                           or "region_id" in maps[v].dims])
    params = dict(params)
    space = params.get("feature_space", "shape")
    if space == "parameters":
        features = maps
    elif space == "abundance":
        if "component_abundance" not in maps:
            raise StepError("regions from 'abundance' need a [components] table (NMF) too")
        features = maps["component_abundance"]
    else:
        features = cube
    region = segment(features, **params)
    region = region.rename("region").compute()
    region = region.assign_coords(y=maps["y"], x=maps["x"])  # µm coords with their units
    stats = region_statistics(region, maps, cube=cube).compute()
    # The map is the variable "region" (y, x); the statistics live on dim "region_id".
    stats_store = stats.rename({"region": "region_id"})
    # the statistics' attrs (pixel area, legend...) go to the store's attrs, as before
    stage = stats_store.assign(
        region=region.drop_vars([c for c in region.coords if c not in ("y", "x")]))
    append_stage(store, stage, {"step": "segment", "params": params,
                                "results": {"k": region.attrs.get("k")}})
    if csv:
        write_region_csv(stats, store.with_name(store.name.removesuffix(".zarr") + "_regions.csv"))


#: Smallest compute chunk (MiB) the memory model chooses: below it, per-task overhead
#: dominates.
MIN_CHUNK_MIB = 0.25


def parse_memory(text: str | int | float | None) -> int:
    """Bytes from a size such as "1GB", "512MB", "2GiB" or a number of bytes.

    None gives the default: half of the memory available now.
    """
    if text is None:
        import psutil

        return int(psutil.virtual_memory().available * 0.5)
    if isinstance(text, (int, float)):
        return int(text)
    t = str(text).strip().upper().replace(" ", "")
    units = {"TIB": 2**40, "GIB": 2**30, "MIB": 2**20, "KIB": 2**10, "TB": 10**12, "GB": 10**9,
             "MB": 10**6, "KB": 10**3, "T": 10**12, "G": 10**9, "M": 10**6, "K": 10**3, "B": 1}
    for u, f in units.items():
        if t.endswith(u):
            try:
                return int(float(t[: -len(u)]) * f)
            except ValueError:
                break
    try:
        return int(t)
    except ValueError:
        raise StepError(f"memory size {text!r} not understood (use e.g. 1GB, 512MB)") from None


#: Peak memory of processing one chunk, as a multiple of its raw size (float64
#: copies, energy conversion, fit work arrays), and the memory the process holds
#: before any chunk (interpreter, numpy, numba, dask); measured with
#: scripts/bench_scale.py (peak RSS ≈ base + 14–20 × chunk × threads on the demo pipeline).
CHUNK_MEMORY_FACTOR = 20
BASE_MEMORY_BYTES = 350 * 2**20
#: Rows of processed chunks that streaming the result keeps in memory at its peak
#: (measured with scripts/bench_scale.py: about 2.2 rows of masked chunks).
HELD_ROWS = 2.5


def _streaming_fits(cube: xr.DataArray, mem: int, threads: int) -> bool:
    """Whether HELD_ROWS rows of processed chunks fit in ``mem`` bytes beside the base
    and the chunks being worked on (else the writer uses bounded tiles)."""
    per_value = max(cube.dtype.itemsize, 4)  # processed data are float32 or wider
    chunk_y = max(cube.chunks[cube.get_axis_num("y")]) if cube.chunks else cube.sizes["y"]
    row = cube.size // cube.sizes["y"] * chunk_y * per_value
    chunk = np.prod([max(c) for c in cube.chunks]) if cube.chunks else cube.size
    working = BASE_MEMORY_BYTES + CHUNK_MEMORY_FACTOR * chunk * cube.dtype.itemsize * threads
    return bool(HELD_ROWS * row <= mem - working)


def process(
    source: str | Path | xr.DataArray,
    out: str | Path,
    *,
    pipeline: Pipeline | str | Path | None = None,
    peaks: int | None = None,
    model: str | None = None,
    regions: int | str | None = None,
    components: int | None = None,
    overwrite: bool = False,
    resume: bool = False,
    progress: bool = True,
    read_options: dict | None = None,
    memory_limit: str | int | None = None,
    client=None,
    planck: bool | dict | None = None,
) -> xr.Dataset:
    """Run a pipeline on a cube (path or DataArray) and write a result store.

    Parameters
    ----------
    source : path or DataArray
        Cube in any format pmap reads, or a cube already in memory.
    out : path
        Result Zarr store to create (refused if it exists unless ``overwrite``).
    pipeline : Pipeline, TOML path, or None for the default pipeline.
    peaks, model : override ``[fit] peaks`` and ``[fit] model``.
    regions, components : add ``[regions] n_regions`` / ``[components] n_components``.
    planck : add the ``[planck]`` stage (True, or a dict of :func:`pmap.planck.fit_planck`
        options): qfls (eV), carrier_temperature (K), implied_voc (V) of a calibrated cube.
    resume : continue an interrupted run, recomputing only unfinished blocks.
    memory_limit : bytes or a size like "1GB"; sets chunk size and blocks in flight
        (default half the available memory).
    client : a dask.distributed Client to run on a cluster (None: local threads).

    Returns
    -------
    xarray.Dataset
        The written result, reopened lazily from the store. Figures are made
        by the edges (``plcube process`` or :func:`pmap.report.write_figures`).

    Notes
    -----
    The linear algebra library (BLAS) runs on one thread during the run: the blocks
    already run in parallel, and a multi-threaded BLAS sums in an order that depends
    on its thread count, so the same cube gave NMF spectra and merge scores that
    differed in the last bits between settings (labels were the same). The same
    input and pipeline now give the same bits.
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        return _process(source, out, pipeline=pipeline, peaks=peaks, model=model,
                        regions=regions, components=components, overwrite=overwrite,
                        resume=resume, progress=progress, read_options=read_options,
                        memory_limit=memory_limit, client=client, planck=planck)


def _process(source, out, *, pipeline, peaks, model, regions, components, overwrite, resume,
             progress, read_options, memory_limit, client, planck) -> xr.Dataset:
    from ._progress import TqdmProgress, phase

    if isinstance(pipeline, Pipeline):
        pipe = pipeline
    else:
        with phase("load pipeline"):
            pipe = load_pipeline(pipeline)
    if peaks is not None or model is not None:
        pipe.fit = dict(pipe.fit or {})
        if peaks is not None:
            pipe.fit["peaks"] = int(peaks)
        if model is not None:
            pipe.fit["model"] = model
    if planck:  # add the [planck] stage (absolute PL), with its options if a dict
        pipe.planck = {**(pipe.planck or {}), **(planck if isinstance(planck, dict) else {})}
    if components is not None:
        pipe.components = {**(pipe.components or {}), "n_components": int(components)}
    if regions is not None:
        _check_regions(regions)
        pipe.regions = {**(pipe.regions or {}), "n_regions": regions}
    out = Path(out)
    recorded = None  # the interrupted run's manifest (grid, input, pipeline)
    if resume and out.exists() and is_result_store(out):
        done = open_result(out, require_complete=False)
        if bool(done.attrs.get("pmap_complete")):
            warnings.warn(f"{out} is already complete; nothing to do", PmapNotice, stacklevel=2)
            return done
        recorded = json.loads(done.attrs["pmap_run"]) if "pmap_run" in done.attrs else None
    mem = parse_memory(memory_limit)
    threads = (sum(client.nthreads().values()) if client is not None else (os.cpu_count() or 1))
    chunk_mib = pipe.output.get("chunk_mib")
    if chunk_mib is None:
        spare = max(mem - BASE_MEMORY_BYTES, mem / 4)
        chunk_mib = min(64.0, spare / (CHUNK_MEMORY_FACTOR * max(threads, 1)) / 2**20)
    chunk_mib = max(float(chunk_mib), MIN_CHUNK_MIB)
    pipe_hash = _pipeline_hash(pipe)
    if recorded is not None:  # resume on the recorded grid, whatever the memory now
        _check_resumable(recorded, source, pipe_hash, out)
        chunk_mib = float(recorded["chunk_mib"])
    in_path = None
    with phase("open cube"):
        if isinstance(source, xr.DataArray):
            cube = rechunk_cube(validate_cube(source), target_mib=chunk_mib)
        else:
            from .io import open_cube

            in_path = Path(source)
            # chunks chosen at open time, aligned with the stored chunks (no re-reads)
            cube = open_cube(in_path, target_chunk_mib=chunk_mib, **(read_options or {}))
        _refuse_empty(cube)
    stack = [d for d in cube.dims if d not in ("y", "x") and d != spectral_dim(cube)]
    if pipe.regions is not None and stack:
        raise StepError(f"regions are made on one map, and this cube has the stack dim(s) "
                        f"{', '.join(stack)}: process it without --regions, or segment one "
                        "of its maps")
    if not (resume and out.exists()):
        prepare_output(out, overwrite=overwrite, input_paths=(in_path,))
    if spectral_dim(cube) == "wavelength" and not any(n == "to_energy" for n, _ in pipe.steps):
        warnings.warn("pipeline has no to_energy step: fitting on the wavelength axis",
                      PmapNotice, stacklevel=2)
    with phase("whole-map pass"), TqdmProgress("whole-map checks", enabled=progress):
        result, processed = build_result(cube, pipe)  # hot channels, saturation…
    streaming = (bool(recorded["streaming"]) if recorded is not None
                 else _streaming_fits(cube, mem, threads))
    result.attrs["pmap_run"] = json.dumps({
        "input_fingerprint": _source_fingerprint(source),
        "pipeline_sha256": pipe_hash,
        "chunk_mib": chunk_mib,
        "streaming": streaming,
        "memory_limit_bytes": int(mem),
        "chunks": {d: [int(c) for c in cube.chunksizes[d]] for d in ("y", "x")
                   if cube.chunks is not None and d in cube.chunksizes},
    })
    with phase("blocks"):
        path = write_result(result, out, overwrite=overwrite, resume=resume, progress=progress,
                            input_paths=(in_path,), concurrency=threads, client=client,
                            complete=pipe.regions is None, streaming=streaming)
    if pipe.regions is not None:
        with phase("regions"):
            add_regions(path, processed, pipe.regions)
            mark_complete(path)
    return open_result(path)
