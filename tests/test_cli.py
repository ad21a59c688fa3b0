"""The pmap command: help, one-line errors without tracebacks, inputs never modified."""

import os
import subprocess
import sys

import numpy as np
import pytest

from pmap.cli import main

SUBCOMMANDS = ["info", "convert", "process", "report", "demo", "steps", "view"]


def run_cli(*args, cwd=None):
    """Run ``python -m pmap`` in a fresh process, as a user would."""
    env = {**os.environ, "PYTHONWARNINGS": "ignore::DeprecationWarning"}
    return subprocess.run([sys.executable, "-m", "pmap", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, env=env, timeout=300)


@pytest.mark.parametrize("sub", SUBCOMMANDS)
def test_help(sub, capsys):
    with pytest.raises(SystemExit) as exc:
        main([sub, "--help"])
    assert exc.value.code == 0
    assert "usage: plcube " + sub in capsys.readouterr().out


def test_no_command_prints_help(capsys):
    assert main([]) == 2
    assert "COMMAND" in capsys.readouterr().out


def test_print_config_and_steps(capsys):
    assert main(["process", "--print-config"]) == 0
    assert "[[steps]]" in capsys.readouterr().out
    assert main(["steps"]) == 0
    listed = capsys.readouterr().out
    for name in ("remove_spikes", "to_energy", "fit_peaks"):
        assert name in listed


def _one_line_error(res):
    assert res.returncode == 2, res.stderr
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    errs = [ln for ln in lines if ln.startswith("plcube: error:")]
    assert len(errs) == 1, res.stderr
    assert "Traceback" not in res.stderr
    return errs[0]


def test_missing_file_is_one_line(tmp_path):
    msg = _one_line_error(run_cli("info", tmp_path / "nope.zarr"))
    assert "nope.zarr" in msg


def test_unknown_format_is_one_line(tmp_path):
    f = tmp_path / "map.xyz"
    f.write_bytes(b"\x00\x01garbage")
    msg = _one_line_error(run_cli("info", f))
    assert "format" in msg.lower()
    assert f.read_bytes() == b"\x00\x01garbage"


def test_truncated_npy_is_one_line(tmp_path):
    f = tmp_path / "cube.npy"
    np.save(f, np.ones((4, 5, 16), np.float32))
    data = f.read_bytes()
    f.write_bytes(data[: len(data) // 2])
    before = f.read_bytes()
    _one_line_error(run_cli("info", f, "-O", "wavelength_start_nm=500",
                            "-O", "wavelength_step_nm=1"))
    assert f.read_bytes() == before


def test_debug_shows_traceback(tmp_path):
    res = run_cli("--debug", "info", tmp_path / "nope.zarr")
    assert res.returncode == 2 and "Traceback" in res.stderr


def test_process_needs_output(tmp_path):
    _one_line_error(run_cli("process", tmp_path / "x.zarr"))


def test_bad_regions_value(tmp_path):
    msg = _one_line_error(run_cli("process", tmp_path / "x.zarr", "-o", tmp_path / "r.zarr",
                                  "--regions", "many"))
    assert "many" in msg


def test_report_on_a_result_store(tmp_path):
    import pmap
    from pmap.synthetic import make_demo_cube

    cube, _ = make_demo_cube(shape=(8, 12), n_channels=128, seed=4)
    pipe = '[[steps]]\nstep = "to_energy"\n[descriptors]\n[fit]\n'
    pmap.process(cube, tmp_path / "r.zarr", pipeline=pipe, progress=False)
    assert main(["report", str(tmp_path / "r.zarr"), "-o", str(tmp_path / "figs")]) == 0
    names = {p.name for p in (tmp_path / "figs").glob("*.png")}
    assert "peak_energy_peak0.png" in names or any(n.startswith("peak_energy") for n in names)
    msg = _one_line_error(run_cli("report", tmp_path / "missing.zarr"))
    assert "missing.zarr" in msg


def test_readme_scripts_call_the_installed_command():
    """scripts/demo.sh (command 1 of the README) runs the console script pyproject installs."""
    import re
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    scripts = tomllib.loads((root / "pyproject.toml").read_text())["project"]["scripts"]
    called = re.findall(r"\.venv/bin/([\w-]+)", (root / "scripts" / "demo.sh").read_text())
    assert called and all(c in scripts or c == "python" for c in called), (called, scripts)
