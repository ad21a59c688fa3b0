"""Result store: block-wise writes, completeness flag, resume, overwrite protection."""

import dask.array as da
import numpy as np
import pytest
import xarray as xr

import pmap.results as results
from pmap.errors import FormatError, OutputExistsError
from pmap.results import DONE_ARRAY, assemble_result, open_result, write_result


def _result(seed=0):
    rs = da.random.RandomState(seed)
    ds = xr.Dataset(
        {
            "peak_energy": (("peak", "y", "x"), rs.random_sample((2, 10, 12), chunks=(2, 4, 5)),
                            {"units": "eV"}),
            "chi2_red": (("y", "x"), rs.random_sample((10, 12), chunks=(4, 5)), {"units": "1"}),
            "component_spectrum": (("component", "energy"), np.arange(21.0).reshape(3, 7)),
        },
        coords={"y": ("y", np.arange(10) * 0.5, {"units": "um"}),
                "x": ("x", np.arange(12) * 0.5, {"units": "um"}), "peak": [0, 1]},
    )
    return assemble_result([ds], provenance_json='{"steps": []}')


def test_write_and_reopen(tmp_path):
    ds = _result()
    p = write_result(ds, tmp_path / "r.zarr", progress=False)
    r = open_result(p)
    assert r.attrs["pmap_complete"] is True
    xr.testing.assert_allclose(r.compute(), ds.compute().assign_attrs(pmap_complete=True))
    assert r.peak_energy.attrs["units"] == "eV" and r.x.attrs["units"] == "um"
    import zarr

    # the done-record lives inside the store while it is written, and goes at completion
    assert DONE_ARRAY not in zarr.open_group(str(p), mode="r")
    assert not list(tmp_path.glob("*.progress"))


def test_refuses_overwrite_and_foreign_folders(tmp_path):
    p = write_result(_result(), tmp_path / "r.zarr", progress=False)
    with pytest.raises(OutputExistsError, match="--overwrite"):
        write_result(_result(), p, progress=False)
    write_result(_result(1), p, progress=False, overwrite=True)
    other = tmp_path / "precious"
    other.mkdir()
    (other / "data.txt").write_text("keep me")
    with pytest.raises(OutputExistsError, match="not a pmap result"):
        write_result(_result(), other, progress=False, overwrite=True)
    assert (other / "data.txt").read_text() == "keep me"


def test_interrupted_then_resumed_equals_uninterrupted(tmp_path, monkeypatch):
    monkeypatch.setattr(results, "WRITE_BLOCK_BYTES", 1)  # one write block per chunk
    ds = _result(3)
    full = write_result(ds, tmp_path / "full.zarr", progress=False)
    calls = {"n": 0}
    real = results._write_block

    def flaky(*args, **kw):
        calls["n"] += 1
        if calls["n"] > 4:
            raise KeyboardInterrupt  # as if the user pressed Ctrl-C mid-run
        return real(*args, **kw)

    monkeypatch.setattr(results, "_write_block", flaky)
    part = tmp_path / "part.zarr"
    with pytest.raises(KeyboardInterrupt):
        write_result(ds, part, progress=False, concurrency=1)
    monkeypatch.setattr(results, "_write_block", real)
    # an interrupted store never claims to be complete
    with pytest.raises(FormatError, match="incomplete"):
        open_result(part)
    import zarr

    assert int(np.asarray(zarr.open_group(str(part), mode="r")[DONE_ARRAY][:]).sum()) == 4
    written = []
    monkeypatch.setattr(results, "_write_block",
                        lambda *a, **k: (written.append(a[1]), real(*a, **k))[1])
    write_result(ds, part, progress=False, resume=True)
    assert len(written) == 9 - 4  # only unfinished blocks were recomputed
    xr.testing.assert_identical(open_result(part).compute(), open_result(full).compute())
