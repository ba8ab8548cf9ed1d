"""Every page at a phone's width (390 px) and a desktop's (1440 px): nothing makes the page wider than the
screen (wide tables and the navigation scroll inside their own boxes), charts are drawn, and a coverage bar
opens the departures behind it. Drives Debian's Chromium through Playwright (never `playwright install`).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, urlsplit

import pytest
from test_e2e_browser import CHROMIUM, CHROMIUM_ARGS, _need_browser

pytestmark = pytest.mark.browser

PAGES = ("/rosters", "/rosters/1", "/rosters/1/reasons", "/rosters/1/coverage", "/rosters/1/departures",
         "/rosters/1/departures?year=2010&category=forced", "/rosters/1/trend", "/rosters/1/resampling",
         "/rosters/1/sectors", "/rosters/1/robustness", "/rosters/1/briefing", "/profiles", "/rosters/1/versions")

#: boxes in the page that scroll or clip sideways and hold more than they show (the Reason codes rules table
#: cut its "Remove" header at 1440 px before its code choice was given a width)
CLIPPED = """() => [...document.querySelectorAll('main *')].filter(e => {
  const x = getComputedStyle(e).overflowX;
  return ['auto', 'scroll', 'hidden'].includes(x) && e.scrollWidth > e.clientWidth + 1;
}).map(e => e.tagName + '.' + e.className + ' ' + e.scrollWidth + ' > ' + e.clientWidth)"""


#: chart text (annotations: row labels, values, notes, source line; axis tick labels) outside its chart's box: at
#: 390 px the forest charts' label and value columns and every chart's source line ran off both edges
OUTSIDE = """() => [...document.querySelectorAll('.chart')].flatMap(chart => {
  const box = chart.getBoundingClientRect();
  return [...chart.querySelectorAll('g.annotation-text-g text, g.ytick text, g.xtick text')].filter(t => {
    const r = t.getBoundingClientRect();
    return r.width > 0 && (r.left < box.left - 2 || r.right > box.right + 2);
  }).map(t => chart.id + ': ' + t.textContent.slice(0, 40));
})"""


@pytest.mark.slow
def test_every_page_fits_phone_and_desktop_widths(demo_db: Path, live_server: Any) -> None:
    sync_playwright = _need_browser()
    server = live_server(demo_db)
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            for width in (390, 1440):
                context = browser.new_context(viewport={"width": width, "height": 900})
                page = context.new_page()
                for path in PAGES:
                    page.goto(server.base_url + path)
                    page.wait_for_load_state("networkidle")
                    for chart in page.locator(".chart").all():
                        chart_id = chart.get_attribute("id")
                        page.wait_for_selector(f"#{chart_id}[data-state='drawn']", timeout=60_000)
                    assert page.evaluate("document.documentElement.scrollWidth") <= width, (path, width)
                    assert page.evaluate(OUTSIDE) == [], (path, width)
                    if width == 1440:  # at a desktop's width no box scrolls sideways: a column would be cut off
                        assert page.evaluate(CLIPPED) == [], (path, width)
                    # the navigation is one row, not a column as tall as the screen
                    assert page.locator("header.topbar").bounding_box()["height"] < 130, (path, width)
                if width == 390:
                    # a "what changed and why" field gets a row of its own, not a few letters beside the names
                    page.goto(server.base_url + "/rosters/1/reasons")
                    for field in ("#note", "#rules-note"):
                        assert page.locator(field).bounding_box()["width"] > 250, field
                    # each code is a card a thumb can scroll past (a long suggestion note made a row 290-450 px
                    # tall, a few words a line): the note is behind "why", one tap away
                    rows = page.locator("table.reason-codes tbody tr")
                    assert max(r.bounding_box()["height"] for r in rows.all()) < 220
                    merger = rows.filter(has_text="Merger - role eliminated")
                    assert not merger.locator(".note-wide").is_visible()
                    merger.locator("details.note-narrow summary").click()
                    assert "Common practice" in merger.locator("details.note-narrow").inner_text()
                    for choice in ("select", "textarea"):  # category and label fit the screen
                        box = merger.locator(choice).bounding_box()
                        assert box["x"] >= 0 and box["x"] + box["width"] <= width, choice
                    # each mapping version is a card: its CSV link on the screen (it was past the right edge) and
                    # its note a line of its own (it was squeezed to a few words a line)
                    version = page.locator("table.row-cards tbody tr").first
                    link = version.get_by_role("link", name="as CSV").bounding_box()
                    assert link["x"] >= 0 and link["x"] + link["width"] <= width
                    assert version.locator("td[data-label=Note]").bounding_box()["width"] > 250
                    # the roster's versions too: every field of a version on the screen, none scrolled out of view
                    page.goto(server.base_url + "/rosters/1/versions")
                    for cell in page.locator("table.versions tbody td").all():
                        box = cell.bounding_box()
                        assert box is None or (box["x"] >= 0 and box["x"] + box["width"] <= width), cell.inner_text()
                    page.goto(server.base_url + "/rosters/1/trend")
                    page.wait_for_selector("#fig-trend[data-state='drawn']")
                    legend = page.evaluate("document.getElementById('fig-trend').layout.legend.orientation")
                    assert legend == "h"
                else:  # at desktop width the note shows in full beside its code
                    page.goto(server.base_url + "/rosters/1/reasons")
                    merger = page.locator("table.reason-codes tbody tr", has_text="Merger - role eliminated")
                    assert "Common practice" in merger.locator(".note-wide").inner_text()
                    assert not merger.locator("details.note-narrow").is_visible()
                    # its label reads in full (demo_data/mapping-standard.csv), wrapped inside its column, not cut
                    # to "Role ended by merger (judge" in a one-line box
                    label = merger.locator("textarea")
                    assert label.input_value() == "Role ended by merger (judgement call)"
                    assert label.evaluate("e => e.scrollHeight <= e.clientHeight + 1 && e.scrollWidth <= e.clientWidth")
                    box, cell = label.bounding_box(), label.locator("xpath=..").bounding_box()
                    assert cell["x"] <= box["x"] and box["x"] + box["width"] <= cell["x"] + cell["width"]
                context.close()
            # a coverage bar is a link too: clicking the forced bar of a year opens that year's forced list
            context = browser.new_context(viewport={"width": 1440, "height": 900})
            page = context.new_page()
            page.goto(server.base_url + "/rosters/1/coverage")
            page.wait_for_selector("#fig-coverage[data-state='drawn']")
            bar = page.locator("#fig-coverage g.trace.bars").first.locator("path").nth(10)
            with page.expect_navigation():
                bar.click(force=True)
            query = parse_qs(urlsplit(page.url).query)
            assert urlsplit(page.url).path == "/rosters/1/departures"
            assert query["category"] == ["forced"] and query["mapping"] == ["demo standard:1"]
            year = int(query["year"][0])
            shown = page.locator("#records-total strong").inner_text()
            total = page.request.get(f"{server.base_url}/api/rosters/1/departures?year={year}&category=forced"
                                     "&mapping=demo+standard:1").json()["total"]
            assert int(shown.replace(",", "")) == total > 0
            context.close()
        finally:
            browser.close()
