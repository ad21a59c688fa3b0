"""The pmap command: help, one-line errors without tracebacks, inputs never modified."""

import os
import subprocess
import sys

import numpy as np
import pytest

from pmap.cli import main

SUBCOMMANDS = ["info", "convert", "process", "report", "demo", "steps", "view", "warmup"]


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


# ------------------------------------------------------------- first run: compiling kernels


def test_compile_notice_speaks_on_a_cache_miss_only(capsys):
    """A kernel that numba must compile (cache miss) is announced once, with the count and
    time at the end; a kernel already compiled says nothing (numba's event API: a cache
    hit or a compiled overload fires no "numba:compile" event; from memory)."""
    import numba

    from pmap._progress import COMPILING_MESSAGE, CompileNotice

    @numba.njit(cache=False)
    def twice(a):  # a new function: never in any cache
        return 2 * a

    with CompileNotice("plcube") as notice:
        assert twice(3) == 6
        assert twice(4) == 8  # same signature: compiled once
    err = capsys.readouterr().err
    assert err.count(COMPILING_MESSAGE) == 1
    assert notice.kernels == 1 and notice.seconds > 0
    assert "compiled 1 kernel(s)" in err
    with CompileNotice("plcube") as again:  # compiled already: silent
        assert twice(5) == 10
    assert capsys.readouterr().err == "" and again.kernels == 0
    with CompileNotice("plcube", enabled=False) as quiet:  # counts, says nothing
        assert twice(2.5) == 5.0  # a new signature (float64) compiles
    assert capsys.readouterr().err == "" and quiet.kernels == 1


def test_warmup_parts_cover_the_default_and_demo_pipelines():
    """The two warm-up processes together run every step of the default pipeline, and
    the second every stage of `process --regions 3 --components 3` and of `demo`."""
    from pmap.cli import _warmup_pipelines
    from pmap.pipeline import load_pipeline

    default = [n for n, _ in load_pipeline(None).steps]
    spikes, = _warmup_pipelines("spikes")
    rest = _warmup_pipelines("rest")
    ran = {n for n, _ in spikes.steps} | {n for p in rest for n, _ in p.steps}
    assert ran == set(default)
    assert "remove_spikes" in [n for n, _ in spikes.steps]
    # remove_spikes follows mask_bad_pixels as in the default pipeline (masked channels)
    assert [n for n, _ in spikes.steps] == [n for n in default
                                           if n in ("mask_bad_pixels", "remove_spikes")]
    methods = {p.regions.get("method", "default") for p in rest}
    assert methods == {"default", "gmm"}
    assert all(p.fit is not None and p.components["method"] == "nmf" for p in rest)
    whole = _warmup_pipelines("all")
    assert all([n for n, _ in p.steps] == default for p in whole)


def test_warmup_part_runs(tmp_path, capsys):
    """`plcube warmup --part spikes` processes its tiny cube (kernels from the cache here)."""
    from pmap.synthetic import write_demo_cube

    cube = write_demo_cube(tmp_path, size="tiny", seed=0, overwrite=True).cube
    assert main(["warmup", "--part", "spikes", "--cube", str(cube)]) == 0
    assert "error" not in capsys.readouterr().err


def test_timings_name_every_phase(tmp_path):
    """PMAP_TIMINGS=1: `plcube process` states each phase's wall and CPU seconds."""
    from pmap.synthetic import write_demo_cube

    cube = write_demo_cube(tmp_path, size="tiny", seed=0, overwrite=True).cube
    env = {**os.environ, "PMAP_TIMINGS": "1", "PYTHONWARNINGS": "ignore::DeprecationWarning"}
    r = subprocess.run([sys.executable, "-m", "pmap", "process", str(cube), "-o",
                        str(tmp_path / "r.zarr"), "-q"], capture_output=True, text=True,
                       env=env, timeout=300)
    assert r.returncode == 0, r.stderr
    phases = [ln.split(": timing: ")[1].split(":")[0] for ln in r.stderr.splitlines()
              if ": timing: " in ln]
    assert phases == ["start-up", "imports", "load pipeline", "open cube", "whole-map pass", "blocks",
                      "summary", "figures", "html"]
    r2 = subprocess.run([sys.executable, "-m", "pmap", "process", str(cube), "-o",
                         str(tmp_path / "r2.zarr"), "-q", "--no-figures"], capture_output=True,
                        text=True, timeout=300,
                        env={**os.environ, "PYTHONWARNINGS": "ignore::DeprecationWarning"})
    assert r2.returncode == 0 and ": timing: " not in r2.stderr  # off by default


def test_quick_exit_keeps_outputs_exit_handlers_and_status(tmp_path):
    """`python -m pmap process` leaves without the interpreter's final garbage collection
    (pmap.cli._exit_now), yet every line of output arrives through a pipe, the exit
    handlers registered in the process run (a sitecustomize registers one that writes a
    file), the store is complete, and the exit status is kept (0; 2 for bad input)."""
    import xarray as xr

    from pmap.synthetic import write_demo_cube

    cube = write_demo_cube(tmp_path, size="tiny", seed=0, overwrite=True).cube
    site = tmp_path / "site"
    site.mkdir()
    flag = tmp_path / "atexit_ran.txt"
    (site / "sitecustomize.py").write_text(
        "import atexit, pathlib\n"
        f"atexit.register(pathlib.Path({str(flag)!r}).write_text, 'ran')\n")
    env = {**os.environ, "PYTHONWARNINGS": "ignore::DeprecationWarning",
           "PYTHONPATH": os.pathsep.join([str(site), os.environ.get("PYTHONPATH", "")])}
    r = subprocess.run([sys.executable, "-m", "pmap", "process", str(cube), "-o",
                        str(tmp_path / "r.zarr"), "-q"], capture_output=True, text=True,
                       env=env, timeout=300)
    assert r.returncode == 0, r.stderr
    assert flag.read_text() == "ran"
    lines = r.stdout.splitlines()
    assert lines[0].startswith("result store:") and lines[-1].startswith("HTML report:")
    assert "fit:" in r.stderr
    assert xr.open_zarr(tmp_path / "r.zarr").attrs["pmap_complete"] is True
    flag.unlink()
    bad = subprocess.run([sys.executable, "-m", "pmap", "process", str(tmp_path / "none.zarr"),
                          "-o", str(tmp_path / "r2.zarr")], capture_output=True, text=True,
                         env=env, timeout=300)
    assert bad.returncode == 2 and "no such file" in bad.stderr
    assert flag.read_text() == "ran"


def test_local_run_does_not_import_distributed(tmp_path):
    """Without --workers/--scheduler, `plcube process` tells dask its scheduler (threads) and
    rechunk method (tasks) up front, which is what dask picks with no client: dask finds
    that out by importing distributed (~0.2 s of every run) when it is installed."""
    pytest.importorskip("distributed")  # the 'distributed' extra; CI installs it
    from pmap.synthetic import write_demo_cube

    cube = write_demo_cube(tmp_path, size="tiny", seed=0, overwrite=True).cube
    code = ("import sys; from pmap.cli import main; "
            f"rc = main(['process', {str(cube)!r}, '-o', {str(tmp_path / 'r.zarr')!r}, '-q', "
            "'--no-figures']); print('distributed' in sys.modules, rc)")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       timeout=300, env={**os.environ, "PYTHONWARNINGS": "ignore"})
    assert r.returncode == 0, r.stderr
    assert r.stdout.split()[-2:] == ["False", "0"]
    import xarray as xr  # and the run is complete

    assert bool(xr.open_zarr(tmp_path / "r.zarr").attrs["pmap_complete"])
