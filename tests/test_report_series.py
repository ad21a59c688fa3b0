"""Figures of a series store (pmap.report_series): parameter maps, status legend, per-region plot.

Truth is made with numpy from the published laws; the numbers drawn (stored in each
PNG's Description chunk) are checked against that truth.
"""

import json

import numpy as np
import pytest
import xarray as xr
from PIL import Image

from pmap import _style
from pmap.errors import StepError
from pmap.report_series import region_series, write_series_figures
from pmap.series import evaluate_law, fit_law

# Vurgaftman, Meyer & Ram-Mohan, J. Appl. Phys. 89, 5815 (2001): GaAs and InP Varshni
# parameters, and the worked E(300 K) values in /work/shared/REFERENCES.md
GAAS = (1.519, 0.5405e-3, 204.0, 1.42248)
INP = (1.4236, 0.363e-3, 162.0, 1.35289)
SIG = 3e-4  # eV, 1-sigma per point


def _meta(path):
    with Image.open(path) as im:
        return json.loads(im.text["Description"])


def _two_region_ds(rng, *, with_region=True, ny=16, nx=20, n_t=12):
    """GaAs on the left half (region 0), InP on the right (region 1); a corner of no signal."""
    t = np.linspace(10, 300, n_t)
    reg = np.zeros((ny, nx), int)
    reg[:, nx // 2:] = 1
    reg[:2, :2] = -1
    e = np.empty((n_t, ny, nx))
    for code, (e0, a, b, _) in ((0, GAAS), (1, INP)):
        e[:, reg == code] = (e0 - a * t**2 / (t + b))[:, None]
    e[:, reg == -1] = (GAAS[0] - GAAS[1] * t**2 / (t + GAAS[2]))[:, None]
    noisy = e + rng.normal(size=e.shape) * SIG
    noisy[:, reg == -1] = np.nan  # no signal: no points
    dims = ("temperature", "peak", "y", "x")
    ds = xr.Dataset(
        {"peak_energy": (dims, noisy[:, None], {"units": "eV"}),
         "peak_energy_err": (dims, np.full((n_t, 1, ny, nx), SIG), {"units": "eV"})},
        coords={"temperature": ("temperature", t, {"units": "K"}), "peak": [0],
                "y": ("y", np.arange(ny) * 0.5, {"units": "um"}),
                "x": ("x", np.arange(nx) * 0.5, {"units": "um"})})
    if with_region:
        ds["region"] = (("y", "x"), reg, {"region_names": '{"0": "GaAs", "1": "InP"}'})
    return ds, reg


def test_evaluate_law_against_published_values():
    # Varshni with the GaAs/InP parameters gives the worked E(300 K) (Vurgaftman et al. 2001)
    for e0, a, b, e300 in (GAAS, INP):
        assert evaluate_law("varshni", [300.0], [e0, a, b])[0] == pytest.approx(e300, abs=1e-5)
    # Arrhenius is stored with C itself (fitted as ln C): I(T) = I0/(1 + C exp(-Ea/kT))
    kb = 8.617333262e-5  # eV/K, CODATA 2018 (Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021))
    t = np.array([50.0, 150.0, 300.0])
    got = evaluate_law("arrhenius", t, [1000.0, 200.0, 0.05])
    assert np.allclose(got, 1000.0 / (1 + 200.0 * np.exp(-0.05 / (kb * t))), rtol=1e-6)
    # power law: A at the reference power
    p = np.array([1e-5, 1e-4, 1e-3])
    got = evaluate_law("power_law", p, [7.0, 1.5], reference_power_w=1e-4)
    assert np.allclose(got, 7.0 * (p / 1e-4) ** 1.5)
    with pytest.raises(StepError, match="reference power"):
        evaluate_law("power_law", p, [7.0, 1.5])
    with pytest.raises(StepError, match="3 parameters"):
        evaluate_law("varshni", p, [1.0, 2.0])


def test_region_series_numbers(rng):
    ds, reg = _two_region_ds(rng)
    out = fit_law(ds, law="varshni").compute()
    rs = region_series(out)
    assert rs["grouping"] == "region map" and rs["dim"] == "temperature"
    assert [r["code"] for r in rs["regions"]] == [0, 1]  # region -1 (no signal) is left out
    t = rs["x"]
    for r, (e0, a, b, _) in zip(rs["regions"], (GAAS, INP)):
        n = int((reg == r["code"]).sum())
        assert r["n_px"] == n and r["n_converged"] == n
        truth = e0 - a * t**2 / (t + b)  # Varshni 1967
        # mean of n pixels: s.e. SIG/sqrt(n); the reported s.e. estimates it (n-1 dof)
        assert np.all(np.abs(r["mean"] - truth) < 4 * SIG / np.sqrt(n))
        assert np.allclose(r["sem"], SIG / np.sqrt(n), rtol=0.35)
        # the law at the median parameters: within 3 s.e. of the truth at every T
        assert np.all(np.abs(r["curve"] - truth) < 3 * SIG / np.sqrt(n) * 3)
        assert r["params"][0] == pytest.approx(e0, abs=3 * 2 * SIG / np.sqrt(n))


def test_figures_maps_status_and_region_plot(tmp_path, rng):
    ds, reg = _two_region_ds(rng)
    out = fit_law(ds, law="varshni").compute()
    figs = write_series_figures(out, tmp_path)
    names = sorted(p.name for p in figs)
    expected = sorted([f"varshni_{p}{e}.png" for p in ("e0", "alpha", "beta") for e in ("", "_err")]
                      + ["varshni_chi2_red.png", "varshni_status.png",
                         "varshni_peak_energy_by_region.png"])
    assert names == expected
    m = _meta(tmp_path / "varshni_e0.png")
    assert m["title"].startswith("Varshni e0") and "(eV)" in m["title"]
    assert m["cmap"].startswith("viridis")
    assert m["n_no_value"] == int((reg == -1).sum())  # no signal, grey
    assert m["origin"] == "lower"
    assert _meta(tmp_path / "varshni_e0_err.png")["cmap"].startswith("cividis")
    st = _meta(tmp_path / "varshni_status.png")
    # CF flag legend; code 4 (too few points: here the no-signal corner) drawn grey
    assert st["legend"] == ["converged (0)", "masked or nan (4)"]
    assert st["colours"] == [_style.CATEGORY_PALETTE[0], _style.NAN_COLOUR]
    rp = _meta(tmp_path / "varshni_peak_energy_by_region.png")
    assert rp["xlabel"] == "Temperature (K)" and rp["ylabel"] == "Peak energy (eV)"
    assert [r["name"] for r in rp["regions"]] == ["GaAs", "InP"]
    assert rp["regions"][1]["median_params"]["e0"] == pytest.approx(INP[0], abs=2e-3)


def test_whole_map_without_region_and_peak_slices(tmp_path, rng):
    ds, _ = _two_region_ds(rng, with_region=False)
    two = xr.concat([ds, ds.assign(peak_energy=ds["peak_energy"] + 0.1)], dim="peak")
    two = two.assign_coords(peak=[0, 1])
    out = fit_law(two, law="varshni").compute()
    figs = write_series_figures(out, tmp_path)
    by_region = sorted(p.name for p in figs if "by_region" in p.name)
    assert by_region == ["varshni_peak_energy_by_region_peak0.png",
                         "varshni_peak_energy_by_region_peak1.png"]
    m0 = _meta(tmp_path / by_region[0])
    m1 = _meta(tmp_path / by_region[1])
    assert m0["grouping"].startswith("whole map") and len(m0["regions"]) == 1
    # peak 1 is peak 0 shifted by 0.1 eV: so are the whole-map means
    assert np.allclose(np.array(m1["regions"][0]["mean"]) - m0["regions"][0]["mean"], 0.1,
                       atol=1e-9)


def test_power_law_log_axes_and_classes(tmp_path, rng):
    p = np.geomspace(1e-6, 1e-3, 8)
    k = np.where(np.arange(6 * 5).reshape(6, 5) < 15, 0.8, 1.5)  # two classes of pixels
    clean = 1e3 * (p[:, None, None] / 1e-4) ** k[None]
    sig = 0.01 * clean
    ds = xr.Dataset({"integrated_intensity": (("excitation_power", "y", "x"),
                                              clean + rng.normal(size=clean.shape) * sig,
                                              {"units": "counts"}),
                     "integrated_intensity_err": (("excitation_power", "y", "x"), sig,
                                                  {"units": "counts"})},
                    coords={"excitation_power": ("excitation_power", p, {"units": "W"}),
                            "y": ("y", np.arange(6.0), {"units": "um"}),
                            "x": ("x", np.arange(5.0), {"units": "um"})})
    ds["region"] = (("y", "x"), (k > 1).astype(int))
    out = fit_law(ds, law="power_law").compute()
    figs = write_series_figures(out, tmp_path)
    assert "power_law_class.png" in [f.name for f in figs]
    c = _meta(tmp_path / "power_law_class.png")
    assert c["legend"] == ["k < 1 (0)", "1 ≤ k ≤ 2 (1)"]
    rp = _meta(tmp_path / "power_law_integrated_intensity_by_region.png")
    assert rp["log_axes"] is True
    # each region's curve is its law within a few per cent (1 % noise, 15 px)
    for r, kk in zip(rp["regions"], (0.8, 1.5)):
        assert np.allclose(r["curve"], 1e3 * (p / 1e-4) ** kk, rtol=0.02)


def test_cli_series_figures_and_report(tmp_path, rng, capsys):
    from pmap.cli import main

    ds, _ = _two_region_ds(rng, ny=6, nx=8)
    src = tmp_path / "res.zarr"
    ds.attrs.update(pmap_result=1, pmap_complete=True)
    ds.to_zarr(str(src), mode="w", consolidated=False)
    assert main(["series", str(src), "--law", "varshni", "-o", str(tmp_path / "S.zarr"),
                 "-q"]) == 0
    assert (tmp_path / "S_figures" / "varshni_status.png").exists()
    assert "figures (9)" in capsys.readouterr().out
    assert main(["series", str(src), "--law", "varshni", "-o", str(tmp_path / "T.zarr"),
                 "-q", "--no-figures"]) == 0
    assert not (tmp_path / "T_figures").exists()
    assert main(["report", str(tmp_path / "T.zarr")]) == 0
    assert (tmp_path / "T_figures" / "varshni_peak_energy_by_region.png").exists()


KB = 8.617333262e-5  # eV/K, CODATA 2018 (Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021))
T_GRID = np.linspace(10.0, 300.0, 14)
# (law, quantity, units, truth(T), relative 1-sigma of a point); parameters: GaAs Bose-Einstein
# (O'Donnell & Chen 1991, REFERENCES.md: 1.521 eV, S 3.0, 26.7 meV; from memory), linewidth
# with a 36 meV LO phonon (Rudin, Reinecke & Segall 1990; GaAs LO from memory), one-channel
# quenching (common practice)
LAW_CASES = [
    ("bose_einstein", "peak_energy", "eV",
     lambda t: 1.521 - 2 * 3.0 * 0.0267 / np.expm1(0.0267 / (KB * t)), 2e-4),
    ("linewidth", "peak_fwhm", "eV",
     lambda t: 0.004 + 2e-6 * t + 0.02 / np.expm1(0.036 / (KB * t)), 2e-4),
    ("arrhenius", "integrated_intensity", "counts",
     lambda t: 1e4 / (1 + 300.0 * np.exp(-0.05 / (KB * t))), 0.01),
]


@pytest.mark.parametrize("law, quantity, units, truth, sig", LAW_CASES,
                         ids=[c[0] for c in LAW_CASES])
def test_every_temperature_law_draws_its_curve(tmp_path, rng, law, quantity, units, truth, sig):
    clean = truth(T_GRID)
    s = sig * (clean if units == "counts" else 1.0)
    shape = (len(T_GRID), 8, 10)
    noisy = clean[:, None, None] + rng.normal(size=shape) * np.broadcast_to(
        np.asarray(s).reshape(-1, 1, 1) if np.ndim(s) else s, shape)
    err = np.broadcast_to(np.asarray(s).reshape(-1, 1, 1) if np.ndim(s) else s, shape)
    ds = xr.Dataset({quantity: (("temperature", "y", "x"), noisy, {"units": units}),
                     f"{quantity}_err": (("temperature", "y", "x"), err.copy(), {"units": units})},
                    coords={"temperature": ("temperature", T_GRID, {"units": "K"}),
                            "y": ("y", np.arange(8.0), {"units": "um"}),
                            "x": ("x", np.arange(10.0), {"units": "um"})})
    out = fit_law(ds, law=law, quantity=quantity).compute()
    figs = write_series_figures(out, tmp_path)
    from pmap.series import LAWS

    # each parameter and its 1-sigma, chi2_red, status, the series plot
    assert len(figs) == 2 * len(LAWS[law].params) + 3
    rp = _meta(tmp_path / f"{law}_{quantity}_by_region.png")
    [r] = rp["regions"]
    assert r["n_converged"] >= 0.95 * 80
    # the law at the map's median parameters follows the truth within a few s.e. of one
    # point (80 pixels: the median's scatter is ~1.25 sigma/sqrt(80) per point)
    tol = 5 * np.asarray(s) * 1.25 / np.sqrt(80)
    assert np.all(np.abs(np.array(r["curve"]) - clean) < np.maximum(tol, 1e-12))
