"""The self-contained HTML report (pmap.report_html), checked as text and in a real browser.

The browser checks run the distribution's headless Chromium (``scripts/setup.sh --test``
installs it as root): the page must render (screenshot not blank), log no console
message, request nothing (every resource the page fetched is listed by the browser's
Resource Timing API; data: URLs are not fetched), and decode every image. Each check
is first shown to fail on a page built to break it (negative controls).
"""

from __future__ import annotations

import base64
import html
import io
import json
import os
import re
import shutil
import subprocess
import warnings
from html.parser import HTMLParser
from importlib import metadata
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from PIL import Image

from pmap import _style
from pmap.errors import PmapNotice
from pmap.provenance import get_provenance
from pmap.report_html import BANDGAP_CAVEATS, write_html_report, write_summary_html
from pmap.results import open_result

# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def demo_store(tmp_path_factory):
    """The tiny demo map processed with 2 components and 3 regions (every section)."""
    from pmap.pipeline import process
    from pmap.synthetic import write_demo_cube

    d = tmp_path_factory.mktemp("html")
    paths = write_demo_cube(d, size="tiny", seed=0, overwrite=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapNotice)
        process(paths["cube"], d / "r.zarr", regions=3, components=2, progress=False)
    return d / "r.zarr"


@pytest.fixture(scope="module")
def report(demo_store):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapNotice)
        return write_html_report(demo_store, demo_store.parent / "report.html")


class _Tags(HTMLParser):
    """Every start tag with its attributes, and the text of <style> blocks."""

    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.style = ""
        self._in_style = False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in_style = tag == "style"

    def handle_endtag(self, tag):
        self._in_style = False

    def handle_data(self, data):
        if self._in_style:
            self.style += data


def _parse(text: str) -> _Tags:
    p = _Tags()
    p.feed(text)
    return p


def _outside_references(text: str) -> list[str]:
    """Every reference that would make a browser fetch something: src/href/srcset/poster/
    data attributes that are not data: URLs or in-page anchors, <script src>, <link>,
    <iframe>/<object>/<embed>, and url()/@import in CSS."""
    p = _parse(text)
    bad = []
    for tag, attrs in p.tags:
        if tag in ("link", "iframe", "object", "embed", "base"):
            bad.append(f"<{tag}>")
        for key in ("src", "href", "srcset", "poster", "data", "action"):
            v = attrs.get(key)
            if v is None:
                continue
            if not (v.startswith("data:") or (key == "href" and v.startswith("#"))):
                bad.append(f"{tag} {key}={v[:60]}")
        style = attrs.get("style") or ""
        if "url(" in style:
            bad.append(f"{tag} style url()")
    css = p.style + " ".join(a.get("style") or "" for _, a in p.tags)
    for m in re.finditer(r"url\(\s*['\"]?([^'\")]*)", css):
        if not m.group(1).startswith("data:"):
            bad.append(f"css url({m.group(1)[:60]})")
    if "@import" in css:
        bad.append("css @import")
    return bad


# --------------------------------------------------------------------------- as text


def test_report_is_one_self_contained_file(report, demo_store):
    text = report.read_text(encoding="utf-8")
    assert _outside_references(text) == []
    p = _parse(text)
    assert not any(tag == "script" for tag, _ in p.tags)  # no script at all
    imgs = [a["src"] for tag, a in p.tags if tag == "img"]
    assert len(imgs) >= 20  # maps, histogram, regions, components, fit quality
    for src in imgs:
        assert src.startswith("data:image/png;base64,")
        with Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))) as im:
            im.load()
            assert im.format == "PNG" and im.size[0] > 200 and im.size[1] > 150
    # every alt text is the figure's title with units (no raw variable names)
    alts = [a.get("alt", "") for tag, a in p.tags if tag == "img"]
    assert "Peak energy (eV) — peak 0" in alts


def test_negative_control_outside_references_are_found():
    bad = ('<img src="http://example.org/x.png"><link rel="stylesheet" href="a.css">'
           '<style>body{background:url(https://example.org/b.png)}</style>'
           '<a href="#ok">in page</a><img src="data:image/png;base64,AAAA">')
    found = _outside_references(bad)
    assert len(found) == 4, found  # img, link, link href, css url — not the anchor or data:


def test_fit_summary_counts_equal_the_store(report, demo_store):
    text = report.read_text(encoding="utf-8")
    ds = open_result(demo_store)
    st = np.asarray(ds["fit_status"].values).ravel()
    names = _style.flag_names(ds["fit_status"].attrs)
    rows = re.findall(r"<tr><td>(\d+)</td><td>.*?</span>([^<]+)</td><td class=\"num\">(\d+)"
                      r"</td><td class=\"num\">([\d.]+) %</td></tr>", text)
    got = {int(code): (name, int(n), float(pct)) for code, name, n, pct in rows[:len(names)]}
    assert set(got) == set(names)
    for code, name in names.items():
        n = int(np.sum(st == code))  # reference: the stored status map itself
        assert got[code][0] == name and got[code][1] == n
        assert abs(got[code][2] - 100.0 * n / st.size) < 0.051  # printed with one decimal
    assert f"<td class=\"num\">{st.size}</td>" in text


def test_sections_caveats_provenance_and_versions(report, demo_store):
    text = report.read_text(encoding="utf-8")
    for anchor in ("input", "summary", "caveats", "maps", "histograms", "regions",
                   "components", "fitquality", "qc", "provenance", "versions"):
        assert f'id="{anchor}"' in text, anchor
    for caveat in BANDGAP_CAVEATS:
        assert html.escape(caveat) in text
    ds = open_result(demo_store)
    prov = get_provenance(ds.attrs)
    assert html.escape(prov["input"]["fingerprint"]) in text
    assert html.escape(str(demo_store)) in text
    for step in prov["steps"]:  # every step and every parameter
        assert f"<b>{html.escape(step['step'])}</b>" in text
        for key, value in step.get("params", {}).items():
            assert (f"<code>{html.escape(key)}</code> = "
                    f"{html.escape(json.dumps(value, ensure_ascii=False))}") in text
    for dist in ("numpy", "xarray", "dask", "zarr"):
        assert f"<th>{dist}</th><td>{html.escape(metadata.version(dist))}</td>" in text
    assert "synthetic data, not a measurement" in text  # the demo says what it is


def test_regions_table_names_and_colours(report, demo_store):
    text = report.read_text(encoding="utf-8")
    ds = open_result(demo_store)
    codes = np.asarray(ds["region_id"].values).astype(int)
    names = [str(t) for t in np.asarray(ds["region_name"].values)]
    counts = np.asarray(ds["region_pixel_count"].values)
    region = np.asarray(ds["region"].values)
    for c, name, n in zip(codes, names, counts):
        assert int(n) == int(np.sum(region == c))  # the table's source agrees with the map
        row = re.search(rf'background:{re.escape(_style.region_colour(c))}"></span></td>'
                        rf"<td>{c}</td><td>{re.escape(html.escape(name))}</td>"
                        rf'<td class="num">(\d+)</td>', text)
        assert row is not None, name
        assert int(row.group(1)) == int(n)


def test_all_text_is_escaped(demo_store, tmp_path):
    ds = open_result(demo_store)
    ds = ds.drop_vars([v for v in ds.data_vars if v == "intensity"])
    evil = '<script>alert("x")</script> & <img src=http://example.org/e.png>'
    ds.attrs["instrument_notes"] = evil
    prov = get_provenance(ds.attrs)
    prov["input"]["path"] = "/data/<b>bold</b>.zarr"
    prov["steps"][0]["params"]["note"] = evil
    ds.attrs["pmap_provenance"] = json.dumps(prov)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapNotice)
        out = write_html_report(ds, tmp_path / "evil.html", figures=[])
    text = out.read_text(encoding="utf-8")
    assert "<script" not in text and "<b>bold</b>" not in text
    assert html.escape(evil) in text and html.escape("/data/<b>bold</b>.zarr") in text
    assert _outside_references(text) == []


def test_skipped_map_note_with_and_without_the_figures(demo_store, tmp_path):
    """The note names exactly the maps whose every pixel is NaN, whether the report reads
    every map or knows from the figures passed which maps have values (``n_value`` in
    each PNG's description)."""
    from pmap.report import write_figures

    ds = open_result(demo_store)
    ds = ds.drop_vars([v for v in ds.data_vars if v == "intensity"])
    # two all-NaN maps: one named like the prefix of a drawn one, one 3-D
    ds["peak_energy_empty"] = ds["peak_energy"] * np.nan
    ds["bic"] = ds["bic"] * np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapNotice)
        figs = write_figures(ds, tmp_path / "figs")
        notes = []
        for given in (figs, None):
            out = write_html_report(ds, tmp_path / f"r{given is None}.html", figures=given)
            text = out.read_text(encoding="utf-8")
            m = re.search(r"Not drawn, every pixel is NaN:</b> ([^<]*)</div>", text)
            notes.append(m.group(1) if m else "")
    assert notes[0] == notes[1]
    note = html.unescape(notes[0])
    named = {n for n in ds.data_vars if re.search(rf"(^|; ){re.escape(n)}( \(|;|$)", note)}
    finite = {n for n, v in ds.data_vars.items() if v.dtype.kind == "f" and {"y", "x"} <= set(
        v.dims) and v.ndim <= 3 and not bool(np.isfinite(v.values).any())}
    assert {"peak_energy_empty", "bic"} <= finite
    assert named == finite  # computed here from the values, map by map
    drawn = {json.loads(Image.open(f).text["Description"]).get("variable") for f in figs}
    assert "peak_energy" in drawn and not named & {"peak_energy", "peak_energy_err"}


# --------------------------------------------------------------------------- batch summary


def _fake_result(path: Path, offset_ev: float, seed: int) -> Path:
    rng = np.random.default_rng(seed)
    ny, nx = 12, 16
    pe = 1.60 + offset_ev + 0.01 * rng.standard_normal((1, ny, nx))
    pe[0, 0, :3] = np.nan
    ds = xr.Dataset(
        {"peak_energy": (("peak", "y", "x"), pe, {"units": "eV"}),
         "integrated_intensity": (("y", "x"), 1e4 * (1 + rng.random((ny, nx))),
                                  {"units": "counts"})},
        coords={"peak": [0], "y": ("y", np.arange(ny) * 0.5, {"units": "um"}),
                "x": ("x", np.arange(nx) * 0.5, {"units": "um"})},
        attrs={"pmap_result": 1, "pmap_complete": True},
    )
    ds.to_zarr(str(path), mode="w", consolidated=False)
    return path


def test_summary_page_shares_colour_limits(tmp_path):
    from pmap.report import summarise_result

    rows = []
    for i, off in enumerate((0.0, 0.05)):
        p = _fake_result(tmp_path / f"s{i}_result.zarr", off, i)
        rows.append({"input": f"s{i}.zarr", "result": str(p),
                     **summarise_result(open_result(p))})
    out = write_summary_html(rows, tmp_path / "summary.html")
    text = out.read_text(encoding="utf-8")
    assert _outside_references(text) == []
    key = next(k for k in rows[0] if k.startswith("peak_energy") and " median " in k)
    assert html.escape(key) in text
    for r in rows:  # the table holds every summary.csv number (5 significant digits)
        assert f'<td class="num">{float(r[key]):.5g}</td>' in text
    imgs = [a["src"] for tag, a in _parse(text).tags if tag == "img"]
    assert len(imgs) == 2  # peak energy and integrated intensity; no fwhm or region here
    with Image.open(io.BytesIO(base64.b64decode(imgs[0].split(",", 1)[1]))) as im:
        info = json.loads(im.text["Description"])
    pooled = np.concatenate([np.asarray(open_result(r["result"])["peak_energy"].values).ravel()
                             for r in rows])
    lo, hi = np.percentile(pooled[np.isfinite(pooled)], [2, 98])  # reference: numpy
    assert info["variable"] == "peak_energy" and info["panels"] == ["s0_result", "s1_result"]
    assert info["clim"] == pytest.approx([lo, hi], rel=1e-12)
    assert info["clipped_below"] == int(np.sum(pooled < lo))
    assert "peak_fwhm" in text and "region" in text  # said not drawn


# --------------------------------------------------------------------------- in a browser

_HARNESS = """<script>
window.__pmapErrors = [];
window.addEventListener('error', e => window.__pmapErrors.push(String(e.message)), true);
window.addEventListener('load', () => {
  const out = {
    images: [...document.images].map(i => i.complete && i.naturalWidth > 0),
    resources: performance.getEntriesByType('resource').map(e => e.name),
    errors: window.__pmapErrors,
    height: document.documentElement.scrollHeight,
  };
  document.documentElement.setAttribute('data-pmap-check', JSON.stringify(out));
});
</script>"""


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


@pytest.fixture(scope="module")
def chromium():
    exe = _chromium()
    if exe is None:
        if hasattr(os, "geteuid") and os.geteuid() == 0:
            pytest.fail("no chromium: run `bash scripts/setup.sh --test` (as root it installs "
                        "the distribution's chromium package); CI must run the browser test")
        pytest.skip("no chromium binary found and not root: install the 'chromium' package "
                    "(scripts/setup.sh --test as root) to run the browser test")
    return exe


def _browse(chromium: str, page: Path, tmp: Path) -> tuple[dict, list[str], np.ndarray]:
    """Open ``page`` (a copy with the check harness) in headless Chromium, no network:
    (what the harness recorded, console log lines, screenshot pixels)."""
    text = page.read_text(encoding="utf-8")
    checked = tmp / f"{page.stem}_checked.html"
    checked.write_text(text.replace("<head>", "<head>" + _HARNESS, 1), encoding="utf-8")
    base = [chromium, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
            "--no-first-run", "--disable-extensions", f"--user-data-dir={tmp / 'profile'}",
            "--host-resolver-rules=MAP * ~NOTFOUND", "--enable-logging=stderr", "--v=0",
            "--virtual-time-budget=15000", "--window-size=1280,2000"]
    dom = subprocess.run([*base, "--dump-dom", checked.as_uri()], capture_output=True,
                         text=True, timeout=180)
    m = re.search(r'data-pmap-check="([^"]*)"', dom.stdout)
    assert m, f"the page did not finish loading: {dom.stderr[-2000:]}"
    record = json.loads(html.unescape(m.group(1)))
    console = [ln for ln in dom.stderr.splitlines() if ":CONSOLE" in ln]
    shot = tmp / f"{page.stem}.png"
    subprocess.run([*base, f"--screenshot={shot}", page.as_uri()], capture_output=True,
                   text=True, timeout=180)
    with Image.open(shot) as im:
        pixels = np.asarray(im.convert("L"), dtype=float)
    return record, console, pixels


def _assert_clean(record: dict, console: list[str], pixels: np.ndarray, n_images: int) -> None:
    assert record["resources"] == [], record["resources"]  # nothing fetched
    assert record["errors"] == [] and console == [], (record["errors"], console)
    assert len(record["images"]) == n_images and all(record["images"])  # all decoded
    assert pixels.std() > 20  # not a blank page
    assert 0.03 < np.mean(pixels < 200) < 0.97  # ink on paper, not one colour


def test_report_renders_in_chromium(chromium, report, tmp_path):
    text = report.read_text(encoding="utf-8")
    n_images = sum(1 for tag, _ in _parse(text).tags if tag == "img")
    record, console, pixels = _browse(chromium, report, tmp_path)
    _assert_clean(record, console, pixels, n_images)
    assert record["height"] > 5000  # a long page: every section laid out


def test_browser_checks_fail_on_a_broken_page(chromium, tmp_path):
    """Negative controls: an outside image, a script error and a corrupt image are caught."""
    one_px = ("iVBORw0KGgoAAAANSUhEUgAAAAEAAAABCAYAAAAfFcSJAAAADUlEQVR42mP8z8BQDwAEhQGA"
              "hKmMIQAAAABJRU5ErkJggg==")
    bad = tmp_path / "bad.html"
    bad.write_text("<!DOCTYPE html><html><head><meta charset='utf-8'></head><body>"
                   "<h1>broken</h1><img src='http://example.org/a.png'>"
                   f"<img src='data:image/png;base64,{one_px}'>"
                   "<img src='data:image/png;base64,AAAA'>"
                   "<script>undefinedFunction()</script></body></html>", encoding="utf-8")
    record, console, _ = _browse(chromium, bad, tmp_path)
    assert record["resources"] == ["http://example.org/a.png"]
    assert record["images"] == [False, True, False]
    assert record["errors"] and "undefinedFunction" in record["errors"][0]
    assert any("undefinedFunction" in ln for ln in console)


def test_summary_page_renders_in_chromium(chromium, tmp_path):
    from pmap.report import summarise_result

    rows = []
    for i, off in enumerate((0.0, 0.03, 0.06)):
        p = _fake_result(tmp_path / f"m{i}_result.zarr", off, i)
        rows.append({"input": f"m{i}", "result": str(p), **summarise_result(open_result(p))})
    page = write_summary_html(rows, tmp_path / "summary.html")
    record, console, pixels = _browse(chromium, page, tmp_path)
    _assert_clean(record, console, pixels, 2)


def test_cli_process_folder_writes_reports_and_summary_html(tmp_path, capsys):
    """plcube process FOLDER/ -o OUT/: one HTML report per result and summary.html."""
    from pmap.cli import main
    from pmap.synthetic import write_demo_cube

    src = tmp_path / "maps"
    for seed in (1, 2):
        paths = write_demo_cube(tmp_path / f"gen{seed}", size="tiny", seed=seed)
        shutil.copytree(paths["cube"], src / f"map{seed}.zarr")
    out = tmp_path / "results"
    assert main(["process", str(src), "-o", str(out), "-q"]) == 0
    printed = capsys.readouterr().out
    assert "summary report:" in printed
    summary = out / "summary.html"
    text = summary.read_text(encoding="utf-8")
    assert _outside_references(text) == []
    assert "map1_result" in text and "map2_result" in text
    assert sum(1 for tag, _ in _parse(text).tags if tag == "img") >= 2  # small multiples
    for seed in (1, 2):
        page = out / f"map{seed}_result_figures" / f"map{seed}_result_report.html"
        assert page.exists(), page
        assert _outside_references(page.read_text(encoding="utf-8")) == []
    # without figures there is no per-map report (it goes beside the PNGs), still a summary
    out2 = tmp_path / "bare"
    assert main(["process", str(src), "-o", str(out2), "-q", "--no-figures"]) == 0
    assert (out2 / "summary.html").exists()
    assert not list(out2.rglob("*_report.html"))


def test_cli_report_html(demo_store, tmp_path, capsys):
    """plcube report RESULT --html: the figures and, beside them, NAME_report.html."""
    from pmap.cli import main

    out = tmp_path / "figs"
    assert main(["report", str(demo_store), "-o", str(out), "--html"]) == 0
    page = out / "r_report.html"
    assert f"HTML report: {page}" in capsys.readouterr().out
    text = page.read_text(encoding="utf-8")
    assert _outside_references(text) == []
    pngs = sorted(out.glob("*.png"))
    imgs = [a["src"] for tag, a in _parse(text).tags if tag == "img"]
    # every figure drawn is in the page, once, plus the reduced chi-square histogram
    assert len(imgs) == len(pngs) + 1
    embedded = [base64.b64decode(s.split(",", 1)[1]) for s in imgs]
    assert {p.read_bytes() for p in pngs} <= set(embedded)
    alts = [a.get("alt", "") for tag, a in _parse(text).tags if tag == "img"]
    assert sum(a.startswith("Reduced χ² of the fits") for a in alts) == 1


def test_caveats_of_an_assumed_medium_and_the_planck_stage(demo_store, tmp_path):
    """The assumed-medium warning gives the shift at the median peak; physics assumptions."""
    from pmap.conventions import HC_EV_NM
    from pmap.spectral._airvac import medium_shift_mev

    ds = open_result(demo_store)
    ds = ds.drop_vars([v for v in ds.data_vars if v == "intensity"])
    prov = get_provenance(ds.attrs)
    prov["input"].update(wavelength_medium="air", wavelength_medium_source="assumed")
    prov["steps"].append({"step": "planck", "params": {"energy_range_ev": [1.58, 1.75],
                                                        "absorptivity": 1.0, "max_iter": 50},
                          "results": {"reference": "Würfel, J. Phys. C 15, 3967 (1982)",
                                      "weighted": False}})
    ds.attrs["pmap_provenance"] = json.dumps(prov)
    text = write_html_report(ds, tmp_path / "m.html", figures=[]).read_text(encoding="utf-8")
    med = float(np.nanmedian(ds["peak_energy"].isel(peak=0).values))
    peak_nm = HC_EV_NM / med
    # the shift the warning quotes is the one pmap.spectral computes at the median peak
    assert f"energies are {medium_shift_mev(peak_nm):.3g} meV higher at {peak_nm:.0f} nm" in text
    assert "assuming air" in text
    assert "absorptivity taken as a constant 1.0 on the fitted window 1.58–1.75 eV" in text
    assert "Würfel" in text


def test_report_from_the_opened_store_is_the_same_page(demo_store, tmp_path):
    """dataset= (the store as the caller opened it) writes the very page that opening
    the store again writes (same figures, same stated run time)."""
    from pmap.report import write_figures

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapNotice)
        figs = write_figures(open_result(demo_store), tmp_path / "figs")
        a = write_html_report(demo_store, tmp_path / "a.html", figures=figs, run_time_s=1.5)
        b = write_html_report(demo_store, tmp_path / "b.html", figures=figs, run_time_s=1.5,
                              dataset=open_result(demo_store))
    assert a.read_bytes() == b.read_bytes()
    assert b"PL map report" in b.read_bytes()
