"""Every spectral step is reachable by name, takes plain TOML parameters and is lazy."""

import tomllib

import numpy as np
import pytest

import pmap
from pmap.steps import available_steps, get_step

SPECTRAL_STEPS = {
    "to_vacuum",
    "to_air",
    "to_energy",
    "to_wavenumber",
    "to_raman_shift",
    "remove_spikes",
    "apply_calibration",
    "subtract_dark",
    "correct_response",
    "normalise_exposure",
    "mask_bad_pixels",
    "remove_baseline",
    "smooth",
    "pca_denoise",
}


@pytest.fixture
def setup(tmp_path):
    rng = np.random.default_rng(0)
    n = 256
    wl = np.linspace(580.0, 730.0, n)
    data = 100 + 300 * np.exp(-0.5 * ((wl - 650) / 12) ** 2) + rng.normal(0, 2, (6, 8, n))
    cube = pmap.make_cube(
        data.astype("float32"),
        wavelength_nm=wl,
        y_um=np.arange(6) * 0.5,
        x_um=np.arange(8) * 0.5,
        attrs={"exposure_s": 0.5, "excitation_wavelength_nm": 532.0, "excitation_power_W": 2e-3},
        chunks={"y": 3, "x": 4},
    )
    np.savetxt(tmp_path / "dark.txt", np.column_stack([wl, np.full(n, 3.0)]))
    np.savetxt(
        tmp_path / "response.csv",
        np.column_stack([np.linspace(500, 800, 61), np.linspace(0.5, 1.0, 61)]),
        delimiter=",",
    )
    # a Ne lamp on the same detector, for an on-the-fly calibration
    lamp = np.full(n, 20.0)
    for line in pmap.spectral.reference_lines("Ne"):
        lamp += 1000 * np.exp(-0.5 * ((wl - line - 0.4) / 0.8) ** 2)
    np.savetxt(tmp_path / "lamp.txt", np.column_stack([wl, lamp]))
    toml_text = f"""
[[steps]]
step = "subtract_dark"
dark = "{tmp_path / "dark.txt"}"
[[steps]]
step = "subtract_dark"
region = {{ x = [0.0, 1.0], y = [0.0, 1.0] }}
[[steps]]
step = "correct_response"
response = "{tmp_path / "response.csv"}"
[[steps]]
step = "normalise_exposure"
per_power = true
[[steps]]
step = "apply_calibration"
lamp = "{tmp_path / "lamp.txt"}"
lines = "Ne"
[[steps]]
step = "remove_spikes"
threshold = 6.0
[[steps]]
step = "mask_bad_pixels"
saturation_counts = 60000
[[steps]]
step = "remove_baseline"
method = "als"
lam = 1e5
p = 0.01
[[steps]]
step = "remove_baseline"
method = "constant"
window = [580.0, 590.0]
[[steps]]
step = "smooth"
window = 7
order = 3
[[steps]]
step = "pca_denoise"
n_components = 4
sample_size = 30
seed = 1
[[steps]]
step = "to_vacuum"
method = "iau"
[[steps]]
step = "to_air"
[[steps]]
step = "to_raman_shift"
[[steps]]
step = "to_wavenumber"
[[steps]]
step = "to_energy"
resample = "uniform"
n_channels = 200
"""
    return cube, tomllib.loads(toml_text)["steps"]


def test_all_registered():
    assert SPECTRAL_STEPS <= set(available_steps())
    for name in SPECTRAL_STEPS:
        assert get_step(name).func.__name__ == name or name == "apply_calibration"


def test_steps_lazy_and_plain_params(setup, no_compute):
    cube, steps = setup
    done = set()
    outputs = []
    for spec in steps:
        params = dict(spec)
        name = params.pop("step")
        target = cube if name not in ("to_air",) else pmap.spectral.to_vacuum(cube)
        out = get_step(name).func(target, **params)  # builds a graph, computes nothing
        assert no_compute.count == 0
        assert out.name == "intensity"
        last = pmap.provenance.get_provenance(out.attrs)["steps"][-1]
        assert last["step"] == name
        done.add(name)
        outputs.append(out)
    assert done == SPECTRAL_STEPS


def test_chained_pipeline_computes(setup):
    cube, steps = setup
    out = cube
    for spec in steps[:-4]:  # the wavelength-domain steps in order
        params = dict(spec)
        out = get_step(params.pop("step")).func(out, **params)
    out = get_step("to_energy").func(out, resample="uniform", n_channels=200)
    vals = out.values
    assert vals.shape == (6, 8, 200)
    assert out.attrs["units"] == "counts/s/W/eV"
    names = [s["step"] for s in pmap.provenance.get_provenance(out.attrs)["steps"]]
    assert names[0] == "subtract_dark" and names[-1] == "to_energy"
