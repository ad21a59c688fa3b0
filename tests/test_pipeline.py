"""Pipeline TOML parsing and option handling (end-to-end runs are in tests/test_process.py)."""

import numpy as np
import pytest

from pmap.errors import StepError
from pmap.pipeline import DEFAULT_PIPELINE_TOML, load_pipeline, parse_memory


def test_default_pipeline_parses_and_names_registered_steps():
    pipe = load_pipeline(None)
    names = [n for n, _ in pipe.steps]
    assert "to_energy" in names and "remove_spikes" in names
    assert pipe.fit["peaks"] == 1 and pipe.descriptors == {}
    assert load_pipeline(DEFAULT_PIPELINE_TOML).as_dict()["steps"] == pipe.as_dict()["steps"]


def test_pipeline_file(tmp_path):
    f = tmp_path / "p.toml"
    f.write_text('[[steps]]\nstep = "to_energy"\n\n[fit]\nmodel = "voigt"\npeaks = 2\n')
    pipe = load_pipeline(f)
    assert pipe.steps == [("to_energy", {})]
    assert pipe.fit == {"model": "voigt", "peaks": 2}
    assert pipe.descriptors is None and pipe.regions is None
    assert pipe.source == str(f)


@pytest.mark.parametrize(
    "text, match",
    [
        ('[[steps]]\nstep = "make_coffee"\n', "unknown step 'make_coffee'"),
        ("[[steps]]\nthreshold = 3\n", "no 'step' name"),
        ("[fitt]\npeaks = 1\n", "unknown table"),
        ("[output]\ncolour = 'red'\n", "unknown \\[output\\] key"),
        ("[fit\npeaks = 1\n", "invalid TOML"),
    ],
)
def test_pipeline_errors_name_the_problem(text, match):
    with pytest.raises(StepError, match=match):
        load_pipeline(text + "\n")


def test_missing_pipeline_file(tmp_path):
    with pytest.raises(StepError, match="not found"):
        load_pipeline(tmp_path / "nope.toml")


@pytest.mark.parametrize(
    "text, expected",
    [("1GB", 10**9), ("512MB", 512 * 10**6), ("2GiB", 2 * 2**30), ("1.5 GB", 1.5e9), (4096, 4096)],
)
def test_parse_memory(text, expected):
    # SI (kB, MB, GB) and IEC (KiB, MiB, GiB) prefixes (IEC 80000-13:2008)
    assert parse_memory(text) == int(expected)


def test_parse_memory_rejects_nonsense():
    with pytest.raises(StepError, match="not understood"):
        parse_memory("lots")
    assert parse_memory(None) > 0


def test_properties_table_adds_bandgap_and_shift(tmp_path):
    import numpy as np

    import pmap
    from pmap.synthetic import make_demo_cube

    cube, _ = make_demo_cube(shape=(8, 12), n_channels=128, seed=2)
    # exciton binding energy of monolayer WS2, 0.32 eV (Chernikov et al., Phys. Rev. Lett.
    # 113, 076802 (2014)); E_g ≈ E_peak + E_b (common practice for excitonic emission)
    pipe = load_pipeline('[[steps]]\nstep = "to_energy"\n[fit]\n[properties]\n'
                         "reference_energy_ev = 1.6\nexciton_binding_ev = 0.32\n")
    ds = pmap.process(cube, tmp_path / "r.zarr", pipeline=pipe, progress=False)
    ok = np.isfinite(ds.peak_energy.values)
    assert ok.sum() > 10
    np.testing.assert_allclose((ds.bandgap_estimate - ds.peak_energy).values[ok], 0.32)
    np.testing.assert_allclose((ds.peak_shift - ds.peak_energy).values[ok], -1.6)
    assert "caveat" in ds.bandgap_estimate.attrs and ds.peak_shift.attrs["units"] == "eV"


def test_properties_need_a_fit():
    with pytest.raises(StepError, match="needs a \\[fit\\]"):
        load_pipeline("[properties]\nreference_energy_ev = 1.6\n")
    with pytest.raises(StepError, match="unknown \\[properties\\] key"):
        load_pipeline("[fit]\n[properties]\ngap = 1\n")


def _nan_cube_with(finite_chunk):
    """A 4 x 4-chunk cube (8 x 8 pixels, 2 x 2 a chunk) of NaN except one chunk (iy, ix)."""
    import dask.array as da
    import xarray as xr

    data = np.full((8, 8, 16), np.nan, dtype=np.float32)
    if finite_chunk is not None:
        iy, ix = finite_chunk
        data[2 * iy:2 * iy + 2, 2 * ix:2 * ix + 2] = 1.0
    cube = xr.DataArray(da.from_array(data, chunks=(2, 2, 16)), dims=("y", "x", "wavelength"),
                        coords={"wavelength": np.linspace(600, 700, 16)},
                        attrs={"units": "counts"})
    assert cube.data.numblocks == (4, 4, 1)
    return cube


@pytest.mark.parametrize("chunk", [(0, 0), (1, 1), (3, 3), (2, 1), (0, 3)])
def test_empty_check_finds_any_finite_chunk(chunk):
    """Not refused when one chunk anywhere holds values: one of the four sampled chunks
    (the first, (1, 1), (2, 2)... of the 4 x 4 grid in order) or, failing those, any
    other (the whole-cube scan)."""
    from pmap.pipeline import _refuse_empty

    _refuse_empty(_nan_cube_with(chunk))  # no error


def test_empty_check_finds_one_value_at_a_chunk_corner():
    """One finite value, at the corner of a sampled chunk far from its centre: the cube
    is not refused."""
    import dask.array as da
    import xarray as xr

    from pmap.pipeline import _refuse_empty

    data = np.full((40, 40, 8), np.nan, dtype=np.float32)
    data[20, 39] = 1.0  # the corner of chunk (1, 1), far from its centre (30, 30)
    cube = xr.DataArray(da.from_array(data, chunks=(20, 20, 8)), dims=("y", "x", "wavelength"),
                        coords={"wavelength": np.linspace(600, 700, 8)})
    _refuse_empty(cube)  # no error


def test_empty_check_refuses_an_all_nan_cube():
    from pmap.errors import StepError
    from pmap.pipeline import _refuse_empty

    with pytest.raises(StepError, match="no finite values"):
        _refuse_empty(_nan_cube_with(None))
