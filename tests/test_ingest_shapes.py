"""Awkward but ordinary files, built here: title blocks, footers, a desk's own header words, every date form,
code spellings, still-in-post rows, ambiguous day/month columns; the dry run before any import.

Expected values are worked out by hand from the rows each test writes (the files are ours, invented here);
Excel's 1900 date system (serial 1 = 1900-01-01, with the phantom 29 Feb 1900) is from Microsoft's
documentation of the DATEVALUE function, from memory.
"""

from __future__ import annotations

import csv
import io
import json
from datetime import date, datetime
from pathlib import Path

import openpyxl
import pandas as pd
import pytest

from app.cli import main
from app.intake.dates import parse_dates
from app.intake.ingest import RosterFileError, import_roster, preview_roster, review_roster
from app.intake.reasons import suggest_category
from app.stats.cells import assign_categories, code_key
from app.store import HEAD_REVISION, Store

TODAY = date(2026, 6, 1)


def csv_bytes(rows: list[list[object]], delimiter: str = ",") -> bytes:
    buf = io.StringIO(newline="")
    csv.writer(buf, delimiter=delimiter, lineterminator="\r\n").writerows(rows)
    return buf.getvalue().encode()


def xlsx_bytes(rows: list[list[object]]) -> bytes:
    wb = openpyxl.Workbook()
    ws = wb.active
    assert ws is not None
    for row in rows:
        ws.append(row)
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


DESK = ["Ticker", "Issuer", "Chief executive", "FY", "Date left", "How left", "Years in post"]
DATA = [
    ["AB1", "Albatross Bay plc", "P. Quill", "2015", "2015-03-31", "Retired", "7"],
    ["CD2", "Cedar Drift Ltd", "R. Moss", "2016", "2016-06-15", "Dismissed by board", "3"],
    ["AB1", "Albatross Bay plc", "T. Fenn", "2019", "2019-01-10", "Resigned", "4"],
    ["EF3", "Ember Fold SA", "L. Ward", "2018", "2018-11-02", "Retired", "9"],
]


def _shapes() -> list[tuple[str, bytes, str, int, dict[str, str]]]:
    shapes: list[tuple[str, bytes, str, int, dict[str, str]]] = []
    desk_roles = {"firm_id": "Ticker", "firm_name": "Issuer", "executive": "Chief executive", "year": "FY",
                  "date": "Date left", "reason": "How left", "tenure": "Years in post"}
    # 1. title block, generated-on line and a blank row above the header
    shapes.append(("title block", csv_bytes([["Departures export"], ["Generated on 2026-05-01 by desk"], [],
                                             DESK, *DATA]), "t.csv", 4, desk_roles))
    # 2. plain: the header is line 1
    shapes.append(("plain", csv_bytes([DESK, *DATA]), "p.csv", 1, desk_roles))
    # 3. workbook: title in A1, blank row, header on row 3, real dates, a source footer
    wb_rows: list[list[object]] = [["CEO departures, all issuers"], [], DESK]
    wb_rows += [[*r[:4], datetime.fromisoformat(r[4]), *r[5:]] for r in DATA]
    wb_rows += [[], ["Source: invented for the tests"]]
    shapes.append(("workbook", xlsx_bytes(wb_rows), "w.xlsx", 3, desk_roles))
    # 4. semicolons, a notes row above the header
    shapes.append(("semicolon notes", csv_bytes([["Note: figures are provisional"], DESK, *DATA], ";"),
                   "s.csv", 2, desk_roles))
    # 5. tabs, two title lines, a totals footer
    shapes.append(("tabs totals", csv_bytes([["Board changes"], ["Quarter 2"], DESK, *DATA,
                                             ["Total", "", "", "", "", "", "4"]], "\t"), "x.tsv", 3, desk_roles))
    # 6. a date column named in no word list: its values say it is the date
    shapes.append(("date by values", csv_bytes([["Ticker", "Reason", "When"], *[[r[0], r[5], r[4]] for r in DATA]]),
                   "d.csv", 1, {"firm_id": "Ticker", "reason": "Reason", "date": "When"}))
    # 7. a reason column named "Outcome": departure wording says it is the reason
    shapes.append(("reason by values", csv_bytes([["Ticker", "Outcome", "FY"], *[[r[0], r[5], r[3]] for r in DATA]]),
                   "r.csv", 1, {"firm_id": "Ticker", "reason": "Outcome", "year": "FY"}))
    # 8. a firm id column named "Key": short, repeating values say it is the firm id
    shapes.append(("id by values", csv_bytes([["Key", "Reason", "FY"], *[[r[0], r[5], r[3]] for r in DATA]]),
                   "k.csv", 1, {"firm_id": "Key", "reason": "Reason", "year": "FY"}))
    # 9. firm names only: the company column identifies the firms
    shapes.append(("names only", csv_bytes([["Company", "Why", "Exit"], *[[r[1], r[5], r[4]] for r in DATA]]),
                   "c.csv", 1, {"firm_id": "Company", "reason": "Why", "date": "Exit"}))
    # 10. workbook with the header on row 5 under a block of notes, years only
    shapes.append(("workbook notes", xlsx_bytes([["Prepared by the governance desk"], ["Confidential"],
                                                 ["Figures in fiscal years"], [],
                                                 ["Ref", "Cause", "Year of exit"],
                                                 *[[r[0], r[5], int(r[3])] for r in DATA]]),
                   "n.xlsx", 5, {"firm_id": "Ref", "reason": "Cause", "year": "Year of exit"}))
    # 11. a long free-text title sentence with commas, then the header
    shapes.append(("sentence title", csv_bytes([["This file lists every chief executive departure we found, "
                                                 "by issuer and fiscal year, as of May"], DESK, *DATA]),
                   "l.csv", 2, desk_roles))
    return shapes


SHAPES = _shapes()


@pytest.mark.parametrize(("label", "data", "filename", "header_row", "roles"), SHAPES, ids=[s[0] for s in SHAPES])
def test_header_row_and_roles_found(label: str, data: bytes, filename: str, header_row: int,
                                    roles: dict[str, str]) -> None:
    preview = preview_roster(data, filename)
    assert preview.header_row == header_row, preview.header_why
    assert preview.roles == roles
    assert set(preview.guesses) == set(roles)
    for guess in preview.guesses.values():
        assert guess.confidence in ("high", "medium", "low") and guess.why


@pytest.mark.parametrize(("label", "data", "filename", "header_row", "roles"), SHAPES, ids=[s[0] for s in SHAPES])
def test_awkward_files_import_without_flags(store: Store, label: str, data: bytes, filename: str,
                                            header_row: int, roles: dict[str, str]) -> None:
    report = import_roster(store, data, filename, today=TODAY)
    assert (report.header_row, report.accepted, report.rejected) == (header_row, 4, 0)
    deps = store.departures(report.roster.id)
    assert sorted(deps["firm_id"].str[:2]) == ["AB", "AB", "CD", "EF"] or "Company" in roles.values()
    assert sorted(deps["year"]) == [2015, 2016, 2018, 2019]


def test_title_and_footer_left_out_with_notes(store: Store) -> None:
    data = csv_bytes([["Departures export"], [], DESK, *DATA, [], ["Source: invented"],
                      ["Total", "", "", "", "", "", "23"]])
    report = import_roster(store, data, "f.csv", today=TODAY)
    assert (report.header_row, report.accepted, report.rejected) == (3, 4, 0)
    notes = " ".join(report.messages)
    assert "line 1 above it (a title block or notes) was left out" in notes
    assert "Lines 9-10 after the data look like a footer" in notes and "were left out, not rejected" in notes


def test_footer_like_line_inside_the_data_is_not_dropped(store: Store) -> None:
    rows = [DESK, DATA[0], ["Total", "", "", "", "", "", "1"], DATA[1]]
    report = import_roster(store, csv_bytes(rows), "m.csv", today=TODAY)
    assert report.accepted == 2 and [r.line for r in report.rejected_rows] == [3]


def test_header_row_override_and_its_errors(store: Store) -> None:
    data = csv_bytes([["Departures export"], DESK, *DATA])
    assert preview_roster(data, "o.csv").header_row == 2
    forced = preview_roster(data, "o.csv", header_row=3)  # the analyst's choice wins, even a poor one
    assert forced.header_row == 3 and forced.headers == tuple(DATA[0]) and len(forced.rows) == 3
    with pytest.raises(RosterFileError, match="Header row 40 is past the end of the file"):
        preview_roster(data, "o.csv", header_row=40)
    blank = csv_bytes([["Departures export"], [], DESK, *DATA])
    with pytest.raises(RosterFileError, match="Header row 2 is blank"):
        preview_roster(blank, "b.csv", header_row=2)
    assert preview_roster(blank, "b.csv", header_row=3).header_row == 3


# -- dates -------------------------------------------------------------------------------------------
@pytest.mark.parametrize(("value", "iso", "fiscal"), [
    ("2015-06-30", "2015-06-30", 2015), ("30/06/2015", "2015-06-30", 2015), ("20150630", "2015-06-30", 2015),
    ("30-Jun-2015", "2015-06-30", 2015), ("Jun 30, 2015", "2015-06-30", 2015),
    ("42185", "2015-06-30", 2015),  # Excel serial: 42185 days after 1899-12-30
    ("Jun-2015", "2015-06", 2015), ("06/2015", "2015-06", 2015), ("June 2015", "2015-06", 2015),
    ("2015-06", "2015-06", 2015), ("Jun-15", "2015-06", 2015), ("2017", None, 2017), ("FY2017", None, 2017),
])
def test_every_date_form(value: str, iso: str | None, fiscal: int) -> None:
    parsed = parse_dates(pd.Series([value]), max_year=2027)
    assert (parsed.iso[0], parsed.year[0], parsed.status[0]) == (iso, fiscal, "")


def test_fiscal_year_end_march() -> None:
    values = pd.Series(["2020-02-01", "2020-03-31", "2020-04-01", "May 2020", "2020"])
    parsed = parse_dates(values, max_year=2027, fy_end=3)
    # named by the calendar year in which the fiscal year ends; a bare year is that fiscal year
    assert list(parsed.year) == [2020, 2020, 2021, 2021, 2020]


def test_day_month_order_is_decided_for_the_whole_column() -> None:
    dmy = parse_dates(pd.Series(["03/04/2015", "25/04/2015"]), max_year=2027)
    assert list(dmy.iso) == ["2015-04-03", "2015-04-25"] and dmy.order == "dmy"
    mdy = parse_dates(pd.Series(["03/04/2015", "04/25/2015", "04/26/2015"]), max_year=2027)
    assert list(mdy.iso) == ["2015-03-04", "2015-04-25", "2015-04-26"] and mdy.order == "mdy"
    unsure = parse_dates(pd.Series(["03/04/2015", "05/06/2016"]), max_year=2027)
    assert unsure.order == "dmy" and "no value shows" in unsure.message


def test_fiscal_year_end_on_import_and_rule_stated(store: Store) -> None:
    rows = [["Ticker", "Reason", "Exit date"], ["A1", "Retired", "2020-02-01"], ["B2", "Retired", "2020-05-01"]]
    review = review_roster(csv_bytes(rows), "fy.csv", fy_end=3, today=TODAY)
    assert "end in March" in review.date_rule and "fiscal 2021" in review.date_rule
    report = import_roster(store, csv_bytes(rows), "fy.csv", fy_end=3, today=TODAY)
    assert list(store.departures(report.roster.id)["year"]) == [2020, 2021]
    with pytest.raises(RosterFileError, match="month number 1..12"):
        review_roster(csv_bytes(rows), "fy.csv", fy_end=13)


def test_mixed_date_forms_all_read(store: Store) -> None:
    rows = [["Ticker", "Reason", "Exit"], ["A", "Retired", "Jun-15"], ["B", "Retired", "2017"],
            ["C", "Retired", "31/12/2014"], ["D", "Retired", "June 2016"], ["E", "Retired", "42185"]]
    report = import_roster(store, csv_bytes(rows), "mix.csv", today=TODAY)
    assert report.rejected == 0
    deps = store.departures(report.roster.id)
    assert list(deps["year"]) == [2015, 2017, 2014, 2016, 2015]
    assert list(deps["date"].fillna("")) == ["2015-06", "", "2014-12-31", "2016-06", "2015-06-30"]


# -- codes and still in post -------------------------------------------------------------------------
SPELLINGS = ["Retired", "RETIRED", "Retired ", " retired", "Retired", "Forced \u2013 out", "forced - out",
             "Forced  -  out", "Board\u2019s decision", "board's decision"]


def test_one_code_per_spelling_keeps_the_raw_spelling(store: Store) -> None:
    rows = [["Ticker", "Reason", "FY"]] + [[f"F{i}", s, str(2000 + i)] for i, s in enumerate(SPELLINGS)]
    report = import_roster(store, csv_bytes(rows), "codes.csv", today=TODAY)
    deps = store.departures(report.roster.id)
    assert list(deps["reason"]) == ["Retired"] * 5 + ["Forced \u2013 out"] * 3 + ["Board\u2019s decision"] * 2
    assert list(deps["reason_raw"]) == SPELLINGS
    assert report.review is not None
    groups = {g.code: dict(g.variants) for g in report.review.code_groups}
    assert groups["Retired"] == {"Retired": 2, "RETIRED": 1, "Retired ": 1, " retired": 1}
    assert set(store.reason_counts(report.roster.id)["code"]) == {"Retired", "Forced \u2013 out",
                                                                  "Board\u2019s decision"}


def test_mapping_naming_each_code_once_covers_every_spelling() -> None:
    reasons = pd.Series(SPELLINGS)
    mapping = {"retired": "voluntary", "FORCED-OUT": "forced", "forced - out": "forced",
               "Board's decision": "forced"}
    got = assign_categories(reasons, mapping)
    assert list(got) == ["voluntary"] * 5 + ["forced"] * 5
    assert code_key("  Forced \u2014  Out ") == code_key("forced - out") == "forced - out"


def test_still_in_post_rows_are_accepted(store: Store) -> None:
    rows = [["Ticker", "Reason", "Exit date"], ["A", "Retired", "2019-05-01"], ["B", "Still in post", ""],
            ["C", "Incumbent", ""], ["D", "Retired", ""]]
    report = import_roster(store, csv_bytes(rows), "sip.csv", today=TODAY)
    assert (report.accepted, report.rejected) == (3, 1)
    assert "missing year and date" in report.rejected_rows[0].reason
    deps = store.departures(report.roster.id)
    assert list(deps["year"]) == [2019, 2019, 2019] and deps["date"].isna().tolist() == [False, True, True]
    assert suggest_category("Still in post").category == "excluded"
    assert report.review is not None and report.review.still_in_post == 2


# -- the dry run -------------------------------------------------------------------------------------
def _messy() -> bytes:
    rows = [["Roster of departures"], ["Ticker", "Reason", "Exit date"]]
    rows += [[f"F{i}", "Retired", f"{(i % 12) + 1:02d}/25/2015"] for i in range(6)]  # month-first dates
    rows += [[f"G{i}", "Retired", f"{(i % 9) + 13}/03/2016"] for i in range(7)]  # day-first dates
    rows += [["", "Retired", "2016-01-01"], ["", "Dismissed", "2016-01-02"], ["", "Retired", "2016-01-03"]]
    rows += [["F0", "Retired", "01/25/2015"]]  # exact duplicate of line 3
    return csv_bytes(rows)


def test_dry_run_groups_rejections_and_stores_nothing(store: Store) -> None:
    before = store.counts()
    review = review_roster(_messy(), "messy.csv", today=TODAY)
    assert store.counts() == before
    assert (review.header_row, review.rows, review.accepted, review.rejected, review.duplicates) == (2, 17, 7, 9, 1)
    by_reason = {g.reason: g for g in review.rejected_groups}
    assert [g.count for g in review.rejected_groups] == [6, 3]
    impossible = next(g for g in review.rejected_groups if g.reason.startswith("impossible date"))
    assert [e.line for e in impossible.examples] == [3, 4]
    assert any(k.startswith("missing firm id") for k in by_reason)
    assert any("Read dates as month/day/year: 6 rejected row(s)" in f for f in review.fixes)
    report = import_roster(store, _messy(), "messy.csv", today=TODAY)
    assert (report.accepted, report.rejected, report.duplicates) == (review.accepted, review.rejected,
                                                                     review.duplicates)


def test_cli_dry_run_json_and_header_row(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    path = tmp_path / "messy.csv"
    path.write_bytes(_messy())
    db = str(tmp_path / "cli.db")
    assert main(["import", str(path), "--db", db, "--dry-run", "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert payload["dry_run"] is True and payload["header_row"] == 2
    assert (payload["accepted"], payload["rejected"]) == (7, 9)
    assert payload["rejected_groups"][0]["count"] == 6 and len(payload["rejected_groups"][0]["examples"]) == 2
    assert Store(f"sqlite:///{db}").counts()["rosters"] == 0
    assert main(["import", str(path), "--db", db, "--header-row", "2", "--date-order", "mdy", "--json"]) == 0
    imported = json.loads(capsys.readouterr().out)
    assert imported["header_row"] == 2 and imported["rejected"] == 10  # day-first dates are now impossible


def test_migration_adds_the_raw_spelling_to_an_old_database(tmp_path: Path) -> None:
    """A database written by Helmshift 0.1 (tests/data/store-0.1.sql) stored each spelling as its code: on
    upgrade every record's raw spelling is its code."""
    import sqlite3

    old = tmp_path / "old.db"
    with sqlite3.connect(old) as conn:
        conn.executescript((Path(__file__).parent / "data" / "store-0.1.sql").read_text(encoding="utf-8"))
    upgraded = Store(f"sqlite:///{old}")
    assert upgraded.schema_version() == int(HEAD_REVISION)
    deps = upgraded.departures(upgraded.get_roster("Legacy roster").id)
    assert len(deps) == 4
    assert list(deps["reason_raw"]) == list(deps["reason"])
