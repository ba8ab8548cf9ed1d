"""Roster import: formats, encodings, role detection, row validation, and all-or-nothing storage.

Oracles: Python's own codecs and ``datetime`` (what a byte string or a calendar date really is),
openpyxl (Excel's serial day numbers and date cells), the csv module (how a quoted multi-line cell
is laid out), and OWASP's CSV-injection advice for the formula triggers (common practice).
"""

from __future__ import annotations

import csv
import io
import json
from datetime import date, datetime

import openpyxl
import pandas as pd
import pytest
from openpyxl.utils.datetime import from_excel, to_excel
from sqlalchemy import text

from app.intake.ingest import (
    DuplicateRosterError,
    RosterFileError,
    detect_roles,
    import_roster,
    is_still_in_post,
    preview_roster,
    rejected_rows_csv,
)
from app.intake.readers import ReadLimits
from app.intake.spreadsheet_safety import neutralise_formula, safe_csv
from app.store import DEPARTURE_FIELDS, RejectedRow, Store

DEMO_HEADER = ["Issuer Code", "Issuer Name", "Industry", "FY", "Exit Date", "Exit Reason", "Executive",
               "Age at Exit", "Years in Role", "Interim?", "Comment"]
ROWS = [
    ["KV01", "Kestrel Vane plc", "Utilities", "2011", "31/03/2011", "Retired", "Ada Quill", "61", "7", "no", ""],
    ["OB02", "Orrin Basalt", "Mining", "2012", "15/06/2012", "Dismissed", "Bram Tolle", "55", "3.5", "yes", ""],
    ["PL03", "Pell Loam", "Farming", "2013", "", "Still in post", "Cato Fenn", "48", "2", "", "serving"],
]


def make_csv(rows: list[list[str]], header: list[str] = DEMO_HEADER, delimiter: str = ",") -> str:
    buf = io.StringIO()
    csv.writer(buf, delimiter=delimiter, lineterminator="\r\n").writerows([header, *rows])
    return buf.getvalue()


def one_row(**cells: str) -> list[str]:
    row = dict(zip(DEMO_HEADER, ROWS[0], strict=True))
    row.update({k.replace("_", " "): v for k, v in cells.items()})
    return [row[h] for h in DEMO_HEADER]


# -- formats and encodings ---------------------------------------------------------------------
@pytest.mark.parametrize("delimiter", [",", ";", "\t", "|"])
def test_each_delimiter(store: Store, delimiter: str) -> None:
    rows = [*ROWS, one_row(Issuer_Name="Smith, Jones; and Tab")]
    data = make_csv(rows, delimiter=delimiter).encode()
    report = import_roster(store, data, "r.csv")
    assert report.delimiter == delimiter
    assert (report.accepted, report.rejected) == (4, 0)
    assert "Smith, Jones; and Tab" in set(store.departures(report.roster.id)["firm_name"])


@pytest.mark.parametrize(("encoding", "bom", "expected"), [
    ("utf-8", b"", "utf-8"),
    ("utf-8", b"\xef\xbb\xbf", "utf-8-sig"),
    ("cp1252", b"", "cp1252"),
    ("utf-16-le", b"\xff\xfe", "utf-16"),
])
def test_encodings(store: Store, encoding: str, bom: bytes, expected: str) -> None:
    names = ["Cr\u00e9mieux Verre S.A.", "M\u00fcller & S\u00f8n", "Caf\u00e9 \u00c6gir \u20ac"]
    rows = [one_row(Issuer_Code=f"E{i}", Issuer_Name=n) for i, n in enumerate(names)]
    data = bom + make_csv(rows).encode(encoding)
    report = import_roster(store, data, "accents.csv")
    assert report.encoding == expected
    assert report.roles["firm_id"] == "Issuer Code"  # a BOM must not stick to the first header
    assert sorted(store.departures(report.roster.id)["firm_name"]) == sorted(names)


def test_encoding_override(store: Store) -> None:
    data = make_csv([one_row(Issuer_Name="R\u00e9my")]).encode("cp1252")
    report = import_roster(store, data, "x.csv", encoding="latin-1")
    assert report.encoding == "latin-1"
    assert store.departures(report.roster.id)["firm_name"].iloc[0] == "R\u00e9my"
    with pytest.raises(RosterFileError, match="Unknown text encoding 'klingon'"):
        import_roster(store, data, "x.csv", encoding="klingon", allow_same_file=True)


def _workbook(sheets: dict[str, list[list[object]]]) -> bytes:
    wb = openpyxl.Workbook()
    wb.remove(wb.active)
    for title, rows in sheets.items():
        ws = wb.create_sheet(title)
        for r in rows:
            ws.append(r)
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def test_xlsx_named_sheet_with_date_cells(store: Store) -> None:
    header = ["Company ID", "Company", "Sector", "Departure Date", "Reason Code", "CEO", "Age", "Tenure",
              "Interim", "Notes"]
    data = _workbook({
        "Cover": [["This workbook holds an invented roster"]],
        "Departures": [
            header,
            ["A1", "Alder Tide", "Retail", datetime(2011, 3, 31), "R", "Bo Vale", 58, 4.5, True, None],
            ["A2", "Bexley Moor", "Retail", "40633", "D", "Cy Holt", 61.0, 3, "n", "serial as text"],
            [],
            ["A3", "Corran Fell", "Retail", date(2019, 12, 1), "D", "Di Ash", None, None, None, None],
        ],
    })
    with pytest.raises(RosterFileError, match=r"no sheet named 'Nope'; its sheets are: 'Cover', 'Departures'"):
        import_roster(store, data, "book.xlsx", sheet="Nope")
    preview = preview_roster(data, "book.xlsx", sheet="Departures", rows=2)
    assert preview.sheets == ("Cover", "Departures") and preview.headers == tuple(header)
    assert preview.rows[0][3] == "2011-03-31"  # a real date cell, shown as ISO text
    report = import_roster(store, data, "book.xlsx", sheet="Departures")
    assert (report.sheet, report.encoding, report.delimiter) == ("Departures", None, None)
    assert report.accepted == 3
    frame = store.departures(report.roster.id)
    assert list(frame["line"]) == [2, 3, 5]  # Excel row numbers; the blank row 4 is skipped
    # openpyxl's own conversion is the oracle for Excel's serial day 40633
    assert list(frame["date"]) == ["2011-03-31", from_excel(40633).date().isoformat(), "2019-12-01"]
    assert list(frame["year"]) == [2011, 2011, 2019]  # no year column: calendar year of the date
    assert list(frame["interim"]) == [True, False, None]
    assert frame["age"].iloc[0] == 58.0 and frame["tenure"].iloc[0] == 4.5


def test_xlsx_first_sheet_by_default(store: Store) -> None:
    data = _workbook({"Only": [DEMO_HEADER, ROWS[0]]})
    report = import_roster(store, data, "book.xlsx")
    assert report.sheet == "Only" and report.accepted == 1


# -- roles ---------------------------------------------------------------------------------------
def test_demo_headers_auto_detect() -> None:
    roles, notes = detect_roles(DEMO_HEADER)
    assert roles == {
        "firm_id": "Issuer Code", "firm_name": "Issuer Name", "sector": "Industry", "year": "FY",
        "date": "Exit Date", "reason": "Exit Reason", "executive": "Executive", "age": "Age at Exit",
        "tenure": "Years in Role", "interim": "Interim?", "notes": "Comment",
    }
    assert notes == []


@pytest.mark.parametrize(("header", "role"), [
    ("Company ID", "firm_id"), ("ticker", "firm_id"), ("FIRM", "firm_name"), ("Sector", "sector"),
    ("Year", "year"), ("Fiscal Year", "year"), ("fiscal_year", "year"), ("Departure Date", "date"),
    ("Departure date (dd/mm/yyyy)", "date"), ("Reason", "reason"), ("Reason Code", "reason"),
    ("CEO", "executive"), ("Name", "executive"), ("AGE", "age"), ("Tenure", "tenure"),
    ("Interim", "interim"), ("Notes", "notes"),
])
def test_header_variants(header: str, role: str) -> None:
    if role == "firm_name":  # a lone firm-name column is the firm id (tested in test_ingest_shapes.py)
        roles, _ = detect_roles([header, "Ticker"])
        assert roles == {role: header, "firm_id": "Ticker"}
        return
    roles, _ = detect_roles([header])
    assert roles == {role: header}


def test_explicit_roles_override_detection(store: Store) -> None:
    header = ["Ref", "Why", "When", "Year"]
    data = make_csv([["Z1", "Retired", "2011", "2012"]], header=header).encode()
    # a desk's own words are detected (issue 14): ref = firm id, why = reason
    assert detect_roles(header)[0] == {"firm_id": "Ref", "year": "Year", "reason": "Why"}
    # "when" (matched case-insensitively) replaces the detected "Year" column as the year
    report = import_roster(store, data, "z.csv", roles={"firm_id": "Ref", "reason": "why", "year": "WHEN"})
    assert report.roles == {"firm_id": "Ref", "year": "When", "reason": "Why"}
    assert list(store.departures(report.roster.id)["year"]) == [2011]


def test_explicit_role_errors(store: Store) -> None:
    data = make_csv(ROWS).encode()
    with pytest.raises(RosterFileError, match=r"No column 'Ticker' \(asked for the firm id\); the headers "
                                              r"are: Issuer Code, Issuer Name"):
        import_roster(store, data, "r.csv", roles={"firm_id": "Ticker"})
    with pytest.raises(RosterFileError, match="Unknown role 'boss'; roles are: firm_id"):
        import_roster(store, data, "r.csv", roles={"boss": "Executive"})
    # a typed column name is echoed cut to 80 characters with its length (a probe sent 100,000 characters)
    with pytest.raises(RosterFileError, match=r"No column 'xxxxxxxxxx[x]{70}'\.\.\. \(100,000 characters\) "
                                              r"\(asked for the firm id\)") as caught:
        import_roster(store, data, "r.csv", roles={"firm_id": "x" * 100_000})
    assert len(str(caught.value)) < 500
    assert store.counts()["rosters"] == 0


def test_preview(store: Store) -> None:
    data = make_csv(ROWS * 5).encode()
    preview = preview_roster(data, "r.csv", rows=4)
    assert preview.headers == tuple(DEMO_HEADER)
    assert preview.rows[0] == tuple(ROWS[0]) and len(preview.rows) == 4
    assert preview.missing_roles == () and preview.delimiter == ","
    partial = preview_roster(make_csv([["1", "x"]], header=["Key", "Text"]).encode(), "p.csv")
    assert partial.missing_roles == ("firm id", "reason code", "fiscal year or departure date")
    assert store.counts()["rosters"] == 0


# -- row validation ------------------------------------------------------------------------------
# each case: the bad row, and the phrase its rejection must carry
REJECTIONS = [
    (one_row(Issuer_Code=""), "missing firm id (column 'Issuer Code' is empty)"),
    (one_row(Exit_Reason="  "), "missing reason code"),
    (one_row(Exit_Date="31.13.2011x"), "unparseable date '31.13.2011x'; expected YYYY-MM-DD"),
    (one_row(Exit_Date="31/02/2011"), "impossible date '31/02/2011'"),
    (one_row(FY="1850", Exit_Date=""), "year 1850 is outside 1900.."),
    (one_row(FY="twenty"), "year 'twenty' is not a whole number"),
    (one_row(FY="2015"), "year 2015 and date 2011-03-31 disagree by more than one year"),
    (one_row(Age_at_Exit="old"), "age 'old' is not a number"),
    (one_row(Age_at_Exit="-3"), "negative age -3"),
    (one_row(Age_at_Exit="12"), "age 12 is outside 14..110"),
    (one_row(Years_in_Role="-1"), "negative tenure -1"),
    (one_row(Years_in_Role="n/a"), "tenure 'n/a' is not a number"),
    (one_row(**{"Interim?": "maybe"}), "interim flag 'maybe' not recognised"),
    (one_row(FY="", Exit_Date=""), "missing year and date"),
    (one_row(Comment="x\x00y"), "NUL byte in column 'Comment'"),
    (one_row(Comment="x" * 10_001), "cell in column 'Comment' has 10,001 characters (limit 10,000)"),
    (ROWS[0][:5], "wrong number of fields: 5 where the header has 11"),
]


@pytest.mark.parametrize(("row", "phrase"), REJECTIONS, ids=[p[:30] for _, p in REJECTIONS])
def test_each_rejection_with_its_line(store: Store, row: list[str], phrase: str) -> None:
    # a quoted cell holding two newlines makes data row 1 span lines 2-4, so the bad row is on line 5
    first = one_row(Issuer_Code="M1", Comment="line one\nline two\nline three")
    text_ = make_csv([first, row, ROWS[1]])
    # the csv module's own line counter is the oracle for the physical line of the bad row
    reader = csv.reader(io.StringIO(text_, newline=""))
    next(reader), next(reader)
    expected_line = reader.line_num + 1
    assert expected_line == 5
    report = import_roster(store, text_.encode(), "r.csv", today=date(2026, 6, 1))
    assert [(r.line, phrase in r.reason) for r in report.rejected_rows] == [(expected_line, True)]
    assert report.accepted == 2
    stored = store.departures(report.roster.id)
    assert list(stored["line"]) == [2, 6]


def test_year_bounds_follow_today(store: Store) -> None:
    data = make_csv([one_row(FY="2027", Exit_Date=""), one_row(Issuer_Code="B", FY="2028", Exit_Date="")])
    report = import_roster(store, data.encode(), "r.csv", today=date(2026, 6, 1))
    assert [r.reason for r in report.rejected_rows] == ["year 2028 is outside 1900..2027"]


def test_still_in_post_without_date_is_accepted(store: Store) -> None:
    report = import_roster(store, make_csv(ROWS).encode(), "r.csv")
    frame = store.departures(report.roster.id)
    serving = frame[frame["firm_id"] == "PL03"].iloc[0]
    assert serving["year"] == 2013 and pd.isna(serving["date"]) and serving["reason"] == "Still in post"
    assert all(is_still_in_post(r) for r in ("still in office", "Incumbent", "currently serving", "in post"))
    assert not any(is_still_in_post(r) for r in ("Retired", "Dismissed", "Posted abroad"))


@pytest.mark.parametrize(("dates", "order", "expected"), [
    (["31/03/2011", "01/02/2011"], "auto", [date(2011, 3, 31), date(2011, 2, 1)]),   # day-first proven
    (["03/31/2011", "01/02/2011"], "auto", [date(2011, 3, 31), date(2011, 1, 2)]),   # month-first proven
    (["01/02/2011", "03/04/2011"], "auto", [date(2011, 2, 1), date(2011, 4, 3)]),    # ambiguous: day-first
    (["01/02/2011", "03/04/2011"], "mdy", [date(2011, 1, 2), date(2011, 3, 4)]),
    (["2011-03-31", "2011-03-31T10:00:00"], "auto", [date(2011, 3, 31)] * 2),
    (["31-Mar-2011", "Mar 31, 2011"], "auto", [date(2011, 3, 31)] * 2),
    ([str(to_excel(datetime(2011, 3, 31))), "20110331"], "auto", [date(2011, 3, 31)] * 2),
])
def test_date_formats(store: Store, dates: list[str], order: str, expected: list[date]) -> None:
    rows = [one_row(Issuer_Code=f"D{i}", FY="", Exit_Date=d) for i, d in enumerate(dates)]
    report = import_roster(store, make_csv(rows).encode(), "d.csv", date_order=order)  # type: ignore[arg-type]
    assert report.rejected == 0
    frame = store.departures(report.roster.id)
    assert list(frame["date"]) == [d.isoformat() for d in expected]
    assert list(frame["year"]) == [d.year for d in expected]


def test_ambiguous_dates_are_reported(store: Store) -> None:
    rows = [one_row(Issuer_Code="A", FY="", Exit_Date="01/02/2011")]
    report = import_roster(store, make_csv(rows).encode(), "d.csv")
    assert any("read as day/month/year" in m for m in report.messages)
    with pytest.raises(ValueError, match="date_order must be one of auto, dmy, mdy"):
        import_roster(store, make_csv(rows).encode(), "e.csv", date_order="ymd")  # type: ignore[arg-type]


def test_duplicates_counted_and_stored_once(store: Store) -> None:
    data = make_csv([ROWS[0], ROWS[1], ROWS[0], ROWS[0], ROWS[2]]).encode()
    report = import_roster(store, data, "r.csv")
    assert (report.rows, report.accepted, report.duplicates, report.rejected) == (5, 3, 2, 0)
    assert report.roster.duplicates == 2
    assert list(store.departures(report.roster.id)["line"]) == [2, 3, 6]


def test_records_have_the_store_fields_and_types(store: Store) -> None:
    report = import_roster(store, make_csv(ROWS).encode(), "r.csv")
    frame = store.departures(report.roster.id, with_raw=True)
    assert list(frame.columns) == ["id", *DEPARTURE_FIELDS]
    first = frame.iloc[0]
    assert (first["firm_id"], first["year"], first["date"], first["age"], first["tenure"], first["interim"]) == (
        "KV01", 2011, "2011-03-31", 61.0, 7.0, False)
    with store.engine.connect() as conn:  # blanks are stored as NULL, not as empty strings
        nulls = conn.execute(text("SELECT count(*) FROM departures WHERE notes IS NULL")).scalar_one()
    assert nulls == 2
    assert json.loads(first["raw"]) == dict(zip(DEMO_HEADER, ROWS[0], strict=True))


# -- the roster as a whole -----------------------------------------------------------------------
def test_same_file_twice(store: Store) -> None:
    data = make_csv(ROWS).encode()
    first = import_roster(store, data, "C:\\exports\\roster 2024.csv")
    assert first.roster.name == "roster 2024"
    with pytest.raises(DuplicateRosterError, match="already imported as roster 'roster 2024'"):
        import_roster(store, data, "roster 2024.csv")
    again = import_roster(store, data, "roster 2024.csv", allow_same_file=True)
    assert again.roster.name == "roster 2024 (2)"
    with pytest.raises(RosterFileError, match="A roster named 'roster 2024' already exists"):
        import_roster(store, data + b"\r\n", "x.csv", name="roster 2024")


def test_filename_is_only_a_label(store: Store, tmp_path: object) -> None:
    report = import_roster(store, make_csv(ROWS).encode(), "../../etc/passwd")
    assert report.roster.name == "passwd" and report.roster.source_name == "../../etc/passwd"


def test_failure_half_way_leaves_database_unchanged(store: Store) -> None:
    import_roster(store, make_csv(ROWS).encode(), "earlier.csv")
    before = store.counts()
    # a real database failure inside the transaction, after some departures were already inserted
    with store.engine.begin() as conn:
        if conn.dialect.name == "sqlite":
            conn.execute(text(
                "CREATE TRIGGER fail_late BEFORE INSERT ON departures "
                "WHEN (SELECT count(*) FROM departures) >= 5 BEGIN SELECT RAISE(ABORT, 'disk says no'); END"
            ))
        else:
            conn.execute(text(
                "CREATE FUNCTION fail_late() RETURNS trigger LANGUAGE plpgsql AS $$ BEGIN "
                "IF (SELECT count(*) FROM departures) >= 5 THEN RAISE EXCEPTION 'disk says no'; END IF; "
                "RETURN NEW; END $$"
            ))
            conn.execute(text("CREATE TRIGGER fail_late BEFORE INSERT ON departures "
                              "FOR EACH ROW EXECUTE FUNCTION fail_late()"))
    rows = [one_row(Issuer_Code=f"F{i}") for i in range(20)] + [one_row(Issuer_Code="")]
    with pytest.raises(Exception, match="disk says no"):
        import_roster(store, make_csv(rows).encode(), "later.csv")
    assert store.counts() == before
    assert [r.name for r in store.list_rosters()] == ["earlier"]


def test_size_and_zip_limits(store: Store) -> None:
    data = make_csv(ROWS).encode()
    with pytest.raises(RosterFileError, match="upload limit is 100 bytes"):
        import_roster(store, data, "r.csv", limits=ReadLimits(max_bytes=100))
    book = _workbook({"S": [DEMO_HEADER, ROWS[0]]})
    with pytest.raises(RosterFileError, match="entries"):
        import_roster(store, book, "b.xlsx", limits=ReadLimits(max_zip_entries=3))
    assert store.counts()["rosters"] == 0


# -- formula safety ------------------------------------------------------------------------------
@pytest.mark.parametrize(("cell", "expected"), [
    ("=1+1", "'=1+1"), ("+cmd|' /C calc'!A0", "'+cmd|' /C calc'!A0"), ("@SUM(A1)", "'@SUM(A1)"),
    ("-2+3", "'-2+3"), ("\t=1", "'\t=1"), ("\r=1", "'\r=1"),
    ("-3", "-3"), ("+1.5", "+1.5"), ("-2e3", "-2e3"), ("plain", "plain"), ("", ""), ("a=b", "a=b"),
])
def test_neutralise_formula(cell: str, expected: str) -> None:
    # triggers per OWASP "CSV Injection" (common practice); plain numbers stay numbers by design
    assert neutralise_formula(cell) == expected


def test_rejected_rows_csv_is_safe_and_round_trips() -> None:
    rows = [RejectedRow(line=7, raw='=HYPERLINK("http://x.invalid","hi")', reason="missing firm id"),
            RejectedRow(line=9, raw='{"a": "multi\nline, \\"quoted\\""}', reason="@bad")]
    parsed = list(csv.reader(io.StringIO(rejected_rows_csv(rows))))
    assert parsed == [["line", "reason", "raw"],
                      ["7", "missing firm id", '\'=HYPERLINK("http://x.invalid","hi")'],
                      ["9", "'@bad", '{"a": "multi\nline, \\"quoted\\""}']]
    assert safe_csv([[None, float("nan"), -4]], ["=h"]) == "'=h\r\n,,-4\r\n"


def test_excel_sep_hint_and_malformed_quoting(store: Store) -> None:
    body = make_csv([ROWS[0], ROWS[1]], delimiter=";")
    bad = 'BQ9;"Bad "quote" Ltd;Tech;2011;;Retired;Ann;50;1;no;\r\n'
    report = import_roster(store, ("sep=;\r\n" + body + bad).encode(), "hint.csv")
    assert report.delimiter == ";" and report.accepted == 2
    # the hint is line 1, the header line 2, so the malformed row is physical line 5
    assert [(r.line, r.reason.split(" (")[0]) for r in report.rejected_rows] == [(5, "malformed quoting")]
    assert json.loads(report.rejected_rows[0].raw) == [bad.rstrip("\r\n")]


def test_validate_returns_the_store_fields() -> None:
    from app.intake.ingest import validate
    from app.intake.readers import read_table

    table = read_table(make_csv(ROWS).encode(), "r.csv")
    records, rejected, duplicates, _ = validate(table, detect_roles(table.headers)[0])
    assert tuple(records.columns) == DEPARTURE_FIELDS
    assert (rejected, duplicates) == ([], 0)
    assert str(records["year"].dtype) == "int64" and str(records["age"].dtype) == "float64"
    # the raw column is exactly what the json module writes for the original row
    for raw, row in zip(records["raw"], ROWS, strict=True):
        assert raw == json.dumps(dict(zip(DEMO_HEADER, row, strict=True)), ensure_ascii=False)


def test_row_limit_refuses_oversized_files_before_storing(store) -> None:
    # a hostile but small file (e.g. a highly compressed workbook) must not tie up the server:
    # past ReadLimits.max_data_rows the whole file is refused with a sentence naming the line
    from app.intake.readers import ReadLimits

    data = ("Company ID,Reason,Year\n" + "F1,Retired,2010\n" * 30).encode()
    before = store.counts()
    with pytest.raises(RosterFileError, match=r"more than 20 data rows \(line 22\)"):
        import_roster(store, data, "big.csv", limits=ReadLimits(max_data_rows=20))
    assert store.counts() == before
