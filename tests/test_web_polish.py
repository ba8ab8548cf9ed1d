"""Issue 15's small things on the pages: one odds-ratio convention, en dashes in year ranges, the per-roster
navigation, run numbers, the spline control, the intervals state, the stable seed, the sector-chart note,
the command line's help and the brief following the ticked findings."""

from __future__ import annotations

import argparse
import dataclasses
import re
from collections.abc import Iterator
from html.parser import HTMLParser
from typing import Any
from urllib.parse import parse_qs, urlsplit

import pytest
from conftest import figure_handoff

from app.analysis.inputs import load_input
from app.analysis.jobs import bootstrap_params, create_bootstrap_run
from app.analysis.run_params import default_seed
from app.cli import build_parser
from app.store import Store

ROSTER = 1
# a year range written with a hyphen (1998-2022); number ranges take an en dash: common practice in
# typesetting (The Chicago Manual of Style, 17th ed., 6.78; section number from memory), see tests/data/README.md
HYPHEN_RANGE = re.compile(r"\b(?:19|20)\d\d-(?:19|20)\d\d\b")


class _VisibleText(HTMLParser):
    """Text a reader sees: no attributes (form values, placeholders, URLs), no script or style bodies."""

    def __init__(self) -> None:
        super().__init__()
        self.parts: list[str] = []
        self._skip = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag in ("script", "style"):
            self._skip += 1

    def handle_endtag(self, tag: str) -> None:
        if tag in ("script", "style"):
            self._skip -= 1

    def handle_data(self, data: str) -> None:
        if not self._skip:
            self.parts.append(data)


def visible(html: str) -> str:
    parser = _VisibleText()
    parser.feed(html)
    return " ".join(" ".join(parser.parts).split())


def links(html: str, text: str) -> list[str]:
    """The hrefs of the <a> elements whose text starts with ``text``."""
    found = []
    for m in re.finditer(r'<a [^>]*href="([^"]+)"[^>]*>' + re.escape(text), html):
        parts = urlsplit(m.group(1).replace("&amp;", "&"))  # url_for gives absolute addresses
        found.append(parts.path + (f"?{parts.query}" if parts.query else ""))
    return found


# -- odds ratios at three decimals --------------------------------------------------------------------------

def test_odds_ratios_and_intervals_have_three_decimals_on_trend_and_sectors(client: Any) -> None:
    # the numbers themselves are checked against statsmodels in test_web_trend.py / test_web_sectors.py;
    # here only their printed form: three decimals, the convention of the sentences (app/stats/headline.py)
    fit = client.get(f"/api/rosters/{ROSTER}/trend").json()["fit"]
    text = visible(client.get(f"/rosters/{ROSTER}/trend").text)
    lo, hi = fit["conf_int"]["profile"]
    assert f"{lo:.3f} – {hi:.3f}" in text and f"{fit['odds_ratio']:.3f}" in text
    assert f"{fit['odds_ratio']:.4f}" not in text and f"{lo:.4f}" not in text
    sectors = client.get(f"/api/rosters/{ROSTER}/sectors").json()
    common = sectors["result"]["common"]
    sector_text = visible(client.get(f"/rosters/{ROSTER}/sectors").text)
    assert f"{common['odds_ratio']:.3f}" in sector_text and f"{common['odds_ratio']:.4f}" not in sector_text


# -- en dashes ----------------------------------------------------------------------------------------------

PAGES = ("", "/coverage", "/trend", "/trend?model=spline", "/sectors", "/resampling", "/robustness", "/briefing",
         "/reasons", "/departures?from=1998&to=2022")


@pytest.mark.parametrize("path", PAGES)
def test_year_ranges_on_pages_use_an_en_dash(client: Any, path: str) -> None:
    response = client.get(f"/rosters/{ROSTER}{path}")
    assert response.status_code == 200
    text = visible(response.text)
    assert HYPHEN_RANGE.findall(text) == []
    # and every page shows at least one range (the window, or the roster's years on the overview)
    assert re.search(r"\b(?:19|20)\d\d–(?:19|20)\d\d\b", text)


def test_the_trend_sentence_writes_its_window_with_an_en_dash(client: Any) -> None:
    page = client.get(f"/api/rosters/{ROSTER}/trend").json()
    assert page["sentence"] and "1998–2022" in page["sentence"] and not HYPHEN_RANGE.search(page["sentence"])


# -- navigation ---------------------------------------------------------------------------------------------

def test_per_roster_navigation_says_overview_not_roster(client: Any) -> None:
    html = client.get(f"/rosters/{ROSTER}").text
    nav = re.search(r'<nav aria-label="Pages">(.*?)</nav>', html, re.S)
    assert nav
    labels = [visible(a) for a in re.findall(r"<a [^>]*>(.*?)</a>", nav.group(1), re.S)]
    assert labels[:2] == ["Rosters", "Overview"] and "Roster" not in labels
    assert re.search(r'href="[^"]*/rosters/1" aria-current="page">Overview</a>', nav.group(1))


# -- runs numbered per roster -------------------------------------------------------------------------------

def start(client: Any, **form: str) -> int:
    response = client.post(f"/rosters/{ROSTER}/resampling", data=form, follow_redirects=False)
    assert response.status_code == 303, response.text
    return int(response.headers["location"].rsplit("/", 1)[1])


def test_bootstrap_runs_are_numbered_per_roster_and_link_by_id(client: Any, demo_store: Store) -> None:
    before = len(demo_store.list_runs(ROSTER, "bootstrap"))
    # a fit run in between: bootstrap numbers do not count it, while the global ids do
    first = start(client, unit="departure", resamples="200", seed="5")
    client.get(f"/rosters/{ROSTER}/trend?model=spline")
    second = start(client, unit="departure", resamples="200", seed="6")
    assert second > first + 1
    html = client.get(f"/rosters/{ROSTER}/resampling").text
    assert links(html, f"Bootstrap {before + 1}") == [f"/runs/{first}"]
    assert links(html, f"Bootstrap {before + 2}") == [f"/runs/{second}"]
    run_page = client.get(f"/runs/{second}").text
    assert re.search(rf"<h1>Bootstrap {before + 2} <span[^>]*>run {second}</span></h1>", run_page)
    briefing = client.get(f"/rosters/{ROSTER}/briefing").text
    assert f">Bootstrap {before + 2} (run {second}):" in briefing


def test_stored_fits_are_numbered_and_reopen_their_options(client: Any, demo_store: Store) -> None:
    client.get(f"/rosters/{ROSTER}/trend")
    spline = client.get(f"/rosters/{ROSTER}/trend?model=spline&spline_df=4").context["page"]
    fits = sorted(r.id for r in demo_store.list_runs(ROSTER, "fit")
                  if r.params.get("model") not in ("by_sector", "rate"))
    number = fits.index(spline.run_id) + 1  # its place among the roster's trend fits, oldest first
    html = client.get(f"/rosters/{ROSTER}/trend").text
    (href,) = links(html, f"Fit {number}<")
    query = parse_qs(urlsplit(href).query)
    assert query == {"model": ["spline"], "from": ["1998"], "to": ["2022"], "spline_df": ["4"]}
    reopened = client.get(href).context["page"]
    assert reopened.run_id == spline.run_id and reopened.model == "spline" and reopened.spline_df == 4
    assert f"Fit {len(fits)}<" in html and "Fit 0<" not in html


# -- spline control -----------------------------------------------------------------------------------------

@pytest.mark.parametrize(("model", "shown"), [("linear", False), ("sector", False), ("spline", True)])
def test_spline_df_control_only_for_the_spline_model(client: Any, model: str, shown: bool) -> None:
    html = client.get(f"/rosters/{ROSTER}/trend?model={model}").text
    assert ('id="spline_df"' in html) is shown


# -- run progress -------------------------------------------------------------------------------------------

def test_progress_says_computing_intervals_after_the_last_resample(client: Any, demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    run_id = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="firm", resamples=400, seed=1))
    demo_store.set_run_status(run_id, "running")
    demo_store.set_run_progress(run_id, 250, 400)
    drawing = visible(client.get(f"/runs/{run_id}/progress").text)
    assert "250 of 400 resamples" in drawing and "computing intervals" not in drawing
    demo_store.set_run_progress(run_id, 400)  # all drawn; the summary (jackknife, MC error) not yet stored
    partial = client.get(f"/runs/{run_id}/progress")
    text = visible(partial.text)
    assert "computing intervals" in text and "All 400 resamples drawn" in text
    assert 'hx-trigger="every 1s"' in partial.text and "hx-refresh" not in partial.headers
    assert "computing intervals" in visible(client.get(f"/runs/{run_id}").text)


# -- default seed -------------------------------------------------------------------------------------------

def test_default_seed_is_stable_per_roster_and_shown(client: Any, demo_store: Store) -> None:
    pages = [client.get(f"/rosters/{ROSTER}/resampling") for _ in range(2)]
    seeds = [p.context["page"].default_seed for p in pages]
    assert seeds[0] == seeds[1] and 100_000 <= seeds[0] < 1_000_000
    assert f'name="seed" type="number" min="0" value="{seeds[0]}"' in pages[0].text
    assert f"The suggested seed, {seeds[0]}," in pages[0].text
    roster = demo_store.get_roster(ROSTER)
    # a refreshed file (another digest) or another roster gets another seed
    assert default_seed(dataclasses.replace(roster, sha256="0" * 64)) != seeds[0]
    assert default_seed(dataclasses.replace(roster, id=roster.id + 1)) != seeds[0]


# -- sector chart -------------------------------------------------------------------------------------------

def test_sector_chart_explains_the_counts_in_its_labels(client: Any) -> None:
    spec = figure_handoff(client.get(f"/rosters/{ROSTER}/sectors").text, "fig-sectors")
    labels = spec["figure"]["layout"]["yaxis"]["ticktext"]
    assert any(re.search(r"\(\d+/\d+\)$", str(t)) for t in labels)
    notes = " ".join(str(a.get("text", "")) for a in spec["figure"]["layout"]["annotations"])
    assert "forced/counted departures" in " ".join(notes.replace("<br>", " ").split())


# -- command line help --------------------------------------------------------------------------------------

def _parsers(parser: argparse.ArgumentParser, path: str = "helmshift") -> Iterator[tuple[str,
                                                                                         argparse.ArgumentParser]]:
    yield path, parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield from _parsers(sub, f"{path} {name}")


def test_cli_help_has_no_markup_and_every_option_a_help_with_its_default() -> None:
    parsers = list(_parsers(build_parser()))
    assert len(parsers) > 15
    missing, no_default = [], []
    for path, parser in parsers:
        text = parser.format_help()
        assert "``" not in text and "`" not in text, path
        for action in parser._actions:
            if isinstance(action, (argparse._HelpAction, argparse._VersionAction, argparse._SubParsersAction)):
                continue
            name = f"{path} {'/'.join(action.option_strings) or action.dest}"
            if not action.help:
                missing.append(name)
            elif (action.option_strings and action.default not in (None, False)
                  and "default" not in action.help):
                no_default.append(name)
    assert missing == [] and no_default == []


# -- the brief follows the ticked findings ------------------------------------------------------------------

def test_briefing_brief_link_carries_the_ticked_findings(client: Any) -> None:
    html = client.get(f"/rosters/{ROSTER}/briefing?chart=sectors&chart=coverage").text
    (href,) = links(html, "Download brief")
    assert parse_qs(urlsplit(href).query)["chart"] == ["sectors", "coverage"]


@pytest.mark.slow
def test_brief_pdf_has_every_ticked_finding_and_no_other(demo_store: Store, tmp_path: Any) -> None:
    from test_export import AVAILABLE, WHY, pdf_pages, pdf_text  # the export tests' browser check and readers

    from app.briefing.exports import brief_file
    from app.briefing.findings import build_finding

    if not AVAILABLE:
        pytest.skip(WHY)
    inp = load_input(demo_store, ROSTER)

    def start_of(name: str) -> str:
        return " ".join(build_finding(demo_store, inp, name).takeaway.split()[:6])

    pdf = brief_file(demo_store, inp, ["sectors", "coverage"])
    text = pdf_text(pdf, tmp_path).replace("- ", "-")
    assert pdf_pages(pdf) == 1
    assert start_of("sectors") in text and start_of("coverage") in text
    assert "Resampling firms" not in text and start_of("trend") not in text
    three = brief_file(demo_store, inp, ["coverage", "trend", "robustness"])
    assert pdf_pages(three) == 2
    with pytest.raises(ValueError, match="at least one finding"):
        brief_file(demo_store, inp, [])
