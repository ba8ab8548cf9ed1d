"""The record browser classifies as the counts do when a mapping version has classification rules and case
overrides: override first, then the rules in order (first match wins; a record without the field keeps its
code's category), then the code's category matched by code key (issue 15: every count links to its records).

References: the small roster's expected categories are hand counts of the CSV text below (read each row: its
code, age, tenure and whether an override names it); the demo roster's are counted with pandas over
demo_data/roster.csv and the shipped mapping CSV (conftest ``demo_clean``, ``read_mapping``), never with the
code under test. Every page's count link is then checked against the list it opens.
"""

from __future__ import annotations

import csv
import html
import io
import math
import re
from typing import Any
from urllib.parse import parse_qs, urlsplit

import pandas as pd
from conftest import make_client, read_mapping

from app.analysis.overrides import add_override
from app.intake.ingest import import_roster
from app.store import Store
from app.types import ClassificationRule
from tests.test_web_departures import COUNT_LINK

HEADER = "firm_id,firm_name,sector,year,date,reason,executive,age,tenure\n"
ROWS = (
    "A1,Alpha,Energy,2001,2001-03-01,Retired,Ann One,58,3\n"        # rule 1 -> forced; override -> voluntary
    "A2,Beta,Energy,2001,2001-04-01,Retired,Bo Two,59.9,4\n"        # 59 completed years: rule 1 -> forced
    "A3,Gamma,Energy,2001,2001-05-01,Retired,Cy Three,60,12\n"      # not below 60; rule 2 -> excluded
    "A4,Delta,Retail,2002,2002-02-01,Retired,Di Four,,15\n"         # no age: rule 1 passes it; rule 2 -> excluded
    "A5,Eps,Retail,2002,2002-03-01,Retired,Ed Five,,\n"             # neither field: its code, voluntary
    "A6,Zeta,Retail,2002,2002-04-01,Retired,Flo Six,55,20\n"        # both rules match; the first wins: forced
    "A7,Eta,Energy,2003,2003-02-01,Dismissed,Gus Seven,70,9\n"      # forced by code
    "A8,Theta,Energy,2003,2003-03-01,Resigned,Hal Eight,50,2\n"     # voluntary by code; override -> forced
    "A9,Iota,Retail,2003,2003-04-01,Dismissed,Ivy Nine,45,1\n"      # forced by code
    "A10,Kappa,Retail,2003,2003-05-01,Resigned,Jo Ten,40,6\n"       # voluntary by code
    "A11,Lam,Energy,2004,2004-02-01,Other,Kit Eleven,61,7\n"        # a code the mapping lacks: unmapped
    "A12,Mu,Energy,2004,2004-03-01,Dismissed,Lu Twelve,52,8\n"      # forced by code
    "A13,Nu,Retail,2004,2004-04-01,Retired,Mo Thirteen,62,5\n"      # no rule matches: voluntary
)
# the mapping names its codes in other spellings than the roster ("retired " and "DISMISSED"): the counts
# match by code key, so must the browser
CATEGORIES = {"retired ": "voluntary", "DISMISSED": "forced", "Resigned": "voluntary"}
RULES = (ClassificationRule("Retired", "age", "below", 60, "forced"),
         ClassificationRule("Retired", "tenure", "at_least", 10, "excluded"))
# firm -> category, read by hand from the comments above
EXPECTED = {"A1": "voluntary", "A2": "forced", "A3": "excluded", "A4": "excluded", "A5": "voluntary",
            "A6": "forced", "A7": "forced", "A8": "forced", "A9": "forced", "A10": "voluntary",
            "A11": "unmapped", "A12": "forced", "A13": "voluntary"}
ROBUSTNESS_LINK = re.compile(r'<a href="([^"]+)" title="the (?:forced|counted) departures under this reading">'
                             r'([\d,]+)</a>')


def built(store: Store, rules: tuple[ClassificationRule, ...] = RULES) -> int:
    """The small roster with the mapping version (rules, and two overrides) as its settings' mapping."""
    roster = import_roster(store, (HEADER + ROWS).encode(), "rules.csv", name="rules").roster
    mapping = store.save_mapping_version("rule map", CATEGORIES, rules=rules)
    ids = store.departures(roster.id).set_index("firm_id")["id"]
    mapping = add_override(store, roster, mapping, int(ids["A1"]), "voluntary", "board statement: a retirement")
    add_override(store, roster, mapping, int(ids["A8"]), "forced", "press release of the board")
    store.update_settings(roster.id, mapping_name="rule map")
    return roster.id


def _params(href: str) -> dict[str, str]:
    return {k: v[0] for k, v in parse_qs(urlsplit(html.unescape(href)).query).items()}


def _total(client: Any, roster_id: int, params: dict[str, Any]) -> int:
    response = client.get(f"/api/rosters/{roster_id}/departures", params={**params, "per_page": 1})
    assert response.status_code == 200, response.text
    return int(response.json()["total"])


def test_each_record_gets_the_category_the_rules_and_overrides_give(store: Store) -> None:
    roster_id = built(store)
    client = make_client(store)
    body = client.get(f"/api/rosters/{roster_id}/departures", params={"per_page": 100}).json()
    assert body["mapping_label"] == "rule map v3"
    assert {d["firm_id"]: d["category"] for d in body["departures"]} == EXPECTED
    # the rules moved A2, A6 (to forced) and A3, A4 (to excluded); A1 too, but its override takes precedence
    for category in ("forced", "voluntary", "excluded", "unmapped"):
        listed = client.get(f"/api/rosters/{roster_id}/departures", params={"category": category}).json()
        assert sorted(d["firm_id"] for d in listed["departures"]) == sorted(
            f for f, c in EXPECTED.items() if c == category), category
    counted = sum(c in ("forced", "voluntary") for c in EXPECTED.values())
    assert _total(client, roster_id, {"category": "counted"}) == counted == 10
    # sorted by category: the SQL sort uses the same CASE (alphabetical: excluded, forced, unmapped, voluntary)
    ordered = client.get(f"/api/rosters/{roster_id}/departures", params={"sort": "category", "per_page": 100})
    assert [d["category"] for d in ordered.json()["departures"]] == sorted(EXPECTED.values())


def test_rules_name_their_code_in_any_spelling(store: Store) -> None:
    """A rule written "RETIRED  " (as a rules CSV typed by hand may have it) reaches the roster's "Retired"
    records, in the counts and in the browser alike: rules match codes by code key, as mappings do. Expected
    categories: the same hand counts as for the rules spelled as stored."""
    respelled = tuple(ClassificationRule("RETIRED  ", r.field, r.comparison, r.value, r.category) for r in RULES)
    roster_id = built(store, respelled)
    client = make_client(store)
    body = client.get(f"/api/rosters/{roster_id}/departures", params={"per_page": 100}).json()
    assert {d["firm_id"]: d["category"] for d in body["departures"]} == EXPECTED
    years = {f"A{i}": int(row.split(",")[3]) for i, row in enumerate(ROWS.splitlines(), start=1)}
    table = {row["year"]: row for row in client.get(f"/api/rosters/{roster_id}/coverage").json()["table"]}
    for year in (2001, 2002):
        for category in ("forced", "excluded"):
            assert table[year][category] == sum(1 for f, c in EXPECTED.items()
                                                if c == category and years[f] == year), (year, category)


def test_coverage_counts_equal_the_linked_lists_and_the_hand_counts(store: Store) -> None:
    roster_id = built(store)
    client = make_client(store)
    years = {f"A{i}": int(row.split(",")[3]) for i, row in enumerate(ROWS.splitlines(), start=1)}
    table = {row["year"]: row for row in client.get(f"/api/rosters/{roster_id}/coverage").json()["table"]}
    for year in (2001, 2002, 2003, 2004):
        for category in ("forced", "voluntary", "excluded"):
            by_hand = sum(1 for f, c in EXPECTED.items() if c == category and years[f] == year)
            assert table[year][category] == by_hand, (year, category)
            assert _total(client, roster_id, {"year": year, "category": category}) == by_hand, (year, category)
    links = COUNT_LINK.findall(client.get(f"/rosters/{roster_id}/coverage").text)
    assert len(links) >= 4 * 3
    for href, shown in links:
        assert _total(client, roster_id, _params(href)) == int(shown.replace(",", "")), href


def test_csv_export_carries_the_same_categories(store: Store) -> None:
    roster_id = built(store)
    client = make_client(store)
    response = client.get(f"/rosters/{roster_id}/departures.csv")
    assert response.status_code == 200
    rows = list(csv.DictReader(io.StringIO(response.text)))
    assert {r["Firm id"]: r["Category"] for r in rows} == EXPECTED
    forced = list(csv.DictReader(io.StringIO(
        client.get(f"/rosters/{roster_id}/departures.csv", params={"category": "forced"}).text)))
    assert sorted(r["Firm id"] for r in forced) == sorted(f for f, c in EXPECTED.items() if c == "forced")


# -- the demo roster: every count link on every page, with a rule and an override -------------------------
def _demo_with_rules(demo_store: Store) -> tuple[Store, int, int]:
    """demo roster 1 under a copy of the standard mapping with "Retired below 60 -> forced" and one override
    (the first 2010 record counted forced by code, set excluded); returns the store, the record's id, its line."""
    roster = demo_store.get_roster(1)
    standard = demo_store.get_mapping("demo standard", 1)
    mapping = demo_store.save_mapping_version("demo ruled", dict(standard.categories),
                                              rules=(ClassificationRule("Retired", "age", "below", 60, "forced"),))
    records = demo_store.departures(1)
    cats = records["reason"].map(dict(standard.categories))
    chosen = records.loc[(records["year"] == 2010) & (cats == "forced")].sort_values("line").iloc[0]
    add_override(demo_store, roster, mapping, int(chosen["id"]), "excluded", "acting chief, not a departure")
    demo_store.update_settings(1, mapping_name="demo ruled")
    return demo_store, int(chosen["id"]), int(chosen["line"])


def test_the_rule_moves_the_records_pandas_finds(demo_store: Store, demo_clean: pd.DataFrame) -> None:
    store, _, line = _demo_with_rules(demo_store)
    client = make_client(store)
    cats = demo_clean["Exit Reason"].map(read_mapping("mapping-standard.csv")).fillna("unmapped")
    age = pd.to_numeric(demo_clean["Age at Exit"], errors="coerce")
    moved = (demo_clean["Exit Reason"] == "Retired") & (age.map(math.floor, na_action="ignore") < 60)
    cats = cats.mask(moved, "forced").mask(demo_clean["line"] == line, "excluded")
    assert moved.sum() > 100  # the rule matters: pandas finds hundreds of retirements below 60
    for year in (1998, 2005, 2010, 2022):
        for category in ("forced", "voluntary", "excluded"):
            expected = int(((demo_clean["year"] == year) & (cats == category)).sum())
            assert _total(client, 1, {"year": year, "category": category}) == expected, (year, category)


def test_every_linked_count_equals_the_linked_lists_total_with_rules(demo_store: Store) -> None:
    store, _, _ = _demo_with_rules(demo_store)
    client = make_client(store)
    for page, minimum in (("coverage", 5 * 28), ("trend", 2 * 25), ("sectors", 2 * 6), ("reasons", 2 * 10)):
        text = client.get(f"/rosters/1/{page}").text
        links = COUNT_LINK.findall(text)
        assert len(links) >= minimum, page
        for href, shown in links:
            params = _params(href)
            assert params.get("mapping") == "demo ruled:2" or page == "reasons", href
            assert _total(client, 1, params) == int(shown.replace(",", "")), (page, href)
    text = client.get("/rosters/1/robustness").text
    links = ROBUSTNESS_LINK.findall(text)
    refs = {_params(h)["mapping"] for h, _ in links}
    assert "demo ruled:2" in refs, refs  # the reading with the rule and the override
    for href, shown in links:
        assert _total(client, 1, _params(href)) == int(shown.replace(",", "")), href


# -- interim and notice-day rules: the other two fields ---------------------------------------------------
NOTICE_CSV = (
    "firm_id,year,date,announced,reason,interim\n"
    "B1,2001,2001-06-30,2001-01-01,Retired,yes\n"   # 180 days' notice (< 183); interim: rule 2 -> excluded
    "B2,2001,2001-06-30,2000-06-01,Retired,yes\n"   # 394 days: rule 1 -> voluntary before the interim rule
    "B3,2001,2001-06-30,2001-06-20,Retired,no\n"    # 10 days, not interim: rule 3 -> forced
    "B4,2001,2001-06-30,,Retired,no\n"              # no notice, not interim: its code, voluntary
    "B5,2001,2001-06-30,,Retired,yes\n"             # no notice, interim: rule 2 -> excluded
    "B6,2001,2001-06-30,2001-05-31,Retired,\n"      # exactly 30 days (not below 30), no flag: voluntary
)
NOTICE_RULES = (ClassificationRule("Retired", "notice_days", "at_least", 183, "voluntary"),
                ClassificationRule("Retired", "interim", "equals", 1, "excluded"),
                ClassificationRule("Retired", "notice_days", "below", 30, "forced"))
NOTICE_EXPECTED = {"B1": "excluded", "B2": "voluntary", "B3": "forced", "B4": "voluntary", "B5": "excluded",
                   "B6": "voluntary"}


def test_interim_and_notice_day_rules_classify_as_by_hand(store: Store) -> None:
    roster = import_roster(store, NOTICE_CSV.encode(), "notice.csv", name="notice").roster
    store.save_mapping_version("notice map", {"Retired": "voluntary"}, rules=NOTICE_RULES)
    store.update_settings(roster.id, mapping_name="notice map")
    client = make_client(store)
    body = client.get(f"/api/rosters/{roster.id}/departures").json()
    assert {d["firm_id"]: d["category"] for d in body["departures"]} == NOTICE_EXPECTED
    table = client.get(f"/api/rosters/{roster.id}/coverage").json()["table"]
    row = next(r for r in table if r["year"] == 2001)
    for category in ("forced", "voluntary", "excluded"):
        by_hand = sum(c == category for c in NOTICE_EXPECTED.values())
        assert row[category] == by_hand == _total(client, roster.id, {"year": 2001, "category": category})
