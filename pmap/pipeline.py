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

    [components]              # NMF/PCA decomposition (optional)
    method = "nmf"
    n_components = 3

    [regions]                 # clustering into regions (optional)
    n_regions = "auto"

    [output]
    figures = true
    keep_cube = "auto"        # store the processed cube beside the maps (true/false/"auto")

``pmap process --print-config`` prints the default pipeline as a starting point.
"""

from __future__ import annotations

import json
import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import xarray as xr

from .cube import spectral_dim, validate_cube
from .errors import PmapNotice, StepError
from .provenance import get_provenance
from .results import assemble_result, open_result, prepare_output, write_result
from .steps import get_step

__all__ = ["DEFAULT_PIPELINE_TOML", "Pipeline", "load_pipeline", "process"]

DEFAULT_PIPELINE_TOML = """\
# pmap default pipeline: clean, convert to photon energy, describe, fit one peak.
[[steps]]
step = "mask_bad_pixels"

[[steps]]
step = "remove_spikes"
threshold = 6.0

[[steps]]
step = "remove_baseline"
method = "constant"
quantile = 0.05

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

_TOP_KEYS = {"pipeline", "steps", "descriptors", "fit", "components", "regions", "output"}
_OUTPUT_KEYS = {"figures", "keep_cube", "chunk_mib"}
_KEEP_CUBE_AUTO_BYTES = 512 * 2**20


@dataclass
class Pipeline:
    """A parsed pipeline: ordered cube steps and the result stages (None = skipped)."""

    steps: list[tuple[str, dict]] = field(default_factory=list)
    descriptors: dict | None = field(default_factory=dict)
    fit: dict | None = None
    components: dict | None = None
    regions: dict | None = None
    output: dict = field(default_factory=lambda: {"figures": True, "keep_cube": "auto"})
    source: str = "<default>"

    def as_dict(self) -> dict:
        """Plain-dict form (for provenance)."""
        return {
            "steps": [{"step": n, **p} for n, p in self.steps],
            "descriptors": self.descriptors,
            "fit": self.fit,
            "components": self.components,
            "regions": self.regions,
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
        get_step(name)  # raises StepError for unknown names
        steps.append((name, params))
    output = {"figures": True, "keep_cube": "auto"}
    output.update(raw.get("output", {}))
    bad = set(output) - _OUTPUT_KEYS
    if bad:
        raise StepError(f"pipeline {origin}: unknown [output] key(s) {sorted(bad)}")
    return Pipeline(
        steps=steps,
        descriptors=raw.get("descriptors"),
        fit=raw.get("fit"),
        components=raw.get("components"),
        regions=raw.get("regions"),
        output=output,
        source=origin,
    )


def _run_step(name: str, cube: xr.DataArray, params: dict) -> Any:
    spec = get_step(name)
    try:
        return spec.func(cube, **params)
    except TypeError as exc:
        raise StepError(f"step {name!r}: {exc}") from None


def build_result(cube: xr.DataArray, pipeline: Pipeline) -> tuple[xr.Dataset, xr.DataArray]:
    """Build the lazy result Dataset for ``cube`` (computes nothing).

    Returns (result, processed_cube).
    """
    for name, params in pipeline.steps:
        out = _run_step(name, cube, params)
        if not isinstance(out, xr.DataArray):
            raise StepError(f"step {name!r} does not return a cube; put it in its own table")
        cube = out
    prov = get_provenance(cube.attrs)
    parts: list[xr.Dataset | xr.DataArray] = []
    if pipeline.descriptors is not None:
        ds = _run_step("spectral_descriptors", cube, dict(pipeline.descriptors))
        parts.append(ds)
        prov["steps"].append({"step": "spectral_descriptors", "params": pipeline.descriptors})
    fit_ds = None
    if pipeline.fit is not None:
        fit_ds = _run_step("fit_peaks", cube, dict(pipeline.fit))
        parts.append(fit_ds)
        prov["steps"].append({"step": "fit_peaks", "params": pipeline.fit})
    if pipeline.components is not None:
        comp = _run_step("decompose", cube, dict(pipeline.components))
        parts.append(comp)
        prov["steps"].append({"step": "decompose", "params": pipeline.components})
    if pipeline.regions is not None:
        params = dict(pipeline.regions)
        maps = xr.merge([p for p in parts if isinstance(p, xr.Dataset)], compat="override",
                        combine_attrs="drop") if parts else None
        region = _run_step("segment", cube, {**params, "maps": maps})
        parts.append(region)
        prov["steps"].append({"step": "segment", "params": params})
        from .decomposition import region_statistics

        if maps is not None:
            parts.append(region_statistics(region, maps, cube=cube))
    keep = pipeline.output.get("keep_cube", "auto")
    if keep == "auto":
        keep = cube.nbytes <= _KEEP_CUBE_AUTO_BYTES
    if keep:
        parts.append(cube.rename("intensity").to_dataset())
    if not parts:
        raise StepError("the pipeline produces nothing: add [descriptors], [fit] or more")
    prov["pipeline"] = pipeline.as_dict()
    ds = assemble_result(parts, provenance_json=json.dumps(prov))
    return ds, cube


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
    progress: bool = True,
    read_options: dict | None = None,
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

    Returns
    -------
    xarray.Dataset
        The written result, reopened lazily from the store. Figures are made
        by the edges (``pmap process`` or :func:`pmap.report.write_figures`).
    """
    pipe = pipeline if isinstance(pipeline, Pipeline) else load_pipeline(pipeline)
    if peaks is not None or model is not None:
        pipe.fit = dict(pipe.fit or {})
        if peaks is not None:
            pipe.fit["peaks"] = int(peaks)
        if model is not None:
            pipe.fit["model"] = model
    if components is not None:
        pipe.components = {**(pipe.components or {}), "n_components": int(components)}
    if regions is not None:
        pipe.regions = {**(pipe.regions or {}), "n_regions": regions}
    in_path = None
    if isinstance(source, xr.DataArray):
        cube = validate_cube(source)
    else:
        from .io import open_cube

        in_path = Path(source)
        cube = open_cube(in_path, **(read_options or {}))
    prepare_output(out, overwrite=overwrite, input_paths=(in_path,))
    if spectral_dim(cube) == "wavelength" and not any(n == "to_energy" for n, _ in pipe.steps):
        warnings.warn("pipeline has no to_energy step: fitting on the wavelength axis",
                      PmapNotice, stacklevel=2)
    result, processed = build_result(cube, pipe)
    path = write_result(result, out, overwrite=overwrite, progress=progress,
                        input_paths=(in_path,))
    return open_result(path)
