"""Briefs and decks the analyst signs: settings per roster, native charts from the page's numbers, notes.

Oracles: statsmodels (the fitted trend and odds ratios), numpy (the bootstrap histogram), pandas counts of
demo_data/roster.csv (the coverage bars), python-pptx reading back what the deck wrote, pdftotext (poppler).
"""

from __future__ import annotations

import io
import shutil
import subprocess
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import copy_database, read_mapping, statsmodels_trend, year_counts
from pptx import Presentation
from pptx.enum.chart import XL_CHART_TYPE
from pptx.oxml.ns import qn

from app.analysis.inputs import load_input
from app.analysis.jobs import replicate_odds_ratios, run_bootstrap_now
from app.briefing.exports import deck_file
from app.briefing.render import export_available
from app.briefing.signature import SignatureError, resolve_signature
from app.cli import main
from app.store import Store

ROSTER = 1
AVAILABLE, WHY = export_available()


def _slides(data: bytes) -> list[Any]:
    return list(Presentation(io.BytesIO(data)).slides)


def _text(slide: Any) -> str:
    return " ".join(sh.text_frame.text.replace("\n", " ") for sh in slide.shapes if sh.has_text_frame)


def _notes(slide: Any) -> str:
    return str(slide.notes_slide.notes_text_frame.text) if slide.has_notes_slide else ""


def _charts(slide: Any) -> list[Any]:
    return [sh.chart for sh in slide.shapes if sh.has_chart]


def _xy(series: Any) -> tuple[list[float], list[float]]:
    xs = [float(v.text) for v in series._element.find(qn("c:xVal")).iter(qn("c:v"))]
    ys = [float(v.text) for v in series._element.find(qn("c:yVal")).iter(qn("c:v"))]
    return xs, ys


# --- settings: validation and the store ---------------------------------------------------------------

def test_signature_fields_are_validated_with_the_field_named() -> None:
    with pytest.raises(SignatureError, match="^date: write it as YYYY-MM-DD"):
        resolve_signature(None, "R", when="3 May 2026")
    with pytest.raises(SignatureError, match="^date: 2026-02-30 is not a calendar date"):
        resolve_signature(None, "R", when="2026-02-30")
    with pytest.raises(SignatureError, match="^marking: at most 60 characters; got 61"):
        resolve_signature(None, "R", marking="x" * 61)
    with pytest.raises(SignatureError, match="^author: remove the control character U\\+200E"):
        resolve_signature(None, "R", author="A\u200eB")
    sign = resolve_signature(None, "Roster A", author="  A.   Analyst ", when="2026-12-03")
    assert sign.title == "Forced chief-executive departures: Roster A" and sign.author == "A. Analyst"
    assert sign.byline() == "Prepared by A. Analyst \u00b7 3 December 2026"


def test_settings_are_remembered_per_roster_with_an_audit_event(demo_store: Store) -> None:
    assert demo_store.briefing_settings(ROSTER).title == ""  # nothing saved yet: defaults
    saved = demo_store.save_briefing_settings(ROSTER, title="Board paper", author="A. Analyst", marking="SECRET",
                                              date="2026-12-03", takeaways={"trend": "Mine."})
    again = demo_store.briefing_settings(ROSTER)
    assert again == saved and again.takeaways == {"trend": "Mine."} and again.marking == "SECRET"
    events = demo_store.audit_events(action="briefing_settings")
    assert len(events) == 1 and events[0].target == f"roster:{ROSTER}" and events[0].detail["marking"] == "SECRET"
    # the command line's flags win over the saved fields for that export only
    sign = resolve_signature(again, "Demo", marking="", when="2027-01-02")
    assert (sign.title, sign.author, sign.marking, sign.date.isoformat()) == (
        "Board paper", "A. Analyst", "", "2027-01-02")


# --- the deck ----------------------------------------------------------------------------------------------

def test_deck_carries_the_signature_native_charts_and_notes(demo_store: Store, demo_clean: pd.DataFrame) -> None:
    demo_store.save_briefing_settings(ROSTER, title="Board paper: forced exits", author="A. Analyst",
                                      marking="CONFIDENTIAL", date="2026-12-03",
                                      takeaways={"coverage": "Enough years are covered."})
    inp = load_input(demo_store, ROSTER)
    run = run_bootstrap_now(demo_store, inp, unit="firm", resamples=300, seed=5)
    slides = _slides(deck_file(demo_store, inp))
    titles = [s.shapes.title.text_frame.text.replace("\n", " ") for s in slides]
    assert titles[0] == "Board paper: forced exits" and titles[-2:] == ["Methods and provenance", "Cautions"]
    first = _text(slides[0])
    assert "CONFIDENTIAL" in first and "Prepared by A. Analyst, 3 December 2026" in first
    finding_slides = slides[1:-2]
    assert len(finding_slides) == 5  # coverage, trend, bootstrap, sectors, robustness: the standard deck
    for slide in slides[1:]:
        assert "CONFIDENTIAL" in _text(slide)  # the marking in every footer
    for slide in finding_slides:
        assert not [sh for sh in slide.shapes if sh.shape_type == 13], "a picture where a native chart belongs"
        assert len(_charts(slide)) == 1
        notes = _notes(slide)
        for part in ("Method: ", "Interval: ", "Caveat: "):
            assert part in notes, (slide.shapes.title.text_frame.text, notes)
    coverage, trend, boot, sectors, robust = (_charts(s)[0] for s in finding_slides)
    assert "Enough years are covered." in _text(finding_slides[0])
    assert "Computed takeaway: " in _notes(finding_slides[0])  # the edited sentence keeps the computed one

    # coverage: stacked columns equal to pandas counts of the demo file under the standard mapping
    assert coverage.chart_type == XL_CHART_TYPE.COLUMN_STACKED
    categories = read_mapping("mapping-standard.csv")
    forced = demo_clean.assign(cat=demo_clean["Exit Reason"].map(categories)).query("cat == 'forced'")
    expected = forced.groupby("year").size()
    series = {s.name: list(s.values) for s in coverage.plots[0].series}
    years = [int(c) for c in coverage.plots[0].categories]
    assert [series["Forced"][years.index(y)] for y in expected.index] == [float(v) for v in expected]

    # trend: the fitted line is statsmodels' prediction at each year of the window
    assert type(trend.plots[0]).__name__ == "XyPlot"  # an XY scatter (its styled series set the subtype)
    named = {s.name: s for s in trend.plots[0].series}
    xs, ys = _xy(named["Fitted logistic trend"])
    model = statsmodels_trend(year_counts(demo_clean, categories, inp.window), inp.window)
    t = np.asarray(xs) - (inp.window[0] + inp.window[1]) / 2
    np.testing.assert_allclose(ys, model.predict(np.column_stack([np.ones_like(t), t])), rtol=1e-6)
    observed = named["Observed forced share (95% Wilson interval)"]._element
    assert observed.find(qn("c:errBars")) is not None  # the Wilson intervals as error bars

    # bootstrap: the histogram counts every finite stored replicate, in numpy's bins over their range
    ors = replicate_odds_ratios(demo_store, run["run"])
    ok = ors[np.isfinite(ors)]
    bars = [float(v) for v in boot.plots[0].series[0].values]
    counts, _ = np.histogram(ok, bins=len(bars), range=(ok.min(), ok.max()))
    assert bars == [float(c) for c in counts] and sum(bars) == ok.size

    # sectors and robustness: odds-ratio bars with the interval as error bars; the reference is statsmodels'
    for chart in (sectors, robust):
        assert chart.chart_type == XL_CHART_TYPE.BAR_CLUSTERED
        assert chart.plots[0].series[0]._element.find(qn("c:errBars")) is not None
    reference = float(robust.plots[0].series[0].values[0])
    assert reference == pytest.approx(float(np.exp(model.params[1])), rel=1e-6)


def test_only_and_all_ticked_findings_appear(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    slides = _slides(deck_file(demo_store, inp, ["sectors", "trend"]))
    assert len(slides) == 1 + 2 + 2  # title, the two ticked findings in their order, methods, cautions
    names = [s.shapes.title.text_frame.text.replace("\n", " ") for s in slides[1:-2]]
    assert "sectors the yearly trends" in names[0] and "percentage points" in names[1]
    # a ticked finding that cannot be shown is an error naming it, never a silently shorter deck
    with pytest.raises(ValueError, match="^The bootstrap finding was ticked but cannot be shown: No finished"):
        deck_file(demo_store, inp, ["trend", "bootstrap"])
    # nothing ticked: the standard deck of what can be shown (no bootstrap run yet)
    assert len(_slides(deck_file(demo_store, inp))) == 1 + 4 + 2


# --- the Briefing page -----------------------------------------------------------------------------------

def test_briefing_page_saves_the_settings_and_refuses_bad_ones(client: Any, demo_store: Store) -> None:
    page = client.get(f"/rosters/{ROSTER}/briefing")
    assert page.status_code == 200 and 'id="signature"' in page.text
    # nothing ticked and no bootstrap run: the standard deck leaves bootstrap out, so the deck link is offered
    assert page.context["page"].chosen == ["coverage", "trend", "sectors", "robustness"]
    assert 'id="download-deck"' in page.text
    form = {"title": "Board <paper>", "author": "A. Analyst", "marking": "CONFIDENTIAL", "date": "2026-12-03",
            "takeaway-trend": "The share rose.", "back": "chart=trend&chart=sectors&next=https://x.example"}
    saved = client.post(f"/rosters/{ROSTER}/briefing/settings", data=form, follow_redirects=False)
    assert saved.status_code == 303
    assert saved.headers["location"].endswith(f"/rosters/{ROSTER}/briefing?chart=trend&chart=sectors&saved=1")
    settings = demo_store.briefing_settings(ROSTER)
    assert (settings.title, settings.marking, settings.takeaways) == (
        "Board <paper>", "CONFIDENTIAL", {"trend": "The share rose."})
    shown = client.get(f"/rosters/{ROSTER}/briefing?chart=trend&saved=1")
    assert "Board &lt;paper&gt;" in shown.text and "Takeaway on the slide: The share rose." in shown.text
    bad = client.post(f"/rosters/{ROSTER}/briefing/settings", data={**form, "date": "03/12/2026"},
                      follow_redirects=False)
    assert bad.status_code == 400 and "date: write it as YYYY-MM-DD" in bad.text
    assert demo_store.briefing_settings(ROSTER).date == "2026-12-03"  # nothing half-saved
    # bootstrap ticked without a run: the page says so and offers no deck that would leave it out
    blocked = client.get(f"/rosters/{ROSTER}/briefing?chart=trend&chart=bootstrap")
    # the brief follows the ticked findings too (issue 15), so it waits with the deck
    assert 'id="download-deck"' not in blocked.text and 'id="download-brief"' not in blocked.text
    assert "the deck and the brief carry every ticked finding" in blocked.text.lower()
    refused = client.get(f"/rosters/{ROSTER}/briefing/deck.pptx?chart=trend&chart=bootstrap")
    assert refused.status_code == 400 and "bootstrap finding was ticked" in refused.text


# --- the command line and the brief -----------------------------------------------------------------------

def test_export_flags_sign_the_deck(capsys: pytest.CaptureFixture[str], shared_demo_db: Path,
                                    tmp_path: Path) -> None:
    db = str(copy_database(shared_demo_db, tmp_path / "cli.db"))
    out = tmp_path / "deck.pptx"
    code = main(["export", "--db", db, "--roster", str(ROSTER), "--format", "pptx", "--chart", "trend,coverage",
                 "--title", "For the board", "--author", "B. Analyst", "--marking", "RESTRICTED",
                 "--date", "2026-11-30", "--out", str(out)])
    assert code == 0, capsys.readouterr().err
    slides = _slides(out.read_bytes())
    assert len(slides) == 1 + 2 + 2
    first = _text(slides[0])
    assert "For the board" in first and "RESTRICTED" in first and "B. Analyst, 30 November 2026" in first
    assert Presentation(io.BytesIO(out.read_bytes())).core_properties.author == "B. Analyst"
    code = main(["export", "--db", db, "--roster", str(ROSTER), "--format", "pptx", "--date", "tomorrow",
                 "--out", str(tmp_path / "no.pptx")])
    err = capsys.readouterr().err
    assert code != 0 and "date: write it as YYYY-MM-DD" in err and not (tmp_path / "no.pptx").exists()


@pytest.mark.slow
@pytest.mark.skipif(not AVAILABLE, reason=WHY)
def test_brief_carries_title_author_marking_rows_and_the_point_headline(demo_store: Store) -> None:
    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (poppler-utils) is not installed")
    from app.briefing.exports import brief_file

    demo_store.save_briefing_settings(ROSTER, title="Board paper: forced exits", author="A. Analyst",
                                      marking="CONFIDENTIAL", date="2026-12-03", takeaways={})
    inp = load_input(demo_store, ROSTER)
    pdf = brief_file(demo_store, inp)
    text = " ".join(subprocess.run(["pdftotext", "-layout", "-", "-"], input=pdf, capture_output=True,
                                   check=True).stdout.decode().split())
    roster = demo_store.get_roster(ROSTER)
    for fragment in ("Board paper: forced exits", "Prepared by A. Analyst", "3 December 2026", "CONFIDENTIAL",
                     "percentage points", f"{roster.accepted:,} of {roster.rows_total:,} rows",
                     f"{roster.rejected:,} rejected"):
        assert fragment in text, fragment
