"""Benchmark: `plcube process` end to end, as a user runs it, against the read floor.

Generates the synthetic demo cube at a chosen size (written tile by tile to Zarr),
then, each in a fresh process so that peak memory is its own:

1. startup: ``plcube --version`` (interpreter and imports only);
2. the read floor: open the cube, read every chunk and sum it (nothing else;
   timed inside the process, imports excluded);
3. the whole job: the command ``plcube process CUBE -o RESULT.zarr --memory-limit
   LIMIT`` with the default pipeline, figures on (read, clean, convert to energy,
   descriptors, one-peak fit, write the result store, draw the figures).

Prints spectra/s and peak RSS (the child's own maximum resident set, or that of a
process it forked and waited for, e.g. the figure drawer, whichever is larger) of each,
the CPU seconds of the process run against those of the read floor (``cpu_vs_read``,
steadier than wall time on a shared machine), and
last ``end_to_end_vs_read: N``: the command's wall time less the startup time,
divided by the read floor measured in the same run. With ``--sizes`` it repeats
this for several sizes and prints the scaling table: seconds per GB and the
deviation of each time from the least-squares straight line through all sizes.

    python scripts/bench_scale.py                       # 0.5 GB of float32 data
    python scripts/bench_scale.py --size 4 --memory-limit 1GB
    python scripts/bench_scale.py --sizes 0.5,1,2,4     # scaling line (long)
    python scripts/bench_scale.py --profile prof/       # py-spy profile of the process run
    python scripts/bench_scale.py --cold                # first run after an install vs later

The process run sets ``PMAP_TIMINGS=1`` and prints its split into phases (start-up, open,
whole-map pass, blocks, summary, figures, HTML): wall and CPU seconds of each.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

READ = r"""
import json, sys, time, dask
import pmap
cube = pmap.open_cube(sys.argv[1])
t, c = time.perf_counter(), time.process_time()
with dask.config.set(scheduler="threads"):
    total = float(cube.data.sum(dtype="float64").compute())
dt, dc = time.perf_counter() - t, time.process_time() - c
print(json.dumps({"seconds": dt, "cpu_seconds": dc, "n": int(cube.sizes["y"] * cube.sizes["x"])}))
"""


#: CPU seconds (user + system) of the last child run by _run_child: on a shared machine
#: (other jobs taking cores) CPU time compares two runs better than wall time does
LAST_CPU_S = [0.0]


def _run_child(cmd: list[str], env: dict | None = None) -> tuple[float, float, str, str]:
    """Run cmd (with ``env`` added to the environment); (wall seconds, peak RSS MiB of
    that child alone, stdout, stderr)."""
    with tempfile.TemporaryFile("w+") as fo, tempfile.TemporaryFile("w+") as fe:
        t = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=fo, stderr=fe, text=True,
                                env={**os.environ, **env} if env else None)
        _, status, ru = os.wait4(proc.pid, 0)  # the child's own rusage (ru_maxrss in KiB)
        wall = time.perf_counter() - t
        LAST_CPU_S[0] = ru.ru_utime + ru.ru_stime
        proc.returncode = os.waitstatus_to_exitcode(status)
        fo.seek(0)
        fe.seek(0)
        out, err = fo.read(), fe.read()
    if proc.returncode:
        sys.stderr.write(err)
        raise SystemExit(f"benchmark step failed ({proc.returncode}): {' '.join(cmd)}")
    return wall, ru.ru_maxrss / 1024, out, err


def _load() -> str:
    return "/".join(f"{v:.2f}" for v in os.getloadavg())


def bench_one(size_gb: float, args, work: Path) -> dict:
    """Generate one cube and measure startup, read floor and the process command."""
    from pmap.synthetic import write_demo_cube

    side = int(math.sqrt(size_gb * 1e9 / (4 * args.channels)))
    print(f"cube: {side} x {side} x {args.channels} float32 = "
          f"{side * side * args.channels * 4 / 1e9:.2f} GB in memory; memory limit "
          f"{args.memory_limit}; load average {_load()}", flush=True)
    t = time.perf_counter()
    name = f"bench_{side}"
    if args.reuse and (work / f"{name}.zarr").is_dir() and (work / f"{name}_truth.zarr").is_dir():
        paths = {"cube": work / f"{name}.zarr", "truth": work / f"{name}_truth.zarr"}
    else:
        paths = write_demo_cube(work, shape=(side, side), n_channels=args.channels, seed=1,
                                workers=os.cpu_count() or 1, overwrite=True, name=name)
        paths = {"cube": paths.cube, "truth": paths.truth}
    gen = time.perf_counter() - t
    disk = sum(f.stat().st_size for f in Path(paths["cube"]).rglob("*") if f.is_file())
    n = side * side
    print(f"generated in {gen:.1f} s ({n / gen:,.0f} spectra/s), {disk / 1e9:.2f} GB on disk")
    py = sys.executable
    starts = []
    for _ in range(3):
        starts.append((_run_child([py, "-m", "pmap", "--version"])[0], LAST_CPU_S[0]))
    startup, startup_cpu = min(starts)
    print(f"startup:     {startup:.2f} s (plcube --version, best of 3)")
    info_s = min(_run_child([py, "-m", "pmap", "info", str(paths["cube"])])[0] for _ in range(3))
    print(f"info:        {info_s:.2f} s (plcube info, best of 3, whole command)")
    wall_r, rss_r, out, _ = _run_child([py, "-c", READ, str(paths["cube"])])
    cpu_r = LAST_CPU_S[0]
    read = json.loads(out.strip().splitlines()[-1])
    print(f"read floor:  {read['seconds']:.1f} s ({read['cpu_seconds']:.1f} CPU s), "
          f"{n / read['seconds']:,.0f} spectra/s, "
          f"{disk / 1e9 / read['seconds']:.2f} GB/s from disk, peak RSS {rss_r:.0f} MiB "
          f"(process incl. startup {wall_r:.1f} s, {cpu_r:.1f} CPU s); load {_load()}", flush=True)
    res = work / f"bench_{side}_result.zarr"
    shutil.rmtree(res, ignore_errors=True)
    shutil.rmtree(work / f"bench_{side}_result_figures", ignore_errors=True)
    cmd = [py, "-m", "pmap", "process", str(paths["cube"]), "-o", str(res),
           "--memory-limit", args.memory_limit]
    if args.regions:
        cmd += ["--regions", "3", "--components", "3"]
    if args.no_figures:
        cmd += ["--no-figures"]
    if args.profile:
        prof = Path(args.profile)
        prof.mkdir(parents=True, exist_ok=True)
        cmd = ["py-spy", "record", "--rate", "50", "--format", "raw", "--threads", "-o",
               str(prof / f"process_{side}.txt"), "--", *cmd]
    wall_p, rss_p, out, err = _run_child(cmd, env={"PMAP_TIMINGS": "1"})
    cpu_p = LAST_CPU_S[0]
    parts = _timings(err)
    summary = [ln for ln in err.splitlines() if "converged" in ln][:1]
    work_s = wall_p - startup
    work_cpu = cpu_p - startup_cpu
    # the default keeps the processed cube in the result up to 512 MiB (keep_cube = "auto"):
    # a run that writes it does more work than one that does not, so the table says which
    kept = (res / "intensity").exists()
    if kept:
        print("kept cube:   the result holds the processed cube (keep_cube = auto keeps it "
              "up to 512 MiB): its writing is part of this run's time")
    print(f"end to end:  {wall_p:.1f} s for the command ({work_s:.1f} s after startup, "
          f"{cpu_p:.1f} CPU s), "
          f"{n / work_s:,.0f} spectra/s, peak RSS {rss_p:.0f} MiB (limit {args.memory_limit})"
          f"{'; ' + summary[0].strip() if summary else ''}; load {_load()}", flush=True)
    if parts:
        print("split:       " + ", ".join(f"{k} {w:.2f} s ({c:.2f} CPU)"
                                          for k, (w, c) in parts.items()))
        print(f"             fixed costs (all but the whole-map pass and blocks): "
              f"{sum(w for k, (w, _) in parts.items() if k not in _SCALING):.2f} s wall; "
              f"the rest {wall_p - sum(w for w, _ in parts.values()):.2f} s (interpreter "
              "start and exit)")
    if not args.keep:
        for p in (paths["cube"], paths["truth"], res, work / f"bench_{side}_result_figures"):
            shutil.rmtree(p, ignore_errors=True)
    if args.cold:
        _bench_cold(cmd, work)
    return {"gb": side * side * args.channels * 4 / 1e9, "read": read["seconds"],
            "read_cpu": read["cpu_seconds"], "process_cpu": work_cpu, "process": work_s, "kept": kept, "startup": startup, "info": info_s, "rss_read": rss_r, "rss_process": rss_p}


#: Phases of a run whose time follows the cube's size (the rest are fixed costs).
_SCALING = ("whole-map pass", "blocks", "regions")


def _timings(stderr: str) -> dict[str, tuple[float, float]]:
    """Phase times of a run from its ``PMAP_TIMINGS`` lines: {phase: (wall s, CPU s)}."""
    out = {}
    for ln in stderr.splitlines():
        if ": timing: " in ln:
            name, rest = ln.split(": timing: ", 1)[1].split(": ", 1)
            w, c = rest.replace(" s wall,", "").replace(" CPU s", "").split()
            out[name] = (float(w), float(c))
    return out


def _fresh_copy(work: Path, name: str) -> Path:
    """A copy of the pmap package (no numba cache) under work/name: runs with it on
    PYTHONPATH compile every kernel, as a first run after an install does."""
    import pmap

    dst = work / name
    shutil.rmtree(dst, ignore_errors=True)
    shutil.copytree(Path(pmap.__file__).parent, dst / "pmap",
                    ignore=shutil.ignore_patterns("__pycache__"))
    return dst


def _bench_cold(cmd: list[str], work: Path) -> None:
    """The first run after an install against later ones: the same command on a fresh
    copy of the package twice (cold: numba compiles; warm: loads its cache), and on
    another fresh copy after ``plcube warmup`` (what scripts/setup.sh runs)."""
    out = Path(cmd[cmd.index("-o") + 1])
    rows = []
    for label, warm_first in (("no warm-up", False), ("after plcube warmup", True)):
        copy = _fresh_copy(work, f"cold_{'w' if warm_first else 'n'}")
        env = {"PYTHONPATH": str(copy)}
        if warm_first:
            w, _, _, err = _run_child([sys.executable, "-m", "pmap", "warmup"], env=env)
            rows.append((f"plcube warmup ({label})", w, LAST_CPU_S[0], err, _load()))
        for run in ("first run", "second run"):
            shutil.rmtree(out, ignore_errors=True)
            shutil.rmtree(out.with_name(out.name.removesuffix(".zarr") + "_figures"),
                          ignore_errors=True)
            w, _, _, err = _run_child(cmd, env=env)
            rows.append((f"{run} ({label})", w, LAST_CPU_S[0], err, _load()))
            if warm_first:
                break
        shutil.rmtree(copy, ignore_errors=True)
    for label, w, c, err, load in rows:
        said = [ln.split(": ", 1)[1] for ln in err.splitlines() if "compiled " in ln]
        print(f"cold/warm:   {label}: {w:.1f} s ({c:.1f} CPU s)"
              f"{'; ' + said[0] if said else '; nothing compiled'}; load {load}", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=float, default=0.5,
                    help="cube size in GB of float32 data (default 0.5)")
    ap.add_argument("--sizes", help="comma-separated sizes in GB for the scaling line, "
                    "e.g. 0.5,1,2,4 (each generated, read and processed in turn)")
    ap.add_argument("--channels", type=int, default=512)
    ap.add_argument("--memory-limit", default="1GB")
    ap.add_argument("--workdir", default=None, help="folder for the cubes (default: a temp dir)")
    ap.add_argument("--keep", action="store_true", help="keep the generated files")
    ap.add_argument("--reuse", action="store_true", help="reuse a cube of the same size left "
                    "in --workdir by an earlier --keep run instead of generating it again")
    ap.add_argument("--regions", action="store_true",
                    help="also NMF (3 components) and 3 regions, as `plcube demo` does")
    ap.add_argument("--no-figures", action="store_true",
                    help="diagnosis only: run the command with --no-figures (a user's run "
                    "draws them; the default measures that)")
    ap.add_argument("--cold", action="store_true", help="also the first run after an install "
                    "(fresh copies of the package without numba's cache): cold, warm, and "
                    "after plcube warmup (minutes: every kernel is compiled twice)")
    ap.add_argument("--profile", help="folder for py-spy profiles (raw collapsed stacks) of "
                    "the process runs (needs py-spy on PATH)")
    args = ap.parse_args()
    sizes = [float(s) for s in args.sizes.split(",")] if args.sizes else [args.size]
    work = Path(args.workdir or tempfile.mkdtemp(prefix="pmap_bench_scale_"))
    work.mkdir(parents=True, exist_ok=True)
    rows = []
    try:
        for s in sizes:
            rows.append(bench_one(s, args, work))
    finally:
        if not args.keep and not args.workdir:
            shutil.rmtree(work, ignore_errors=True)
    print(f"load average after: {_load()}")
    if len(rows) > 1:
        gb = [r["gb"] for r in rows]
        tp = [r["process"] for r in rows]
        m = len(gb)
        mx, my = sum(gb) / m, sum(tp) / m
        slope = sum((g - mx) * (t - my) for g, t in zip(gb, tp)) / max(
            sum((g - mx) ** 2 for g in gb), 1e-300)
        icpt = my - slope * mx
        print(f"scaling: process time = {icpt:.1f} s + {slope:.1f} s/GB x size (least squares)")
        print(" GB      read s  process s  ratio  s/GB   off line  RSS read  RSS process"
              "  CPU ratio  cube kept")
        for r in rows:
            line = icpt + slope * r["gb"]
            print(f"{r['gb']:5.2f}  {r['read']:8.1f}  {r['process']:9.1f}  "
                  f"{r['process'] / r['read']:5.1f}  {r['process'] / r['gb']:5.1f}  "
                  f"{100 * (r['process'] - line) / line:+7.1f} %  {r['rss_read']:6.0f} MiB"
                  f"  {r['rss_process']:6.0f} MiB"
                  f"  {r['process_cpu'] / max(r['read_cpu'], 1e-9):9.1f}"
                  f"  {'yes' if r['kept'] else 'no':>9}")
    last = rows[-1]
    # CPU seconds compare better than wall time on a shared machine (other jobs taking
    # cores stretch the wall time of both runs differently)
    print(f"cpu_vs_read: {last['process_cpu'] / max(last['read_cpu'], 1e-9):.1f} "
          f"(process {last['process_cpu']:.1f} CPU s after startup, read floor "
          f"{last['read_cpu']:.1f} CPU s)")
    print(f"end_to_end_vs_read: {last['process'] / last['read']:.1f}")


if __name__ == "__main__":
    main()
