"""A dask progress bar on stderr (tqdm), for long computations in the CLI and pipeline."""

from __future__ import annotations

import logging
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager

from dask.callbacks import Callback


class TqdmProgress(Callback):
    """Dask local-scheduler callback that shows finished tasks with rate and time left.

    Use as a context manager around ``.compute()`` / ``to_zarr()``. Disabled
    (silent) when ``enabled`` is False.
    """

    def __init__(self, desc: str = "pmap", *, enabled: bool = True, unit: str = "task"):
        super().__init__()
        self.desc = desc
        self.enabled = enabled
        self.unit = unit
        self._bar = None

    def _start_state(self, dsk, state):
        if not self.enabled:
            return
        from tqdm import tqdm

        total = sum(len(state[k]) for k in ("ready", "waiting", "running", "finished"))
        self._bar = tqdm(total=total, desc=self.desc, unit=self.unit, file=sys.stderr,
                         dynamic_ncols=True, leave=True, mininterval=0.5)

    def _posttask(self, key, result, dsk, state, worker_id):
        if self._bar is not None:
            self._bar.update(1)

    def _finish(self, dsk, state, errored):
        if self._bar is not None:
            self._bar.close()
            self._bar = None


#: Said once on stderr when a run has to compile a kernel (numba cache miss).
COMPILING_MESSAGE = ("compiling numerical kernels: first run after an install or an update only, "
                     "1-2 minutes, cached for later runs (`plcube warmup` does it in advance)")


class CompileNotice:
    """Say when numba compiles one of pmap's kernels, and how long compiling took.

    A kernel loaded from numba's on-disk cache says nothing; a cache miss (the first
    run after an install or an update of pmap or numba, or a new input dtype) makes a
    run wait for compilation, tens of seconds per kernel family: the first miss prints
    ``message`` once on stderr. ``seconds`` (compile wall time) and ``kernels`` count the outermost compilations
    (a kernel's callees compile inside it). Use as a
    context manager around the work; silent (counting only) when ``enabled`` is False.
    Imports numba's event module only on entry.
    """

    def __init__(self, prefix: str = "pmap", *, enabled: bool = True,
                 message: str = COMPILING_MESSAGE):
        self.prefix = prefix
        self.enabled = enabled
        self.message = message
        self.seconds = 0.0
        self.kernels = 0
        self._depth = 0
        self._t0 = 0.0
        self._said = False
        self._listener = None

    def _start(self, ev) -> None:
        if self._depth == 0:  # numba compiles under one global lock: no interleaving
            self._t0 = time.perf_counter()
            self.kernels += 1
            if not self._said and self.enabled:
                self._said = True
                _write_line(f"{self.prefix}: {self.message}")
        self._depth += 1

    def _end(self, ev) -> None:
        self._depth -= 1
        if self._depth == 0:
            self.seconds += time.perf_counter() - self._t0

    def __enter__(self) -> CompileNotice:
        from numba.core import event

        outer = self

        class _Listener(event.Listener):
            def on_start(self, ev):
                outer._start(ev)

            def on_end(self, ev):
                outer._end(ev)

        self._listener = _Listener()
        event.register("numba:compile", self._listener)
        return self

    def __exit__(self, *exc) -> None:
        from numba.core import event

        event.unregister("numba:compile", self._listener)
        if self._said and self.enabled and not exc[0]:
            _write_line(f"{self.prefix}: compiled {self.kernels} kernel(s) in "
                        f"{self.seconds:.0f} s (cached: later runs skip this)")


def _write_line(text: str) -> None:
    """One line on stderr that does not break a tqdm bar being drawn."""
    try:
        from tqdm import tqdm

        tqdm.write(text, file=sys.stderr)
    except ImportError:  # pragma: no cover - tqdm is a dependency
        print(text, file=sys.stderr)


@contextmanager
def phase(name: str) -> Iterator[None]:
    """Time a phase of a run: wall and CPU seconds (all threads of this process) go to
    the logger ``pmap.timing`` at DEBUG level (``PMAP_TIMINGS=1`` prints them from the
    command line; scripts/bench_scale.py reads them to split a run into its parts)."""
    log = logging.getLogger("pmap.timing")
    if not log.isEnabledFor(logging.DEBUG):
        yield
        return
    t, c = time.perf_counter(), time.process_time()
    try:
        yield
    finally:
        log.debug("%s: %.3f s wall, %.3f CPU s", name, time.perf_counter() - t,
                  time.process_time() - c)
