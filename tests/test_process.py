"""End to end: pmap.process and `pmap process` on the synthetic demo map (known truth)."""

import hashlib
import json
import os
import subprocess
import sys
import warnings

import numpy as np
import pytest
import xarray as xr

import pmap
from pmap import pipeline
from pmap.errors import OutputExistsError, PmapNotice
from pmap.pipeline import load_pipeline
from pmap.synthetic import write_demo_cube

sys.path.insert(0, os.path.dirname(__file__))
from _interrupt import interrupted  # noqa: E402

CONTRACT_PEAK = ["peak_energy", "peak_energy_err", "peak_fwhm", "peak_fwhm_err", "peak_height",
                 "peak_area"]
CONTRACT_MAP = ["fit_status", "chi2_red", "max_energy", "centroid_energy", "integrated_intensity"]


def _tree_digest(path):
    h = hashlib.sha256()
    for root, _, files in sorted(os.walk(path)):
        for f in sorted(files):
            p = os.path.join(root, f)
            h.update(p.encode())
            with open(p, "rb") as fh:
                h.update(fh.read())
            h.update(str(os.stat(p).st_mtime_ns).encode())
    return h.hexdigest()


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("demo")
    paths = write_demo_cube(d, shape=(32, 48), n_channels=256, seed=3, chunks=(16, 16))
    return paths


@pytest.fixture(scope="module")
def result(demo, tmp_path_factory):
    out = tmp_path_factory.mktemp("res") / "r.zarr"
    pipe = load_pipeline(None)
    pipe.regions = {"n_regions": 3, "method": "gmm", "feature_space": "shape+intensity"}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapNotice)
        ds = pmap.process(demo["cube"], out, pipeline=pipe, progress=False,
                          memory_limit="200MB")
    return ds, out


def test_result_store_contract(result):
    ds, out = result
    reopened = xr.open_zarr(out)
    for v in CONTRACT_PEAK:
        assert reopened[v].dims == ("peak", "y", "x"), v
    for v in CONTRACT_MAP + ["region"]:
        assert reopened[v].dims == ("y", "x"), v
    for v in ["peak_energy", "peak_energy_err", "peak_fwhm", "max_energy", "centroid_energy"]:
        assert reopened[v].attrs["units"] == "eV"
    assert reopened.x.attrs["units"] == "um" and reopened.y.attrs["units"] == "um"
    assert "0=" in str(reopened.fit_status.attrs.get("legend", reopened.fit_status.attrs))
    assert reopened.attrs["pmap_complete"] is True


def test_provenance_names_every_step_version_and_input(result, demo):
    ds, _ = result
    prov = json.loads(ds.attrs["pmap_provenance"])
    names = [s["step"] for s in prov["steps"]]
    for step in ("mask_bad_pixels", "remove_spikes", "remove_baseline", "to_energy",
                 "spectral_descriptors", "fit_peaks", "segment"):
        assert step in names, names
    assert prov["pmap_version"] == pmap.__version__
    assert prov["input"]["path"] == str(demo["cube"].resolve())
    assert prov["input"]["fingerprint"].startswith("sha256:")


def test_demo_truth_recovered(result, demo):
    """Fitted band-edge energy against the generator's truth (bias and scatter stated)."""
    ds, _ = result
    truth = xr.open_zarr(demo["truth"])
    region = truth.region.values
    # Truth peak 0 is the graded band edge of the matrix (region 0); compare matrix pixels
    # with a converged fit. One Gaussian describes them (E = hc/λ conversion with the
    # Jacobian, Mooney & Kambhampati, J. Phys. Chem. Lett. 4, 3316 (2013)).
    names = list(truth.peak_name.values) if "peak_name" in truth else list(truth.peak.values)
    k = [i for i, n in enumerate(names) if "band" in str(n)][0]
    t = truth.peak_energy.isel(peak=k).values
    f = ds.peak_energy.isel(peak=0).values
    ok = (region == 0) & (ds.fit_status.values == 0) & np.isfinite(t)
    assert ok.sum() > 0.5 * (region == 0).sum()
    d_mev = (f[ok] - t[ok]) * 1e3
    bias, scatter = np.median(d_mev), 1.4826 * np.median(np.abs(d_mev - np.median(d_mev)))
    assert abs(bias) < 1.0, bias  # meV
    assert scatter < 2.0, scatter  # meV
    # off-sample pixels: no invented values
    off = region == -1
    assert np.all(np.isnan(ds.peak_energy.isel(peak=0).values[off]) | (ds.fit_status.values[off] != 0))


def test_regions_match_truth(result, demo):
    from sklearn.metrics import adjusted_rand_score

    ds, _ = result
    truth = xr.open_zarr(demo["truth"]).region.values.ravel()
    got = ds.region.values.ravel()
    # adjusted Rand index (Hubert & Arabie, J. Classif. 2, 193 (1985)), sklearn's implementation
    assert adjusted_rand_score(truth, got) >= 0.9


def test_region_table_written(result):
    _, out = result
    csv = out.with_name("r_regions.csv")
    assert csv.exists()
    text = csv.read_text()
    assert "area" in text and "peak_energy" in text


def test_input_never_modified_and_no_overwrite(demo, result, tmp_path):
    _, out = result
    before = _tree_digest(demo["cube"])
    with pytest.raises(OutputExistsError):
        pmap.process(demo["cube"], out, progress=False)
    with pytest.raises(OutputExistsError):
        pmap.process(demo["cube"], demo["cube"], progress=False, overwrite=True)
    assert _tree_digest(demo["cube"]) == before


def test_results_do_not_depend_on_memory_limit_or_chunks(demo, tmp_path, monkeypatch):
    import pmap.results as results

    monkeypatch.setattr(results, "WRITE_BLOCK_BYTES", 1)  # store chunks = compute chunks
    pipe = """[[steps]]\nstep = "remove_spikes"\n[[steps]]\nstep = "to_energy"\n[descriptors]\n[fit]\npeaks = 1\n"""
    a = pmap.process(demo["cube"], tmp_path / "a.zarr", pipeline=pipe, progress=False,
                     memory_limit="2GB")
    b = pmap.process(demo["cube"], tmp_path / "b.zarr", pipeline=pipe, progress=False,
                     memory_limit="8MB")
    assert b.chunksizes["x"] != a.chunksizes["x"] or b.chunksizes["y"] != a.chunksizes["y"]
    a, b = a.compute(), b.compute()
    for v in ("peak_energy", "peak_fwhm", "peak_area", "integrated_intensity"):
        np.testing.assert_allclose(a[v].values, b[v].values, rtol=1e-5, equal_nan=True)


def _record_modes(monkeypatch, results):
    """Spy on the writer's mode: True for streaming strips, False for tiles."""
    modes, grow = [], results._grow_write_blocks

    def spy(ds, spatial, *, strips=True):
        modes.append(strips)
        return grow(ds, spatial, strips=strips)

    monkeypatch.setattr(results, "_grow_write_blocks", spy)
    return modes


# Small compute chunks (several blocks on the small demo cube) under a generous limit:
# the writer streams unless HELD_ROWS is made huge, which forces bounded tiles.
_SMALL_CHUNKS = "[output]\nchunk_mib = 0.25\n"


def test_streaming_strips_and_bounded_tiles_write_the_same_maps(demo, tmp_path, monkeypatch):
    # Ground truth is the run itself: the writer's two modes (one graph of full-width
    # strips; tiles a few at a time, chosen when rows of chunks are too big for the
    # memory limit) must give identical maps, spike removal's neighbours included.
    import pmap.results as results

    monkeypatch.setattr(results, "WRITE_BLOCK_BYTES", 1)
    modes = _record_modes(monkeypatch, results)
    pipe = ("""[[steps]]\nstep = "remove_spikes"\n[[steps]]\nstep = "to_energy"\n"""
            """[descriptors]\n[fit]\npeaks = 1\n""" + _SMALL_CHUNKS)
    a = pmap.process(demo["cube"], tmp_path / "s.zarr", pipeline=pipe, progress=False,
                     memory_limit="2GB").compute()
    monkeypatch.setattr(pipeline, "HELD_ROWS", 1e12)  # every row "too big": tiles
    b = pmap.process(demo["cube"], tmp_path / "t.zarr", pipeline=pipe, progress=False,
                     memory_limit="2GB").compute()
    assert modes == [True, False]
    assert b.attrs["pmap_complete"]
    for v in ("peak_energy", "peak_area", "chi2_red", "integrated_intensity", "fit_status"):
        np.testing.assert_array_equal(a[v].values, b[v].values)


def test_resume_on_complete_store_says_so(result, demo):
    _, out = result
    with pytest.warns(PmapNotice, match="already complete"):
        pmap.process(demo["cube"], out, resume=True, progress=False)


@pytest.mark.slow
def test_threads_local_cluster_and_resumed_run_agree(demo, tmp_path):
    distributed = pytest.importorskip("distributed")
    pipe = """[[steps]]\nstep = "to_energy"\n[descriptors]\n[fit]\npeaks = 1\n"""
    ref = pmap.process(demo["cube"], tmp_path / "t.zarr", pipeline=pipe, progress=False,
                       memory_limit="8MB").compute()
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        dist = pmap.process(demo["cube"], tmp_path / "d.zarr", pipeline=pipe, progress=False,
                            memory_limit="8MB", client=client).compute()
    for v in ("peak_energy", "peak_area", "chi2_red", "max_energy"):
        np.testing.assert_allclose(dist[v].values, ref[v].values, rtol=1e-6, equal_nan=True)


def test_cli_process_writes_store_and_figures(demo, tmp_path):
    out = tmp_path / "cli.zarr"
    cfg = tmp_path / "p.toml"
    cfg.write_text('[[steps]]\nstep = "to_energy"\n[descriptors]\n[fit]\npeaks = 1\n')
    res = subprocess.run([sys.executable, "-m", "pmap", "process", str(demo["cube"]), "-o",
                          str(out), "--config", str(cfg), "-q"], capture_output=True, text=True,
                         timeout=600)
    assert res.returncode == 0, res.stderr
    assert out.exists() and "result store" in res.stdout
    figs = list((tmp_path / "cli_figures").glob("*.png"))
    assert any("peak_energy" in f.name for f in figs)
    again = subprocess.run([sys.executable, "-m", "pmap", "process", str(demo["cube"]), "-o",
                            str(out), "--config", str(cfg), "-q"], capture_output=True, text=True,
                           timeout=600)
    assert again.returncode == 2 and "--overwrite" in again.stderr


@pytest.mark.parametrize("mode", ["streaming", "tiles"])
def test_interrupted_then_resumed_process_equals_uninterrupted(demo, tmp_path, monkeypatch,
                                                               mode):
    import pmap.results as results

    monkeypatch.setattr(results, "WRITE_BLOCK_BYTES", 1)  # several blocks on a small cube
    if mode == "tiles":
        monkeypatch.setattr(pipeline, "HELD_ROWS", 1e12)
    modes = _record_modes(monkeypatch, results)
    pipe = ("""[[steps]]\nstep = "remove_spikes"\n[[steps]]\nstep = "to_energy"\n"""
            """[descriptors]\n[fit]\npeaks = 1\n""" + _SMALL_CHUNKS)
    ref = pmap.process(demo["cube"], tmp_path / "ref.zarr", pipeline=pipe, progress=False,
                       memory_limit="2GB").compute()
    out = tmp_path / "int.zarr"
    interrupted(monkeypatch, lambda: pmap.process(demo["cube"], out, pipeline=pipe,
                                                  progress=False, memory_limit="2GB"))
    assert xr.open_zarr(out).attrs["pmap_complete"] is False
    with pytest.raises(OutputExistsError):  # neither resume nor overwrite: refused
        pmap.process(demo["cube"], out, pipeline=pipe, progress=False, memory_limit="2GB")
    res = pmap.process(demo["cube"], out, pipeline=pipe, progress=False, memory_limit="2GB",
                       resume=True).compute()
    assert set(modes) == {mode == "streaming"}
    for v in ("peak_energy", "peak_area", "chi2_red", "integrated_intensity"):
        np.testing.assert_array_equal(res[v].values, ref[v].values)
