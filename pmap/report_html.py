"""One self-contained HTML report of a result store, and a batch summary page.

An edge module (layer 6, like :mod:`pmap.report`): it reads a result store
(or a store written by ``plcube series``), draws its figures with
:mod:`pmap.report` and writes one HTML file that holds everything: figures
embedded as base64 PNG ``data:`` URLs, CSS inline, no script, no font, no
link to anything outside the file, so it opens offline and can be mailed as
it is. Every text that comes from the data (paths, names, attrs, provenance)
is escaped with :func:`html.escape`.

Sections: input, pipeline and run time; fit and detection summary; warnings
and caveats; maps; histograms; regions; components; series laws; physics
stages; quality control; provenance (every step and parameter); versions.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import platform
import tempfile
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from . import _style
from ._version import COMMAND, __version__
from .errors import PmapNotice, StepError
from .provenance import get_provenance

__all__ = [
    "write_html_report",
    "write_summary_html",
    "html_report_path",
    "BANDGAP_CAVEATS",
    "VERSION_PACKAGES",
]

#: Packages whose versions the report lists (distribution names).
VERSION_PACKAGES = ("plcube", "numpy", "xarray", "dask", "zarr", "scipy", "pandas",
                    "matplotlib", "numba", "scikit-learn", "scikit-image", "tifffile",
                    "distributed", "napari")

#: Why a PL peak energy is not the bandgap (README, "What the numbers mean").
BANDGAP_CAVEATS = (
    "The PL peak energy is not the bandgap.",
    "Excitonic emission lies below the gap by the exciton binding energy "
    "(meV in bulk III-V semiconductors and halide perovskites, hundreds of meV in "
    "monolayer transition-metal dichalcogenides).",
    "Indirect-gap materials emit through phonon-assisted lines, shifted from the gap by "
    "the phonon energies.",
    "A Stokes shift (emission from relaxed or localised states) and band tails (disorder, "
    "compositional fluctuations, Urbach tails) move the maximum below the absorption edge; "
    "temperature and carrier density move it further.",
    "Calibration: an uncalibrated wavelength axis, or one whose medium (air or vacuum) is "
    "wrong, shifts every energy; pmap converts with vacuum wavelengths and the Jacobian "
    "I_E = I_λ·λ²/hc.",
    "pmap reports a bandgap estimate only with the corrections you supply.",
)

_MAIN = ("peak_energy", "peak_wavelength", "peak_fwhm", "peak_height", "peak_area",
         "integrated_intensity", "max_energy", "centroid_energy", "fwhm_interp",
         "window_ratio", "peak_shape")
_QUALITY = ("fit_status", "peak_status", "chi2_red", "residual_variance",
            "weighted_residual_variance", "bic", "n_iter", "background_offset",
            "background_slope")
_PHYSICS = ("qfls", "implied_voc", "carrier_temperature", "planck_")

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif;
 margin:0;color:#1a1a1a;background:#fff;line-height:1.45}
main{max-width:1180px;margin:0 auto;padding:0 24px 48px}
header{background:#0f2f4a;color:#fff;padding:18px 24px}
header h1{margin:0 0 4px;font-size:1.45em}header p{margin:0;color:#cfe0ee;font-size:.92em}
nav{position:sticky;top:0;background:#f3f6f9;border-bottom:1px solid #d5dde5;padding:6px 24px;
 font-size:.86em;z-index:2}
nav a{margin-right:14px;color:#0f4c81;text-decoration:none;white-space:nowrap}
nav a:hover{text-decoration:underline}
h2{border-bottom:2px solid #0f2f4a;padding-bottom:3px;margin-top:36px;font-size:1.25em}
h3{font-size:1.05em;margin:22px 0 8px}
table{border-collapse:collapse;margin:8px 0 14px;font-size:.88em}
th,td{border:1px solid #d5dde5;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#eef2f6;font-weight:600}td.num{text-align:right;font-variant-numeric:tabular-nums}
table.kv th{width:220px}
.grid{display:grid;grid-template-columns:repeat(auto-fill,minmax(440px,1fr));gap:14px}
figure{margin:0;border:1px solid #e1e6eb;border-radius:4px;padding:6px;background:#fff}
figure img{width:100%;height:auto;display:block}
figcaption{font-size:.8em;color:#444;margin-top:4px}
.wide{grid-column:1/-1}.wide img{max-width:900px;margin:0 auto}
.warn{background:#fff4e0;border-left:4px solid #e69f00;padding:8px 12px;margin:8px 0}
.note{background:#eef5fb;border-left:4px solid #0072b2;padding:8px 12px;margin:8px 0}
.ok{background:#eaf6f1;border-left:4px solid #009e73;padding:8px 12px;margin:8px 0}
.swatch{display:inline-block;width:12px;height:12px;border:1px solid #555;margin-right:6px;
 vertical-align:-1px}
pre{background:#f6f8fa;border:1px solid #e1e6eb;padding:8px;overflow:auto;font-size:.8em;
 max-height:420px}
details summary{cursor:pointer;color:#0f4c81}
.scroll{overflow-x:auto;max-width:100%}
code{font-size:.95em;background:#f1f3f5;padding:0 3px;border-radius:3px}
footer{margin-top:40px;font-size:.8em;color:#666}
@media print{nav{display:none}.grid{display:block}figure{break-inside:avoid;margin-bottom:10px}}
"""


# --------------------------------------------------------------------------- small helpers


def _e(value: Any) -> str:
    """Escaped text of any value."""
    return html.escape(str(value), quote=True)


def _num(v: Any, digits: int = 4) -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return _e(v)
    if not np.isfinite(f):
        return "–"
    if f == int(f) and abs(f) < 1e15:
        return f"{int(f)}"
    return f"{f:.{digits}g}"


def _mean_sd(mean: float, sd: float) -> str:
    """``mean ± sd`` with the s.d. to 2 significant digits and the mean to the same place."""
    if not np.isfinite(mean):
        return "–"
    if not (np.isfinite(sd) and sd > 0):
        return _num(mean, 5)
    place = int(np.floor(np.log10(sd))) - 1  # the s.d.'s second significant digit
    decimals = max(-place, 0)
    m, sdr = round(mean, -place), round(sd, -place)
    return f"{m:.{decimals}f} ± {sdr:.{decimals}f}"


def _kv_table(rows: Sequence[tuple[str, Any]], raw: bool = False) -> str:
    body = "".join(f"<tr><th>{_e(k)}</th><td>{v if raw else _e(v)}</td></tr>" for k, v in rows)
    return f'<table class="kv">{body}</table>'


def _table(header: Sequence[str], rows: Sequence[Sequence[Any]], num_cols: Sequence[int] = ()
           ) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    out = []
    for r in rows:
        cells = []
        for i, c in enumerate(r):
            cls = ' class="num"' if i in num_cols else ""
            cells.append(f"<td{cls}>{c}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(out)}</tbody></table>"


def _box(kind: str, text: str) -> str:
    return f'<div class="{kind}">{text}</div>'


def _png_data_url(path: Path) -> str:
    return "data:image/png;base64," + base64.b64encode(Path(path).read_bytes()).decode("ascii")


def _drawn_variables(figs: Sequence[Path]) -> set[str]:
    """Variables shown with at least one finite value by the figures ``figs`` (from each
    PNG's description: a map's ``n_value``, a histogram's ``n``)."""
    out = set()
    for f in figs:
        info = _png_description(f)
        if info.get("variable") is not None and (info.get("n_value") or info.get("n")):
            out.add(str(info["variable"]))
    return out


def _png_description(path: Path) -> dict:
    """The JSON ``Description`` of a PNG written by :mod:`pmap.report` ({} if none)."""
    key = str(path)
    try:
        stamp = Path(path).stat().st_mtime_ns
    except OSError:
        return {}
    hit = _DESCRIPTIONS.get(key)
    if hit is not None and hit[0] == stamp:
        return hit[1]
    info = _read_png_description(path)
    _DESCRIPTIONS[key] = (stamp, info)
    return info


#: PNG descriptions read, by path: (modification time ns, description); the maps'
#: section and the skipped-map note read each figure's once.
_DESCRIPTIONS: dict[str, tuple[int, dict]] = {}


def _read_png_description(path: Path) -> dict:
    try:
        from PIL import Image

        with Image.open(path) as im:
            # pmap writes its text chunks before the image data: read from the header
            # (im.text decodes the whole image to look for chunks after it too)
            text = im.info.get("Description")
            return json.loads(text if isinstance(text, str)
                              else im.text.get("Description", "{}"))
    except Exception:  # noqa: BLE001 - a caption is optional
        return {}


def _figure(path: Path, caption: str | None = None, wide: bool = False) -> str:
    """A figure: the PNG embedded as a data URL, its title as alt text, its file name below."""
    info = _png_description(path)
    alt = info.get("title") or Path(path).stem.replace("_", " ")
    cls = ' class="wide"' if wide else ""
    cap = f"{_e(caption)} · " if caption else ""
    return (f"<figure{cls}><img src=\"{_png_data_url(path)}\" alt=\"{_e(alt)}\">"
            f"<figcaption>{cap}<span style=\"color:#777\">{_e(Path(path).name)}"
            f"</span></figcaption></figure>")


def _grid(figs: Sequence[str]) -> str:
    return f'<div class="grid">{"".join(figs)}</div>' if figs else ""


def _versions() -> list[tuple[str, str]]:
    from importlib import metadata

    out = [("python", platform.python_version()), ("pmap (import name)", __version__)]
    for name in VERSION_PACKAGES:
        try:
            out.append((name, metadata.version(name)))
        except metadata.PackageNotFoundError:
            continue
    out.append(("platform", platform.platform()))
    return out


def html_report_path(store: str | Path, figures_dir: str | Path | None = None) -> Path:
    """Default file of a store's HTML report: ``NAME_report.html`` in its figures folder.

    The figures folder is ``NAME_figures/`` beside ``NAME.zarr`` unless given.
    """
    p = Path(store)
    stem = p.name.removesuffix(".zarr")
    folder = Path(figures_dir) if figures_dir is not None else p.with_name(stem + "_figures")
    return folder / f"{stem}_report.html"


# --------------------------------------------------------------------------- sections


def _dims_text(ds: xr.Dataset) -> str:
    return ", ".join(f"{d} {n}" for d, n in ds.sizes.items())


def _pixel_size(ds: xr.Dataset) -> tuple[str, str]:
    parts, ext = [], []
    for d in ("y", "x"):
        if d in ds.coords and ds.sizes[d] > 1:
            v = np.asarray(ds[d].values, float)
            step = float(np.median(np.diff(v)))
            u = _style.unit_text(ds[d].attrs.get("units", "pixel")) or "pixel"
            parts.append(f"{d} {abs(step):.4g} {u}")
            ext.append(f"{d} {v.min():.4g}…{v.max():.4g} {u}")
    return ", ".join(parts) or "–", ", ".join(ext) or "–"


def _run_time(ds: xr.Dataset, store: Path | None, run_time_s: float | None) -> str:
    if run_time_s is not None:
        return f"{run_time_s:.1f} s (wall clock of the run that wrote this store)"
    read_at = get_provenance(ds.attrs).get("input", {}).get("read_at")
    if store is None or not read_at:
        return "not recorded"
    meta = [store / n for n in (".zmetadata", "zarr.json", ".zattrs") if (store / n).exists()]
    if not meta:
        return "not recorded"
    try:
        t0 = _dt.datetime.fromisoformat(str(read_at))
        t1 = _dt.datetime.fromtimestamp(max(m.stat().st_mtime for m in meta), tz=_dt.UTC)
    except ValueError:
        return "not recorded"
    secs = (t1 - t0).total_seconds()
    if not 0 <= secs < 30 * 86400:
        return "not recorded"
    return (f"≈ {secs:.0f} s from reading the input ({_e(read_at)}) to completing the store "
            "(the store's completion time on disk)")


def _section_input(ds: xr.Dataset, store: Path | None, run_time_s: float | None) -> str:
    prov = get_provenance(ds.attrs)
    inp = prov.get("input", {})
    px, ext = _pixel_size(ds)
    ny, nx = ds.sizes.get("y", 0), ds.sizes.get("x", 0)
    spec = [d for d in ("energy", "wavelength", "wavenumber", "raman_shift") if d in ds.coords]
    rows: list[tuple[str, Any]] = [
        ("input file", inp.get("path", "not recorded")),
        ("format", inp.get("format", "–")),
        ("fingerprint", inp.get("fingerprint", "–")),
        ("read at", inp.get("read_at", "–")),
        ("result store", str(store) if store is not None else "(in memory)"),
        ("map size", f"{ny} × {nx} pixels ({ny * nx} spectra)" if ny and nx else "–"),
        ("pixel size", px),
        ("extent", ext),
        ("dims of the store", _dims_text(ds)),
    ]
    for d in spec:
        v = np.asarray(ds[d].values, float)
        rows.append((f"spectral axis ({d})", f"{v.size} channels, {v.min():.5g}…{v.max():.5g} "
                     f"{_style.unit_text(ds[d].attrs.get('units', ''))}"))
    medium = inp.get("wavelength_medium")
    if medium:
        rows.append(("wavelength medium", f"{medium} ({inp.get('wavelength_medium_source', '?')})"))
    for key in ("excitation_wavelength_nm", "excitation_power_W", "temperature_K", "exposure_s",
                "instrument_notes"):
        if key in ds.attrs:
            rows.append((key, ds.attrs[key]))
    steps = [s.get("step", "?") for s in prov.get("steps", [])]
    rows.append(("pipeline", " → ".join(steps) or "–"))
    src = (prov.get("pipeline") or {}).get("source")
    if src:
        rows.append(("pipeline file", src))
    rows.append(("run time", _run_time(ds, store, run_time_s)))
    run = ds.attrs.get("pmap_run")
    if run:
        try:
            r = json.loads(run)
            rows.append(("memory plan", f"{'streaming' if r.get('streaming') else 'tiles'}, "
                         f"chunks of {r.get('chunk_mib', '?')} MiB, memory limit "
                         f"{r.get('memory_limit_bytes', 0) / 2**30:.2f} GiB"))
        except (ValueError, TypeError):
            pass
    return "<h2 id=\"input\">Input, pipeline and run time</h2>" + _kv_table(rows)


def _status_counts(da: xr.DataArray) -> list[tuple[int, str, int]]:
    names = _style.flag_names(da.attrs) or {}
    st = np.asarray(da.values).ravel()
    st = st[np.isfinite(st)] if st.dtype.kind == "f" else st
    codes = sorted(set(names) | {int(c) for c in np.unique(st)})
    return [(c, names.get(c, str(c)), int(np.sum(st == c))) for c in codes]


def _status_table(da: xr.DataArray) -> str:
    counts = _status_counts(da)
    total = max(sum(n for _, _, n in counts), 1)
    colours = _style.status_colours([c for c, _, _ in counts], da.attrs)
    rows = [[_e(c), f'<span class="swatch" style="background:{colours.get(c, "#fff")}"></span>'
             + _e(name), _num(n), f"{100.0 * n / total:.1f} %"] for c, name, n in counts]
    rows.append(["", "<b>all pixels</b>", _num(total), "100 %"])
    return _table(["code", "status", "pixels", "share"], rows, num_cols=(2, 3))


def _section_summary(ds: xr.Dataset) -> tuple[str, list[str]]:
    from .results import fit_summary, run_summary

    out = ['<h2 id="summary">Fit and detection summary</h2>']
    warns: list[str] = []
    cleaning = run_summary(ds)
    if cleaning:  # what the cleaning masked and replaced, the Planck fit's outcome
        out.append("<h3>Cleaning</h3><ul>" + "".join(f"<li>{_e(line)}</li>" for line in cleaning)
                   + "</ul>")
    if "fit_status" in ds:
        lines, warning = fit_summary(ds)
        out.append("<h3>Fit status of every pixel</h3>" + _status_table(ds["fit_status"]))
        legend = ds["fit_status"].attrs.get("legend")
        if legend:
            out.append("<details><summary>what each status means</summary><ul>" + "".join(
                f"<li>{_e(t)}</li>" for t in str(legend).split(";")) + "</ul></details>")
        out.append("<ul>" + "".join(f"<li>{_e(line)}</li>" for line in lines) + "</ul>")
        if warning:
            warns.append(warning)
        if "peak_status" in ds and ds.sizes.get("peak", 1) > 1:
            for k in range(ds.sizes["peak"]):
                out.append(f"<h3>Peak {k} status</h3>" +
                           _status_table(ds["peak_status"].isel(peak=k)))
    else:
        out.append("<p>No per-pixel fit in this store.</p>")
    det = []
    if "n_signal_pixels" in ds.attrs:
        n_sig = int(ds.attrs["n_signal_pixels"])
        n_no = int(ds.attrs.get("n_no_signal_pixels", 0))
        tot = max(n_sig + n_no, 1)
        det.append(("pixels with emission detected", f"{n_sig} ({100.0 * n_sig / tot:.1f} %)"))
        det.append(("pixels without emission", f"{n_no} ({100.0 * n_no / tot:.1f} %)"))
    if "region" in ds and "signal_rule" in ds["region"].attrs:
        det.append(("detection rule", ds["region"].attrs["signal_rule"]))
    if det:
        out.append("<h3>Emission detection</h3>" + _kv_table(det))
    for law_status in [v for v in ds.data_vars if v.endswith("_status")
                       and v not in ("fit_status", "peak_status")
                       and {"y", "x"} <= set(ds[v].dims)]:
        out.append(f"<h3>{_e(_style.human_name(law_status, ds[law_status].attrs))}</h3>"
                   + _status_table(ds[law_status].isel(
                       {d: 0 for d in ds[law_status].dims if d not in ("y", "x")})))
    unc = ds.attrs.get("uncertainty_method")
    if unc:
        out.append(_box("note", "<b>Uncertainties:</b> " + _e(unc)))
    return "".join(out), warns


def _medium_warning(ds: xr.Dataset) -> str | None:
    inp = get_provenance(ds.attrs).get("input", {})
    if inp.get("wavelength_medium_source") != "assumed":
        return None
    from .conventions import HC_EV_NM
    from .spectral._airvac import medium_message

    for name in ("peak_energy", "max_energy"):
        if name in ds and ds[name].attrs.get("units") == "eV":
            v = ds[name]
            v = v.isel({d: 0 for d in v.dims if d not in ("y", "x")})
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                med = float(np.nanmedian(np.asarray(v.values, float)))
            if np.isfinite(med) and med > 0:
                return medium_message(str(inp.get("wavelength_medium", "air")), HC_EV_NM / med)
    return (f"wavelength medium not stated, assumed {inp.get('wavelength_medium', 'air')}; "
            "state it with --medium air|vacuum")


def _section_caveats(ds: xr.Dataset, warns: list[str]) -> str:
    out = ['<h2 id="caveats">Warnings and caveats</h2>']
    items = list(warns)
    med = _medium_warning(ds)
    if med:
        items.append(med)
    items.extend(_region_warnings(ds))
    for key in ("component_notice",):
        if ds.attrs.get(key):
            items.append(str(ds.attrs[key]))
    notes = str(ds.attrs.get("instrument_notes", ""))
    if "SYNTHETIC" in notes.upper():
        items.append("These are synthetic data, not a measurement: " + notes)
    if items:
        out.extend(_box("warn", "<b>Warning:</b> " + _e(w)) for w in items)
    else:
        out.append(_box("ok", "No warning from the fit, the medium or the decomposition."))
    inp = get_provenance(ds.attrs).get("input", {})
    if inp.get("wavelength_medium"):
        out.append(_box("note", f"<b>Medium:</b> the wavelength axis is taken as "
                        f"<b>{_e(inp['wavelength_medium'])}</b> "
                        f"({_e(inp.get('wavelength_medium_source', 'source not recorded'))}); "
                        "energies use vacuum wavelengths (E = hc/λ_vac)."))
    nm = ds.attrs.get("noise_model")
    if nm:
        try:
            m = json.loads(nm)
            txt = (f"noise model from {m.get('source', '?')}; "
                   + ("correlated noise (smoothing/PCA/resampling): fits fall back to "
                      "residual-scaled errors" if m.get("correlated") else "independent noise")
                   + ("" if m.get("valid", True) else "; NOT usable"))
        except (ValueError, TypeError):
            txt = str(nm)
        out.append(_box("note", "<b>Noise:</b> " + _e(txt)))
    out.append("<h3>What the peak energy means (bandgap caveats)</h3><ul>"
               + "".join(f"<li>{_e(t)}</li>" for t in BANDGAP_CAVEATS) + "</ul>")
    phys = _physics_assumptions(ds)
    if phys:
        out.append("<h3>Assumptions of the physics stages</h3><ul>"
                   + "".join(f"<li>{t}</li>" for t in phys) + "</ul>")
    return "".join(out)


def _physics_assumptions(ds: xr.Dataset) -> list[str]:
    """Escaped HTML items: what the Planck and series stages assumed, from provenance."""
    out = []
    for step in get_provenance(ds.attrs).get("steps", []):
        name = step.get("step")
        p = step.get("params", {})
        r = step.get("results", {})
        if name == "planck":
            rng = p.get("energy_range_ev")
            out.append(_e(
                f"Generalized Planck law ({r.get('reference', 'Würfel 1982')}): absorptivity "
                f"taken as a constant {p.get('absorptivity', 1)} on the fitted window "
                f"{rng[0]:.4g}–{rng[1]:.4g} eV" if rng else
                f"Generalized Planck law: absorptivity {p.get('absorptivity', 1)}")
                + _e("; the cube must be in absolute units (photons s⁻¹ m⁻² eV⁻¹): qfls, carrier "
                     "temperature and implied Voc are only as good as that calibration; the "
                     "carriers are taken as in quasi-equilibrium, one quasi-Fermi-level "
                     "splitting and one carrier temperature per pixel. "
                     f"{'Weighted by the given errors.' if r.get('weighted') else 'Unweighted.'}"))
        elif name == "series":
            out.append(_e(
                f"Series law {p.get('law')} ({r.get('reference', '')}) fitted per pixel to "
                f"{p.get('quantity')} along {p.get('dim')} ({r.get('n_points', '?')} points)"
                + ("; weighted by the maps' 1σ errors" if r.get("weighted")
                   else "; unweighted: errors scaled by the residual")))
    for v in ds.data_vars:
        cav = ds[v].attrs.get("caveat")
        if cav:
            out.append(_e(f"{v}: {cav}"))
    return out


def _classify(stem: str, law: str | None) -> str:
    s = stem
    if s.endswith("_histogram"):
        return "quality" if s.startswith("chi2_red") else "histograms"
    if s.startswith("region"):
        return "regions"
    if s.startswith("component"):
        return "components"
    if s.startswith("spikes") or s.startswith("qc_"):
        return "qc"
    if law and (s.startswith(law + "_") or s.startswith("series_")):
        return "series"
    if any(s.startswith(p) for p in _PHYSICS):
        return "physics"
    if "_err" in s:
        return "uncertainties"
    if any(s == q or s.startswith(q + "_") for q in _QUALITY):
        return "quality"
    if any(s == m or s.startswith(m + "_") for m in _MAIN):
        return "maps"
    return "other"


def _figure_order(path: Path) -> int:
    """Main quantities first (peak energy, width, intensity...), then the rest; a stable sort
    on this keeps the order the figures were drawn in (slices along a stack dim in order)."""
    stem = Path(path).stem
    for i, name in enumerate(_MAIN + _QUALITY + _PHYSICS):
        if stem == name or stem.startswith(name + "_"):
            return i
    return len(_MAIN) + len(_QUALITY) + len(_PHYSICS)


_MAPS_NOTE = ("<p>Every map: y up with the origin (smallest x and y) at the lower left, axes "
              "in µm, colour limits at the 2nd and 98th percentiles unless the colour bar says "
              "otherwise (the pixels beyond them are counted on the bar), grey where a pixel has "
              "no value (NaN, masked or no signal).</p>")


def _any_finite(block):
    """Whether an array (numpy or dask, lazily) holds a finite value."""
    return np.isfinite(block).any()


def _skipped_maps(ds: xr.Dataset, drawn: Sequence[str] = ()) -> str:
    """A note naming the float maps that have no figure because every pixel is NaN.

    ``drawn``: variables with a figure (so with a finite value): not read again.
    """
    import dask

    from .cube import spread_blocks

    maps = [(name, v) for name, v in ds.data_vars.items()
            if v.dtype.kind == "f" and {"y", "x"} <= set(v.dims) and v.ndim <= 3
            and not any(d in v.dims for d in ("energy", "wavelength")) and name not in drawn]
    # a finite value in one of a few chunks settles a map; only the others are read
    # whole; each stage is one parallel read of every map concerned
    seen = dask.compute(*[[_any_finite(b) for b in spread_blocks(v.data, 2)]
                          for _, v in maps])
    rest = [(name, v) for (name, v), s in zip(maps, seen) if not any(bool(x) for x in s)]
    whole = dask.compute(*[np.isfinite(v.data).any() for _, v in rest])
    empty = [f"{name} ({v.attrs.get('long_name', '')})".replace(" ()", "")
             for (name, v), ok in zip(rest, whole) if not bool(ok)]
    if not empty:
        return ""
    return _box("note", "<b>Not drawn, every pixel is NaN:</b> " + _e("; ".join(empty)))


def _region_warnings(ds: xr.Dataset, limit: float = 2.0) -> list[str]:
    """Regions whose mean reduced χ² exceeds ``limit``: the line model misses their spectra."""
    if "chi2_red_mean" not in ds or "region_pixel_count" not in ds:
        return []
    rdim = ds["chi2_red_mean"].dims[0]
    codes = np.asarray(ds[rdim].values).astype(int)
    names = ({int(c): str(t) for c, t in zip(codes, np.asarray(ds["region_name"].values))}
             if "region_name" in ds.coords else {})
    chi = np.asarray(ds["chi2_red_mean"].values, float)
    peaks = ds.attrs.get("fit_n_peaks")
    out = []
    for c, x in zip(codes, chi):
        if np.isfinite(x) and x > limit:
            shape = f" ({peaks} peak{'s' if peaks != 1 else ''})" if peaks else ""
            out.append(f"region {c} ({names.get(int(c), '')}): mean reduced chi-square {x:.3g} "
                       f"(above {limit:g}): the fitted line shape{shape} does not describe "
                       "these spectra (compare the region's mean spectrum; fit more peaks "
                       "with --peaks, or another --model)")
    return out


def _find_count(results: Mapping[str, Any], words: Sequence[str]) -> str | None:
    """``"key: value"`` of the first numeric result whose key contains one of ``words``."""
    for k, v in results.items():
        if any(w in k.lower() for w in words) and isinstance(v, (int, float, list)) \
                and not isinstance(v, bool):
            return f"{k}: {v}"
    return None


def _qc_counts(steps: Sequence[Mapping[str, Any]],
               whole_map: Sequence[Mapping[str, Any]] = ()) -> list[tuple[str, Any]]:
    """Spikes, hot channels and calibration residuals as recorded by the steps (and by the
    run's whole-map pass, ``whole_map_pass`` in the provenance), or why not."""
    by: dict[str, list] = {}
    for st in steps:
        by.setdefault(str(st.get("step", "")), []).append(st)
    rows: list[tuple[str, Any]] = []
    sp = by.get("remove_spikes")
    if sp:
        got = _find_count(sp[-1].get("results", {}), ("n_", "count", "number"))
        rows.append(("cosmic spikes replaced", got or "not recorded in the store (the step "
                     "records its parameters, not its count)"))
    else:
        rows.append(("cosmic spikes replaced", "no spike removal in this run"))
    bp = by.get("mask_bad_pixels")
    if bp:
        got = _find_count(bp[-1].get("results", {}), ("hot", "dead", "saturat", "channel"))
        passed = [r.get("values", {}) for r in whole_map if r.get("step") == "mask_bad_pixels"]
        hot = passed[-1].get("hot_channels") if passed else None
        if isinstance(hot, dict) and "count" in hot:
            where = ", ".join(str(i) for i in hot.get("true_at", [])[:20])
            got = (f"{hot['count']} hot channel(s) masked in every spectrum"
                   + (f" (channel index {where})" if where else ""))
        rows.append(("hot / dead channels, saturated values", got or "not recorded in the "
                     "store (masked pixels are counted above)"))
    cal = [st for name, sts in by.items() if "calib" in name for st in sts]
    for st in cal:
        got = _find_count(st.get("results", {}), ("rms", "residual", "uncertainty", "sigma"))
        rows.append((f"calibration residuals ({st.get('step')})", got or "not recorded"))
    if not cal:
        rows.append(("calibration residuals", "no calibration step in this run (the spectral "
                     "axis is used as stored)"))
    return rows


def _region_table(ds: xr.Dataset) -> str:
    if "region_pixel_count" not in ds:
        return ""
    rdim = ds["region_pixel_count"].dims[0]
    codes = np.asarray(ds[rdim].values).astype(int)
    names: dict[int, str] = {}
    if "region_name" in ds.coords:
        names = {int(c): str(t) for c, t in zip(codes, np.asarray(ds["region_name"].values))}
    cols = [("region_pixel_count", "pixels", None), ("region_fraction", "share of signal", "%"),
            ("region_area_um2", "area (µm²)", None)]
    stats = []
    for base in ("peak_energy", "peak_fwhm", "centroid_energy", "integrated_intensity",
                 "chi2_red", "qfls"):
        if f"{base}_mean" in ds:
            stats.append(base)
    header = ["", "code", "name"] + [c[1] for c in cols if c[0] in ds]
    for b in stats:
        header.append(f"{_style.human_name(b)} mean ± s.d."
                      f" ({_style.unit_text(ds[f'{b}_mean'].attrs.get('units'))})".replace(" ()", ""))
    rows = []
    for i, c in enumerate(codes):
        row = [f'<span class="swatch" style="background:{_style.region_colour(c)}"></span>',
               _e(c), _e(names.get(int(c), f"region {c}"))]
        for var, _, fmt in cols:
            if var in ds:
                v = float(np.asarray(ds[var].values)[i])
                row.append(f"{100 * v:.1f} %" if fmt == "%" else _num(v))
        for b in stats:
            m, s = ds[f"{b}_mean"], ds[f"{b}_std"] if f"{b}_std" in ds else None
            sel = {d: 0 for d in m.dims if d != rdim}
            mv = float(np.asarray(m.isel(sel).values)[i])
            sv = float(np.asarray(s.isel(sel).values)[i]) if s is not None else float("nan")
            row.append(_mean_sd(mv, sv))
        rows.append(row)
    n_num = len(header)
    return _table(header, rows, num_cols=tuple(range(3, n_num)))


def _section_regions(ds: xr.Dataset, figs: list[Path]) -> str:
    if not figs and "region_pixel_count" not in ds:
        return ""  # e.g. a series store that keeps the region map only for its by-region plot
    out = ['<h2 id="regions">Regions</h2>']
    r = ds["region"] if "region" in ds else None
    if r is not None:
        a = r.attrs
        desc = [(label, a[key]) for label, key in (
            ("method", "method"), ("feature space", "feature_space"),
            ("number of regions", "k"), ("how the number was chosen", "rule"),
            ("ordered by", "order_by"), ("islands", "island_rule")) if key in a]
        if desc:
            out.append(_kv_table(desc))
        out.append(_region_table(ds))
        out.append("<p>Colours are the same in the region map, the mean spectra and the viewer "
                   f"(Okabe &amp; Ito palette); grey ({_e(_style.NAN_COLOUR)}) is no emission "
                   "detected, NaN or masked.</p>")
    # the region map carries a legend of long names: a whole row, so the names stay legible
    out.append(_grid([_figure(f, wide=f.stem == "region") for f in figs]))
    return "".join(out)


def _section_components(ds: xr.Dataset, figs: list[Path]) -> str:
    if "component_spectrum" not in ds and not figs:
        return ""
    out = ['<h2 id="components">Components</h2>']
    if "component" in ds.dims:
        rows = []
        for i in range(ds.sizes["component"]):
            row = [_e(i)]
            for v in ("component_peak", "explained_variance"):
                if v in ds:
                    val = float(np.asarray(ds[v].values)[i])
                    row.append(f"{100 * val:.1f} %" if v == "explained_variance" else _num(val, 5))
            rows.append(row)
        header = ["component"] + [h for v, h in (("component_peak", "energy of maximum (eV)"),
                                                  ("explained_variance", "share of intensity"))
                                  if v in ds]
        out.append(_table(header, rows, num_cols=(1, 2)))
        extra = [(k, ds.attrs[k]) for k in ("method", "explained_variance_definition",
                                            "reconstruction_error_rel", "negative_policy")
                 if k in ds.attrs]
        if extra:
            out.append(_kv_table(extra))
    out.append(_grid([_figure(f) for f in figs]))
    return "".join(out)


def _section_series(ds: xr.Dataset, figs: list[Path]) -> str:
    law = ds.attrs.get("series_law")
    if not law:
        return ""
    from .series import LAWS

    lw = LAWS.get(law)
    out = ['<h2 id="series">Series law</h2>',
           _kv_table([("law", f"{law} ({ds.attrs.get('series_reference', '')})"),
                      ("fitted quantity", ds.attrs.get("series_quantity", "–")),
                      ("along", ds.attrs.get("series_dim", "–")),
                      ("stack values", ", ".join(f"{float(v):.4g}" for v in np.atleast_1d(
                          ds.attrs.get(f"{ds.attrs.get('series_dim')}_values", []))) or "–"),
                      ("uncertainties", ds.attrs.get("uncertainty_method", "–"))])]
    st_name = f"{law}_status"
    ok = None
    if st_name in ds:
        ok = np.asarray(ds[st_name].values).ravel() == 0
    rows = []
    for p in (lw.params if lw else []):
        name = f"{law}_{p}"
        if name not in ds:
            continue
        v = np.asarray(ds[name].values, float).ravel()
        e = np.asarray(ds[f"{name}_err"].values, float).ravel() if f"{name}_err" in ds else None
        sel = ok if ok is not None and ok.size == v.size else np.isfinite(v)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            rows.append([_e(name), _e(ds[name].attrs.get("long_name", "")),
                         _num(np.nanmedian(v[sel]) if sel.any() else np.nan, 5),
                         _num(np.nanmedian(e[sel]) if e is not None and sel.any() else np.nan, 3),
                         _e(_style.unit_text(ds[name].attrs.get("units", ""))),
                         _num(int(sel.sum()))])
    if rows:
        out.append(_table(["parameter", "meaning", "median", "median 1σ", "units",
                           "pixels converged"], rows, num_cols=(2, 3, 5)))
    order = [f"{law}_{p}" for p in (lw.params if lw else [])]

    def rank(f: Path) -> tuple[int, str]:
        stem = f.stem
        if "_by_region" in stem:
            return -1, stem
        for i, base in enumerate(order):
            if stem == base or stem.startswith(base + "_err") or stem.startswith(base + "_"):
                return i, stem
        return len(order), stem

    out.append(_grid([_figure(f, wide="_by_region" in f.stem) for f in sorted(figs, key=rank)]))
    return "".join(out)


def _section_qc(ds: xr.Dataset, figs: list[Path]) -> str:
    out = ['<h2 id="qc">Quality control</h2>']
    rows: list[tuple[str, Any]] = []
    if "fit_status" in ds:
        counts = {name: n for _, name, n in _status_counts(ds["fit_status"])}
        tot = max(sum(counts.values()), 1)
        for key, label in (("masked or nan", "masked or NaN pixels (dead, saturated, NaN)"),
                           ("no signal", "pixels without signal")):
            if key in counts:
                rows.append((label, f"{counts[key]} ({100.0 * counts[key] / tot:.2f} %)"))
    for v in ds.data_vars:
        if v.endswith("_mask") and {"y", "x"} <= set(ds[v].dims):
            rows.append((f"{v} (true values)", int(np.asarray(ds[v].values).sum())))
    prov = get_provenance(ds.attrs)
    steps = prov.get("steps", [])
    rows.extend(_qc_counts(steps, prov.get("whole_map_pass", [])))
    for step in steps:
        name = step.get("step", "")
        if name in ("mask_bad_pixels", "remove_spikes", "remove_dark", "remove_baseline",
                    "attach_noise_model") or "calib" in name or "spike" in name \
                or "mask" in name:
            res = step.get("results")
            params = step.get("params", {})
            text = ", ".join(f"{k} = {v}" for k, v in params.items())
            if res:
                text += " — " + "; ".join(f"{k}: {v}" for k, v in res.items())
            rows.append((f"step {name}", text or "(default parameters)"))
    out.append(_kv_table(rows))
    out.append(_grid([_figure(f, wide=True) for f in figs]))
    return "".join(out)


def _section_provenance(ds: xr.Dataset) -> str:
    prov = get_provenance(ds.attrs)
    out = ['<h2 id="provenance">Provenance</h2>',
           f"<p>Written by pmap {_e(prov.get('pmap_version', '?'))}; every step in order with "
           "its parameters (as a pipeline file would name them) and recorded results.</p>"]
    rows = []
    for i, s in enumerate(prov.get("steps", [])):
        params = s.get("params", {})
        ptxt = "<br>".join(f"<code>{_e(k)}</code> = {_e(json.dumps(v, ensure_ascii=False))}"
                           for k, v in params.items()) or "–"
        res = s.get("results", {})
        rtxt = "<br>".join(f"<code>{_e(k)}</code>: {_e(v)}" for k, v in res.items()) or "–"
        rows.append([_e(i + 1), f"<b>{_e(s.get('step', '?'))}</b>", ptxt, rtxt])
    out.append(_table(["#", "step", "parameters", "results"], rows))
    pipe = prov.get("pipeline")
    if pipe:
        out.append("<details><summary>pipeline as run</summary><pre>"
                   + _e(json.dumps(pipe, indent=2, ensure_ascii=False)) + "</pre></details>")
    out.append("<details><summary>full provenance record (attrs['pmap_provenance'])</summary><pre>"
               + _e(json.dumps(prov, indent=2, ensure_ascii=False)) + "</pre></details>")
    other = {k: v for k, v in ds.attrs.items() if k not in ("pmap_provenance",)}
    out.append("<details><summary>every attribute of the store</summary>"
               + _kv_table([(k, v) for k, v in other.items()]) + "</details>")
    return "".join(out)


def _page(title: str, subtitle: str, sections: Sequence[tuple[str, str, str]]) -> str:
    nav = "".join(f'<a href="#{_e(i)}">{_e(t)}</a>' for i, t, body in sections if body)
    body = "".join(b for _, _, b in sections if b)
    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<meta name=\"generator\" content=\"pmap {_e(__version__)}\">"
            f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>"
            f"<header><h1>{_e(title)}</h1><p>{subtitle}</p></header>"
            f"<nav>{nav}</nav><main>{body}"
            f"<footer>Written {_e(now)} by {_e(COMMAND)} (pmap {_e(__version__)}). "
            "One self-contained file: figures are embedded; it loads nothing from the network."
            "</footer></main></body></html>\n")


# --------------------------------------------------------------------------- public


def _draw_figures(ds: xr.Dataset, folder: Path) -> list[Path]:
    """The figures of a result (:func:`pmap.report.write_figures`) or of a series store
    (:func:`pmap.report_series.write_series_figures`)."""
    if ds.attrs.get("series_law"):
        from .report_series import write_series_figures

        return write_series_figures(ds, folder)
    from .report import write_figures

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapNotice)
        return write_figures(ds, folder)


def _fit_quality_figures(ds: xr.Dataset, folder: Path, have: set[str]) -> list[Path]:
    """The reduced χ² histogram (pixels with a fit), when the store has χ² and no such figure."""
    if "chi2_red" not in ds or "chi2_red_histogram" in have:
        return []
    chi = ds["chi2_red"].load()  # read once: for the check and the histogram
    if not bool(np.isfinite(np.asarray(chi.values, float)).any()):
        return []
    from .report import plot_histogram

    return [plot_histogram(chi, folder / "chi2_red_histogram.png",
                           title="Reduced χ² of the fits (1 when the model and the noise model "
                                 "describe the data)", log=True)]


def write_html_report(
    result: xr.Dataset | str | Path,
    path: str | Path | None = None,
    *,
    figures: Sequence[str | Path] | None = None,
    run_time_s: float | None = None,
    title: str | None = None,
    dataset: xr.Dataset | None = None,
) -> Path:
    """Write one self-contained HTML report of a result (or series) store.

    Parameters
    ----------
    result : xarray.Dataset or path
        A complete store written by ``plcube process`` or ``plcube series``,
        or the Dataset itself.
    path : str or Path, optional
        HTML file to write (default :func:`html_report_path` of the store;
        required when ``result`` is a Dataset).
    figures : sequence of paths, optional
        PNG figures already drawn for this result (e.g. by
        :func:`pmap.report.write_figures`); default: drawn here into a
        temporary folder. Every figure is embedded as a base64 ``data:`` URL.
    run_time_s : float, optional
        Wall-clock time of the run in seconds; default: from the input's read
        time in the provenance to the store's completion time on disk.
    title : str, optional
        Page title (default: "PL map report — NAME").
    dataset : xarray.Dataset, optional
        With a store path as ``result``: that store as the caller opened it already
        (:func:`pmap.results.open_result`), so it is not opened again.

    Returns
    -------
    Path
        The HTML file written.
    """
    store: Path | None = None
    if isinstance(result, (str, Path)):
        from .results import open_result

        store = Path(result)
        ds = dataset if dataset is not None else open_result(store)
    elif isinstance(result, xr.Dataset):
        ds = result
    else:
        raise StepError(f"report needs a result store path or Dataset, got {type(result).__name__}")
    if path is None:
        if store is None:
            raise StepError("write_html_report needs path= when given a Dataset")
        path = html_report_path(store)
    out = Path(path)
    # the small per-region and per-component tables in memory; maps stay lazy (read one
    # at a time where a section needs them), so a map of 10⁷ pixels is never held whole
    small = [v for v in ds.data_vars if not {"y", "x"} & set(ds[v].dims)]
    ds = ds.assign({k: ds[k].load() for k in small})
    with tempfile.TemporaryDirectory(prefix="pmap_report_") as tmp:
        figs = [Path(f) for f in figures] if figures is not None else _draw_figures(ds, Path(tmp))
        if figures is None or figs:
            figs += _fit_quality_figures(ds, Path(tmp), {f.stem for f in figs})
        law = ds.attrs.get("series_law")
        groups: dict[str, list[Path]] = {}
        for f in sorted(figs, key=_figure_order):
            groups.setdefault(_classify(f.stem, law), []).append(f)
        summary, warns = _section_summary(ds)
        name = (store.name if store is not None else str(ds.attrs.get("title", "result")))
        sections = [
            ("input", "Input", _section_input(ds, store, run_time_s)),
            ("summary", "Fit summary", summary),
            ("caveats", "Warnings & caveats", _section_caveats(ds, warns)),
            ("maps", "Maps", ('<h2 id="maps">Maps</h2>' + _MAPS_NOTE + _grid(
                [_figure(f) for f in groups.get("maps", []) + groups.get("other", [])])
                + _skipped_maps(ds, _drawn_variables(figs)))
             if groups.get("maps") or groups.get("other") else ""),
            ("physics", "Absolute PL", ('<h2 id="physics">Absolute PL (generalized Planck law)'
                                        '</h2>' + _grid([_figure(f) for f in
                                                         groups["physics"]]))
             if groups.get("physics") else ""),
            ("histograms", "Histograms", ('<h2 id="histograms">Histograms</h2>' + _grid(
                [_figure(f) for f in groups["histograms"]])) if groups.get("histograms") else ""),
            ("regions", "Regions", _section_regions(ds, groups.get("regions", []))),
            ("components", "Components", _section_components(ds, groups.get("components", []))),
            ("series", "Series law", _section_series(ds, groups.get("series", []))),
            ("fitquality", "Fit quality", ('<h2 id="fitquality">Fit quality and uncertainties'
                                           '</h2>' + _grid([_figure(f) for f in
                                                            groups.get("quality", [])
                                                            + groups.get("uncertainties", [])]))
             if groups.get("quality") or groups.get("uncertainties") else ""),
            ("qc", "Quality control", _section_qc(ds, groups.get("qc", []))),
            ("provenance", "Provenance", _section_provenance(ds)),
            ("versions", "Versions", '<h2 id="versions">Versions</h2>' + _kv_table(_versions())),
        ]
        page = _page(title or f"PL map report — {name}",
                     f"{_e(get_provenance(ds.attrs).get('input', {}).get('path', name))} · "
                     f"{ds.sizes.get('y', 0)} × {ds.sizes.get('x', 0)} pixels · "
                     f"pmap {_e(__version__)}", sections)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(page, encoding="utf-8")
    return out


#: Maps drawn as small multiples on the batch summary page, when every result has them.
SUMMARY_MAPS = ("peak_energy", "integrated_intensity", "peak_fwhm", "region")


def write_summary_html(
    rows: Sequence[Mapping[str, Any]],
    path: str | Path,
    *,
    variables: Sequence[str] = SUMMARY_MAPS,
) -> Path:
    """Write the batch summary page: the summary table and small multiples of the main maps.

    Parameters
    ----------
    rows : sequence of mapping
        One row per processed cube, as written to ``summary.csv``; each needs
        ``"input"`` and ``"result"`` (the result store's path).
    path : str or Path
        HTML file to write (``summary.html`` beside ``summary.csv``).
    variables : sequence of str
        Maps to draw for every result on one shared colour scale each
        (2–98 % of all maps' values pooled; first peak of (peak, y, x) maps).
        Label maps (regions) are left out of the small multiples.

    Returns
    -------
    Path
        The HTML file written.
    """
    from .report import _no_value_mask, plot_small_multiples
    from .results import open_result

    if not rows:
        raise StepError("a summary needs at least one result")
    out = Path(path)
    opened = [(Path(str(r["result"])).name.removesuffix(".zarr"), open_result(r["result"]))
              for r in rows]
    cols = list(dict.fromkeys(k for r in rows for k in r))

    def table_of(columns: list[str], short: bool = False) -> str:
        def cell(r, c):
            if c in ("input", "result"):
                return _e(Path(str(r.get(c, ""))).name if short else r.get(c, ""))
            return _num(r.get(c, ""), 5)

        trows = [[cell(r, c) for c in columns] for r in rows]
        return '<div class="scroll">' + _table(columns, trows, num_cols=tuple(
            i for i, c in enumerate(columns) if c not in ("input", "result"))) + "</div>"

    main_cols = ["input"] + [c for v in variables for c in cols
                             if (c.startswith(v + " ") or c.startswith(v + "["))
                             and (" median" in c or " sigma_MAD" in c)]
    main_cols += [c for c in cols if c.startswith("peak_energy") and "finite fraction" in c][:1]
    table = (table_of(main_cols, short=True) + "<details><summary>every column (as in summary.csv)"
             "</summary>" + table_of(cols) + "</details>")
    figs = []
    skipped = []
    with tempfile.TemporaryDirectory(prefix="pmap_summary_") as tmp:
        for v in variables:
            maps = {}
            for label, ds in opened:
                if v not in ds or not {"y", "x"} <= set(ds[v].dims):
                    break
                da = ds[v]
                if da.dtype.kind != "f" or "flag_values" in da.attrs:
                    break
                da = da.isel({d: 0 for d in da.dims if d not in ("y", "x")})
                no_value = _no_value_mask(ds)  # grey as in each result's own figures
                if no_value is not None:
                    da = da.where(~no_value)
                maps[label] = da.load()
            else:
                if maps and any(np.isfinite(np.asarray(m.values, float)).any()
                                for m in maps.values()):
                    figs.append(plot_small_multiples(maps, Path(tmp) / f"{v}_all.png"))
                    continue
            skipped.append(v)
        fig_html = _grid([_figure(f, wide=True) for f in figs])
        note = (f"<p>Not drawn (missing in some result, a label map, or no value): "
                f"{_e(', '.join(skipped))}.</p>" if skipped else "")
        sections = [
            ("table", "Table", f'<h2 id="table">Summary table ({len(rows)} maps)</h2>'
             "<p>Median and robust spread σ_MAD = 1.4826 × median absolute deviation of the "
             "main maps, and the fraction of pixels with a peak energy; every map's numbers "
             "(the same as summary.csv) below.</p>" + table),
            ("maps", "Maps", '<h2 id="maps">Main maps on shared colour limits</h2>'
             "<p>Within each figure every panel uses the same colour scale, so colours compare "
             "across samples.</p>" + fig_html + note),
            ("versions", "Versions", '<h2 id="versions">Versions</h2>' + _kv_table(_versions())),
        ]
        page = _page(f"PL map batch summary — {len(rows)} maps",
                     _e(str(out.parent)), sections)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(page, encoding="utf-8")
    return out
