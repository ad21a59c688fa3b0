"""Resume reuses the interrupted run's grid and refuses a different input or pipeline
(issue 13, item 1, first part). Ground truth: the same run without interruption."""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

import numpy as np
import pytest

import pmap
import pmap.results as results
from pmap.errors import StepError
from pmap.synthetic import write_demo_cube

sys.path.insert(0, str(Path(__file__).parent))
from _interrupt import interrupted  # noqa: E402

PIPE = """[[steps]]\nstep = "remove_spikes"\n[[steps]]\nstep = "to_energy"\n[fit]\npeaks = 1\n"""


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("demo")
    return write_demo_cube(d, shape=(32, 48), n_channels=256, seed=5, chunks=(16, 16))


def _interrupt(monkeypatch, cube, out, memory_limit, pipe=PIPE):
    interrupted(monkeypatch, lambda: pmap.process(cube, out, pipeline=pipe, progress=False,
                                                  memory_limit=memory_limit))


def test_resume_with_another_memory_limit_equals_uninterrupted(demo, tmp_path, monkeypatch):
    monkeypatch.setattr(results, "WRITE_BLOCK_BYTES", 1)  # several blocks on a small cube
    ref = pmap.process(demo["cube"], tmp_path / "ref.zarr", pipeline=PIPE, progress=False,
                       memory_limit="8MB").compute()
    out = tmp_path / "int.zarr"
    _interrupt(monkeypatch, demo["cube"], out, "8MB")
    res = pmap.process(demo["cube"], out, pipeline=PIPE, progress=False, memory_limit="4GB",
                       resume=True).compute()
    assert bool(res.attrs["pmap_complete"])
    for v in ("peak_energy", "peak_area", "chi2_red"):
        np.testing.assert_array_equal(res[v].values, ref[v].values)


def test_resume_refuses_another_pipeline_or_input(demo, tmp_path, monkeypatch):
    monkeypatch.setattr(results, "WRITE_BLOCK_BYTES", 1)
    out = tmp_path / "int.zarr"
    _interrupt(monkeypatch, demo["cube"], out, "8MB")
    with pytest.raises(StepError, match="pipeline differs"):
        pmap.process(demo["cube"], out, pipeline=PIPE + "max_iter = 50\n", progress=False,
                     resume=True)
    other = tmp_path / "other.zarr"
    shutil.copytree(demo["cube"], other)
    import zarr

    # a different acquisition: same pixels, other metadata (the fingerprint covers both)
    zarr.open_group(str(other), mode="r+").attrs["temperature_K"] = 4.0
    with pytest.raises(StepError, match="not the one of the interrupted run"):
        pmap.process(other, out, pipeline=PIPE, progress=False, resume=True)
