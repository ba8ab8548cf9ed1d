"""Departures: the record browser, its JSON twin, CSV/XLSX exports, and the count links on every page.

Expected values come from pandas over demo_data/roster.csv (the kept rows, conftest ``demo_clean``) and the
shipped mapping CSVs, never from the store under test.
"""

from __future__ import annotations

import csv
import html
import io
import re
from typing import Any
from urllib.parse import parse_qs, urlsplit

import pandas as pd
import pytest
from conftest import make_client, read_mapping

from app.intake.ingest import import_roster
from app.store import DepartureFilter, Store, StoreError

ROSTER = 1
STANDARD = "demo standard:1"
COUNT_LINK = re.compile(r'<a class="count" href="([^"]+)"[^>]*>([\d,]+)</a>')


def _categories(clean: pd.DataFrame) -> pd.Series:
    return clean["Exit Reason"].map(read_mapping("mapping-standard.csv")).fillna("unmapped")


def _api(client: Any, params: dict[str, Any]) -> dict[str, Any]:
    response = client.get(f"/api/rosters/{ROSTER}/departures", params=params)
    assert response.status_code == 200, response.text
    return dict(response.json())


# -- filters against pandas -------------------------------------------------------------------------
def test_year_and_category_total_equals_pandas(client: Any, demo_clean: pd.DataFrame) -> None:
    cats = _categories(demo_clean)
    for year, category in ((2010, "forced"), (1998, "voluntary"), (2022, "excluded"), (2005, "unmapped")):
        expected = int(((demo_clean["year"] == year) & (cats == category)).sum())
        body = _api(client, {"year": year, "category": category, "mapping": STANDARD})
        assert body["total"] == expected, (year, category)
        assert {d["category"] for d in body["departures"]} <= {category}
        assert {d["year"] for d in body["departures"]} <= {year}
    counted = int((demo_clean["year"].between(1998, 2022) & cats.isin(["forced", "voluntary"])).sum())
    assert _api(client, {"from": 1998, "to": 2022, "category": "counted"})["total"] == counted


def test_sector_reason_firm_and_text_filters_equal_pandas(client: Any, demo_clean: pd.DataFrame) -> None:
    sector = demo_clean["Industry"].mode().iloc[0]
    assert _api(client, {"sector": sector})["total"] == int((demo_clean["Industry"] == sector).sum())
    reason = demo_clean["Exit Reason"].iloc[0]
    assert _api(client, {"reason": reason})["total"] == int((demo_clean["Exit Reason"] == reason).sum())
    firm = demo_clean["Issuer Code"].iloc[5]
    by_id = _api(client, {"firm": firm})
    assert by_id["total"] == int((demo_clean["Issuer Code"] == firm).sum()) > 0
    # free text: case-insensitive substring of the firm name (or executive, notes, ...), as pandas finds it
    word = demo_clean["Issuer Name"].iloc[5].split()[0][:5]
    text_cols = ["Issuer Code", "Issuer Name", "Industry", "Executive", "Exit Reason", "Comment"]
    hit = pd.concat([demo_clean[c].str.lower().str.contains(word.lower(), regex=False) for c in text_cols],
                    axis=1).any(axis=1)
    assert _api(client, {"q": word.upper()})["total"] == int(hit.sum()) > 0
    # LIKE wildcards are taken literally, not as patterns
    assert _api(client, {"q": "%"})["total"] == int(
        pd.concat([demo_clean[c].str.contains("%", regex=False) for c in text_cols], axis=1).any(axis=1).sum())


def test_departures_without_a_sector_are_found_under_none(store: Store) -> None:
    data = (b"Issuer Code,Industry,FY,Exit Reason\nA1,,2001,Retired\nA2,Retail,2001,Retired\n"
            b"A3,,2002,Ousted\n")
    roster = import_roster(store, data, "r.csv").roster
    assert store.count_departures(roster.id, DepartureFilter(sector="(none)")) == 2
    assert store.count_departures(roster.id, DepartureFilter(sector="Retail")) == 1


def test_pages_concatenate_to_the_sorted_list(client: Any, demo_clean: pd.DataFrame) -> None:
    params = {"year": 2010, "per_page": 7}
    first = _api(client, params)
    assert first["pages"] == -(-first["total"] // 7) and first["total"] > 14
    lines = [d["line"] for p in range(1, first["pages"] + 1)
             for d in _api(client, {**params, "page": p})["departures"]]
    assert lines == sorted(demo_clean.loc[demo_clean["year"] == 2010, "line"].tolist())
    newest = _api(client, {"sort": "-year", "per_page": 3})["departures"]
    assert [d["year"] for d in newest] == [int(demo_clean["year"].max())] * 3
    by_firm = [d["firm_name"] for d in _api(client, {"sort": "firm", "year": 2010, "per_page": 500})["departures"]]
    assert by_firm == sorted(by_firm)


@pytest.mark.parametrize(("params", "message"), [
    ({"category": "sacked"}, "category must be one of"),
    ({"year": "nineteen"}, "year must be a fiscal year"),
    ({"page": "0"}, "page must be a page number"),
    ({"page": "9999"}, "past the last page"),
    ({"sort": "salary"}, "sort must be one of"),
    ({"per_page": "100000"}, "per_page must be between"),
    ({"mapping": "no such mapping"}, "No mapping 'no such mapping'"),
    ({"mapping": "demo standard:99"}, "No version 99"),
    # probe (session 7): a 100,000-character q reached SQLite's LIKE, whose pattern limit (50,000 bytes,
    # SQLITE_MAX_LIKE_PATTERN_LENGTH in sqlite.org/limits.html) made it a 500; '_' and '%' double when escaped
    ({"q": "a" * 60_000}, "q (the text searched for) has 60,000 characters"),
    ({"q": "_" * 26_000}, "q (the text searched for) has 26,000 characters"),
])
def test_bad_filters_say_what_and_where(client: Any, params: dict[str, str], message: str) -> None:
    for path in (f"/api/rosters/{ROSTER}/departures", f"/rosters/{ROSTER}/departures.csv"):
        if {"page", "per_page"} & set(params) and path.endswith(".csv"):
            continue  # exports have no pages
        response = client.get(path, params=params)
        assert response.status_code == 400
        assert message in (response.json()["error"] if path.startswith("/api") else html.unescape(response.text))
    assert client.get("/api/rosters/999/departures").status_code == 404


def test_store_refuses_a_bad_category_and_sort(demo_store: Store) -> None:
    with pytest.raises(StoreError, match="category must be one of"):
        DepartureFilter(category="fired")
    with pytest.raises(StoreError, match="sort must be one of"):
        demo_store.find_departures(ROSTER, DepartureFilter(), sort="salary")


# -- every count links to the departures behind it ----------------------------------------------------
@pytest.mark.parametrize(("page", "minimum"), [
    ("coverage", 5 * 28),  # five counts a year over the demo's 28 years (demo_data/README.md)
    ("trend", 2 * 25),  # forced and counted per year of the 1998-2022 window
    ("sectors", 2 * 6),  # forced and counted per sector (at least six sectors in the demo)
    ("reasons", 2 * 10),  # all years and in the window, per code
])
def test_every_linked_count_equals_the_linked_lists_total(client: Any, page: str, minimum: int) -> None:
    text = client.get(f"/rosters/{ROSTER}/{page}").text
    links = COUNT_LINK.findall(text)
    assert len(links) >= minimum
    for href, shown in links:
        url = urlsplit(html.unescape(href))
        assert url.path == f"/rosters/{ROSTER}/departures"
        params = {k: v[0] for k, v in parse_qs(url.query).items()}
        assert _api(client, {**params, "per_page": 1})["total"] == int(shown.replace(",", "")), href
    # and the HTML list it opens says the same number
    href, shown = links[1]
    listed = client.get(html.unescape(href))
    assert listed.status_code == 200
    assert f"<strong>{shown}</strong> departure" in listed.text


def test_coverage_links_use_the_mapping_the_page_counted_with(client: Any, demo_store: Store) -> None:
    demo_store.update_settings(ROSTER, mapping_name="demo strict")
    links = COUNT_LINK.findall(client.get(f"/rosters/{ROSTER}/coverage").text)
    forced = [(h, n) for h, n in links if "category=forced" in h]
    assert forced and all("mapping=demo+strict%3A1" in h for h, _ in forced)
    for href, shown in forced[:5]:
        params = {k: v[0] for k, v in parse_qs(urlsplit(html.unescape(href)).query).items()}
        assert _api(client, params)["total"] == int(shown.replace(",", ""))


# -- exports ----------------------------------------------------------------------------------------
PAYLOAD_CSV = (
    "Issuer Code,Issuer Name,Industry,FY,Exit Reason,Comment\n"
    'F1,=HYPERLINK("http://x.invalid"),Retail,2001,Ousted,@SUM(1+1)\n'
    "F2,Plain Firm,Retail,2001,Retired,-3+cmd|' /C calc'!A0\n"
    "F3,Other Firm,Energy,2002,Retired,ok\n"
)


def test_csv_export_is_formula_safe_and_filtered(store: Store) -> None:
    roster = import_roster(store, PAYLOAD_CSV.encode(), "payload.csv").roster
    client = make_client(store)
    response = client.get(f"/rosters/{roster.id}/departures.csv", params={"year": 2001})
    assert response.status_code == 200
    assert "attachment" in response.headers["content-disposition"]
    rows = list(csv.DictReader(io.StringIO(response.text)))
    assert [r["Firm id"] for r in rows] == ["F1", "F2"]
    # OWASP "CSV injection" advice (common practice): a leading apostrophe, so nothing is evaluated
    assert rows[0]["Firm"] == "'=HYPERLINK(\"http://x.invalid\")"
    assert rows[0]["Notes"] == "'@SUM(1+1)"
    assert rows[1]["Notes"].startswith("'-3+cmd")
    other = client.get(f"/rosters/{roster.id}/departures.csv", params={"year": 2002})
    assert other.headers["content-disposition"] != response.headers["content-disposition"]


def test_xlsx_export_keeps_text_as_text(store: Store) -> None:
    from openpyxl import load_workbook

    roster = import_roster(store, PAYLOAD_CSV.encode(), "payload.csv").roster
    client = make_client(store)
    response = client.get(f"/rosters/{roster.id}/departures.xlsx", params={"sector": "Retail"})
    assert response.status_code == 200
    ws = load_workbook(io.BytesIO(response.content)).active
    assert ws is not None
    rows = list(ws.iter_rows(values_only=False))
    header = [c.value for c in rows[0]]
    firm = rows[1][header.index("Firm")]
    # openpyxl reads a formula cell back with data_type "f"; a text cell has "s" and its exact characters
    assert (firm.data_type, firm.value) == ("s", '=HYPERLINK("http://x.invalid")')
    assert [r[header.index("Firm id")].value for r in rows[1:]] == ["F1", "F2"]
    assert rows[1][header.index("Fiscal year")].value == 2001


def test_roster_without_a_mapping_lists_every_departure_as_unmapped(store: Store) -> None:
    roster = import_roster(store, b"Issuer Code,FY,Exit Reason\nA1,2001,Retired\nA2,2002,Ousted\n", "r.csv").roster
    client = make_client(store)
    body = client.get(f"/api/rosters/{roster.id}/departures").json()
    assert body["mapping_label"] == "no mapping" and body["total"] == 2
    assert {d["category"] for d in body["departures"]} == {"unmapped"}
    assert client.get(f"/api/rosters/{roster.id}/departures", params={"category": "forced"}).json()["total"] == 0
    empty = client.get(f"/rosters/{roster.id}/departures", params={"category": "forced", "q": "<b>x</b>"})
    assert empty.status_code == 200 and "No departure matches these filters." in empty.text
    assert "<b>x</b>" not in empty.text and "&lt;b&gt;x&lt;/b&gt;" in empty.text  # the filter is shown escaped
