"""Reason codes count a code's rows still in post apart from its departures, as Coverage and the record browser do.

A row still in post has no departure date and a code saying the executive has not left
(``app.intake.in_post``); it is no departure of any year. References: hand counts of the invented roster
below (stated beside each check), and for the demo roster pandas over the committed CSV (demo_data/README.md:
the sitting chiefs have no exit date and the reason "Still in post") plus the record browser's own totals.
"""

from __future__ import annotations

import csv
import io
from typing import Any

import pandas as pd

from app.intake.ingest import import_roster
from app.store import Store

HEADER = ["Firm", "FY", "Exit Date", "Reason"]
# (firm, fiscal year, exit date, reason); an empty date with a "still in post" or "incumbent" code is a row still
# in post, filed under its fiscal year or, with none, under the file's latest (2003)
ROWS = [
    ("A1", "2001", "15/03/2001", "Retired"), ("A2", "2001", "15/04/2001", "Retired"),
    ("A3", "2002", "15/05/2002", "Retired"), ("A4", "2003", "15/06/2003", "Retired"),
    ("A5", "2003", "15/07/2003", "Retired"),
    ("B1", "2001", "15/03/2001", "Dismissed"), ("B2", "2002", "15/04/2002", "Dismissed"),
    ("B3", "2002", "15/05/2002", "Dismissed"), ("B4", "2003", "15/06/2003", "Dismissed"),
    # "Still in post" written on a row with an exit date: that executive left, so it is a departure of 2002
    ("C1", "2002", "15/08/2002", "Still in post"),
    ("C2", "", "", "Still in post"), ("C3", "", "", "Still in post"), ("C4", "2003", "", "Still in post"),
    ("D1", "2002", "", "Incumbent"), ("D2", "2002", "", "Incumbent"),
    ("E1", "2001", "15/09/2001", "Still serving"), ("E2", "", "", "Still serving"),
]
MAPPING = {"Retired": "voluntary", "Dismissed": "forced", "Still in post": "excluded"}  # two codes left unmapped
WINDOW = (2002, 2003)

# Hand counts of ROWS: code -> (departures, in window 2002-2003, rows still in post, first year, last year); a
# code with no departure shows the years its rows still in post are filed under
EXPECTED = {
    "Retired": (5, 3, 0, 2001, 2003),          # A1-A5: 2001 twice, 2002, 2003 twice
    "Dismissed": (4, 3, 0, 2001, 2003),        # B1-B4: 2001, 2002 twice, 2003
    "Still in post": (1, 1, 3, 2002, 2002),    # C1 left in 2002; C2-C4 are in post (filed under 2003)
    "Still serving": (1, 0, 1, 2001, 2001),    # E1 left in 2001; E2 is in post
    "Incumbent": (0, 0, 2, 2002, 2002),        # D1, D2 in post, filed under 2002
}


def roster_text(rows: list[tuple[str, str, str, str]]) -> bytes:
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows([HEADER, *rows])
    return out.getvalue().encode()


def setup(store: Store) -> int:
    roster = import_roster(store, roster_text(ROWS), "sitting.csv", name="Sitting chiefs").roster
    assert roster is not None
    store.save_mapping_version("plain", MAPPING, author="test")
    store.update_settings(roster.id, mapping_name="plain", window=WINDOW)
    return roster.id


def codes_of(client: Any, roster_id: int) -> dict[str, tuple[int, int, int, int, int]]:
    page = client.get(f"/api/rosters/{roster_id}/reasons").json()
    return {c["code"]: (c["count"], c["count_in_window"], c["in_post"], c["first_year"], c["last_year"])
            for c in page["codes"]}


def listed(client: Any, roster_id: int, **params: Any) -> int:
    answer = client.get(f"/api/rosters/{roster_id}/departures", params=params)
    assert answer.status_code == 200, answer.text
    return int(answer.json()["total"])


def test_each_code_counts_its_departures_and_its_rows_still_in_post_apart(empty_client: Any, store: Store) -> None:
    roster_id = setup(store)
    page = empty_client.get(f"/api/rosters/{roster_id}/reasons").json()
    assert codes_of(empty_client, roster_id) == EXPECTED
    # most departures first, then most rows still in post
    assert [c["code"] for c in page["codes"]] == ["Retired", "Dismissed", "Still in post", "Still serving",
                                                 "Incumbent"]
    # unmapped: Still serving and Incumbent; 1 departure (E1) and 3 rows still in post (E2, D1, D2)
    assert (page["unmapped_codes"], page["unmapped_departures"], page["unmapped_in_post"]) == (2, 1, 3)
    # Coverage counts the same 6 rows still in post (C2-C4, D1, D2, E2) and 11 departures, 6 of them in 2002-2003
    coverage = empty_client.get(f"/api/rosters/{roster_id}/coverage").json()
    assert coverage["still_in_post"] == 6 == sum(c[2] for c in EXPECTED.values())
    assert sum(r["departures"] for r in coverage["table"]) == 11 == sum(c[0] for c in EXPECTED.values())
    # the record browser lists exactly what each figure counts
    for code, (departures, in_window, in_post, _, _) in EXPECTED.items():
        assert listed(empty_client, roster_id, reason=code, in_post="none") == departures, code
        assert listed(empty_client, roster_id, reason=code, in_post="only") == in_post, code
        assert listed(empty_client, roster_id, reason=code, **{"from": WINDOW[0], "to": WINDOW[1]}) == in_window


def test_the_page_links_each_figure_to_its_rows_and_words_the_notice(empty_client: Any, store: Store) -> None:
    roster_id = setup(store)
    html = empty_client.get(f"/rosters/{roster_id}/reasons").text
    assert "2 code(s) covering 1 departure(s) have no category" in html
    assert "The same codes also hold 3 row(s) still in post, which are no departures" in html
    assert '/rosters/1/departures?in_post=only&amp;reason=Incumbent" title="List these 2 rows still in post"' \
        in html
    # one row is named in the singular (hand count: C1 is the one departure of "Still in post", E2 the one row
    # of "Still serving" still in post), more than one in the plural
    assert '/rosters/1/departures?in_post=none&amp;reason=Still+in+post" title="List this 1 departure"' in html
    assert '/rosters/1/departures?in_post=only&amp;reason=Still+serving" title="List this 1 row still in post"' \
        in html
    assert "List these 1 " not in html
    assert '/rosters/1/departures?reason=Retired" title="List these 5 departures"' in html  # none in post
    assert '/rosters/1/departures?in_post=only" title="List these 6 rows still in post"' in html
    # Coverage names its rows still in post as rows, not departures
    coverage = empty_client.get(f"/rosters/{roster_id}/coverage").text
    assert 'title="List these 6 rows still in post"' in coverage and "List these 1 " not in coverage
    # with only the codes of rows still in post unmapped, the notice says they hold no departure
    store.save_mapping_version("plain", {**MAPPING, "Still serving": "voluntary"}, author="test")
    html = empty_client.get(f"/rosters/{roster_id}/reasons").text
    assert "1 code(s) have no category (highlighted below). They hold no departure, only 2 row(s) still in post" \
        in html


def test_the_counts_follow_a_new_mapping_version_an_override_and_a_refresh(empty_client: Any, store: Store) -> None:
    # the page memoises its counts; each of these changes which rows are departures, so each must show at once
    roster_id = setup(store)
    assert codes_of(empty_client, roster_id)["Incumbent"] == (0, 0, 2, 2002, 2002)
    # a mapping that counts "Incumbent" as voluntary makes D1 and D2 departures of 2002 (as on Coverage)
    store.save_mapping_version("plain", {**MAPPING, "Incumbent": "voluntary"}, author="test")
    assert codes_of(empty_client, roster_id)["Incumbent"] == (2, 2, 0, 2002, 2002)
    assert empty_client.get(f"/api/rosters/{roster_id}/coverage").json()["still_in_post"] == 4
    assert listed(empty_client, roster_id, reason="Incumbent", year=2002) == 2
    # a case override counting one of C2-C4 as forced makes it a departure of 2003 (the year it is filed under)
    record = empty_client.get(f"/api/rosters/{roster_id}/departures",
                              params={"reason": "Still in post", "in_post": "only"}).json()["departures"][0]
    saved = empty_client.post(f"/api/rosters/{roster_id}/overrides",
                              data={"departure_id": record["id"], "category": "forced", "note": "board minute"})
    assert saved.status_code == 200, saved.text
    assert codes_of(empty_client, roster_id)["Still in post"] == (2, 2, 2, 2002, 2003)
    assert listed(empty_client, roster_id, reason="Still in post", in_post="none") == 2
    # a refresh adding one incumbent under the now-voluntary code and a new sitting chief "In office"
    text = roster_text([*ROWS, ("D3", "2003", "", "Incumbent"), ("F1", "", "", "In office")])
    assert import_roster(store, text, "sitting-2.csv", into=roster_id).roster is not None
    codes = codes_of(empty_client, roster_id)
    assert codes["Incumbent"] == (3, 3, 0, 2002, 2003) and codes["In office"] == (0, 0, 1, 2003, 2003)


def test_demo_roster_agrees_with_the_csv_and_the_record_browser(client: Any, demo_clean: pd.DataFrame) -> None:
    page = client.get("/api/rosters/1/reasons").json()
    window = page["window"]
    # pandas over the committed CSV: a row still in post has no exit date and the reason "Still in post"
    in_post = (demo_clean["Exit Date"] == "") & (demo_clean["Exit Reason"].str.lower() == "still in post")
    rows = demo_clean["Exit Reason"].value_counts()
    apart = demo_clean.loc[in_post, "Exit Reason"].value_counts()
    assert sum(c["in_post"] for c in page["codes"]) == int(in_post.sum()) > 0
    assert client.get("/api/rosters/1/coverage").json()["still_in_post"] == int(in_post.sum())
    for c in page["codes"]:
        code = c["code"]
        assert c["in_post"] == int(apart.get(code, 0)), code
        assert c["count"] == int(rows[code]) - c["in_post"], code
        assert listed(client, 1, reason=code, in_post="none") == c["count"], code
        assert listed(client, 1, reason=code, in_post="only") == c["in_post"], code
        assert listed(client, 1, reason=code, **{"from": window[0], "to": window[1]}) == c["count_in_window"], code
    still = next(c for c in page["codes"] if c["code"] == "Still in post")
    assert still["count"] == 0 and still["count_in_window"] == 0
