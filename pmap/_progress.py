"""A dask progress bar on stderr (tqdm), for long computations in the CLI and pipeline."""

from __future__ import annotations

import sys

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
