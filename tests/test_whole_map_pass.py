"""Two explicit phases (issue 13, item 3): whole-map quantities (hot channels, saturation
level, the template spectrum of multi-peak fits, a PCA basis) are computed by the pipeline
runner's phase one and recorded in provenance with their values; building a step's graph
on its own computes nothing. Ground truth: the same quantities computed directly with
numpy on the in-memory cube (common practice: compare with a direct computation)."""

from __future__ import annotations

import json

import numpy as np
import pytest

import pmap
from pmap.pipeline import build_result, load_pipeline
from pmap.steps import WholeMapPass


@pytest.fixture(scope="module")
def cube():
    rng = np.random.default_rng(4)
    lam = np.linspace(650.0, 750.0, 64)
    clean = 40 + 500 * np.exp(-0.5 * ((lam - 700) / 8) ** 2)
    data = rng.poisson(np.broadcast_to(clean, (12, 10, 64))).astype(np.float32)
    data[:, :, 17] += 5000.0  # a hot channel in every spectrum
    return pmap.make_cube(data, wavelength_nm=lam, units="counts",
                          attrs={"wavelength_medium": "vacuum", "saturation_counts": 60000.0},
                          chunks={"y": 4, "x": 5})


@pytest.mark.parametrize("step, kw", [
    ("mask_bad_pixels", {}),
    ("pca_denoise", {"n_components": 3}),
    ("subtract_dark", {"region": {"x": (0, 2)}}),
])
def test_steps_alone_compute_nothing(cube, no_compute, step, kw):
    """Without a pass (an API user building a graph) no step computes anything."""
    from pmap.steps import get_step

    out = get_step(step).func(cube, **kw)
    assert no_compute.count == 0 and out.chunks is not None


def test_fit_template_alone_computes_nothing(cube, no_compute):
    e = pmap.to_energy(cube)
    fit = pmap.fit_peaks(e, peaks=2)
    assert no_compute.count == 0 and fit["peak_energy"].chunks is not None


def test_phase_one_records_the_quantities_with_their_values(cube):
    pipe = load_pipeline(None)
    pipe.fit = {**(pipe.fit or {}), "peaks": 2}
    result, _ = build_result(cube, pipe)
    prov = json.loads(result.attrs["pmap_provenance"])
    records = {r["step"]: r["values"] for r in prov["whole_map_pass"]}
    # the hot channel: found, by index, as numpy finds it directly (every spectrum > 10x)
    assert records["mask_bad_pixels"]["hot_channels"]["true_at"] == [17]
    assert records["mask_bad_pixels"]["hot_channels"]["count"] == 1
    # the fit's template (the mean spectrum of the processed cube): summarised with its shape
    tmpl = records["fit_peaks"]["mean_spectrum"]
    assert tmpl["shape"] == [64] and tmpl["max"] > tmpl["min"]


def test_pass_values_equal_a_direct_computation(cube):
    """The pass computes the same numbers as numpy on the whole array."""
    wm = WholeMapPass()
    mean = cube.mean(("y", "x")).data
    (got,) = wm.compute("check", mean_spectrum=mean)
    np.testing.assert_allclose(np.asarray(got), cube.values.mean(axis=(0, 1)), rtol=1e-6)
    assert wm.records[0]["values"]["mean_spectrum"]["shape"] == [64]


def test_pipeline_file_cannot_set_the_pass(cube, tmp_path):
    bad = tmp_path / "p.toml"
    bad.write_text('[[steps]]\nstep = "mask_bad_pixels"\nwhole_map = 1\n')
    with pytest.raises(pmap.errors.StepError, match="whole_map"):
        load_pipeline(bad)


def test_report_states_the_hot_channels_found(cube, tmp_path):
    """The HTML report's quality control names the hot channel the whole-map pass found
    (channel 17, injected above)."""
    from pmap.report_html import write_html_report

    res = pmap.process(cube, tmp_path / "r.zarr", progress=False)
    html = write_html_report(res, tmp_path / "r.html").read_text(encoding="utf-8")
    assert "1 hot channel(s) masked in every spectrum (channel index 17)" in html
