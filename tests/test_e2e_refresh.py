"""A roster refresh in a real browser (issue 14): next week's file is uploaded as a new version of the demo
roster through the confirm page's "Store as" choice, the review runs, the import lands on the Versions page
with the added/removed/changed counts and the records behind them. The confirm page, the review and the
Versions page are checked (and, with HELMSHIFT_SCREENSHOTS=1, saved under docs/screens/) at 1440 and 390 px:
nothing may make the page wider than the screen.

Next week's file is the demo roster with rows removed, notes changed and invented rows added; the expected
counts are those edits, counted by hand below (identity: firm id, executive and fiscal year, app/intake/refresh.py).
"""

from __future__ import annotations

import csv
import io
import re
from collections import Counter
from pathlib import Path
from typing import Any

import pytest
from test_e2e_browser import CHROMIUM, CHROMIUM_ARGS, DEMO, SCREENS, Watch, _need_browser

pytestmark = pytest.mark.browser

WIDTHS = (1440, 390)
REMOVED, CHANGED = 3, 2
ADDED = [["ZZ9001", "Quillmarsh Works", "Retail", "2024", "14/02/2024", "Retired", "Odile Fenwarren", "61", "9",
          "N", "added next week"],
         ["ZZ9002", "Brantholm Energy", "Utilities", "2024", "03/05/2024", "Dismissed", "Casimir Oakhollow", "55",
          "4.5", "N", ""],
         ["ZZ9003", "Velloran Foods", "Retail", "2024", "21/06/2024", "Resigned", "Ines Pardwick", "49", "2",
          "Y", ""],
         ["ZZ9004", "Kestrelmoor Bank", "Banking", "2024", "30/07/2024", "Health", "Tobiah Wrenfield", "58", "7",
          "N", ""]]


def next_weeks_file() -> bytes:
    """The demo roster with REMOVED rows dropped, CHANGED rows' comment edited and ADDED rows appended.

    Only rows whose identity occurs once in the file, with a date and a numeric age (so they were accepted,
    not rejected or counted as duplicates), are removed or edited: each edit is then exactly one added,
    removed or changed departure.
    """
    text = (DEMO / "roster.csv").read_text(encoding="utf-8")
    rows = list(csv.reader(io.StringIO(text)))
    header, body = rows[0], rows[1:]
    col = {h: i for i, h in enumerate(header)}
    ident = Counter((r[col["Issuer Code"]], r[col["Executive"]], r[col["FY"]]) for r in body)
    plain = [i for i, r in enumerate(body)
             if ident[(r[col["Issuer Code"]], r[col["Executive"]], r[col["FY"]])] == 1 and r[col["Exit Date"]]
             and r[col["Age at Exit"]].isdigit() and r[col["Executive"]] and not r[col["Comment"]]]
    drop, edit = set(plain[10:10 + REMOVED]), plain[40:40 + CHANGED]
    for i in edit:
        body[i][col["Comment"]] = "corrected next week"
    kept = [r for i, r in enumerate(body) if i not in drop]
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows([header, *kept, *ADDED])
    return out.getvalue().encode()


def shoot(page: Any, name: str) -> None:
    """Check the page fits every width; with HELMSHIFT_SCREENSHOTS=1 save it at each, then back to 1440 px."""
    import os

    for width in WIDTHS:
        page.set_viewport_size({"width": width, "height": 900})
        page.wait_for_timeout(200)
        assert page.evaluate("document.documentElement.scrollWidth") <= width, (name, width)
        if os.environ.get("HELMSHIFT_SCREENSHOTS") == "1":
            SCREENS.mkdir(parents=True, exist_ok=True)
            page.screenshot(path=str(SCREENS / f"20-refresh-{name}-{width}.png"), full_page=True)
    page.set_viewport_size({"width": WIDTHS[0], "height": 900})


def test_next_weeks_file_as_a_new_version(demo_db: Path, live_server: Any, tmp_path: Path) -> None:
    sync_playwright = _need_browser()
    server = live_server(demo_db)
    base = server.base_url
    upload = tmp_path / "roster-next-week.csv"
    upload.write_bytes(next_weeks_file())
    watch = Watch(base)
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            context = browser.new_context(viewport={"width": WIDTHS[0], "height": 900}, device_scale_factor=1)
            context.set_default_timeout(60_000)
            page = context.new_page()
            watch.attach(page)
            page.goto(f"{base}/rosters")
            page.set_input_files("#file", str(upload))
            page.click("button:has-text('Preview')")
            page.wait_for_selector("h1:has-text('Confirm the columns of roster-next-week.csv')")
            # the file has the demo roster's columns: the page says so and offers "new version of"
            assert page.get_by_text("next week's file for it?").is_visible()
            options = page.locator("#into option").all_inner_texts()
            target = next(o for o in options if o.startswith("new version of"))
            page.select_option("#into", label=target)
            page.click("button:has-text('Check these choices')")
            page.wait_for_selector("h2#review")
            assert page.locator("#into").input_value() != ""  # the choice survives the review step
            shoot(page, "confirm-review")
            page.click("button:has-text('as the next version of')")
            page.wait_for_selector("h2#diff")
            assert "/versions" in page.url
            stats = dict(zip(page.locator("#diff ~ .stat-row .stat .k").all_inner_texts(),
                             page.locator("#diff ~ .stat-row .stat .v").all_inner_texts(), strict=True))
            assert (stats["added"], stats["removed"], stats["changed"]) == (str(len(ADDED)), str(REMOVED),
                                                                              str(CHANGED)), stats
            assert page.locator("table.diff.added tbody tr").count() == len(ADDED)
            assert page.locator("table.diff.removed tbody tr").count() == REMOVED
            assert page.locator("table.diff.changed tbody tr").count() == CHANGED
            assert page.locator("table.diff.changed ins", has_text="corrected next week").count() == CHANGED
            # line numbers and years are whole numbers, an empty note reads as a dash (not "2024.0", "nan")
            shown = page.inner_text("main")
            assert not re.search(r"\b\d+\.0\b", page.inner_text("table.diff.added")), shown
            assert "nan" not in page.inner_text("table.diff.changed").split(), shown
            shoot(page, "versions")
            page.click("text=Rosters")
            page.click("table >> a >> nth=0")
            page.wait_for_selector("text=versions and what changed")
            shoot(page, "roster")
            context.close()
        finally:
            browser.close()
    assert watch.foreign_requests() == []
    assert watch.problems == []
