"""Pipeline TOML parsing and option handling (end-to-end runs are in tests/test_process.py)."""

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
