"""Kill anywhere, lose nothing (issue 13, item 2): ``plcube process`` killed with SIGKILL at
points spread over every stage (whole-map pass, metadata, blocks, a block cut in two,
regions, completion, figures, HTML report), then resumed with ``--resume`` (half of them
under another ``--memory-limit``), gives every map bit for bit equal to an uninterrupted
run. Ground truth: the same command, not interrupted (common practice for crash
consistency tests: compare with the uninterrupted result)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from pmap.synthetic import write_demo_cube

KILLER = Path(__file__).with_name("_killer.py")

#: Two chains of kills. Each run resumes what the one before left and is killed at the next
#: point (the n-th arrival at it in that run), so the points cover every stage and each
#: resume meets a store left by a kill; a last plain --resume finishes. 20 points in all.
CHAIN_STORE = [  # the store: whole-map pass, metadata, blocks, regions, completion
    ("build", 1), ("whole_map", 1), ("metadata", 1), ("record", 1), ("block", 1),
    ("half_block", 2), ("block", 3), ("segment", 1), ("stage", 1), ("complete", 1),
    ("consolidate", 1),
]
CHAIN_MEMORY_AND_FIGURES = [  # blocks under a changing --memory-limit, then the figures
    ("block", 2), ("half_block", 1), ("block", 4), ("half_block", 3), ("block", 2),
    ("figure", 1), ("figure", 5), ("figure", 12), ("html", 1),
]


def _run(point, n, cube, out, *extra):
    args = [sys.executable, str(KILLER), point, str(n), "process", str(cube), "-o", str(out),
            "--regions", "2", "-q", *extra]
    return subprocess.run(args, capture_output=True, text=True, timeout=600)


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    d = tmp_path_factory.mktemp("kill")
    cube = write_demo_cube(d, shape=(24, 32), n_channels=128, seed=11, chunks=(8, 8))["cube"]
    ref = d / "ref.zarr"
    res = _run("none", 0, cube, ref, "--memory-limit", "300MB")
    assert res.returncode == 0, res.stderr
    return cube, ref


def _maps(path):
    ds = xr.open_zarr(path)
    return ds, {k: ds[k].values for k in ds.data_vars}


def _steps(ds):
    """The provenance steps and their parameters (timestamps of reading aside)."""
    prov = json.loads(ds.attrs["pmap_provenance"])
    return [(s["step"], json.dumps(s.get("params"), sort_keys=True)) for s in prov["steps"]]


def _is_complete(out: Path) -> bool:
    import zarr

    try:
        return bool(zarr.open_group(str(out), mode="r").attrs.get("pmap_complete"))
    except Exception:  # no store (killed before it existed) or no metadata yet
        return False


@pytest.mark.slow
@pytest.mark.parametrize("chain", ["store", "memory_and_figures"])
def test_killed_then_resumed_equals_uninterrupted(case, tmp_path, chain):
    cube, ref = case
    points = CHAIN_STORE if chain == "store" else CHAIN_MEMORY_AND_FIGURES
    figures = chain != "store"
    quiet = () if figures else ("--no-figures", "--no-html")
    out = tmp_path / "r.zarr"
    for i, (point, n) in enumerate(points):
        memory = ("--memory-limit", "4GB" if figures and i % 2 else "300MB")
        killed = _run(point, n, cube, out, "--resume", *memory, *quiet)
        assert killed.returncode == -9, (point, n, killed.returncode, killed.stderr[-500:])
        if point not in ("figure", "html"):  # a killed run never leaves a complete store
            assert not _is_complete(out), (point, n)
    resumed = _run("none", 0, cube, out, "--resume", "--memory-limit", "4GB", *quiet)
    assert resumed.returncode == 0, resumed.stderr[-800:]
    got, got_maps = _maps(out)
    want, want_maps = _maps(ref)
    assert bool(got.attrs["pmap_complete"])
    assert set(got_maps) == set(want_maps)
    for k, v in want_maps.items():
        np.testing.assert_array_equal(got_maps[k], v, err_msg=k)
    assert _steps(got) == _steps(want)
    assert not list(tmp_path.glob(".*partial*"))
    if figures:  # what the user sees beside the store is complete too
        figs = sorted(p.name for p in (tmp_path / "r_figures").glob("*.png"))
        assert figs == sorted(p.name for p in (ref.parent / "ref_figures").glob("*.png"))
        assert (tmp_path / "r_figures" / "r_report.html").stat().st_size > 10_000


def test_kill_points_cover_every_stage():
    """At least 20 kill points, over every stage named by the issue."""
    points = CHAIN_STORE + CHAIN_MEMORY_AND_FIGURES
    assert len(points) >= 20
    stages = {"build": "whole-map", "whole_map": "whole-map", "metadata": "metadata",
              "record": "metadata", "block": "blocks", "half_block": "blocks",
              "segment": "regions", "stage": "regions", "complete": "completion",
              "consolidate": "completion", "figure": "figures", "html": "figures"}
    assert {stages[p] for p, _ in points} == {"whole-map", "metadata", "blocks", "regions",
                                             "completion", "figures"}
