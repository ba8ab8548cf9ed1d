"""Static exports: chart files, the engine's locking/timeout, no-browser message, deck and brief."""

from __future__ import annotations

import io
import re
import shutil
import struct
import subprocess
import threading
import xml.etree.ElementTree as ET
import zlib
from dataclasses import replace
from datetime import UTC, datetime
from itertools import combinations

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import pytest
from pptx import Presentation
from pptx.util import Emu

from app.analysis.provenance import CAUTIONS, Provenance
from app.briefing import charts
from app.briefing.brief import build_brief, render_brief_html
from app.briefing.deck import Finding, build_deck, fit_text, text_width_pt
from app.briefing.render import ExportTimeout, ExportUnavailable, export_available, figure_bytes

AVAILABLE, WHY = export_available()
needs_browser = pytest.mark.skipif(not AVAILABLE, reason=WHY)

PROV = Provenance(
    roster="Demo roster", roster_fingerprint="f00dfacecafe12345678", mapping_name="Standard", mapping_version=4,
    window=(2005, 2021), model="binomial GLM, logit linear in year", interval_method="profile likelihood",
    resamples=500, seed=7, unit="firm", created=datetime(2024, 3, 2, 9, 0, tzinfo=UTC),
    categories=(("forced", ("DISMISSED", "PERF")), ("voluntary", ("RETIRED",)), ("excluded", ("UNKNOWN",))),
    rows_used="670 of 803 rows; 133 rejected, see Rosters",
)


def small_figure(title: str) -> go.Figure:
    table = pd.DataFrame({"year": [2005, 2006, 2007], "forced": [3, 4, 5], "voluntary": [9, 8, 7],
                          "excluded": [1, 1, 0], "unmapped": [0, 1, 0]})
    return charts.coverage_figure(table, (2005, 2007), [2007], title=title, source=PROV.short())


def forest() -> go.Figure:
    rows = pd.DataFrame({"label": ["All", "Energy", "Retail"], "odds_ratio": [1.04, 1.07, np.nan],
                         "low": [1.01, 0.99, np.nan], "high": [1.07, 1.16, np.nan],
                         "group": ["common", "sector", "sector"]})
    return charts.forest_figure(rows, title="Holds in sectors", source=PROV.short())


def png_size(data: bytes) -> tuple[int, int]:
    # PNG spec (ISO/IEC 15948 §11.2.2): IHDR is the first chunk, width and height big-endian at bytes 16-24
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    width, height = struct.unpack(">II", data[16:24])
    return width, height


def pdf_objects(data: bytes) -> bytes:
    """The file with its Flate streams inflated, so objects inside object streams (PDF 1.7 §7.5.7) show."""
    chunks = [data]
    for match in re.finditer(rb"stream\r?\n(.*?)\r?\nendstream", data, re.S):
        try:
            chunks.append(zlib.decompress(match.group(1)))
        except zlib.error:
            continue
    return b"\n".join(chunks)


def pdf_pages(data: bytes) -> int:
    return len(re.findall(rb"/Type\s*/Page(?![a-zA-Z])", pdf_objects(data)))


def pdf_text(data: bytes, tmp_path: object) -> str:
    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (poppler-utils) is not installed")
    out = subprocess.run(["pdftotext", "-layout", "-", "-"], input=data, capture_output=True, check=True)
    return " ".join(out.stdout.decode("utf-8").split())


# --- no browser: the dashboard keeps working, exports say how to enable them -------------------------

def test_switched_off_export_raises_a_clear_message(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("HELMSHIFT_BROWSER", "none")
    ok, message = export_available()
    assert not ok and "apt-get install chromium" in message and "BROWSER_PATH" in message
    with pytest.raises(ExportUnavailable, match="apt-get install chromium"):
        figure_bytes(small_figure("t"), "png")
    with pytest.raises(ExportUnavailable):
        build_deck([Finding("t", "k", small_figure("t"))], PROV, title="T", subtitle="S")
    with pytest.raises(ExportUnavailable):
        build_brief(headline="h", charts=[small_figure("a"), forest()], table=pd.DataFrame(
            {"label": [], "odds_ratio": [], "low": [], "high": [], "method": []}), method_text="m",
            provenance=PROV)


def test_browser_path_to_a_missing_file_names_the_path(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("HELMSHIFT_BROWSER", raising=False)
    monkeypatch.setenv("BROWSER_PATH", "/nonexistent/chromium")
    ok, message = export_available()
    assert not ok and "BROWSER_PATH=/nonexistent/chromium is not an executable file" in message
    with pytest.raises(ExportUnavailable, match="install Chromium"):
        figure_bytes(small_figure("t"), "svg")


def test_unknown_format_is_rejected_with_the_allowed_list() -> None:
    with pytest.raises(ValueError, match="png, svg, pdf"):
        figure_bytes(small_figure("t"), "jpeg")  # type: ignore[arg-type]


# --- chart files -----------------------------------------------------------------------------------

@needs_browser
def test_png_is_twice_the_requested_pixels() -> None:
    data = figure_bytes(small_figure("PNG check"), "png", width=800, height=450)
    assert png_size(data) == (1600, 900)
    assert len(data) > 20_000


@needs_browser
def test_svg_parses_and_carries_title_and_source_line() -> None:
    data = figure_bytes(small_figure("SVG <check> & co"), "svg", width=700, height=400)
    root = ET.fromstring(data)
    assert root.tag.endswith("svg") and root.get("width") == "700"
    text = " ".join(t for t in root.itertext())
    assert "SVG <check> & co" in text  # escaped for plotly, shown literally
    assert "f00dfacecafe" in text and "mapping Standard v4" in text


@needs_browser
def test_pdf_chart_is_a_pdf_with_the_title(tmp_path: object) -> None:
    data = figure_bytes(small_figure("PDF check title"), "pdf")
    assert data.startswith(b"%PDF")
    assert "PDF check title" in pdf_text(data, tmp_path)


@needs_browser
@pytest.mark.slow
def test_concurrent_exports_each_get_their_own_figure() -> None:
    results: dict[int, bytes] = {}
    errors: list[BaseException] = []

    def work(i: int) -> None:
        try:
            results[i] = figure_bytes(small_figure(f"Thread number {i}"), "svg", width=600 + 10 * i, height=400)
        except BaseException as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(i,)) for i in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert not errors
    for i, data in results.items():
        root = ET.fromstring(data)
        assert root.get("width") == str(600 + 10 * i)
        assert f"Thread number {i}" in " ".join(root.itertext())
    assert len(results) == 6


@needs_browser
def test_timeout_raises_and_the_next_export_still_works() -> None:
    with pytest.raises(ExportTimeout):
        figure_bytes(small_figure("slow"), "png", timeout=0.001)
    assert figure_bytes(small_figure("after"), "svg").startswith(b"<svg")


@needs_browser
def test_a_tab_whose_page_script_is_missing_is_replaced_by_a_fresh_browser(monkeypatch: pytest.MonkeyPatch) -> None:
    # seen once in a suite run under heavy load: kaleido's tab ran the render before its page script loaded
    from app.briefing import render

    original, calls, engines = render._Engine.render, [], []

    def flaky(self: object, fig: dict[str, object], opts: dict[str, object], timeout: float) -> bytes:
        calls.append(1)
        engines.append(id(self))
        if len(calls) == 1:
            raise RuntimeError("{'description': 'ReferenceError: kaleido_scopes is not defined'}")
        return original(self, fig, opts, timeout)  # type: ignore[arg-type]

    monkeypatch.setattr(render._Engine, "render", flaky)
    assert figure_bytes(small_figure("retried"), "svg").startswith(b"<svg")
    assert len(calls) == 2 and engines[0] != engines[1]
    calls.clear()
    monkeypatch.setattr(render._Engine, "render", lambda *a: (_ for _ in ()).throw(RuntimeError("another error")))
    with pytest.raises(RuntimeError, match="another error"):  # any other failure is not retried
        figure_bytes(small_figure("failed"), "svg")


# --- deck ------------------------------------------------------------------------------------------

def _rect(shape: object) -> tuple[int, int, int, int]:
    return shape.left, shape.top, shape.left + shape.width, shape.top + shape.height  # type: ignore[attr-defined]


def _overlap(a: tuple[int, int, int, int], b: tuple[int, int, int, int]) -> bool:
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


def test_fit_text_wraps_within_width_and_truncates_what_cannot_fit() -> None:
    text = "The odds of a forced departure rose by about four per cent a year " * 6
    fit = fit_text(text, 6.0, 10.0, 20)
    assert len(fit.lines) > 1 and fit.size == 20
    assert all(text_width_pt(line, fit.size) <= 6.0 * 72 for line in fit.lines)
    tight = fit_text(text, 6.0, 0.6, 20, min_size=14)
    assert tight.size == 14 and tight.height_in <= 0.6 and tight.lines[-1].endswith("\u2026")


@needs_browser
@pytest.mark.slow
def test_deck_has_the_expected_slides_pictures_and_no_overlaps() -> None:
    long = "A takeaway that goes on and on about odds ratios, intervals and sectors " * 5
    findings = [Finding("Forced exits rose", "The odds rose about 4% a year.", small_figure("Rose")),
                Finding("It holds in sectors " * 6, long, forest())]
    data = build_deck(findings, PROV, title="Board paper <draft>", subtitle="Forced CEO exits")
    prs = Presentation(io.BytesIO(data))
    assert prs.slide_width / prs.slide_height == pytest.approx(16 / 9, rel=1e-3)
    slides = list(prs.slides)
    titles = [s.shapes.title.text_frame.text.replace("\n", " ") for s in slides]
    assert titles[0] == "Board paper <draft>"
    assert titles[1] == "Forced exits rose"
    assert titles[2].startswith("It holds in sectors")
    assert titles[3:] == ["Methods and provenance", "Cautions"]
    for index in (1, 2):
        pictures = [s for s in slides[index].shapes if s.shape_type == 13]
        assert len(pictures) == 1 and pictures[0].image.content_type == "image/png"
    all_text = ["\n".join(sh.text_frame.text for sh in s.shapes if sh.has_text_frame) for s in slides]
    assert "Demo roster" in all_text[0] and "2005\u20132021" in all_text[0]
    assert "The odds rose about 4% a year." in all_text[1]
    methods = all_text[3].replace("\n", " ")
    for fragment in ("f00dfacecafe12345678", "version 4", "B = 500 resamples, by firm, seed 7", "DISMISSED, PERF",
                     "Rows used: 670 of 803 rows; 133 rejected, see Rosters"):
        assert fragment in methods
    methods_notes = slides[3].notes_slide.notes_text_frame.text
    assert "670 of 803 rows; 133 rejected, see Rosters" in methods_notes
    cautions = all_text[4].replace("\n", " ")
    assert all(c in cautions for c in CAUTIONS)
    width, height = prs.slide_width, prs.slide_height
    for slide in slides:
        rects = [_rect(s) for s in slide.shapes]
        for r in rects:
            assert r[0] >= 0 and r[1] >= 0 and r[2] <= width and r[3] <= height
        for a, b in combinations(rects, 2):
            assert not _overlap(a, b), (slide.shapes.title.text_frame.text, a, b)
    assert Emu(width).inches == pytest.approx(13.333, abs=1e-3)


# --- brief -----------------------------------------------------------------------------------------

def odds_table(rows: int = 3) -> pd.DataFrame:
    labels = ["Per year <all>", "Energy", "Retail", *[f"Sector {i}" for i in range(rows)]][:rows]
    est = [1.04, 1.07, np.nan, *([1.02] * rows)][:rows]
    return pd.DataFrame({"label": labels, "odds_ratio": est, "low": [e - 0.02 for e in est],
                         "high": [e + 0.03 for e in est], "method": ["profile likelihood"] * rows})


def test_brief_html_escapes_user_text() -> None:
    html = render_brief_html(headline="<script>alert(1)</script> rose", chart_svgs=[b"<svg></svg>"] * 2,
                             table=odds_table(), method_text="A & B", provenance=PROV)
    assert "<script>alert" not in html and "&lt;script&gt;alert(1)&lt;/script&gt; rose" in html
    assert "Per year &lt;all&gt;" in html and "A &amp; B" in html
    assert html.count('src="data:image/svg+xml;base64,') == 2  # charts inlined as SVG, not escaped
    assert "not estimable" in html


def test_brief_html_prints_the_rows_used_line() -> None:
    html = render_brief_html(headline="h", chart_svgs=[b"<svg></svg>"] * 2, table=odds_table(), method_text="m",
                             provenance=PROV)
    assert "Rows used: 670 of 803 rows; 133 rejected, see Rosters" in html
    without = replace(PROV, rows_used="")
    assert "Rows used" not in render_brief_html(headline="h", chart_svgs=[b"<svg></svg>"] * 2, table=odds_table(),
                                                method_text="m", provenance=without)


def test_brief_table_rejects_missing_columns() -> None:
    with pytest.raises(ValueError, match="missing method"):
        render_brief_html(headline="h", chart_svgs=[], table=odds_table().drop(columns="method"),
                          method_text="m", provenance=PROV)


@needs_browser
@pytest.mark.slow
def test_brief_is_one_a4_page_with_headline_table_cautions_and_provenance(tmp_path: object) -> None:
    pdf = build_brief(headline="Forced exits <rose> 4% a year", charts=[small_figure("Coverage ok"), forest()],
                      table=odds_table(), method_text="Binomial GLM on yearly counts.", provenance=PROV)
    assert pdf.startswith(b"%PDF")
    assert pdf_pages(pdf) == 1
    # A4 is 595.28 x 841.89 pt (ISO 216: 210 x 297 mm)
    box = re.search(rb"/MediaBox\s*\[\s*0 0 ([\d.]+) ([\d.]+)\s*\]", pdf_objects(pdf))
    assert box and float(box.group(1)) == pytest.approx(595.28, abs=0.5)
    assert float(box.group(2)) == pytest.approx(841.89, abs=0.5)
    text = pdf_text(pdf, tmp_path)
    for fragment in ("Forced exits <rose> 4% a year", "1.040", "not estimable", "Binomial GLM on yearly counts.",
                     "f00dfacecafe12345678", "Standard, version 4", "a trend is not a cause", "Coverage ok",
                     "670 of 803 rows; 133 rejected"):
        assert fragment in text


@needs_browser
@pytest.mark.slow
def test_brief_with_a_long_table_still_fits_one_page(tmp_path: object) -> None:
    pdf = build_brief(headline="Long " * 30, charts=[small_figure("A"), forest()], table=odds_table(20),
                      method_text="Method " * 80, provenance=PROV)
    assert pdf_pages(pdf) == 1
    assert "more rows are in the app" in pdf_text(pdf, tmp_path)
