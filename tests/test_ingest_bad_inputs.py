"""Every file of the hostile corpus in tests/data/bad gets one clear message, and a refused file
leaves the database exactly as it was. The corpus is written by tests/data/bad/make_corpus.py."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from typing import Any

import pytest

from app.intake.ingest import RosterFileError, import_roster, rejected_rows_csv
from app.intake.spreadsheet_safety import FORMULA_TRIGGERS
from app.store import Store

BAD = Path(__file__).parent / "data" / "bad"

# file -> (outcome, phrase that must appear, 1-based line of the rejected row or None, import kwargs)
# "file": the whole file is refused with RosterFileError; "rows": it imports and a rejected row at that
# line carries the phrase.
EXPECTED: dict[str, tuple[str, str, int | None, dict[str, Any]]] = {
    "empty.csv": ("file", "empty (0 bytes)", None, {}),
    "whitespace_only.csv": ("file", "only whitespace", None, {}),
    "header_only.csv": ("file", "no data rows", None, {}),
    "binary_garbage.csv": ("file", "does not look like text", None, {}),
    "wrong_encoding_declared.csv": ("file", "cannot be read as utf-8: byte 0xe9", None, {"encoding": "utf-8"}),
    "utf16_without_bom.csv": ("file", "UTF-16 text without a byte-order mark", None, {}),
    "mixed_delimiters.csv": ("rows", "wrong number of fields: 1 where the header has 11", 3, {}),
    "ten_thousand_columns.csv": ("file", "has 10,000 columns; the limit is 200", None, {}),
    "ten_thousand_fields_row.csv": ("rows", "wrong number of fields: 10,000", 3, {}),
    "million_char_cell.csv": ("rows", "has 1,000,000 characters (limit 10,000)", 3, {}),
    "unbalanced_quote.csv": ("file", "Line 3 opens a quoted field that is never closed", None, {}),
    "zip_not_xlsx.xlsx": ("file", "zip archive but not an XLSX workbook", None, {}),
    "zip_bomb.xlsx": ("file", "possible zip bomb", None, {}),
    # Python's bundled expat (>= 2.4) refuses entity amplification before it eats memory
    "xml_entity_bomb.xlsx": ("file", "amplification", None, {}),
    "damaged_workbook.xlsx": ("file", "workbook is damaged", None, {}),
    "truncated.xlsx": ("file", "archive is damaged", None, {}),
    "text_named_xlsx.xlsx": ("file", "is not a zip archive", None, {}),
    "old_excel.xls": ("file", "Excel 97-2003", None, {}),
    "pdf_renamed.csv": ("file", "PDF document", None, {}),
    "gzipped.csv": ("file", "gzip archive", None, {}),
    "year_zero_and_9999.csv": ("rows", "date '0000-01-01' is outside 1900..", 3, {}),
    "negative_ages.csv": ("rows", "negative age -44", 3, {}),
    "absurd_ages.csv": ("rows", "age 212 is outside 14..110", 3, {}),
    "formula_payloads.csv": ("rows", "age '=1+1' is not a number", 3, {}),
    "html_payloads.csv": ("rows", "year '<img src=x onerror=alert(1)>' is not a whole number", 4, {}),
    "sql_payloads.csv": ("rows", "year '2012 OR 1=1' is not a whole number", 4, {}),
    "nul_bytes.csv": ("rows", "NUL byte in column 'Issuer Name'", 3, {}),
    "bom_in_middle.csv": ("rows", "repeats the header row", 3, {}),
    "duplicate_headers.csv": ("file", "repeats column names: 'FY' in columns 2, 4", None, {}),
    "missing_required_column.csv": ("file", "No column was found for the reason code; the headers are: "
                                    "Issuer Code, Issuer Name, FY", None, {}),
    "no_header_row.csv": ("file", "looks like data, not column names", None, {}),
    "all_rows_invalid.csv": ("file", "All 2 data rows were rejected", None, {}),
    "impossible_dates.csv": ("rows", "impossible date '31/02/2011'", 3, {}),
    "unparseable_dates.csv": ("rows", "unparseable date 'last spring'; expected YYYY-MM-DD", 3, {}),
    "year_date_disagree.csv": ("rows", "year 2011 and date 2016-01-01 disagree", 3, {}),
    "bad_interim_flag.csv": ("rows", "interim flag 'perhaps' not recognised", 3, {}),
    "short_row.csv": ("rows", "wrong number of fields: 4 where the header has 11", 3, {}),
    "header_cell_too_long.csv": ("file", "header cell on line 1 is 20,000 characters", None, {}),
}


def test_corpus_and_expectations_match() -> None:
    on_disk = {p.name for p in BAD.iterdir() if p.suffix != ".py"}
    assert on_disk == set(EXPECTED)
    assert len(on_disk) >= 25
    assert sum(p.stat().st_size for p in BAD.iterdir()) < 3 * 1024 * 1024


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_bad_file_gets_a_clear_message(store: Store, name: str) -> None:
    outcome, phrase, line, kwargs = EXPECTED[name]
    data = (BAD / name).read_bytes()
    before = store.counts()
    if outcome == "file":
        with pytest.raises(RosterFileError) as info:
            import_roster(store, data, name, **kwargs)
        message = str(info.value)
        assert phrase in message
        assert "\n" not in message and message.endswith(".")
        assert store.counts() == before
        return
    report = import_roster(store, data, name, **kwargs)
    hits = [r for r in report.rejected_rows if phrase in r.reason]
    assert [r.line for r in hits] == [line]
    assert report.accepted >= 1
    assert report.accepted + report.rejected + report.duplicates == report.rows
    assert store.rejected(report.roster.id) == sorted(report.rejected_rows, key=lambda r: r.line)


def test_hostile_text_is_stored_verbatim_and_exported_safely(store: Store) -> None:
    report = import_roster(store, (BAD / "formula_payloads.csv").read_bytes(), "f.csv")
    stored = store.departures(report.roster.id, with_raw=True)
    # the payloads are data: kept exactly as typed, never evaluated or altered in the database
    assert "+cmd|' /C calc'!A0" in set(stored["firm_name"])
    assert "-2+3" in set(stored["notes"])
    rows = list(csv.reader(io.StringIO(rejected_rows_csv(store.rejected(report.roster.id)))))
    for row in rows:
        for cell in row:
            # OWASP CSV-injection advice (common practice): no exported cell may start a formula
            assert not cell.startswith(FORMULA_TRIGGERS) or cell.lstrip("+-").replace(".", "").isdigit()
    raw = json.loads(rows[1][2])
    assert raw["Age at Exit"] == "=1+1"
    assert raw["Issuer Code"] == '=HYPERLINK("http://example.invalid")'


def test_sql_payload_is_only_text(store: Store) -> None:
    report = import_roster(store, (BAD / "sql_payloads.csv").read_bytes(), "s.csv")
    assert "'; DROP TABLE departures; --" in set(store.departures(report.roster.id)["firm_name"])
    assert store.counts()["departures"] == report.accepted == 2


def test_html_payload_is_stored_unchanged(store: Store) -> None:
    report = import_roster(store, (BAD / "html_payloads.csv").read_bytes(), "h.csv")
    frame = store.departures(report.roster.id)
    assert "<script>alert(1)</script> Holdings" in set(frame["firm_name"])
    assert "<b>bold</b>" in set(frame["notes"])
