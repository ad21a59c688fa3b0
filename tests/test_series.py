"""Per-pixel laws along a stack dim (pmap.series.fit_law, ``pmap series``).

Truth is made here with numpy from the published formulas; recovered parameters are
compared with the published values and pulls (error / reported σ) must have s.d.
1 within 3 standard errors (s.e. ≈ 1/√(2n), common practice).
"""

import numpy as np
import pytest
import xarray as xr

from pmap.errors import StepError
from pmap.series import fit_law

KB = 8.617333262e-5  # eV/K, CODATA 2018 (Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021))


def _series_ds(stack_dim, xvals, truth, sigma, rng, shape=(40, 50), name="peak_energy",
               units="eV", chunks=20):
    """A result-like Dataset: name on (stack, peak, y, x) with {name}_err."""
    ny, nx = shape
    clean = np.broadcast_to(truth[:, None, None, None], (len(xvals), 1, ny, nx))
    sig = np.broadcast_to(np.asarray(sigma, float).reshape(-1, 1, 1, 1)
                          if np.ndim(sigma) else sigma, clean.shape)
    noisy = clean + rng.normal(size=clean.shape) * sig
    dims = (stack_dim, "peak", "y", "x")
    coords = {stack_dim: (stack_dim, xvals, {"units": "K" if stack_dim == "temperature" else "W"}),
              "peak": [0], "y": np.arange(ny) * 1.0, "x": np.arange(nx) * 1.0}
    ds = xr.Dataset({name: (dims, noisy, {"units": units}),
                     f"{name}_err": (dims, np.array(sig), {"units": units})}, coords=coords)
    return ds.chunk({"y": chunks, "x": chunks})


def _pulls(est, err, true):
    pull = ((est - true) / err).values.ravel()
    return pull[np.isfinite(pull)]


def _check_pulls(pull, n_expected):
    n = pull.size
    assert n == n_expected
    se_sd = 1 / np.sqrt(2 * n)  # s.e. of a sample s.d. (common practice)
    assert abs(pull.std() - 1) < 3 * se_sd, pull.std()
    assert abs(pull.mean()) < 3 / np.sqrt(n), pull.mean()


# Vurgaftman, Meyer & Ram-Mohan, J. Appl. Phys. 89, 5815 (2001), Table (Varshni parameters)
GAAS = (1.519, 0.5405e-3, 204.0, {77.0: 1.50760, 300.0: 1.42248})
INP = (1.4236, 0.363e-3, 162.0, {300.0: 1.35289})


@pytest.mark.parametrize("mat", [GAAS, INP], ids=["GaAs", "InP"])
def test_varshni_recovers_published_parameters(mat, rng):
    e0, alpha, beta, checks = mat
    t = np.linspace(10, 300, 30)
    truth = e0 - alpha * t**2 / (t + beta)  # Varshni, Physica 34, 149 (1967)
    for tt, ev in checks.items():  # the published check values of the same parameters
        assert abs(e0 - alpha * tt**2 / (tt + beta) - ev) < 1e-5
    ds = _series_ds("temperature", t, truth, 0.3e-3, rng)
    out = fit_law(ds, law="varshni").compute()
    assert set(out.data_vars) >= {"varshni_e0", "varshni_alpha", "varshni_beta",
                                  "varshni_e0_err", "varshni_chi2_red", "varshni_status"}
    assert out["varshni_e0"].dims == ("peak", "y", "x")
    assert out["varshni_alpha"].attrs["units"] == "eV/K"
    assert out["varshni_beta"].attrs["units"] == "K"
    assert (out["varshni_status"] == 0).all()
    n = 2000
    for name, true in (("e0", e0), ("alpha", alpha), ("beta", beta)):
        _check_pulls(_pulls(out[f"varshni_{name}"], out[f"varshni_{name}_err"], true), n)
    # median over n = 2000 pixels: within 3 s.e. of the median (≈ 1.25 σ/√n)
    for name, true in (("e0", e0), ("alpha", alpha), ("beta", beta)):
        med_err = float(out[f"varshni_{name}_err"].median())
        assert abs(float(out[f"varshni_{name}"].median()) - true) < 3 * 1.25 * med_err / np.sqrt(n)
    # the fitted curve reproduces the published energies at 77 K / 300 K
    for tt, ev in checks.items():
        e_fit = out["varshni_e0"] - out["varshni_alpha"] * tt**2 / (tt + out["varshni_beta"])
        assert abs(float(e_fit.mean()) - ev) < 2e-5
    # reduced chi-square of a correct model with true σ: mean 1, s.e. sqrt(2/dof/n)
    dof = 30 - 3
    assert abs(float(out["varshni_chi2_red"].mean()) - 1) < 3 * np.sqrt(2 / dof / n)


def test_bose_einstein_recovery_and_high_temperature_slope(rng):
    # GaAs-like parameters (O'Donnell & Chen, Appl. Phys. Lett. 58, 2924 (1991); from memory)
    e0, s, hw = 1.521, 3.0, 0.0267
    t = np.linspace(10, 400, 30)
    truth = e0 - s * hw * (1 / np.tanh(hw / (2 * KB * t)) - 1)
    ds = _series_ds("temperature", t, truth, 0.3e-3, rng)
    out = fit_law(ds, law="bose_einstein").compute()
    assert (out["bose_einstein_status"] == 0).all()
    for name, true in (("e0", e0), ("s", s), ("phonon_energy", hw)):
        _check_pulls(_pulls(out[f"bose_einstein_{name}"], out[f"bose_einstein_{name}_err"], true),
                     2000)
    assert out["bose_einstein_phonon_energy"].attrs["units"] == "eV"
    # high-T slope of the law is −2Sk (exact limit of the formula); check pmap's model
    from pmap.series import LAWS

    p = np.array([[e0, s, hw]])
    big_t = np.array([2e4, 2e4 + 1.0])
    slope = np.diff(LAWS["bose_einstein"].model(big_t, p)[0])[0]
    assert slope == pytest.approx(-2 * s * KB, rel=1e-4)  # −0.517 meV/K for S = 3


def test_linewidth_recovery(rng):
    # GaAs-like: LO phonon 36 meV (from memory); Rudin, Reinecke & Segall, PRB 42, 11218 (1990)
    g0, gac, glo, elo = 3e-3, 10e-6, 20e-3, 0.036
    t = np.linspace(10, 400, 40)
    truth = g0 + gac * t + glo / (np.exp(elo / (KB * t)) - 1)
    ds = _series_ds("temperature", t, truth, 0.2e-3, rng, name="peak_fwhm")
    out = fit_law(ds, law="linewidth").compute()
    assert (out["linewidth_status"] == 0).all()
    for name, true in (("gamma0", g0), ("gamma_ac", gac), ("gamma_lo", glo), ("lo_energy", elo)):
        _check_pulls(_pulls(out[f"linewidth_{name}"], out[f"linewidth_{name}_err"], true), 2000)


def test_arrhenius_activation_energy(rng):
    # one-channel quenching (common practice): I0 = 1e4, C = 1e3, Ea = 50 meV
    i0, c, ea = 1e4, 1e3, 0.050
    t = np.linspace(10, 300, 30)
    truth = i0 / (1 + c * np.exp(-ea / (KB * t)))
    sigma = np.sqrt(truth) + 5  # shot noise + read noise, in counts
    ds = _series_ds("temperature", t, truth, sigma, rng, name="peak_area", units="counts eV")
    out = fit_law(ds, law="arrhenius").compute()
    assert out.attrs["series_quantity"] == "peak_area"
    assert (out["arrhenius_status"] == 0).all()
    assert out["arrhenius_ea"].attrs["units"] == "eV"
    assert out["arrhenius_i0"].attrs["units"] == "counts eV"
    for name, true in (("i0", i0), ("c", c), ("ea", ea)):
        _check_pulls(_pulls(out[f"arrhenius_{name}"], out[f"arrhenius_{name}_err"], true), 2000)


def test_power_law_exponent_and_classes(rng):
    # Schmidt, Lischka & Zulehner, PRB 45, 8989 (1992): k < 1 DAP/free-to-bound, 1–2 excitonic
    p = np.geomspace(1e-6, 1e-3, 12)
    ny, nx = 30, 60
    k_true = np.repeat([0.8, 1.5, 2.4], nx // 3)[None, :].repeat(ny, 0)
    a = 2e3
    clean = a * (p[:, None, None] / 1e-4) ** k_true[None]
    sig = np.sqrt(clean) + 2.0
    noisy = clean + rng.normal(size=clean.shape) * sig
    ds = xr.Dataset({"integrated_intensity": (("excitation_power", "y", "x"), noisy,
                                              {"units": "counts"}),
                     "integrated_intensity_err": (("excitation_power", "y", "x"), sig)},
                    coords={"excitation_power": ("excitation_power", p, {"units": "W"})})
    out = fit_law(ds.chunk({"y": 10}), law="power_law").compute()
    assert (out["power_law_status"] == 0).all()
    _check_pulls(_pulls(out["power_law_k"], out["power_law_k_err"], k_true), ny * nx)
    cls = out["power_law_class"].values
    expected = np.repeat([0, 1, 2], nx // 3)[None, :]
    assert (cls == expected).all()
    assert "rules of thumb" in out["power_law_class"].attrs["caveat"]
    # A is the intensity at the reference power (geometric mean of the powers)
    pref = out.attrs["reference_power_W"]
    assert pref == pytest.approx(np.exp(np.log(p).mean()))
    a_true = a * (pref / 1e-4) ** k_true
    _check_pulls(_pulls(out["power_law_a"], out["power_law_a_err"], a_true), ny * nx)


def test_fit_law_is_lazy(rng, no_compute):
    t = np.linspace(10, 300, 10)
    ds = _series_ds("temperature", t, 1.5 - 5e-4 * t**2 / (t + 200), 1e-3, rng, shape=(8, 8),
                    chunks=4)
    out = fit_law(ds, law="varshni")
    assert out["varshni_e0"].chunks is not None


def test_nan_points_and_unweighted(rng):
    t = np.linspace(10, 300, 12)
    truth = 1.5 - 5e-4 * t**2 / (t + 200)
    ds = _series_ds("temperature", t, truth, 1e-4, rng, shape=(2, 2)).compute()
    pe = ds["peak_energy"].values
    pe[:8, 0, 0, 0] = np.nan  # only 4 points left: fewer than 3 + 2
    pe[:2, 0, 0, 1] = np.nan  # 10 points: still fits
    out = fit_law(ds, law="varshni")
    assert int(out["varshni_status"][0, 0, 0]) == 4
    assert int(out["varshni_status"][0, 0, 1]) == 0
    da = ds["peak_energy"].rename("peak_energy")
    out2 = fit_law(da, law="varshni")  # no uncertainties: unweighted
    assert "unweighted" in out2.attrs["uncertainty_method"]
    assert int(out2["varshni_status"][0, 1, 1]) == 0


def _small(t):
    return xr.Dataset({"peak_energy": (("temperature", "y", "x"), np.ones((len(t), 2, 2)))},
                      coords={"temperature": t})


@pytest.mark.parametrize("t, match", [
    (np.array([10.0, 20, 30, 40]), "at least 5"),
    (np.array([10.0, 20, 20, 40, 50, 60]), r"duplicated values \[20.0\]"),
    (np.array([10.0, 30, 20, 40, 50, 60]), "not monotonic"),
    (np.array([10.0, np.nan, 30, 40, 50, 60]), r"missing \(NaN\) at positions \[1\]"),
    (np.array([0.0, 10, 20, 30, 40, 50]), "values > 0"),
])
def test_bad_stack_refused(t, match):
    with pytest.raises(StepError, match=match):
        fit_law(_small(t), law="varshni")


def test_bad_law_quantity_dim():
    ds = _small(np.arange(1.0, 7))
    with pytest.raises(StepError, match="unknown law"):
        fit_law(ds, law="nope")
    with pytest.raises(StepError, match="peak_fwhm"):
        fit_law(ds, law="linewidth")
    with pytest.raises(StepError, match="no stack dim"):
        fit_law(ds.rename(temperature="sample_id"), law="varshni")
    with pytest.raises(StepError, match="needs W"):
        fit_law(ds.rename(temperature="excitation_power").assign_coords(
            excitation_power=("excitation_power", np.arange(1.0, 7), {"units": "mW"})),
            law="power_law", quantity="peak_energy")


def _write_result(ds, path):
    ds = ds.copy()
    ds.attrs.update(pmap_result=1, pmap_complete=True)
    ds.to_zarr(str(path), mode="w", consolidated=False)
    return path


def test_cli_series_writes_store(tmp_path, rng, capsys):
    from pmap.cli import main
    from pmap.results import open_result

    t = np.linspace(10, 300, 15)
    e0, alpha, beta, _ = GAAS
    ds = _series_ds("temperature", t, e0 - alpha * t**2 / (t + beta), 0.3e-3, rng,
                    shape=(6, 8), chunks=4)
    src = _write_result(ds, tmp_path / "res.zarr")
    dst = tmp_path / "series.zarr"
    assert main(["series", str(src), "--law", "varshni", "-o", str(dst), "-q"]) == 0
    printed = capsys.readouterr().out
    assert "varshni_e0: median 1.51" in printed and "48 series" in printed
    out = open_result(dst)
    assert out["varshni_e0"].dims == ("peak", "y", "x")
    assert (out["varshni_status"] == 0).all()
    assert "series" in out.attrs["pmap_provenance"]
    # an existing output is refused without --overwrite; bad input is one line, exit 2
    assert main(["series", str(src), "--law", "varshni", "-o", str(dst), "-q"]) == 2
    assert main(["series", str(src), "--law", "varshni", "-o", str(dst), "-q",
                 "--overwrite"]) == 0
    capsys.readouterr()
    few = _write_result(_small(np.arange(1.0, 5)), tmp_path / "few.zarr")
    assert main(["series", str(few), "--law", "varshni", "-o", str(tmp_path / "x.zarr")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "at least 5" in err[0]


def test_process_stack_cube_then_series(tmp_path):
    """End to end: a temperature stack cube → pmap.process → fit_law (Varshni, GaAs)."""
    from pmap.pipeline import process

    rng = np.random.default_rng(7)
    t = np.array([20.0, 60, 100, 140, 180, 220, 260, 300])
    e0, alpha, beta, _ = GAAS
    e_true = e0 - alpha * t**2 / (t + beta)
    energy = np.linspace(1.35, 1.60, 250)
    spec = 2000 * np.exp(-0.5 * ((energy[None] - e_true[:, None]) / 0.008) ** 2) + 20
    data = rng.poisson(np.broadcast_to(spec[:, None, None, :], (8, 6, 7, 250))).astype(float)
    cube = xr.DataArray(
        data, dims=("temperature", "y", "x", "energy"), name="intensity",
        coords={"temperature": ("temperature", t, {"units": "K"}),
                "energy": ("energy", energy, {"units": "eV"}),
                "y": ("y", np.arange(6.0), {"units": "um"}),
                "x": ("x", np.arange(7.0), {"units": "um"})},
        attrs={"units": "counts", "gain_e_per_count": 1.0, "read_noise_counts": 0.0,
               "dark_level_counts": 0.0})
    res = process(cube, tmp_path / "r.zarr", progress=False, peaks=1)
    assert "temperature" in res["peak_energy"].dims
    out = fit_law(res, law="varshni").compute()
    assert out["varshni_e0"].dims == ("peak", "y", "x")
    assert (out["varshni_status"] == 0).all()
    pull = _pulls(out["varshni_e0"], out["varshni_e0_err"], e0)
    assert pull.size == 42 and abs(pull.mean()) < 3 / np.sqrt(42)


def test_dropped_peaks_are_missing_points(rng):
    """A point whose peak_status is not 0 (the fit dropped that component) is not used."""
    t = np.linspace(10, 300, 12)
    e0, alpha, beta, _ = GAAS
    ds = _series_ds("temperature", t, e0 - alpha * t**2 / (t + beta), 1e-4, rng,
                    shape=(2, 2)).compute()
    status = xr.zeros_like(ds["peak_energy"], dtype=np.int8)
    ds["peak_energy"][5, 0, 0, 0] = 9.0  # a wild value, flagged implausible by the fit
    status[5, 0, 0, 0] = 6
    ds["peak_status"] = status
    out = fit_law(ds, law="varshni")
    assert int(out["varshni_status"][0, 0, 0]) == 0
    assert abs(float(out["varshni_e0"][0, 0, 0]) - e0) < 5 * float(out["varshni_e0_err"][0, 0, 0])


def test_cli_series_power_law_classes(tmp_path, rng, capsys):
    from pmap.cli import main

    p = np.geomspace(1e-6, 1e-3, 8)
    clean = 1e3 * (p / 1e-4) ** 1.5
    sig = np.sqrt(clean) + 2
    noisy = clean[:, None, None] + rng.normal(size=(8, 4, 5)) * sig[:, None, None]
    ds = xr.Dataset({"integrated_intensity": (("excitation_power", "y", "x"), noisy),
                     "integrated_intensity_err": (("excitation_power", "y", "x"),
                                                  np.broadcast_to(sig[:, None, None], noisy.shape))},
                    coords={"excitation_power": p})
    src = _write_result(ds, tmp_path / "p.zarr")
    assert main(["series", str(src), "--law", "power_law", "-o", str(tmp_path / "o.zarr"),
                 "-q"]) == 0
    out = capsys.readouterr().out
    assert "1 <= k <= 2 (excitonic): 20" in out and "rules of thumb" in out


def test_stack_registered_process_series_pulls(tmp_path):
    """End to end on maps displaced by known sub-pixel shifts: stack (registered) → process →
    Varshni (GaAs, Vurgaftman et al. 2001). The law's χ²_red and the pulls of E0, α, β must
    be honest after the bilinear registration (which correlates neighbouring pixels).

    n ≈ 500 series; s.e. of a pull s.d. 1/√(2n) ≈ 0.03 and of the mean χ²_red √(2/5/n) ≈
    0.03 for independent pixels (common practice); neighbours share raw counts after
    interpolation, so the bounds are 4 s.e. Measured with scripts/check_series_e2e.py
    (40 × 48 px, seeds 1–3): pull s.d. 0.97–1.02, mean χ²_red 0.95–1.02.
    """
    import warnings

    from pmap.pipeline import process
    from pmap.stack import stack_cubes

    rng = np.random.default_rng(5)
    t = np.array([20.0, 60, 100, 140, 180, 220, 260, 300])
    e0, alpha, beta, _ = GAAS
    ny, nx = 26, 30
    energy = np.linspace(1.33, 1.60, 150)
    blobs = [(rng.uniform(0, ny), rng.uniform(0, nx), rng.uniform(2, 4), rng.uniform(0.5, 1.5))
             for _ in range(8)]
    shifts = [(0.0, 0.0)] + [tuple(rng.uniform(-2.0, 2.0, 2)) for _ in t[1:]]
    cubes = []
    for tt, (dy, dx) in zip(t, shifts):
        yy, xx = np.mgrid[0:ny, 0:nx].astype(float)
        img = 0.15 + sum(a * np.exp(-((yy - dy - cy) ** 2 + (xx - dx - cx) ** 2) / (2 * w * w))
                         for cy, cx, w, a in blobs)
        spec = np.exp(-0.5 * ((energy - (e0 - alpha * tt**2 / (tt + beta))) / 0.010) ** 2)
        mu = 3000.0 * img[:, :, None] * spec + 30.0
        raw = rng.poisson(mu) + rng.normal(size=mu.shape) * 2.0 + 100.0
        cubes.append(xr.DataArray(
            raw, dims=("y", "x", "energy"), name="intensity",
            coords={"y": ("y", np.arange(ny) * 0.5, {"units": "um"}),
                    "x": ("x", np.arange(nx) * 0.5, {"units": "um"}),
                    "energy": ("energy", energy, {"units": "eV"})},
            attrs={"units": "counts", "temperature_K": float(tt), "gain_e_per_count": 1.0,
                   "read_noise_counts": 2.0, "dark_level_counts": 100.0}))
    stack = stack_cubes(cubes, along="temperature")
    # registration: phase correlation recovers the rendered shifts to 0.1 px (8 blobs on a
    # 26 x 30 field; 0.01-0.03 px on 40 x 48 in scripts/check_series_e2e.py)
    np.testing.assert_allclose(stack.attrs["stack_shifts_px"], shifts, atol=0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # notices about the correlated noise after registration
        res = process(stack, tmp_path / "r.zarr", progress=False, peaks=1)
    out = fit_law(res, law="varshni").compute()
    ok = (out["varshni_status"] == 0).values
    n = int(ok.sum())
    assert n > 0.9 * ok.size and n > 400
    chi = out["varshni_chi2_red"].values[ok]
    assert abs(chi.mean() - 1) < 4 * np.sqrt(2 / 5 / n), chi.mean()
    for name, true in (("varshni_e0", e0), ("varshni_alpha", alpha), ("varshni_beta", beta)):
        pull = ((out[name] - true) / out[f"{name}_err"]).values[ok]
        assert abs(pull.std() - 1) < 4 / np.sqrt(2 * n), (name, pull.std())
        assert abs(pull.mean()) < 4 / np.sqrt(n), (name, pull.mean())
