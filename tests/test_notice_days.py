"""Announcement dates and notice days (issue 16): the role, the dates, the stored notice, rules on it.

References: notice days are checked against Python's ``datetime`` (``strptime`` with the format each value
was written in, then date subtraction), not Helmshift's numpy date arithmetic; what a rule moves against a
count by hand over the rows written out below; the cells against the records read back (the two paths a rule
can take); the Excel serial number against Excel's 1900 date system (serial 44197 is 1 January 2021).
"""

from __future__ import annotations

import json
import random
import sqlite3
from datetime import date, datetime, timedelta
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from conftest import make_client

from app.analysis.cellstore import categorise, detail_counts
from app.analysis.rules import notice_preset_rules, rules_to_list, with_notice_preset
from app.cli import main
from app.intake.announced import AFTER_EXIT, COARSE, UNREADABLE
from app.intake.ingest import import_roster, review_roster
from app.intake.roles import guess_roles, resolve_roles
from app.intake.rule_files import parse_rules_csv, rules_csv
from app.stats.rules import make_rule
from app.store import Store
from app.types import ClassificationRule

CATEGORIES = {"Retired": "voluntary", "Resigned": "voluntary", "Dismissed": "forced"}
# firm, reason, exit date, its strptime format, announcement, its format, age ("" = missing); the format None
# marks a value that gives no whole day: unreadable, empty, month-year, or (row A5) after the exit
ROWS: list[tuple[str, str, str, str | None, str, str | None, str]] = [
    ("A1", "Retired", "30/06/2019", "%d/%m/%Y", "10/01/2019", "%d/%m/%Y", "58"),
    ("A2", "Retired", "30/06/2019", "%d/%m/%Y", "2018-10-01", "%Y-%m-%d", "57"),
    ("A3", "Retired", "15/03/2020", "%d/%m/%Y", "01/03/2020", "%d/%m/%Y", "62"),  # day-first, proven by "15"
    ("A4", "Dismissed", "15/01/2020", "%d/%m/%Y", "2020-01-15", "%Y-%m-%d", "50"),  # announced on the day
    ("A5", "Retired", "01/03/2020", "%d/%m/%Y", "2020-05-01", None, "55"),  # announced after the exit
    ("A6", "Retired", "01/03/2020", "%d/%m/%Y", "not known", None, "55"),  # unreadable
    ("A7", "Retired", "Jun-2020", None, "2020-01-01", None, "55"),  # the exit only a month
    ("A8", "Resigned", "01/02/2021", "%d/%m/%Y", "", None, "45"),
    ("A9", "Retired", "31/12/2021", "%d/%m/%Y", "44197", "serial", "59"),
    ("B1", "Retired", "01/07/2022", "%d/%m/%Y", "1 Feb 2022", "%d %b %Y", "61"),
    ("B2", "Retired", "30/09/2022", "%d/%m/%Y", "2022-04-01", "%Y-%m-%d", ""),
    ("B3", "Retired", "05/05/2023", "%d/%m/%Y", "01/05/2023", "%d/%m/%Y", "40"),
]


def roster_csv(rows: list[tuple[str, ...]], header: str = "Ticker,Exit Reason,Exit Date,Date Announced,Age") -> bytes:
    return (header + "\n" + "\n".join(",".join(r[i] for i in (0, 1, 2, 4, 6)) for r in rows) + "\n").encode()


def by_hand(value: str, fmt: str | None) -> date | None:
    if fmt is None:
        return None
    if fmt == "serial":  # Excel's 1900 system: day 1 is 1900-01-01, counted from 1899-12-30 past 1 March 1900
        return date(1899, 12, 30) + timedelta(days=int(value))
    return datetime.strptime(value, fmt).date()


def hand_notice(row: tuple[str, ...]) -> int | None:
    exit_day, announced = by_hand(row[2], row[3]), by_hand(row[4], row[5])
    return None if exit_day is None or announced is None else (exit_day - announced).days


def imported(store: Store, data: bytes | None = None, name: str = "dated") -> Any:
    report = import_roster(store, data or roster_csv(ROWS), f"{name}.csv", name=name)
    mapping = store.save_mapping_version(f"{name} map", CATEGORIES, note="test")
    store.update_settings(report.roster.id, mapping_name=mapping.name)
    return report


# -- the role ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("header", ["Date announced", "Announcement", "Announced on", "Notice date",
                                    "Announcement Date (dd/mm/yyyy)", "ANNOUNCED"])
def test_announcement_headers_name_the_role(header: str) -> None:
    guesses, _ = guess_roles(["Ticker", "Exit Reason", "Exit Date", header])
    assert guesses["announced"].header == header and guesses["date"].header == "Exit Date"


def test_a_notice_length_in_days_is_not_an_announcement_date() -> None:
    columns = {"Ticker": ["A", "B", "A"], "Why": ["Retired", "Dismissed", "Retired"],
               "Exit": ["2020-01-01", "2021-05-01", "2022-03-01"], "Notice (days)": ["90", "0", "183"]}
    guesses, _ = guess_roles(list(columns), columns)
    assert "announced" not in guesses and guesses["date"].header == "Exit"


@pytest.mark.parametrize("order", [("When", "Other"), ("Other", "When")])
def test_of_two_unnamed_date_columns_the_earlier_is_the_announcement(order: tuple[str, str]) -> None:
    values = {"When": ["2019-06-30", "2020-01-15", "2021-03-01", "2018-12-31"],
              "Other": ["2019-01-10", "2019-12-01", "2021-03-01", "2018-06-01"]}
    columns = {"Ref": ["A1", "A2", "A1", "B3"], "Why": ["Retired", "Dismissed", "Resigned", "Retired"]}
    columns |= {h: values[h] for h in order}
    guesses, _ = guess_roles(list(columns), columns)
    assert guesses["date"].header == "When" and guesses["announced"].header == "Other"
    assert guesses["announced"].confidence == "low" and "on or before" in guesses["announced"].why


def test_a_later_date_column_beside_a_named_exit_date_is_left_alone() -> None:
    columns = {"Ref": ["A1", "A2", "A3"], "Why": ["Retired", "Dismissed", "Retired"],
               "Exit Date": ["2019-01-01", "2019-02-01", "2019-03-01"], "X": ["2019-05-01", "2019-06-01", "2019-07-01"]}
    guesses, _ = guess_roles(list(columns), columns)
    assert guesses["date"].header == "Exit Date" and "announced" not in guesses


def test_the_role_is_overridable_like_the_others() -> None:
    headers = ["Ticker", "Exit Reason", "Exit Date", "Date Announced", "Board Date"]
    roles, _, guesses = resolve_roles(headers, {"announced": "board date"})
    assert roles["announced"] == "Board Date" and guesses["announced"].why == "chosen by you"
    roles, _, _ = resolve_roles(headers, {"announced": ""})
    assert "announced" not in roles


def test_cli_column_announced_and_the_dry_run(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "dated.csv"
    path.write_bytes(roster_csv(ROWS, header="Ticker,Exit Reason,Exit Date,Board Date,Age"))
    assert main(["import", str(path), "--dry-run", "--json", "--db", str(tmp_path / "dry.db"),
                 "--column", "announced=Board Date"]) == 0
    dry = json.loads(capsys.readouterr().out)
    assert dry["roles"]["announced"] == "Board Date"
    kept = {w["reason"]: w["lines"] for w in dry["kept_with_warnings"]}
    # lines are 1-based lines of the file (the header is line 1): rows A6, A5 and A7 are the 7th, 6th, 8th lines
    assert kept == {UNREADABLE: [7], AFTER_EXIT: [6], COARSE: [8]}
    assert main(["import", str(path), "--db", str(tmp_path / "cli.db"), "--json",
                 "--column", "announced=Board Date", "--save-profile", "board desk"]) == 0
    assert json.loads(capsys.readouterr().out)["accepted"] == len(ROWS)
    # the intake profile keeps the choice: next week's file from the same desk reads it without the flag
    path.write_bytes(roster_csv(ROWS[:6], header="Ticker,Exit Reason,Exit Date,Board Date,Age"))
    assert main(["import", str(path), "--dry-run", "--json", "--db", str(tmp_path / "cli.db"),
                 "--profile", "board desk"]) == 0
    again = json.loads(capsys.readouterr().out)
    assert again["profile"] == "board desk" and again["role_guesses"]["announced"] == {
        "column": "Board Date", "confidence": "high", "why": "chosen by you"}


# -- dates and the stored notice ------------------------------------------------------------------------------
def test_notice_days_are_stored_as_counted_by_hand(store: Store) -> None:
    report = imported(store)
    assert report.accepted == len(ROWS) and report.rejected == 0  # no row is rejected for its announcement
    records = store.departures(report.roster.id)
    got = dict(zip(records["firm_id"], records["notice_days"], strict=True))
    for row in ROWS:
        expected = hand_notice(row)
        assert (pd.isna(got[row[0]]) if expected is None else got[row[0]] == expected), row
    assert sum(hand_notice(r) is not None for r in ROWS) == 8
    announced = dict(zip(records["firm_id"], records["announced"], strict=True))
    assert announced["A3"] == "2020-03-01"  # day-first, as the exit date column proved
    assert announced["A5"] == "2020-05-01" and pd.isna(announced["A6"])  # kept as read / unreadable
    review = report.review
    assert review is not None
    assert {w.reason: w.lines for w in review.kept_with_warnings} == {UNREADABLE: (7,), AFTER_EXIT: (6,),
                                                                      COARSE: (8,)}
    assert any("line 7" in m and "unreadable" in m for m in report.messages)


def test_a_roster_without_announcements_reads_null_everywhere(store: Store) -> None:
    report = import_roster(store, roster_csv(ROWS, header="Ticker,Exit Reason,Exit Date,Remarks,Age"), "plain.csv")
    assert "announced" not in report.roles
    assert store.departures(report.roster.id)["notice_days"].isna().all()
    assert store.cell_counts(report.roster.id, detail=True)["notice_days"].isna().all()


# -- rules on notice days -------------------------------------------------------------------------------
def test_retirement_with_short_notice_counts_as_forced_exactly_where_it_should(store: Store) -> None:
    report = imported(store)
    rule = make_rule("Retired", "notice_days", "below", 183, "forced")
    mapping = store.save_mapping_version("dated map", CATEGORIES, note="rule", rules=(rule,))
    # by hand: retirements whose notice (datetime) is under 183 days; retirements with no notice are missing
    retired = [r for r in ROWS if r[1] == "Retired"]
    moved = [r[0] for r in retired if (n := hand_notice(r)) is not None and n < 183]
    missing = [r[0] for r in retired if hand_notice(r) is None]
    assert moved == ["A1", "A3", "B1", "B2", "B3"] and missing == ["A5", "A6", "A7"]
    roster = store.get_roster(report.roster.id)
    [effect] = rules_to_list(store, roster, mapping)
    assert (effect["matched"], effect["moved"], effect["missing"]) == (len(moved), len(moved), len(missing))
    assert effect["text"] == "'Retired' counts as forced when announced below 183 days before the exit"
    records = store.departures(roster.id)
    decided, _ = categorise(records.assign(departures=1), mapping)
    assert sorted(decided.loc[decided["category"] == "forced", "firm_id"]) == sorted(moved + ["A4"])


def test_the_notice_preset_reads_as_the_convention_on_hand_counted_rows(store: Store) -> None:
    report = imported(store)
    base = store.get_mapping("dated map")
    preset = notice_preset_rules(base, ["Retired", "Resigned", "Dismissed"])
    assert preset == (ClassificationRule("Retired", "notice_days", "at_least", 183, "voluntary"),
                      ClassificationRule("Retired", "age", "below", 60, "forced"))
    # the plain preset already present moves after the guard, so the guard is reached first
    rules = with_notice_preset((preset[1],), preset)
    assert rules == preset and with_notice_preset(rules, preset) == rules
    mapping = store.save_mapping_version("dated map", CATEGORIES, note="preset", rules=rules)
    # by hand: a retirement under 60 is forced unless announced at least 183 days ahead; no age keeps it
    forced = [r[0] for r in ROWS if r[1] == "Dismissed" or (
        r[1] == "Retired" and r[6] != "" and int(r[6]) < 60 and not ((n := hand_notice(r)) is not None and n >= 183))]
    assert forced == ["A1", "A4", "A5", "A6", "A7", "B3"]
    decided, _ = categorise(detail_counts(store, store.get_roster(report.roster.id)), mapping)
    assert int(decided.loc[decided["category"] == "forced", "departures"].sum()) == len(forced)


def test_rules_csv_round_trips_notice_rules() -> None:
    rules = (ClassificationRule("Retired", "notice_days", "at_least", 183, "voluntary"),
             ClassificationRule("Retired", "age", "below", 60, "forced"),
             ClassificationRule("Stepped down", "notice_days", "below", 30, "forced"))
    text = rules_csv(rules)
    assert text.splitlines()[1] == "Retired,notice_days,at_least,183,voluntary"
    assert parse_rules_csv(text.encode()) == rules


def seeded_rows(n: int, seed: int) -> list[tuple[str, ...]]:
    """Invented departures: ISO exits 2000-2020, announcements 0-400 days before (some after, some missing)."""
    rng = random.Random(seed)
    rows = []
    for i in range(n):
        exit_day = date(2000, 1, 1) + timedelta(days=rng.randrange(7300))
        kind = rng.random()
        announced = ("" if kind < 0.15 else (exit_day + timedelta(days=rng.randrange(1, 60))).isoformat()
                     if kind < 0.25 else (exit_day - timedelta(days=rng.randrange(400))).isoformat())
        rows.append((f"F{rng.randrange(120):03d}", rng.choice(["Retired", "Resigned", "Dismissed"]),
                     exit_day.isoformat(), "%Y-%m-%d", announced, "%Y-%m-%d" if kind >= 0.25 else None,
                     str(rng.randrange(38, 72))))
        del i
    return rows


@pytest.mark.parametrize("seed", [3, 11])
def test_cells_and_records_agree_under_notice_rules(store: Store, seed: int) -> None:
    rows = seeded_rows(400, seed)
    report = imported(store, roster_csv(rows), name=f"seeded{seed}")
    roster = store.get_roster(report.roster.id)
    rules = (make_rule("Retired", "notice_days", "at_least", 183, "voluntary"),
             make_rule("Retired", "age", "below", 60, "forced"),
             make_rule("Resigned", "notice_days", "below", 30, "forced"))
    mapping = store.save_mapping_version(f"seeded{seed} map", CATEGORIES, note="rules", rules=rules)
    cells, cell_effects = categorise(detail_counts(store, roster), mapping)
    records, record_effects = categorise(store.departures(roster.id).assign(departures=1), mapping)
    def per_year(f: pd.DataFrame) -> pd.Series:
        return f.loc[f["category"] == "forced"].groupby("year")["departures"].sum()

    pd.testing.assert_series_equal(per_year(cells), per_year(records))
    assert [(e.matched, e.moved, e.missing) for e in cell_effects] == [
        (e.matched, e.moved, e.missing) for e in record_effects]
    # and both against datetime by hand
    notice = [hand_notice(r) for r in rows]
    forced = sum(r[1] == "Dismissed" or (r[1] == "Retired" and not (n is not None and n >= 183) and int(r[6]) < 60)
                 or (r[1] == "Resigned" and n is not None and 0 <= n < 30) for r, n in zip(rows, notice, strict=True))
    assert int(cells.loc[cells["category"] == "forced", "departures"].sum()) == forced
    assert forced > 0


# -- the Reason codes page --------------------------------------------------------------------------------
def test_the_page_offers_notice_days_only_with_announcement_dates(store: Store) -> None:
    dated = imported(store).roster.id
    plain = import_roster(store, roster_csv(ROWS, header="Ticker,Exit Reason,Exit Date,Remarks,Age"),
                          "plain.csv", name="plain").roster.id
    store.update_settings(plain, mapping_name="dated map")
    client = make_client(store)
    with_dates = client.get(f"/api/rosters/{dated}/reasons").json()
    assert "notice_days" in with_dates["rule_fields"] and with_dates["notice_note"] == ""
    assert with_dates["notice_preset"] == [
        "'Retired' counts as voluntary when announced at least 183 days before the exit",
        "'Retired' counts as forced when age is below 60 years"]
    without = client.get(f"/api/rosters/{plain}/reasons").json()
    assert "notice_days" not in without["rule_fields"] and "no announcement dates" in without["notice_note"]
    assert without["notice_preset"] == []
    assert "no announcement dates" in client.get(f"/rosters/{plain}/reasons").text
    refused = client.post(f"/rosters/{plain}/rules/preset", data={"which": "notice"}, follow_redirects=False)
    assert refused.status_code == 400 and "no announcement dates" in refused.text
    before = store.get_mapping("dated map").version
    done = client.post(f"/rosters/{dated}/rules/preset", data={"which": "notice"}, follow_redirects=False)
    assert done.status_code == 303
    saved = store.get_mapping("dated map")
    assert saved.version == before + 1 and [r.field for r in saved.rules] == ["notice_days", "age"]
    page = client.get(f"/api/rosters/{dated}/reasons").json()
    assert page["notice_preset"] == []
    assert [(r["field"], r["moved"]) for r in page["rules"]] == [("notice_days", 0), ("age", 5)]


def test_review_step_lists_the_kept_rows_with_their_lines() -> None:
    review = review_roster(roster_csv(ROWS), "dated.csv")
    assert review.accepted == len(ROWS) and review.rejected == 0
    listed = review.as_dict()["kept_with_warnings"]
    assert {w["reason"]: (w["count"], w["lines"]) for w in listed} == {
        UNREADABLE: (1, [7]), AFTER_EXIT: (1, [6]), COARSE: (1, [8])}


def test_a_refresh_that_changes_an_announcement_reports_it(store: Store) -> None:
    first = imported(store)
    rows = [r if r[0] != "A2" else (*r[:4], "2019-05-01", "%Y-%m-%d", r[6]) for r in ROWS]
    second = import_roster(store, roster_csv(rows), "dated-2.csv", into=first.roster.id)
    assert (second.version, second.added, second.removed, second.changed) == (2, 0, 0, 1)
    records = store.departures(first.roster.id)
    assert int(records.loc[records["firm_id"] == "A2", "notice_days"].iloc[0]) == (
        date(2019, 6, 30) - date(2019, 5, 1)).days
    # version 1 keeps its own notice (a run on it reopens on its rows)
    old = store.departures(first.roster.id, version=1)
    assert int(old.loc[old["firm_id"] == "A2", "notice_days"].iloc[0]) == hand_notice(ROWS[1])


@pytest.mark.sqlite_only
def test_a_roster_stored_before_revision_0015_reads_null_notice(tmp_path: Path) -> None:
    path = tmp_path / "old.db"
    con = sqlite3.connect(path)
    con.executescript((Path(__file__).parent / "data" / "store-0.1.sql").read_text(encoding="utf-8"))
    con.close()
    store = Store(f"sqlite:///{path}")
    try:
        roster = store.get_roster("Legacy roster")
        assert store.departures(roster.id)["notice_days"].isna().all()
        cells = store.cell_counts(roster.id, detail=True)
        assert len(cells) and cells["notice_days"].isna().all()
        rule = make_rule("Retired", "notice_days", "below", 183, "forced")
        mapping = store.save_mapping_version("legacy-map", store.get_mapping("legacy-map").categories, rules=(rule,))
        [effect] = rules_to_list(store, roster, mapping)
        retired = int((store.departures(roster.id)["reason"] == "Retired").sum())
        assert (effect["matched"], effect["missing"]) == (0, retired) and retired > 0
    finally:
        store.dispose()


def test_the_confirm_page_review_shows_the_kept_rows(store: Store) -> None:
    client = make_client(store)
    preview = client.post("/rosters/upload", files={"file": ("dated.csv", roster_csv(ROWS), "text/csv")})
    page = preview.context["page"]
    assert page.roles["announced"] == "Date Announced"
    form = {"token": page.token, "name": page.name} | {f"role_{r}": h for r, h in page.roles.items() if h}
    html = client.post("/rosters/review", data=form).text
    assert "Kept, with a field left empty" in html and UNREADABLE in html and "Announcement dates are read" in html
