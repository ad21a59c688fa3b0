"""The ``plcube`` command (also ``python -m pmap``): info, convert, process, report, export,
demo, steps, view, series, stack.

User errors print one line on stderr (``plcube: error: ...``) and exit with
status 2, without a traceback; ``--debug`` shows the traceback. No subcommand
ever modifies an input file.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import sys
import time
import traceback
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path

from ._version import COMMAND, __version__
from .errors import PmapError, PmapNotice

__all__ = ["main", "build_parser"]

EXIT_USER_ERROR = 2  # usage and data errors
EXIT_INTERNAL_ERROR = 1  # a bug in pmap
EXIT_INTERRUPTED = 130


def _parse_value(text: str):
    """Turn a KEY=VALUE option's value into int, float, bool, list or str."""
    low = text.lower()
    if low in ("true", "yes"):
        return True
    if low in ("false", "no"):
        return False
    if "," in text:
        return [_parse_value(t) for t in text.split(",")]
    for conv in (int, float):
        try:
            return conv(text)
        except ValueError:
            pass
    return text


def _read_options(args: argparse.Namespace) -> dict:
    opts: dict = {}
    if getattr(args, "format", None):
        opts["fmt"] = args.format
    for item in getattr(args, "option", None) or []:
        if "=" not in item:
            raise PmapError(f"--option needs KEY=VALUE, got {item!r}")
        key, value = item.split("=", 1)
        opts[key.strip().replace("-", "_")] = _parse_value(value.strip())
    return opts


def _add_medium_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--medium", choices=("air", "vacuum"),
                   help="medium of the wavelength axis (overrides the file's attr; without "
                   "it or a stated medium in the file or sidecar, air is assumed, with a note)")


def _apply_medium(opts: dict, medium: str | None) -> dict:
    """Put ``--medium`` into the read options (it sets the cube's ``wavelength_medium``)."""
    if medium is None:
        return opts
    given = opts.get("wavelength_medium")
    if given is not None and str(given).lower() != medium:
        raise PmapError(f"--medium {medium} contradicts -O wavelength_medium={given}")
    opts["wavelength_medium"] = medium
    return opts


def _note_medium(message: str | None) -> None:
    if message:
        warnings.warn(message, PmapNotice, stacklevel=2)


def _medium_note_for_cube(path: Path, read_options: dict) -> str | None:
    """The assumed-medium note for a cube file (reads a small sample of spectra)."""
    from .io import open_cube
    from .spectral._airvac import assumed_medium_notice

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cube = open_cube(path, **read_options)
    return assumed_medium_notice(cube)


def _medium_note_for_result(ds, src: Path, read_options: dict) -> str | None:
    """The assumed-medium note for a processed input, from the result's provenance.

    The median peak comes from the result's peak (or maximum) energy map; without
    one, from a sample of the input's spectra.
    """
    import numpy as np

    from .conventions import HC_EV_NM
    from .provenance import get_provenance
    from .spectral._airvac import medium_message

    inp = get_provenance(ds.attrs).get("input", {})
    if inp.get("wavelength_medium_source") != "assumed":
        return None
    for name in ("peak_energy", "max_energy"):
        if name not in ds:
            continue
        v = ds[name].isel(peak=0) if "peak" in ds[name].dims else ds[name]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            med = float(np.nanmedian(np.asarray(v.values, dtype=float)))
        units = v.attrs.get("units")
        if np.isfinite(med) and med > 0 and units in ("eV", "nm"):
            peak_nm = HC_EV_NM / med if units == "eV" else med
            return medium_message(str(inp.get("wavelength_medium", "air")), peak_nm)
    return _medium_note_for_cube(src, read_options)


def _add_read_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--format", help="input format if the extension does not tell "
                   "(zarr, netcdf, npy, tiff, text)")
    p.add_argument("-O", "--option", action="append", metavar="KEY=VALUE",
                   help="reader option, repeatable: e.g. wavelength_start_nm=500, "
                   "wavelength_step_nm=0.25, pixel_size_um=0.5, x_col=X, delimiter=';'")


# ---------------------------------------------------------------- subcommands
def cmd_info(args: argparse.Namespace) -> int:
    from ._cubeinfo import format_cube_info, quick_zarr_info

    opts = _read_options(args)
    # a canonical Zarr store is summarised without importing xarray/dask (~1 s)
    info = None if opts else quick_zarr_info(args.path, value_range=not args.no_range,
                                             full_range=args.full_range)
    if info is None:
        from .io import cube_info

        info = cube_info(args.path, value_range=not args.no_range,
                         full_range=args.full_range, **opts)
    print(format_cube_info(info))
    return 0


def cmd_convert(args: argparse.Namespace) -> int:
    from .io import convert

    opts = _apply_medium(_read_options(args), args.medium)
    out = convert(args.src, args.dst, overwrite=args.overwrite, fmt=args.to,
                  src_fmt=opts.pop("fmt", None), **opts)
    print(f"wrote {out}")
    _note_medium(_medium_note_for_cube(Path(out), {}))
    return 0


def _figures_dir(store: Path) -> Path:
    return store.with_name(store.name.removesuffix(".zarr") + "_figures")




def _expand_inputs(items: list[str]) -> list[Path]:
    """Input cubes from paths; a folder that is not a Zarr store means every cube inside it."""
    out: list[Path] = []
    for item in items:
        p = Path(item)
        if p.is_dir() and not (p / "zarr.json").exists() and not (p / ".zgroup").exists() \
                and not (p / ".zarray").exists():
            from .io._common import READ_EXTENSIONS  # the format registry's endings

            found = sorted(c for c in p.iterdir() if c.name.lower().endswith(READ_EXTENSIONS)
                           and not c.name.endswith("_result.zarr"))
            if not found:
                raise PmapError(f"no cubes found in folder {p}")
            out.extend(found)
        else:
            out.append(p)
    return out


def _make_client(args: argparse.Namespace):
    if not (args.workers or args.scheduler):
        return None
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise PmapError("--workers/--scheduler need the 'distributed' extra") from None
    if args.scheduler:
        return Client(args.scheduler)
    from .pipeline import parse_memory

    per_worker = parse_memory(args.memory_limit) // max(args.workers, 1)
    cluster = LocalCluster(n_workers=args.workers, threads_per_worker=1,
                           memory_limit=per_worker, dashboard_address=None)
    return Client(cluster)


def _print_fit_summary(ds) -> None:
    """The fit summary of a result on stderr, and its warning if any."""
    from .results import fit_summary, run_summary

    lines, warning = fit_summary(ds)
    for line in run_summary(ds) + lines:
        print(f"{COMMAND}: {line}", file=sys.stderr)
    if warning:
        print(f"{COMMAND}: warning: {warning}", file=sys.stderr)


def cmd_process(args: argparse.Namespace) -> int:
    from ._progress import phase

    with phase("imports"):  # xarray, dask, zarr, numba, scipy: a fixed cost of every run
        from .pipeline import DEFAULT_PIPELINE_TOML, load_pipeline, process

    if args.print_config:
        print(DEFAULT_PIPELINE_TOML, end="")
        return 0
    if not args.cube or not args.output:
        raise PmapError("process needs CUBE and -o RESULT.zarr (or --print-config)")
    with phase("load pipeline"):  # imports the steps' modules
        pipe = load_pipeline(args.config)
    regions = args.regions
    if regions is not None and regions != "auto":
        try:
            regions = int(regions)
        except ValueError:
            raise PmapError(f"--regions takes a number or 'auto', got {regions!r}") from None
        if regions < 1:
            raise PmapError(f"--regions takes 'auto' or a number >= 1, got {regions}")
    inputs = _expand_inputs(args.cube)
    for p in inputs:
        if not p.exists():
            raise PmapError(f"no such file: {p}")
    many = len(inputs) > 1 or Path(args.cube[0]).is_dir() and inputs[0] != Path(args.cube[0])
    out_dir = Path(args.output)
    outputs = ([out_dir / (p.name.split(".")[0] + "_result.zarr") for p in inputs] if many
               else [out_dir])
    read_options = _apply_medium(_read_options(args), args.medium)
    if args.memory_limit is not None:
        from .pipeline import MIN_MEMORY_BYTES, parse_memory

        if parse_memory(args.memory_limit) < MIN_MEMORY_BYTES:
            raise PmapError(f"--memory-limit {args.memory_limit} is below the "
                            f"{MIN_MEMORY_BYTES // 2**20} MiB pmap needs to run at all")
    client = _make_client(args)
    local = contextlib.ExitStack()
    if client is None:
        # dask's own choice without a client, said up front: dask finds it out by importing
        # distributed (~0.19 s), in compute and in rechunk, even for a scheduler named by a
        # string, so the threaded scheduler is given as the function itself
        import dask
        import dask.threaded

        local.enter_context(dask.config.set({"scheduler": dask.threaded.get,
                                             "array.rechunk.method": "tasks"}))
    if pipe.output.get("figures", True) and not args.no_figures:
        _import_in_background(_FIGURE_MODULES)
    summaries = []
    try:
        for i, (src, out) in enumerate(zip(inputs, outputs)):
            if many:
                print(f"[{i + 1}/{len(inputs)}] {src}", file=sys.stderr)
            t_start = time.perf_counter()
            ds = process(src, out, pipeline=load_pipeline(args.config) if i else pipe,
                         peaks=args.peaks, model=args.model, regions=regions,
                         components=args.components, overwrite=args.overwrite,
                         resume=args.resume, progress=not args.quiet,
                         read_options=dict(read_options), memory_limit=args.memory_limit,
                         client=client, planck=_planck_option(args, src, read_options))
            wall_s = time.perf_counter() - t_start
            print(f"result store: {out}")
            with phase("summary"):
                _print_fit_summary(ds)
                _note_medium(_medium_note_for_result(ds, src, read_options))
            figs = None
            if pipe.output.get("figures", True) and not args.no_figures:
                from .report import write_figures

                with phase("figures"):
                    figs = write_figures(ds, _figures_dir(out))
                print(f"figures ({len(figs)}): {_figures_dir(out)}")
            if figs is not None and not args.no_html:  # beside the PNGs
                with phase("html"):
                    _write_html(out, figs, wall_s, ds)
            if many:
                from .report import summarise_result

                summaries.append({"input": str(src), "result": str(out), **summarise_result(ds)})
    finally:
        local.close()
        if client is not None:
            client.close()
    if many:
        import pandas as pd

        table = out_dir / "summary.csv"
        pd.DataFrame(summaries).to_csv(table, index=False)
        print(f"summary table: {table}")
        if not args.no_html:
            from .report_html import write_summary_html

            print(f"summary report: {write_summary_html(summaries, out_dir / 'summary.html')}")
    return 0


#: Modules the figures and the HTML report need (matplotlib alone is ~1 s of imports).
_FIGURE_MODULES = ("matplotlib.figure", "matplotlib.backends.backend_agg", "matplotlib.colors",
                   "PIL.PngImagePlugin", "pmap.report", "pmap.report_html")


def _import_in_background(modules: Sequence[str]) -> None:
    """Import ``modules`` on a daemon thread, while the compute (numba kernels that
    release the GIL) runs: the figures afterwards find them loaded. An import that
    fails here fails again, with its message, where the module is used."""
    import importlib
    import threading

    def run() -> None:
        for m in modules:
            try:
                importlib.import_module(m)
            except Exception:  # noqa: BLE001 - reported at the real import
                return

    threading.Thread(target=run, name="pmap-preload", daemon=True).start()


def _write_html(store: Path, figures, run_time_s: float | None = None, ds=None) -> Path:
    """The self-contained HTML report of a result store (``ds``: the store opened
    already), beside its PNG figures."""
    from .report_html import html_report_path, write_html_report

    path = write_html_report(store, html_report_path(store, _figures_dir(store)),
                             figures=figures, run_time_s=run_time_s, dataset=ds)
    print(f"HTML report: {path}")
    return path


def _planck_option(args: argparse.Namespace, src: Path, read_options: dict):
    """The ``planck=`` argument of process: None, True, or the window in eV.

    ``--planck-window LO:HI`` is in eV for a cube on an energy axis and in nm for a cube
    on a wavelength axis (in the cube's medium; converted to eV as to_energy converts the
    axis: air to vacuum, then E = hc/lambda).
    """
    if not args.planck_window:
        return True if args.planck else None
    from .io import open_cube
    from .planck import window_nm_to_ev

    try:
        lo, hi = (float(v) for v in args.planck_window.split(":"))
    except ValueError:
        raise PmapError(f"--planck-window takes LOW:HIGH (eV, or nm for a wavelength cube), "
                        f"got {args.planck_window!r}") from None
    if not lo < hi:
        raise PmapError(f"--planck-window: LOW must be below HIGH, got {lo:g}:{hi:g}")
    cube = open_cube(src, **read_options)
    if "energy" in cube.dims:
        window = (lo, hi)
        print(f"Planck window: {lo:g}-{hi:g} eV", file=sys.stderr)
    elif "wavelength" in cube.dims:
        medium = str(cube.attrs.get("wavelength_medium", "air"))
        window = window_nm_to_ev((lo, hi), medium=medium)
        print(f"Planck window: {lo:g}-{hi:g} nm ({medium}) = {window[0]:.4f}-{window[1]:.4f} eV",
              file=sys.stderr)
    else:
        raise PmapError(f"--planck-window needs a cube on an energy (eV) or wavelength (nm) "
                        f"axis; {src} has dims {tuple(cube.dims)}")
    return {"energy_range_ev": [float(window[0]), float(window[1])]}


def cmd_demo(args: argparse.Namespace) -> int:
    from .pipeline import load_pipeline, process
    from .report import write_figures
    from .synthetic import write_demo_cube

    out_dir = Path(args.out)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = write_demo_cube(out_dir, size=args.size, seed=args.seed, overwrite=args.overwrite)
    cube_path = Path(paths["cube"])
    print(f"demo cube:   {cube_path}")
    print(f"demo truth:  {paths['truth']}")
    result_path = out_dir / "demo_result.zarr"
    pipe = load_pipeline(None)
    regions = args.regions if args.regions == "auto" else int(args.regions)
    # The demo's regions differ in spectral shape *and* intensity (grain boundaries are
    # darker), so cluster on shape + log-intensity with a Gaussian mixture.
    pipe.regions = {"n_regions": regions, "method": "gmm", "feature_space": "shape+intensity"}
    if args.components:
        pipe.components = {"method": "nmf", "n_components": args.components}
    t_start = time.perf_counter()
    ds = process(cube_path, result_path, pipeline=pipe, overwrite=True,
                 progress=not args.quiet)
    wall_s = time.perf_counter() - t_start
    _print_fit_summary(ds)
    figs = write_figures(ds, _figures_dir(result_path))
    figs.append(_demo_spike_figure(cube_path, paths["truth"], _figures_dir(result_path)))
    print(f"result:      {result_path}")
    print(f"figures:     {_figures_dir(result_path)} ({len(figs)} PNG)")
    _write_html(result_path, figs, wall_s, ds)
    try:
        from .synthetic import compare_with_truth

        print(compare_with_truth(ds, paths["truth"]))
    except ImportError:
        pass
    return 0


#: Map of the tiny cube the warm-up compiles the kernels on (pixels): big enough for
#: every stage of the demo pipeline (NMF, regions), small enough to cost nothing but
#: the compilation.
_WARMUP_SHAPE = (48, 48)


def _warmup_pipelines(part: str) -> list:
    """The pipelines a warm-up part runs: "spikes" the cleaning steps up to spike removal;
    "rest" all else of the default pipeline with `--components 3 --regions 3` and of the
    demo's (NMF, Gaussian-mixture regions on shape + intensity); "all" both whole."""
    from .pipeline import load_pipeline

    if part == "spikes":
        pipe = load_pipeline(None)
        keep = ("mask_bad_pixels", "remove_spikes")
        pipe.steps = [(n, p) for n, p in pipe.steps if n in keep]
        pipe.descriptors = pipe.fit = None
        pipe.output = {**pipe.output, "keep_cube": True}
        return [pipe]
    pipes = []
    for regions in ({"n_regions": 3},  # plcube process --regions 3 --components 3
                    {"n_regions": 3, "method": "gmm", "feature_space": "shape+intensity"}):
        pipe = load_pipeline(None)  # cmd_demo's stages in the second
        if part == "rest":
            pipe.steps = [(n, p) for n, p in pipe.steps if n != "remove_spikes"]
        pipe.components = {"method": "nmf", "n_components": 3}
        pipe.regions = regions
        pipes.append(pipe)
    return pipes


def cmd_warmup(args: argparse.Namespace) -> int:
    """Compile every numerical kernel of the default and demo pipelines into numba's
    cache by processing a tiny invented cube (float32, the dtype of the demo cube and of
    integer detector counts after cleaning): a later run loads them in well under a second
    instead of compiling them for about a minute. Two parts run as separate processes at
    once (numba compiles one kernel at a time per process), then the whole pipeline runs
    once more to check that nothing is left to compile."""
    import subprocess
    import tempfile

    from ._progress import CompileNotice
    from .pipeline import process
    from .synthetic import write_demo_cube

    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="pmap_warmup_") as tmp:
        work = Path(tmp)
        if args.part is None:
            cube = write_demo_cube(work, shape=_WARMUP_SHAPE, seed=0, overwrite=True,
                                   name="warmup").cube
        else:
            cube = Path(args.cube)
        if args.part is None and (os.cpu_count() or 1) > 1:
            print(f"{COMMAND}: compiling the numerical kernels into the cache (once after an "
                  "install or an update; about a minute or two)", file=sys.stderr)
            procs = {part: subprocess.Popen([sys.executable, "-m", "pmap", "warmup", "--part",
                                             part, "--cube", str(cube)],
                                            stdout=subprocess.DEVNULL)
                     for part in ("spikes", "rest")}
            bad = [part for part, p in procs.items() if p.wait() != 0]
            if bad:
                raise PmapError(f"warm-up part(s) {', '.join(bad)} failed (see above)")
        parts = [args.part] if args.part is not None else ["all"]
        with CompileNotice(COMMAND, enabled=False) as notice:
            for part in parts:
                for i, pipe in enumerate(_warmup_pipelines(part)):
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")
                        process(cube, work / f"warmup_{part}_{i}.zarr", pipeline=pipe,
                                overwrite=True, progress=False, memory_limit="512MB")
    if args.part is None:
        print(f"{COMMAND}: kernels compiled and cached in {time.perf_counter() - t0:.0f} s"
              + (f" ({notice.kernels} compiled in the final check)" if notice.kernels else ""),
              file=sys.stderr)
    return 0


def _demo_spike_figure(cube_path: Path, truth_path: Path, out_dir: Path) -> Path:
    """Raw vs spike-cleaned spectra at the demo pixels hit by the most cosmic spikes."""
    import numpy as np
    import xarray as xr

    from .io import open_cube
    from .report import plot_spectra
    from .spectral import remove_spikes

    raw = open_cube(cube_path)
    truth = xr.open_zarr(truth_path)
    hits = truth["spike_mask"].sum(truth["spike_mask"].dims[-1]).values
    order = np.argsort(hits.ravel())[::-1][:3]
    pixels = [tuple(int(i) for i in np.unravel_index(k, hits.shape)) for k in order]
    cleaned = remove_spikes(raw)
    return plot_spectra(cleaned, out_dir / "spikes_raw_vs_cleaned.png", pixels=pixels,
                        reference=raw, reference_label="raw (with cosmic spikes)",
                        title="cosmic-spike removal at the pixels with most spikes")


def cmd_report(args: argparse.Namespace) -> int:
    from .report import figure_output, parse_size_cm, write_figures
    from .results import open_result

    size_cm = parse_size_cm(args.size) if args.size else None
    store = Path(args.result)
    ds = open_result(store)
    out = Path(args.out) if args.out else _figures_dir(store)
    with figure_output(dpi=args.dpi, size_cm=size_cm):
        if ds.attrs.get("series_law"):  # a series store (plcube series): its own figures
            from .report_series import write_series_figures

            figs = write_series_figures(ds, out)
        else:
            figs = write_figures(ds, out)
    print(f"figures ({len(figs)}): {out}")
    if args.html:
        from .report_html import html_report_path, write_html_report

        html_path = write_html_report(store, html_report_path(store, out), figures=figs)
        print(f"HTML report: {html_path}")
    if ds.attrs.get("series_law"):
        return 0
    region_vars = [v for v in ds.data_vars if "region_id" in ds[v].dims]
    if region_vars:
        from .decomposition import write_region_csv

        csv = out / "regions.csv"
        stats = ds[region_vars].rename({"region_id": "region"}).load()
        if "region_name" in stats.coords:  # Zarr v3 gives numpy StringDType: plain str objects
            stats = stats.assign_coords(region_name=stats["region_name"].astype(object))
        write_region_csv(stats, csv)
        print(f"region table: {csv}")
    return 0


def cmd_export(args: argparse.Namespace) -> int:
    from .export import export_map
    from .results import open_result

    index: dict[str, int] = {}
    for item in args.index or []:
        dim, sep, val = item.partition("=")
        try:
            index[dim.strip()] = int(val)
        except ValueError:
            raise PmapError(f"--index needs DIM=N with an integer N, got {item!r}") from None
        if not sep:
            raise PmapError(f"--index needs DIM=N, got {item!r}")
    if args.peak is not None:
        index["peak"] = args.peak
    dst = Path(args.output)
    if dst.exists() and not args.overwrite:
        raise PmapError(f"{dst} exists; use --overwrite to replace it")
    src = Path(args.result)
    if dst.resolve() == src.resolve():
        raise PmapError("the output would replace the input store")
    ds = open_result(src)
    out = export_map(ds, args.variable, dst, index=index)
    print(f"wrote {out}")
    return 0


def cmd_steps(args: argparse.Namespace) -> int:
    from .steps import available_steps

    for name, spec in available_steps().items():
        print(f"{name:24s} {spec.summary}")
    return 0


def _no_display_reason() -> str | None:
    """Why Qt cannot open a window here (Linux/BSD without X11 or Wayland), or None."""
    if not sys.platform.startswith(("linux", "freebsd", "openbsd", "netbsd")):
        return None
    if os.environ.get("QT_QPA_PLATFORM"):  # the user chose a platform (offscreen, vnc, ...)
        return None
    if os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"):
        return None
    return "no display (DISPLAY and WAYLAND_DISPLAY are unset)"


def cmd_view(args: argparse.Namespace) -> int:
    reason = _no_display_reason()
    if reason:
        raise PmapError(
            f"{COMMAND} view needs a graphical display: {reason}; run it in a desktop session "
            f"(or ssh -X), or write the figures and an HTML report to open in a browser with: "
            f"{COMMAND} report {args.path} --html"
        )
    try:
        from .napari_plugin import view
    except ImportError as exc:
        raise PmapError(f"the viewer needs the 'viewer' extra (napari, Qt): {exc}") from None
    return view(args.path)


def cmd_series(args: argparse.Namespace) -> int:
    import time

    import numpy as np

    from ._progress import TqdmProgress
    from .results import RESULT_FORMAT_VERSION, mark_complete, open_result, prepare_output
    from .series import STATUS_LEGEND, fit_law

    src = Path(args.result)
    ds = open_result(src)
    out = fit_law(ds, law=args.law, quantity=args.quantity, dim=args.dim,
                  max_iter=args.max_iter)
    dst = prepare_output(args.output, overwrite=args.overwrite, input_paths=(src,))
    out.attrs["pmap_result"] = RESULT_FORMAT_VERSION
    out.attrs["pmap_complete"] = False
    law = args.law
    n_series = int(np.prod([out.sizes[d] for d in out[f"{law}_status"].dims]))
    t0 = time.perf_counter()
    with TqdmProgress(f"{law} fit", enabled=not args.quiet, unit="chunk"):
        out.to_zarr(str(dst), mode="w", consolidated=False)  # mark_complete consolidates
    wall = time.perf_counter() - t0
    mark_complete(dst)
    res = open_result(dst)
    status = res[f"{law}_status"].values.ravel()
    ok = status == 0
    print(f"wrote {dst}: {law} ({out.attrs['series_reference']}) on "
          f"{out.attrs['series_quantity']} along {out.attrs['series_dim']}, "
          f"{n_series} series in {wall:.1f} s")
    for code, word in STATUS_LEGEND.items():
        n = int((status == code).sum())
        if n:
            print(f"  {word}: {n} ({100 * n / status.size:.1f} %)")
    if ok.any():
        for name in [v for v in res.data_vars if v.startswith(law + "_") and not v.endswith(
                ("_err", "_status", "_class", "_chi2_red"))]:
            val = res[name].values.ravel()[ok]
            err = res[f"{name}_err"].values.ravel()[ok]
            print(f"  {name}: median {np.median(val):.6g} {res[name].attrs.get('units', '')} "
                  f"(median 1-sigma {np.median(err):.3g})")
        print(f"  {law}_chi2_red: median {np.nanmedian(res[f'{law}_chi2_red'].values.ravel()[ok]):.3g}")
    if "power_law_class" in res:
        from .series import POWER_CLASS_LEGEND

        cls = res["power_law_class"].values.ravel()
        for code, word in POWER_CLASS_LEGEND.items():
            if code >= 0 and (cls == code).any():
                print(f"  power_law_class {word}: {int((cls == code).sum())}")
        print(f"  power_law_class: {res['power_law_class'].attrs['caveat']}")
    if not args.no_figures:
        from .report_series import write_series_figures

        figs = write_series_figures(res, _figures_dir(dst))
        print(f"figures ({len(figs)}): {_figures_dir(dst)}")
    return 0


def cmd_stack(args: argparse.Namespace) -> int:
    from ._progress import TqdmProgress
    from .io import open_cube, save_cube
    from .stack import stack_cubes

    paths = _expand_inputs(args.maps)
    opts = _read_options(args)
    values = None
    if args.values:
        try:
            values = [float(v) for v in args.values.split(",")]
        except ValueError:
            raise PmapError(f"--values needs numbers separated by commas, got {args.values!r}") \
                from None
    cubes = [open_cube(p, **opts) for p in paths]
    with TqdmProgress("integrated images", enabled=not args.quiet and not args.no_register):
        cube = stack_cubes(cubes, along=args.along, values=values, units=args.units,
                           register=not args.no_register, names=[p.name for p in paths])
    units = cube[args.along].attrs.get("units", "")
    for (dy, dx), v in zip(cube.attrs["stack_shifts_px"], cube[args.along].values):
        print(f"  {args.along} = {v:g} {units}: shift dy = {dy:+.2f} px, dx = {dx:+.2f} px")
    print(f"  common area: {cube.sizes['y']} x {cube.sizes['x']} px")
    with TqdmProgress("writing", enabled=not args.quiet):
        out = save_cube(cube, args.output, overwrite=args.overwrite)
    print(f"wrote {out}: {len(paths)} maps along {args.along}")
    return 0


# ---------------------------------------------------------------- parser
def build_parser() -> argparse.ArgumentParser:
    """The argparse parser of the ``plcube`` command."""
    parser = argparse.ArgumentParser(
        prog=COMMAND,
        description="Hyperspectral photoluminescence map processor: calibrated spectra, "
        "per-pixel fits, regions, figures.",
    )
    parser.add_argument("--version", action="version", version=f"{COMMAND} (pmap) {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("info", help="describe a cube: dims, spectral range, pixel size, chunks")
    p.add_argument("path")
    p.add_argument("--no-range", action="store_true", help="no value range at all")
    p.add_argument("--full-range", action="store_true",
                   help="value range from every chunk (one full read); by default a large "
                   "cube's range comes from the file's stored actual_range or a stated sample "
                   "of chunks spread over the map")
    _add_read_options(p)
    p.set_defaults(func=cmd_info)

    p = sub.add_parser("convert", help="convert a cube between formats (Zarr, NetCDF, ...)")
    p.add_argument("src")
    p.add_argument("dst")
    p.add_argument("--to", help="output format (zarr or netcdf; default from extension)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output")
    _add_medium_option(p)
    _add_read_options(p)
    p.set_defaults(func=cmd_convert)

    p = sub.add_parser("process", help="clean, convert, fit and map cubes into result stores")
    p.add_argument("cube", nargs="*", help="cube(s), or a folder of cubes")
    p.add_argument("-o", "--output", help="result store to create (RESULT.zarr); with several "
                   "inputs or a folder, the folder for one NAME_result.zarr each + summary.csv")
    p.add_argument("--config", help="pipeline TOML file (see --print-config)")
    p.add_argument("--peaks", type=int, help="number of peaks to fit (1-4)")
    p.add_argument("--model", help="line shape: gaussian, lorentzian, voigt, pseudo_voigt, "
                   "asymmetric")
    p.add_argument("--regions", help="cluster pixels into K regions, or 'auto'")
    p.add_argument("--components", type=int, help="NMF components to extract")
    p.add_argument("--planck", action="store_true", help="absolute PL: fit the generalized "
                   "Planck law (qfls, carrier_temperature, implied_voc, plqy with "
                   "excitation_photon_flux; needs a cube in photons s-1 m-2 eV-1, or counts "
                   "with photon_flux_per_count as attr or in the [planck] table)")
    p.add_argument("--planck-window", metavar="LOW:HIGH", help="Planck fit window (implies "
                   "--planck): in eV for a cube on an energy axis, in nm for a cube on a "
                   "wavelength axis (its medium, air unless stated), e.g. 1.60:1.75")
    p.add_argument("--overwrite", action="store_true", help="replace an existing result store")
    p.add_argument("--resume", action="store_true",
                   help="continue an interrupted run, recomputing only unfinished blocks")
    p.add_argument("--memory-limit", help="memory to stay under, e.g. 1GB or 512MB "
                   "(default: half the available memory)")
    p.add_argument("--workers", type=int, help="run on a local dask cluster of N workers")
    p.add_argument("--scheduler", help="address of a running dask scheduler to join "
                   "(e.g. tcp://10.0.0.5:8786)")
    p.add_argument("--no-figures", action="store_true", help="do not write PNG figures")
    p.add_argument("--no-html", action="store_true", help="do not write the HTML report "
                   "(RESULT_figures/RESULT_report.html, written with the figures; summary.html "
                   "for a folder)")
    p.add_argument("--print-config", action="store_true",
                   help="print the default pipeline TOML and exit")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    _add_medium_option(p)
    _add_read_options(p)
    p.set_defaults(func=cmd_process)

    p = sub.add_parser("demo", help="generate the synthetic demo map and process it end to end")
    p.add_argument("--out", default="pmap_demo_output", help="output folder (default %(default)s)")
    p.add_argument("--size", default="small", help="tiny, small, medium or large")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--regions", default="3", help="regions to find (number or 'auto'; "
                   "default %(default)s)")
    p.add_argument("--components", type=int, default=3, help="NMF components")
    p.add_argument("--overwrite", action="store_true", help="replace earlier demo files")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("warmup", help="compile the numerical kernels into the cache now "
                       "(scripts/setup.sh does; otherwise the first process run does, ~1-2 min)")
    p.add_argument("--part", choices=["spikes", "rest", "all"], help=argparse.SUPPRESS)
    p.add_argument("--cube", help=argparse.SUPPRESS)
    p.set_defaults(func=cmd_warmup)

    p = sub.add_parser("report", help="(re)draw the figures and region table of a result store")
    p.add_argument("result", help="result store written by plcube process (or plcube series)")
    p.add_argument("-o", "--out", help="folder for the figures (default RESULT_figures/)")
    p.add_argument("--html", action="store_true", help="also write one self-contained HTML "
                   "report (figures embedded, opens offline): OUT/RESULT_report.html")
    p.add_argument("--dpi", type=float, help="resolution of the PNG figures, dots per inch "
                   "(default 120; e.g. 300 for a paper)")
    p.add_argument("--size", metavar="WxH", help="size of every figure in centimetres, "
                   "e.g. 8.5x6 for one journal column (default: each figure's own size)")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("export", help="export one map of a result as a CSV table (x, y, value "
                       "with units) or a 32-bit float TIFF with its pixel size")
    p.add_argument("result", help="result store (RESULT.zarr)")
    p.add_argument("variable", help="map to export, e.g. peak_energy, integrated_intensity")
    p.add_argument("-o", "--output", required=True, help="FILE.csv, FILE.tif or FILE.tiff")
    p.add_argument("--peak", type=int, help="peak index (0 = lowest energy) for per-peak maps")
    p.add_argument("--index", action="append", metavar="DIM=N",
                   help="slice of another dim, repeatable, e.g. --index component=1")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    p.set_defaults(func=cmd_export)

    p = sub.add_parser("steps", help="list the processing steps a pipeline TOML may name")
    p.set_defaults(func=cmd_steps)

    p = sub.add_parser("view", help="open a cube or result in the napari viewer")
    p.add_argument("path", nargs="?")
    p.set_defaults(func=cmd_view)

    p = sub.add_parser("series", help="fit a published law per pixel along a stack dim "
                       "(temperature, excitation power) of a result store")
    p.add_argument("result", help="result store whose maps carry a stack dim")
    p.add_argument("--law", required=True,
                   choices=["varshni", "bose_einstein", "linewidth", "arrhenius", "power_law"])
    p.add_argument("-o", "--output", required=True, help="output store (SERIES.zarr)")
    p.add_argument("--quantity", help="map to fit (default: the law's usual one)")
    p.add_argument("--dim", help="stack dim (default: the law's, else the only one)")
    p.add_argument("--max-iter", type=int, default=200, help="Levenberg-Marquardt iterations")
    p.add_argument("--no-figures", action="store_true", help="do not write PNG figures "
                   "(default: parameter maps and per-region series in SERIES_figures/)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output store")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_series)

    p = sub.add_parser("stack", help="stack single maps into one cube along a dim "
                       "(temperature, excitation power, ...), registered to the first")
    p.add_argument("maps", nargs="+", help="map files (any format pmap reads)")
    p.add_argument("--along", required=True, help="the new dim: temperature, excitation_power, ...")
    p.add_argument("-o", "--output", required=True, help="output cube (STACK.zarr)")
    p.add_argument("--values", help="its value for each map, comma-separated (default: each "
                   "map's metadata, e.g. temperature_K, excitation_power_W)")
    p.add_argument("--units", help="units of the values (needed for dims other than "
                   "temperature [K], excitation_power [W], time [s], ...)")
    p.add_argument("--no-register", action="store_true",
                   help="no sub-pixel registration (maps only cropped to the common size)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    _add_read_options(p)
    p.set_defaults(func=cmd_stack)
    return parser


def _from_storage_codec(exc: BaseException) -> bool:
    """True when the exception was raised while decoding stored bytes (zarr, numcodecs,
    HDF5 filters): corrupt or truncated input rather than a bug."""
    tb = exc.__traceback__
    mods = []
    while tb is not None:
        mods.append(tb.tb_frame.f_globals.get("__name__", ""))
        tb = tb.tb_next
    return any(m.split(".")[0] in ("numcodecs", "zarr", "h5py", "h5netcdf", "tifffile")
               for m in mods[-6:])


def _since_start() -> float:
    """Seconds since this process started (interpreter start-up and imports so far; to
    10 ms on Linux, from /proc; NaN elsewhere)."""
    try:
        with open("/proc/self/stat") as f:
            start_ticks = float(f.read().rsplit(")", 1)[1].split()[19])
        with open("/proc/uptime") as f:
            uptime_s = float(f.read().split()[0])
        return uptime_s - start_ticks / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError, AttributeError):
        return float("nan")


#: Commands that run numba kernels: a kernel missing from numba's cache (first run after
#: an install) is compiled first, which they announce (pmap._progress.CompileNotice).
_COMPILING_COMMANDS = ("process", "demo", "series", "stack")


def _exit_now(code: int) -> None:
    """End the process with ``code`` once the exit handlers have run (logging, tqdm,
    multiprocessing, weakref finalizers) and the output is flushed, without the
    interpreter's final garbage collections over every object still alive (dask graphs,
    xarray objects, numba's compiled libraries), measured between the last exit handler
    and the process's end: 0.8 s after a 1 GB run (load 2.8), 6.6 s after a small one
    (load 8.9). Everything the command
    wrote is complete and closed before (the result store, figures, HTML)."""
    import atexit

    try:
        atexit._run_exitfuncs()
    finally:
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except (OSError, ValueError):  # a closed pipe: nothing more to say
                pass
        os._exit(code)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``plcube`` console script; returns the exit status.

    Called with ``argv`` None (the console script, ``python -m pmap``), the commands that
    compute leave at once when done (:func:`_exit_now`); called with arguments (tests,
    scripts), it returns.
    """
    code = _main(argv)
    if (argv is None and _ARGS and _ARGS[0].command in _COMPILING_COMMANDS + ("warmup",)
            and not getattr(_ARGS[0], "workers", None)
            and not getattr(_ARGS[0], "scheduler", None)):
        _exit_now(code)
    return code


#: The parsed arguments of the last main() call (for the way out).
_ARGS: list = []


def _main(argv: Sequence[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _ARGS[:] = [args]
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USER_ERROR
    func: Callable[[argparse.Namespace], int] = args.func
    debug = args.debug or bool(os.environ.get("PMAP_DEBUG"))

    def _notice(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, PmapNotice):
            print(f"{COMMAND}: note: {message}", file=sys.stderr)
        else:
            print(warnings.formatwarning(message, category, filename, lineno, line),
                  file=sys.stderr, end="")

    warnings.showwarning = _notice
    if os.environ.get("PMAP_TIMINGS"):  # phase times of a run on stderr (pmap._progress.phase)
        import logging

        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter(f"{COMMAND}: timing: %(message)s"))
        log = logging.getLogger("pmap.timing")
        log.addHandler(handler)
        log.setLevel(logging.DEBUG)
        log.debug("start-up: %.3f s wall, %.3f CPU s", _since_start(), time.process_time())
    # numerical RuntimeWarnings (empty slices of masked pixels, NaN comparisons) are
    # handled where they matter; on the terminal they would only confuse
    warnings.filterwarnings("ignore", category=RuntimeWarning)
    try:
        if args.command in _COMPILING_COMMANDS:
            from ._progress import CompileNotice

            with CompileNotice(COMMAND):  # says so when a kernel must be compiled first
                return int(func(args) or 0)
        return int(func(args) or 0)
    except KeyboardInterrupt:
        print(f"{COMMAND}: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:  # output piped into `head` and closed early
        sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - silence the flush at exit
        return 0
    except (PmapError, OSError) as exc:  # bad input, a missing or unreadable file
        if debug:
            traceback.print_exc()
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        if not isinstance(exc, PmapError):
            msg = f"{type(exc).__name__}: {msg}"
        print(f"{COMMAND}: error: {msg}", file=sys.stderr)
        return EXIT_USER_ERROR
    except Exception as exc:  # anything else is a bug in pmap, not the user's mistake
        if debug:
            traceback.print_exc()
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        if _from_storage_codec(exc):  # a chunk that does not decode: the data, not pmap
            print(f"{COMMAND}: error: a chunk of the input cannot be decoded (corrupt or truncated "
                  f"file): {type(exc).__name__}: {msg}", file=sys.stderr)
            return EXIT_USER_ERROR
        print(f"{COMMAND}: internal error: {type(exc).__name__}: {msg} (a bug in pmap; rerun with "
              "--debug for the traceback and please report it)", file=sys.stderr)
        return EXIT_INTERNAL_ERROR
