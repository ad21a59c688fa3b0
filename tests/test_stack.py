"""Stacking maps into one cube with sub-pixel registration (pmap.stack, ``pmap stack``)."""

import numpy as np
import pytest
import xarray as xr
from scipy import ndimage

from pmap.errors import StepError
from pmap.stack import phase_correlation_shift, stack_cubes


def _scene(ny=64, nx=72, seed=0):
    """Smooth blobs well inside the field (so shifting does not wrap structure)."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:ny, 0:nx]
    img = np.zeros((ny, nx))
    for _ in range(12):
        cy, cx = rng.uniform(12, ny - 12), rng.uniform(12, nx - 12)
        img += rng.uniform(0.5, 2) * np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * rng.uniform(2, 4) ** 2))
    return img


def _cube(img, temperature=None, peak=1.45):
    energy = np.linspace(1.3, 1.6, 40)
    spec = np.exp(-0.5 * ((energy - peak) / 0.02) ** 2) + 0.05
    ny, nx = img.shape
    attrs = {"units": "counts"}
    if temperature is not None:
        attrs["temperature_K"] = temperature
    return xr.DataArray(img[:, :, None] * spec, dims=("y", "x", "energy"), name="intensity",
                        coords={"y": ("y", np.arange(ny) * 0.5, {"units": "um"}),
                                "x": ("x", np.arange(nx) * 0.5, {"units": "um"}),
                                "energy": ("energy", energy, {"units": "eV"})},
                        attrs=attrs).chunk({"y": 16, "x": 16})


def _independent_shift(a, b, pad=16):
    """Cross-correlation written here with numpy only (common practice): cross-power
    spectrum, zero-padded inverse FFT (1/pad pixel), then a parabola through the peak."""
    fa, fb = np.fft.fft2(a - a.mean()), np.fft.fft2(b - b.mean())
    r = fb * np.conj(fa)
    ny, nx = a.shape
    big = np.zeros((ny * pad, nx * pad), complex)
    rs = np.fft.fftshift(r)
    y0, x0 = (ny * pad - ny) // 2, (nx * pad - nx) // 2
    big[y0:y0 + ny, x0:x0 + nx] = rs
    c = np.fft.ifft2(np.fft.ifftshift(big)).real
    iy, ix = np.unravel_index(np.argmax(c), c.shape)

    def vertex(m, p, q):
        den = m - 2 * p + q
        return 0.0 if den == 0 else 0.5 * (m - q) / den
    Y, X = c.shape
    dy = iy + vertex(c[iy - 1, ix], c[iy, ix], c[(iy + 1) % Y, ix])
    dx = ix + vertex(c[iy, ix - 1], c[iy, ix], c[iy, (ix + 1) % X])
    dy = dy - Y if dy > Y / 2 else dy
    dx = dx - X if dx > X / 2 else dx
    return dy / pad, dx / pad


@pytest.mark.parametrize("shift", [(1.3, -2.6), (-0.45, 0.7), (3.0, 2.25)])
def test_phase_correlation_recovers_subpixel_shift(shift):
    ref = _scene()
    img = ndimage.shift(ref, shift, order=3, mode="constant")  # img(r) = ref(r − d)
    got = phase_correlation_shift(ref, img, upsample=50)
    indep = _independent_shift(ref, img)
    assert got == pytest.approx(shift, abs=0.05)
    assert got == pytest.approx(indep, abs=0.1)


@pytest.mark.parametrize("shift", [(1.3, -2.6), (0.4, 0.7), (-3.2, 5.5), (7.3, -9.6)])
def test_phase_correlation_on_background_and_gradient(shift):
    """A real map: blobs on an offset with a gradient (non-periodic edges), noise."""
    rng = np.random.default_rng(1)
    yy, xx = np.mgrid[0:64, 0:80]
    img = 5 + 0.05 * yy + 0.03 * xx
    for _ in range(10):
        cy, cx = rng.uniform(0, 64), rng.uniform(0, 80)
        img += rng.uniform(0.5, 2) * np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2)
                                            / (2 * rng.uniform(2, 5) ** 2))
    moved = ndimage.shift(img, shift, order=3, mode="nearest")
    got = phase_correlation_shift(img + rng.normal(0, 0.05, img.shape),
                                  moved + rng.normal(0, 0.05, img.shape))
    assert got == pytest.approx(shift, abs=0.15)


def test_stack_registers_and_crops():
    ref = _scene()
    shifts = [(0.0, 0.0), (1.3, -2.6), (-0.7, 0.4)]
    cubes = [_cube(ndimage.shift(ref, s, order=3, mode="constant"), temperature=t)
             for s, t in zip(shifts, [300.0, 10.0, 150.0])]
    out = stack_cubes(cubes, along="temperature")
    assert out.dims == ("temperature", "y", "x", "energy")
    assert out["temperature"].values.tolist() == [10.0, 150.0, 300.0]
    assert out["temperature"].attrs["units"] == "K"
    got = dict(zip([10.0, 150.0, 300.0], out.attrs["stack_shifts_px"]))
    for s, t in zip(shifts, [300.0, 10.0, 150.0]):
        assert got[t] == pytest.approx(s, abs=0.05)
    assert "stack" in out.attrs["pmap_provenance"]
    assert "temperature_K" not in out.attrs
    # common area: pixels with data in every registered map, H − ceil(max d) − ceil(−min d)
    # (dy from −0.7 to 1.3, dx from −2.6 to 0.4)
    assert out.sizes["y"] == 64 - 2 - 1 and out.sizes["x"] == 72 - 1 - 3
    # registered images agree with the reference image over the common area
    # (bilinear interpolation of blobs with σ ≥ 2 px: a few %), far better than unregistered
    raw = stack_cubes(cubes, along="temperature", register=False).sum("energy").values
    imgs = out.sum("energy").values
    inner = (slice(4, -4), slice(4, -4))
    for k in range(2):
        rel = np.abs(imgs[k][inner] - imgs[2][inner]).max() / imgs[2][inner].max()
        rel_raw = np.abs(raw[k][inner] - raw[2][inner]).max() / raw[2][inner].max()
        assert rel < 0.05 and rel_raw > 5 * rel, (rel, rel_raw)


def test_stack_lazy_after_registration():
    import dask

    from tests.conftest import ComputeCounter

    ref = _scene()
    cubes = [_cube(ref, temperature=10.0), _cube(ndimage.shift(ref, (0.5, 0.5)), temperature=20.0)]
    out = stack_cubes(cubes, along="temperature")  # computes the two integrated images only
    with dask.config.set(scheduler=ComputeCounter(forbid=True)):
        out2 = out * 2  # no compute in building further graphs
    assert out2.chunks is not None


def test_different_sizes_and_no_register():
    ref = _scene()
    a = _cube(ref, temperature=10.0)
    b = _cube(ref[:50, :60], temperature=20.0)
    out = stack_cubes([a, b], along="temperature", register=False)
    assert (out.sizes["y"], out.sizes["x"]) == (50, 60)
    assert out.attrs["stack_shifts_px"] == [[0.0, 0.0], [0.0, 0.0]]
    out = stack_cubes([a, b], along="temperature")
    assert out.attrs["stack_shifts_px"][1] == pytest.approx([0, 0], abs=0.05)


def test_values_units_and_refusals():
    ref = _scene()
    a, b = _cube(ref), _cube(ref)
    out = stack_cubes([a, b], along="excitation_power", values=[1e-3, 1e-4], register=False)
    assert out["excitation_power"].values.tolist() == [1e-4, 1e-3]
    assert out["excitation_power"].attrs["units"] == "W"
    out = stack_cubes([a, b], along="pressure", units="GPa", values=[1, 2], register=False)
    assert out["pressure"].attrs["units"] == "GPa"
    with pytest.raises(StepError, match="temperature_K"):
        stack_cubes([a, b], along="temperature")
    with pytest.raises(StepError, match="duplicated"):
        stack_cubes([a, b], along="temperature", values=[5, 5])
    with pytest.raises(StepError, match="units"):
        stack_cubes([a, b], along="pressure", values=[1, 2])
    with pytest.raises(StepError, match="beyond 25%"):
        stack_cubes([_cube(ref), _cube(ndimage.shift(ref, (20, 0)))], along="temperature",
                    values=[1, 2])
    other = _cube(ref, peak=1.5).assign_coords(energy=np.linspace(1.2, 1.6, 40))
    with pytest.raises(StepError, match="spectral axis"):
        stack_cubes([a, other], along="temperature", values=[1, 2])


def test_cli_stack(tmp_path, capsys):
    from pmap.cli import main
    from pmap.io import open_cube, save_cube

    ref = _scene()
    paths = []
    for i, (t, s) in enumerate([(10.0, (0, 0)), (100.0, (0.6, -1.2))]):
        p = tmp_path / f"m{i}.zarr"
        save_cube(_cube(ndimage.shift(ref, s, order=3, mode="constant"), temperature=t), p)
        paths.append(str(p))
    dst = tmp_path / "stack.zarr"
    assert main(["stack", *paths, "--along", "temperature", "-o", str(dst), "-q"]) == 0
    printed = capsys.readouterr().out
    assert "temperature = 100 K: shift dy = +0.60 px, dx = -1.20 px" in printed
    cube = open_cube(dst)
    assert cube.dims == ("temperature", "y", "x", "energy")
    assert cube["temperature"].values.tolist() == [10.0, 100.0]
    # refusals: one line on stderr, exit 2
    assert main(["stack", *paths, "--along", "excitation_power", "-o",
                 str(tmp_path / "x.zarr"), "-q"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "excitation_power_W" in err[0]
    assert main(["stack", *paths, "--along", "temperature", "--values", "1,a", "-o",
                 str(tmp_path / "y.zarr"), "-q"]) == 2


def test_subpixel_registration_marks_noise_correlated():
    """Bilinear interpolation mixes pixels: the noise model (from the stated detector
    figures) travels with the stack, marked correlated, so fits do not claim Poisson errors."""
    from pmap.noise import get_noise_model

    ref = _scene()
    cubes = [_cube(ref, temperature=10.0), _cube(ndimage.shift(ref, (0.5, 0.3)), temperature=20.0)]
    for c in cubes:
        c.attrs.update(gain_e_per_count=1.0, read_noise_counts=2.0, dark_level_counts=0.0)
    out = stack_cubes(cubes, along="temperature")
    model = get_noise_model(out)
    assert model is not None and model.correlated
    plain = stack_cubes(cubes, along="temperature", register=False)
    assert get_noise_model(plain) is None or not get_noise_model(plain).correlated


def test_structure_to_noise_is_one_for_white_noise():
    """White noise on a plane: structure/noise variance ≈ 1 (the Laplacian noise estimate
    is unbiased for white noise; MAD-based, so n = 20 images of 40 x 48 px stay within
    1 ± 0.3), far above 2 for a structured scene."""
    from pmap.stack import MIN_STRUCTURE, structure_to_noise

    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[0:40, 0:48]
    vals = [structure_to_noise(100 + 0.5 * yy + 0.3 * xx + rng.normal(0, 3, yy.shape))
            for _ in range(20)]
    assert 0.7 < min(vals) and max(vals) < 1.3, vals
    assert structure_to_noise(_scene()) > 10 * MIN_STRUCTURE


def test_uniform_film_is_stacked_unshifted_with_a_notice():
    """Maps of a uniform film (no spatial structure, only noise): phase correlation has
    nothing to lock on (it once reported shifts of several pixels and refused the stack
    as 'not the same area'); they are stacked unshifted and the run says why."""
    from pmap.errors import PmapNotice

    rng = np.random.default_rng(3)
    cubes = [_cube(1000 + rng.normal(0, 5, (24, 28)), temperature=t) for t in (10, 100, 300)]
    with pytest.warns(PmapNotice, match="no structure above noise"):
        out = stack_cubes(cubes, along="temperature")
    assert out.attrs["stack_shifts_px"] == [[0.0, 0.0]] * 3
    assert out.sizes["y"] == 24 and out.sizes["x"] == 28
