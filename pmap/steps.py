"""Registry of processing steps, so that a pipeline TOML file can name them.

A *step* is a plain public function ``fn(cube, *, **params) -> cube`` that
returns a new lazy cube and records itself (name and parameters) in the
provenance of what it returns (:func:`pmap.provenance.with_step`). Modules in
lower layers register their steps with :func:`register_step`; the pipeline
runner looks them up by name with :func:`get_step`. This module imports nothing
from the layers above it.

Pipeline TOML (read by :mod:`pmap.pipeline`) lists steps in order::

    [[steps]]
    step = "remove_spikes"
    threshold = 6.0

    [[steps]]
    step = "to_energy"
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from importlib import import_module
from typing import Any

import numpy as np

from .errors import StepError

__all__ = [
    "StepSpec",
    "register_step",
    "get_step",
    "available_steps",
    "WholeMapPass",
    "whole_map_values",
]


@dataclass(frozen=True)
class StepSpec:
    """A registered step: its TOML name, the function, and a one-line summary."""

    name: str
    func: Callable
    summary: str


_REGISTRY: dict[str, StepSpec] = {}

# Modules that register steps when imported (looked up lazily, keeps `import pmap` light).
_STEP_MODULES = (
    "pmap.spectral",
    "pmap.fitting",
    "pmap.decomposition",
)


def register_step(name: str) -> Callable[[Callable], Callable]:
    """Decorator: register ``func`` under ``name`` for pipeline files."""

    def deco(func: Callable) -> Callable:
        doc = (func.__doc__ or "").strip().splitlines()
        _REGISTRY[name] = StepSpec(name, func, doc[0] if doc else "")
        return func

    return deco


def _load_all() -> None:
    for mod in _STEP_MODULES:
        try:
            import_module(mod)
        except ModuleNotFoundError as exc:  # a subpackage not built yet
            if exc.name != mod:
                raise


def get_step(name: str) -> StepSpec:
    """Look up a registered step by name; StepError naming the known steps if absent."""
    _load_all()
    if name not in _REGISTRY:
        raise StepError(f"unknown step {name!r}; known steps: {', '.join(sorted(_REGISTRY))}")
    return _REGISTRY[name]


def available_steps() -> dict[str, StepSpec]:
    """All registered steps, by name."""
    _load_all()
    return dict(sorted(_REGISTRY.items()))


# ------------------------------------------------------------------ whole-map pass
# Some steps need a small quantity reduced over the whole map (hot-channel votes, the
# maximum for saturation, the mean spectrum that seeds multi-peak fits, a PCA basis).
# Lazily, every block written on its own would recompute that reduction, i.e. re-read
# the whole cube per block. A pipeline run therefore has two explicit phases: the
# runner hands each step a ``WholeMapPass`` (keyword ``whole_map``), through which the
# step computes those quantities once, now, and records them; the per-block phase then
# depends only on each block's own chunks and on these values. Called without a pass
# (the default), a step computes nothing and its graph holds the reductions.

#: The keyword through which the pipeline runner hands a step its whole-map pass (not a
#: pipeline-file key).
WHOLE_MAP_KEYWORD = "whole_map"


def _summary(value: np.ndarray) -> Any:
    """A provenance-sized record of a computed quantity: the values when small, else the
    indices of a sparse boolean mask, else shape, range and a content hash."""
    import hashlib

    v = np.asarray(value)
    if v.dtype == bool:
        idx = np.flatnonzero(v)
        if idx.size <= 256:
            return {"true_at": idx.tolist(), "count": int(idx.size), "shape": list(v.shape)}
    if v.size <= 16:
        return v.tolist()
    finite = v[np.isfinite(v)] if v.dtype.kind == "f" else v.ravel()
    return {"shape": list(v.shape), "dtype": str(v.dtype),
            "min": float(finite.min()) if finite.size else None,
            "max": float(finite.max()) if finite.size else None,
            "sha256": hashlib.sha256(np.ascontiguousarray(v).tobytes()).hexdigest()[:16]}


class WholeMapPass:
    """Phase one of a pipeline run: whole-map quantities computed once and recorded.

    ``records`` lists, per step, the quantities computed and their values (small ones in
    full, large ones summarised), for the result's provenance.
    """

    def __init__(self) -> None:
        self.records: list[dict[str, Any]] = []

    def compute(self, step: str, **quantities: Any) -> tuple:
        """Compute the lazy ``quantities`` of ``step`` in one pass; returns them as
        single-chunk-per-original-chunk dask arrays holding the values."""
        import dask
        import dask.array as da

        names = list(quantities)
        values = dask.compute(*quantities.values())
        self.records.append({"step": step, "values": {
            n: _summary(v) for n, v in zip(names, values, strict=True)}})
        out = []
        for lazy, v in zip(quantities.values(), values, strict=True):
            v = np.asarray(v)
            chunks = getattr(lazy, "chunks", None)
            out.append(da.from_array(v, chunks=chunks if chunks is not None else -1))
        return tuple(out)


def whole_map_values(whole_map: WholeMapPass | None, step: str, **quantities: Any):
    """The named whole-map ``quantities`` of ``step``: computed now through ``whole_map``
    (phase one of a pipeline run, recorded under these names), or returned unchanged
    (lazy) without one. One quantity gives one array back, several a tuple in order.
    """
    arrs = (whole_map.compute(step, **quantities) if whole_map is not None
            else tuple(quantities.values()))
    return arrs[0] if len(arrs) == 1 else tuple(arrs)
