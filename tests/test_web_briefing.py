"""Briefing page: previews of every finding, and exports with and without a browser."""

from __future__ import annotations

import io
import struct
import zipfile
from pathlib import Path
from typing import Any

import pytest

from app.analysis.inputs import load_input
from app.analysis.jobs import run_bootstrap_now
from app.briefing.findings import CHART_NAMES, build_finding
from app.briefing.render import ENABLE_HINT
from app.store import Store, StoreError

ROSTER = 1
CHROMIUM = Path("/usr/bin/chromium")  # Debian's chromium package (installed by .ci/run)


@pytest.fixture
def no_browser(monkeypatch: pytest.MonkeyPatch) -> None:
    # app/briefing/render.py: HELMSHIFT_BROWSER=none switches static export off
    monkeypatch.setenv("HELMSHIFT_BROWSER", "none")


def test_page_previews_every_finding(client: Any, demo_store: Store, no_browser: None) -> None:
    response = client.get(f"/rosters/{ROSTER}/briefing")
    assert response.status_code == 200 and response.template.name == "briefing.html"
    page = response.context["page"]
    # nothing ticked and no bootstrap run: the standard deck of what can be shown, bootstrap left out (and
    # rates, with no universe yet; the adjusted trend is shown only when ticked)
    assert page.chosen == [c for c in CHART_NAMES if c not in ("bootstrap", "rates", "adjusted")]
    assert page.run_id is None
    # ticked explicitly, every finding is previewed, and the one that cannot be shown says why
    page = client.get(f"/rosters/{ROSTER}/briefing?" + "&".join(f"chart={c}" for c in CHART_NAMES)).context["page"]
    assert page.chosen == list(CHART_NAMES)
    items = {i.name: i for i in page.items}
    assert set(items) == set(CHART_NAMES)
    assert "No finished bootstrap run" in items["bootstrap"].error
    assert "no universe of firm-years yet" in items["rates"].error
    assert items["adjusted"].error is None and "firm-clustered interval" in items["adjusted"].takeaway
    for name in ("coverage", "trend", "sectors", "robustness"):
        assert items[name].error is None and items[name].takeaway, name
        assert f'data-figure-for="fig-{name}"' in response.text
    # once a run exists, the bootstrap preview uses it
    run = run_bootstrap_now(demo_store, load_input(demo_store, ROSTER), unit="firm", resamples=200, seed=3)
    page = client.get(f"/rosters/{ROSTER}/briefing?chart=bootstrap&chart=trend").context["page"]
    assert page.run_id == run["run"] and [i.name for i in page.items] == ["bootstrap", "trend"]
    assert page.items[0].error is None and "(seed 3)" in page.items[0].takeaway
    assert client.get(f"/rosters/{ROSTER}/briefing?chart=pie").status_code == 400
    assert client.get(f"/api/rosters/{ROSTER}/briefing?run=x").status_code == 400


def test_without_a_browser_the_page_says_how_to_enable_export(client: Any, no_browser: None) -> None:
    response = client.get(f"/rosters/{ROSTER}/briefing")
    page = response.context["page"]
    assert page.export_ok is False and ENABLE_HINT in page.export_message
    assert "Static export (PNG, SVG, PDF, brief) is switched off" in response.text
    for path in (f"/rosters/{ROSTER}/charts/trend.png", f"/rosters/{ROSTER}/charts/coverage.svg",
                 f"/rosters/{ROSTER}/briefing/brief.pdf"):
        download = client.get(path)
        assert download.status_code == 400, path
        assert "Export is not available" in download.context["page"]["message"], path
    api = client.get(f"/rosters/{ROSTER}/briefing/brief.pdf", headers={"accept": "application/json"})
    assert api.status_code == 400 and "switched off" in api.json()["error"]
    # the deck's charts are native PowerPoint charts: it needs no browser
    deck = client.get(f"/rosters/{ROSTER}/briefing/deck.pptx")
    assert deck.status_code == 200 and deck.content[:2] == b"PK"  # a zip (ECMA-376 Part 2 packages)


def test_a_browser_path_that_is_not_a_file_is_explained(client: Any, monkeypatch: pytest.MonkeyPatch,
                                                        tmp_path: Path) -> None:
    monkeypatch.delenv("HELMSHIFT_BROWSER", raising=False)
    monkeypatch.setenv("BROWSER_PATH", str(tmp_path / "no-such-browser"))
    page = client.get(f"/rosters/{ROSTER}/briefing").context["page"]
    assert page.export_ok is False and "is not an executable file" in page.export_message
    assert client.get(f"/rosters/{ROSTER}/charts/trend.svg").status_code == 400


def test_unknown_chart_or_format_is_404(client: Any) -> None:
    assert client.get(f"/rosters/{ROSTER}/charts/pie.png").status_code == 404
    assert client.get(f"/rosters/{ROSTER}/charts/trend.gif").status_code == 404


@pytest.mark.parametrize("window", ["to=-1", "from=1998", "from=2022&to=1998", "from=abc&to=2010"])
def test_a_malformed_window_is_refused_by_every_briefing_download(client: Any, no_browser: None, window: str) -> None:
    """Live fuzzing (session 7) found brief-pack.zip?to=-1 answered 200 with the default window's numbers: a
    board pack must never quietly be of other years than asked for. The demo's default window is 1998-2022."""
    for path in ("briefing/brief-pack.zip", "briefing/deck.pptx", "briefing/brief.pdf",
                 "charts/coverage.png", "trend"):
        r = client.get(f"/rosters/{ROSTER}/{path}?{window}")
        assert r.status_code == 400 and "first and a last fiscal year" in r.text, (path, window, r.status_code)
    assert client.get(f"/rosters/{ROSTER}/briefing/brief-pack.zip?from=2000&to=2010").status_code == 200


def test_findings_refuse_unknown_charts_and_missing_runs(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    with pytest.raises(ValueError, match="chart must be one of coverage, trend"):
        build_finding(demo_store, inp, "pie")
    with pytest.raises(StoreError, match="No finished bootstrap run"):
        build_finding(demo_store, inp, "bootstrap")
    finding = build_finding(demo_store, inp, "coverage")
    assert finding.provenance.mapping_name == "demo standard" and finding.provenance.window == (1998, 2022)


@pytest.mark.slow
@pytest.mark.skipif(not CHROMIUM.is_file(), reason="needs Debian's chromium at /usr/bin/chromium")
def test_png_chart_and_deck_downloads_with_a_browser(client: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("HELMSHIFT_BROWSER", raising=False)
    monkeypatch.setenv("BROWSER_PATH", str(CHROMIUM))
    assert client.get(f"/rosters/{ROSTER}/briefing").context["page"].export_ok
    png = client.get(f"/rosters/{ROSTER}/charts/trend.png")
    assert png.status_code == 200 and png.headers["content-type"] == "image/png"
    assert png.content[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083)
    width, height = struct.unpack(">II", png.content[16:24])  # IHDR
    assert (width, height) == (2200, 1240)  # 1100 x 620 at scale 2 (app/briefing/render.py figure_bytes)
    deck = client.get(f"/rosters/{ROSTER}/briefing/deck.pptx?chart=trend&chart=coverage")
    assert deck.status_code == 200 and "attachment" in deck.headers["content-disposition"]
    from pptx import Presentation  # python-pptx reads what the tool wrote

    slides = Presentation(io.BytesIO(deck.content)).slides
    assert len(slides) >= 3  # title, two findings (and methods)
    assert zipfile.is_zipfile(io.BytesIO(deck.content))
    # slide text is plain text: no chart markup (such as plotly's <br> line breaks) may leak into it
    texts = [shape.text_frame.text for slide in slides for shape in slide.shapes if shape.has_text_frame]
    assert texts and not any("<br>" in t or "<b>" in t for t in texts)
    # the trend slide's headline: the share in percentage points first, then the odds ratio per year
    flat = [t.replace("\n", " ") for t in texts]  # the deck wraps long titles with line breaks
    assert any(t.startswith("Across ") and "percentage point" in t and "odds ratio per year" in t for t in flat)
