"""Case overrides on the pages: set from a record on Departures, listed on Reason codes, removed with a
confirmation, and the JSON twins.

References: the counts are hand counts of the invented roster in tests/test_overrides.py (its CSV text): in
2001 it holds F1 (Retired, Ann Smith) and F2 (Dismissed), so F1 counted as forced makes 2 forced there.
"""

from __future__ import annotations

import re
from typing import Any

from app.store import Store
from tests.test_overrides import setup


def ready(store: Store) -> tuple[int, int]:
    roster_id, f1 = setup(store)
    store.update_settings(roster_id, mapping_name="desk map")
    return roster_id, f1


def test_set_a_category_from_a_record_then_every_page_counts_it(empty_client: Any, store: Store) -> None:
    client = empty_client
    roster_id, f1 = ready(store)
    page = client.get(f"/api/rosters/{roster_id}/departures").json()
    assert page["override_mapping"] == "desk map" and page["override_version"] == 1
    assert {r["id"] for r in page["departures"]} >= {f1} and all(r["override"] is None for r in page["departures"])
    html = client.get(f"/rosters/{roster_id}/departures").text
    assert html.count("Set category for this mapping") == 11  # one per record
    r = client.post(f"/rosters/{roster_id}/overrides", follow_redirects=False, data={
        "departure_id": str(f1), "category": "forced", "note": "board statement of 3 May",
        "mapping_name": "desk map", "based_on": "1", "back": "year=2001&page=1"})
    assert r.status_code == 303
    assert r.headers["location"].endswith(f"/rosters/{roster_id}/departures?year=2001&mapping=desk+map%3A2")
    # the linked list's length equals the count: the browser counts the record as the override says
    forced_2001 = client.get(f"/api/rosters/{roster_id}/departures?year=2001&category=forced").json()
    coverage = client.get(f"/api/rosters/{roster_id}/coverage").json()
    assert forced_2001["total"] == 2
    assert [y["forced"] for y in coverage["table"] if y["year"] == 2001] == [2]
    marked = [r for r in forced_2001["departures"] if r["override"]]
    assert [(r["id"], r["override"]["note"]) for r in marked] == [(f1, "board statement of 3 May")]
    listed = client.get(f"/api/rosters/{roster_id}/overrides").json()
    assert listed["mapping"] == "desk map:2"
    # a mapping that is not stored is not found (404), as on every other route (found by the live fuzzer)
    assert client.get(f"/api/rosters/{roster_id}/overrides?mapping=no+such+map").status_code == 404
    assert [(o["record"], o["counted_as"], o["category"], o["applied"]) for o in listed["overrides"]] == [
        ("firm F1, Ann Smith, FY2001", "voluntary", "forced", True)]
    reasons = client.get(f"/rosters/{roster_id}/reasons").text
    section = reasons[reasons.index('id="overrides"'):]
    assert "firm F1, Ann Smith, FY2001" in section and "board statement of 3 May" in section
    robustness = client.get(f"/api/rosters/{roster_id}/robustness").json()
    assert "without case overrides" in [v["label"] for v in robustness["result"]["variants"]]


def test_a_bad_override_form_says_what_and_saves_nothing(empty_client: Any, store: Store) -> None:
    client = empty_client
    roster_id, f1 = ready(store)
    good = {"departure_id": str(f1), "category": "forced", "note": "why", "based_on": "1"}
    for change, message in (({"note": "  "}, "needs a note"), ({"category": "sacked"}, "category must be one of"),
                            ({"departure_id": "x"}, "departure_id must be"),
                            ({"departure_id": "999999"}, "not a record of the current version"),
                            ({"note": "n" * 501}, "at most 500"),
                            ({"based_on": "7"}, "while you were editing version 7")):
        r = client.post(f"/rosters/{roster_id}/overrides", data=good | change, follow_redirects=False,
                        headers={"accept": "application/json"})
        assert r.status_code == 400 and message in r.json()["error"], (change, r.text)
    assert store.get_mapping("desk map").version == 1


def test_removing_an_override_needs_the_confirmation(empty_client: Any, store: Store) -> None:
    client = empty_client
    roster_id, f1 = ready(store)
    r = client.post(f"/api/rosters/{roster_id}/overrides",
                    data={"departure_id": str(f1), "category": "excluded", "note": "acting chief"})
    assert r.status_code == 200 and r.json()["mapping"] == "desk map:2"
    html = client.get(f"/rosters/{roster_id}/departures").text
    assert "Remove override" in html and re.search(r'name="position" value="1"', html)
    r = client.post(f"/rosters/{roster_id}/overrides/delete", data={"position": "1"}, follow_redirects=False)
    assert r.status_code == 400 and store.get_mapping("desk map").version == 2
    r = client.post(f"/rosters/{roster_id}/overrides/delete", follow_redirects=False,
                    data={"position": "1", "confirm": "yes", "based_on": "2"})
    assert r.status_code == 303
    after = store.get_mapping("desk map")
    assert after.version == 3 and after.overrides == ()
    r = client.post(f"/rosters/{roster_id}/overrides/delete", data={"position": "1", "confirm": "yes"},
                    headers={"accept": "application/json"})
    assert r.status_code == 400 and "no override number 1" in r.json()["error"]
