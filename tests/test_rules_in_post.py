"""The classification rules table counts departures only: rows still in post a rule reaches are counted apart.

A row still in post has no departure date and a code saying the executive has not left (``app.intake.in_post``),
unless the mapping (its rules included) counts it as forced or voluntary; it is no departure of any year.
Reference: hand counts of the invented roster below, stated beside each check. Runs on the store fixtures, so
also on PostgreSQL (``--backend postgresql``).
"""

from __future__ import annotations

import csv
import io
from typing import Any

from app.analysis.rules import rules_to_list
from app.intake.ingest import import_roster
from app.store import Store
from app.types import ClassificationRule

HEADER = ["Firm", "FY", "Exit Date", "Reason", "Age", "Tenure"]
# (firm, fiscal year, exit date, reason, age, tenure); "Incumbent" with no exit date is a row still in post
ROWS = [
    ("R1", "2001", "15/03/2001", "Retired", "55", "3"),
    ("R2", "2002", "15/04/2002", "Retired", "62", "8"),
    ("R3", "2003", "15/05/2003", "Retired", "", "6"),
    ("D1", "2002", "15/06/2002", "Dismissed", "50", "4"),
    # "Incumbent" on a dated row: that executive left, a departure
    ("I1", "2002", "15/07/2002", "Incumbent", "67", "10"),
    ("I2", "2003", "15/08/2003", "Incumbent", "58", "1"),
    # undated: in post, unless a rule counts the row as forced or voluntary (I3)
    ("I3", "2003", "", "Incumbent", "70", "12"),
    ("I4", "2003", "", "Incumbent", "50", "1"),
    ("I5", "2003", "", "Incumbent", "61", "5"),
    ("I6", "2003", "", "Incumbent", "", ""),
    ("I7", "2003", "", "Incumbent", "45", ""),
]
MAPPING = {"Retired": "voluntary", "Dismissed": "forced"}  # "Incumbent" left unmapped
RULES = (
    ClassificationRule("Retired", "age", "below", 60, "forced"),
    ClassificationRule("Incumbent", "age", "at_least", 65, "voluntary"),
    ClassificationRule("Incumbent", "tenure", "below", 2, "excluded"),
)
# Hand counts, rule by rule (the first rule that matches decides):
#   1 Retired, age below 60: decides R1 (moved voluntary -> forced); R3 has no age. No row in post reaches it.
#   2 Incumbent, age 65+: decides I1 and I3 (moved unmapped -> voluntary; I3 is then a departure, not in post);
#     I6 has no age (in post).
#   3 Incumbent, tenure below 2, on the rest (I2, I4-I7): decides I2 (a departure) and I4 (in post), both moved
#     unmapped -> excluded; I6 and I7 have no tenure (both in post).
# (decided, moved, no value) of departures, then (decided, no value) of rows still in post
EXPECTED = [((1, 1, 1), (0, 0)), ((2, 2, 0), (0, 1)), ((1, 1, 0), (1, 2))]
# rows still in post in the end: I4, I5, I6, I7 (I3 counts as voluntary)
IN_POST = 4


def roster_text(rows: list[tuple[str, ...]]) -> bytes:
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows([HEADER, *rows])
    return out.getvalue().encode()


def setup(store: Store) -> int:
    roster = import_roster(store, roster_text(ROWS), "incumbents.csv", name="Incumbents").roster
    assert roster is not None
    store.save_mapping_version("plain", MAPPING, author="test", rules=RULES)
    store.update_settings(roster.id, mapping_name="plain", window=(2001, 2003))
    return roster.id


def test_rule_counts_leave_rows_still_in_post_out_and_count_them_apart(store: Store) -> None:
    roster_id = setup(store)
    roster = store.get_roster(roster_id)
    listed = rules_to_list(store, roster, store.get_mapping("plain"))
    got = [((r["matched"], r["moved"], r["missing"]), (r["in_post_matched"], r["in_post_missing"])) for r in listed]
    assert got == EXPECTED  # hand counts above


def test_the_page_and_its_json_twin_show_the_departure_counts(empty_client: Any, store: Store) -> None:
    roster_id = setup(store)
    page = empty_client.get(f"/api/rosters/{roster_id}/reasons").json()
    assert [((r["matched"], r["moved"], r["missing"]), (r["in_post_matched"], r["in_post_missing"]))
            for r in page["rules"]] == EXPECTED  # hand counts above
    # the same rows the code table and Coverage count apart (hand count: I4-I7)
    assert {c["code"]: c["in_post"] for c in page["codes"]}["Incumbent"] == IN_POST
    assert empty_client.get(f"/api/rosters/{roster_id}/coverage").json()["still_in_post"] == IN_POST
    html = empty_client.get(f"/rosters/{roster_id}/reasons").text
    assert ("rows still in post (no departure date, a code saying the executive has not left) are no departure and "
            "are left out: rule 2 reached 1 of them (0 decided, 1 without the field); rule 3 reached 3 of them "
            "(1 decided, 2 without the field).") in html


def test_a_roster_without_rows_still_in_post_counts_every_row_as_a_departure(store: Store) -> None:
    # every row dated: the rule on "Incumbent" reaches departures only (hand count: I1-I7 dated below)
    dated = [(f, y or "2003", d or "15/09/2003", r, a, t) for f, y, d, r, a, t in ROWS]
    roster = import_roster(store, roster_text(dated), "dated.csv", name="Dated").roster
    assert roster is not None
    store.save_mapping_version("plain", MAPPING, author="test", rules=RULES)
    listed = rules_to_list(store, roster, store.get_mapping("plain"))
    # rule 2 decides I1, I3 (I6 no age); rule 3 decides I2, I4 (I6, I7 no tenure)
    assert [(r["matched"], r["moved"], r["missing"], r["in_post_matched"], r["in_post_missing"]) for r in listed] \
        == [(1, 1, 1, 0, 0), (2, 2, 1, 0, 0), (2, 2, 2, 0, 0)]
