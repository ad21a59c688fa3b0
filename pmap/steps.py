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

import contextlib
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from importlib import import_module

from .errors import StepError

__all__ = [
    "StepSpec",
    "register_step",
    "get_step",
    "available_steps",
    "eager_globals",
    "materialize",
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


# ----------------------------------------------------------------------------- globals
# Some steps need a small quantity reduced over the whole map (hot-channel votes, the
# maximum for saturation, the mean spectrum that seeds multi-peak fits, a PCA basis).
# Lazily, every block written on its own would recompute that reduction, i.e. re-read
# the whole cube per block. Inside ``eager_globals()`` (the pipeline runner uses it),
# steps pass such reductions through ``materialize``, which computes them once, at
# graph-build time, so that each block then depends only on its own chunks. Outside
# the context (the default) steps stay fully lazy.
_EAGER = threading.local()


@contextlib.contextmanager
def eager_globals() -> Iterator[None]:
    """Within this block, :func:`materialize` computes small global reductions at once."""
    old = getattr(_EAGER, "on", False)
    _EAGER.on = True
    try:
        yield
    finally:
        _EAGER.on = old


def materialize(*arrs):
    """Compute small dask arrays now (in one pass) inside :func:`eager_globals`.

    Outside the context they are returned unchanged. One argument gives one array
    back, several give a tuple.
    """
    if getattr(_EAGER, "on", False):
        import dask

        arrs = dask.persist(*arrs)
    return arrs[0] if len(arrs) == 1 else tuple(arrs)
