"""Turn uploaded bytes (CSV or XLSX) into a header and rows of text, refusing hostile files early.

Everything a roster can contain is read as text here; typing and validation happen in
``app.ingest``. Whole-file problems raise ``RosterFileError`` with one sentence saying what and
where; row-level problems met while reading (wrong number of fields, broken quoting) come back as
``RejectedRow`` entries so the rest of the file still imports.
"""

from __future__ import annotations

import codecs
import csv
import io
import json
import re
import warnings
import zipfile
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import date, datetime, time
from time import monotonic
from typing import Literal

import numpy as np
import pandas as pd

from app.config import DEFAULT_UPLOAD_LIMIT
from app.store import RejectedRow


class RosterFileError(ValueError):
    """The uploaded file as a whole cannot be imported; the message says what and where."""


@dataclass(frozen=True)
class ReadLimits:
    """Bounds that keep a hostile upload from exhausting memory or time."""

    max_bytes: int = DEFAULT_UPLOAD_LIMIT
    max_columns: int = 200
    max_cell_chars: int = 10_000
    max_uncompressed: int = 200 * 1024 * 1024
    max_zip_entries: int = 10_000
    #: far above any real roster; stops a small, highly compressed workbook from tying up the server
    max_data_rows: int = 500_000
    #: every sheet row openpyxl hands over, blank ones included (a sheet of empty rows is cheap to send)
    max_sheet_rows: int = 1_000_000
    #: wall-clock bound on parsing one workbook
    max_seconds: float = 120.0


DEFAULT_LIMITS = ReadLimits()

DELIMITERS = (",", ";", "\t", "|")
DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab", "|": "pipe"}


@dataclass
class RawTable:
    """A roster as text: the header, the data rows with their source line numbers, and notes."""

    headers: list[str]
    header_line: int
    rows: list[list[str]] = field(default_factory=list)
    lines: list[int] = field(default_factory=list)
    bad_rows: list[RejectedRow] = field(default_factory=list)
    blank_rows: int = 0
    #: False when the source cannot hold NUL characters, which lets validation skip that scan
    may_hold_nul: bool = True
    encoding: str | None = None
    delimiter: str | None = None
    sheet: str | None = None
    sheets: tuple[str, ...] = ()
    messages: list[str] = field(default_factory=list)


def _size(n: int) -> str:
    return f"{n / 1024 / 1024:.1f} MB" if n >= 1024 * 1024 else f"{n:,} bytes"


def looks_like_xlsx(data: bytes, filename: str) -> bool:
    """Content decides (a zip signature); the file name only matters for an empty or tiny file."""
    return data[:4] == b"PK\x03\x04" or (len(data) < 4 and filename.lower().endswith((".xlsx", ".xlsm")))


# -- text files -------------------------------------------------------------------------------------
_BINARY_SIGNATURES = {
    b"\xd0\xcf\x11\xe0": "an old Excel 97-2003 (.xls) or other OLE2 document; save it as .xlsx or CSV",
    b"%PDF": "a PDF document, not a table",
    b"\x89PNG": "a PNG image, not a table",
    b"\x1f\x8b": "a gzip archive; unpack it first",
    b"PK\x05\x06": "an empty zip archive",
}
# bytes that never occur in text files (everything below 0x20 except tab, LF, FF, CR, ESC; and DEL)
_CONTROL = bytes(b for b in range(32) if b not in (9, 10, 12, 13, 27)) + b"\x7f"


def decode_text(data: bytes, encoding: str | None) -> tuple[str, str]:
    """Decode ``data``; return (text, encoding name used).

    Auto-detection: a UTF-16/32 byte-order mark decides; otherwise strict UTF-8 (with or without a
    BOM), then cp1252 (Excel's "CSV" on Western Windows), then Latin-1, which accepts any byte.
    """
    if encoding:
        try:
            name = codecs.lookup(encoding).name
        except (LookupError, ValueError):  # ValueError: a NUL in the name
            raise RosterFileError(f"Unknown text encoding {encoding!r}; try utf-8, cp1252 or latin-1.") from None
        try:
            return data.decode(name), encoding
        except UnicodeDecodeError as exc:
            raise RosterFileError(
                f"The file cannot be read as {encoding}: byte 0x{data[exc.start]:02x} at position "
                f"{exc.start:,} is not valid in that encoding; leave the encoding on automatic or pick another."
            ) from None
    for bom, name in ((codecs.BOM_UTF32_LE, "utf-32"), (codecs.BOM_UTF32_BE, "utf-32"),
                      (codecs.BOM_UTF16_LE, "utf-16"), (codecs.BOM_UTF16_BE, "utf-16")):
        if data.startswith(bom):
            try:
                return data.decode(name), name
            except UnicodeDecodeError as exc:
                raise RosterFileError(
                    f"The file starts with a {name.upper()} byte-order mark but byte {exc.start:,} is not "
                    f"valid {name.upper()}; re-save it as UTF-8 CSV."
                ) from None
    for sig, what in _BINARY_SIGNATURES.items():
        if data.startswith(sig):
            raise RosterFileError(f"The file is {what}.")
    sample = data[:65536]
    if len(sample) >= 4 and sample[1::2].count(0) > 0.9 * (len(sample) // 2):
        raise RosterFileError(
            "The file looks like UTF-16 text without a byte-order mark; re-save it as UTF-8 CSV "
            "or choose the encoding utf-16-le."
        )
    if sum(sample.count(bytes([b])) for b in _CONTROL) > 0.05 * len(sample):
        raise RosterFileError(
            "The file does not look like text (it is full of binary control bytes); upload a CSV or XLSX file."
        )
    try:
        return data.decode("utf-8-sig"), ("utf-8-sig" if data.startswith(codecs.BOM_UTF8) else "utf-8")
    except UnicodeDecodeError:
        pass
    try:
        return data.decode("cp1252"), "cp1252"
    except UnicodeDecodeError:
        return data.decode("latin-1"), "latin-1"


def _first_line(text: str) -> str:
    for line in text[:65536].splitlines():
        if line.strip(" \t\ufeff"):
            return line
    return ""


def detect_delimiter(text: str) -> str:
    """Pick the delimiter from the header line, with ``csv.Sniffer`` to break ties.

    The header line decides because it fixes the column count and header words rarely contain
    delimiters, while a free-text notes column ("Smith, J.") can fool the sniffer on a semicolon
    file. Quoted parts of the header are ignored when counting.
    """
    header = re.sub(r'"[^"]*"', "", _first_line(text))
    counts = {d: header.count(d) for d in DELIMITERS}
    best = max(counts.values())
    if best == 0:
        return ","
    tied = [d for d in DELIMITERS if counts[d] == best]
    if len(tied) == 1:
        return tied[0]
    sample = text[:16384]
    try:
        sniffed = csv.Sniffer().sniff(sample[: sample.rfind("\n") + 1] or sample, delimiters="".join(tied))
        if sniffed.delimiter in tied:
            return sniffed.delimiter
    except csv.Error:
        pass
    return tied[0]


def read_csv_text(
    text: str, *, delimiter: str | None = None, limits: ReadLimits = DEFAULT_LIMITS,
    max_rows: int | None = None,
) -> RawTable:
    """Parse decoded CSV text; line numbers are physical lines (a quoted cell may span several)."""
    if not text.strip(" \t\r\n\ufeff\x0b\x0c"):
        raise RosterFileError("The file contains only whitespace: there is no header row and no data.")
    if "\ufeff" in text:
        # a stray BOM (two files pasted together, a cell copied from another file) is invisible junk
        text = text.replace("\ufeff", "")
    hint = re.match(r"sep=(.)\r?\n", text)
    skipped_lines = 0
    if hint and delimiter is None:
        # Excel's "sep=;" first line names the delimiter; it is not the header
        delimiter, text, skipped_lines = hint.group(1), text[hint.end():], 1
    delim = delimiter or detect_delimiter(text)
    # the csv module's per-field limit (131,072) is process-wide; raise it so an oversized cell is
    # reported as one rejected row by our own max_cell_chars check instead of aborting the file
    if csv.field_size_limit() < len(text) + 1:
        csv.field_size_limit(len(text) + 1)
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delim, strict=True)
    physical: list[str] | None = None
    table: RawTable | None = None

    def rows() -> Iterator[tuple[int, list[str] | None, str, str]]:
        nonlocal physical
        while True:
            start = reader.line_num + 1 + skipped_lines
            try:
                row = next(reader)
            except StopIteration:
                return
            except csv.Error as exc:
                if "unexpected end of data" in str(exc):
                    raise RosterFileError(
                        f"Line {start} opens a quoted field that is never closed (an unbalanced quote), so "
                        "the rest of the file would be read as one cell; fix the quote and upload again."
                    ) from None
                if physical is None:
                    physical = text.splitlines()
                at = start - 1 - skipped_lines
                raw = physical[at] if at < len(physical) else ""
                yield start, None, f"malformed quoting ({exc})", raw
                continue
            yield start, row, "", ""

    for line, row, reason, raw in rows():
        if table is None:
            if row is None or not any(c.strip() for c in row):
                continue
            table = _start_table(row, line, limits)
            table.delimiter = delim
            continue
        if row is None:
            table.bad_rows.append(RejectedRow(line=line, raw=json.dumps([raw], ensure_ascii=False),
                                              reason=reason))
            continue
        _add_row(table, line, row, limits)
        if max_rows is not None and len(table.rows) >= max_rows:
            break
    if table is None:
        raise RosterFileError("The file has no header row: every line is blank.")
    return table


# -- shared header and row handling -------------------------------------------------------------
_DATA_LIKE = re.compile(r"[-+]?\d[\d.,/: -]*")


def _start_table(header: list[str], line: int, limits: ReadLimits) -> RawTable:
    while header and not header[-1].strip():
        header.pop()  # trailing empty header cells: Excel exports pad rows with delimiters
    if len(header) > limits.max_columns:
        raise RosterFileError(
            f"The header row (line {line}) has {len(header):,} columns; the limit is {limits.max_columns} "
            "(is this really a roster, and is the delimiter right?)."
        )
    longest = max((len(h) for h in header), default=0)
    if longest > limits.max_cell_chars:
        raise RosterFileError(
            f"A header cell on line {line} is {longest:,} characters long (limit {limits.max_cell_chars:,}); "
            "the first row should name the columns."
        )
    names = [h.strip() or f"(column {i})" for i, h in enumerate(header, start=1)]
    filled = [h for h in names if not h.startswith("(column ")]
    if filled and sum(bool(_DATA_LIKE.fullmatch(h)) for h in filled) * 2 > len(filled):
        raise RosterFileError(
            f"The first row (line {line}) looks like data, not column names ({', '.join(filled[:4])}); "
            "add a header row naming each column."
        )
    dupes = [h for h, n in Counter(names).items() if n > 1]
    if dupes:
        where = "; ".join(
            f"{h!r} in columns {', '.join(str(i) for i, n in enumerate(names, 1) if n == h)}" for h in dupes
        )
        raise RosterFileError(
            f"The header row (line {line}) repeats column names: {where}; give each column its own name."
        )
    return RawTable(headers=names, header_line=line)


def _add_row(table: RawTable, line: int, row: list[str], limits: ReadLimits = DEFAULT_LIMITS) -> None:
    if len(table.rows) + len(table.bad_rows) >= limits.max_data_rows:
        raise RosterFileError(
            f"The file has more than {limits.max_data_rows:,} data rows (line {line}); a roster that large is "
            "almost certainly not a departures roster. Split it or filter it before importing."
        )
    width = len(table.headers)
    if not "".join(row).strip():
        table.blank_rows += 1
        return
    if len(row) > width and not "".join(row[width:]).strip():
        row = row[:width]  # padding cells beyond the header carry nothing
    if len(row) != width:
        table.bad_rows.append(RejectedRow(
            line=line, raw=json.dumps(row[: width + 20], ensure_ascii=False),
            reason=f"wrong number of fields: {len(row):,} where the header has {width}",
        ))
        return
    table.rows.append(row)
    table.lines.append(line)


# -- XLSX ----------------------------------------------------------------------------------------
def _check_zip(data: bytes, limits: ReadLimits) -> None:
    """Refuse archives that are not workbooks or that would expand beyond the limit.

    Declared sizes are trustworthy here: ``zipfile`` stops reading an entry at its declared size,
    so openpyxl can never inflate more than what is checked.
    """
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as zf:
            infos = zf.infolist()
    except (zipfile.BadZipFile, zipfile.LargeZipFile, ValueError, OSError) as exc:
        raise RosterFileError(f"The file starts like an XLSX (zip) file but the archive is damaged ({exc}).") from None
    if len(infos) > limits.max_zip_entries:
        raise RosterFileError(
            f"The XLSX archive holds {len(infos):,} entries (limit {limits.max_zip_entries:,}); refusing it."
        )
    total = sum(i.file_size for i in infos)
    if total > limits.max_uncompressed:
        raise RosterFileError(
            f"The XLSX file would expand to {_size(total)} (limit {_size(limits.max_uncompressed)}); "
            "refusing a possible zip bomb."
        )
    names = {i.filename for i in infos}
    if "xl/workbook.xml" not in names:
        shown = ", ".join(sorted(names)[:5]) or "nothing"
        raise RosterFileError(f"The file is a zip archive but not an XLSX workbook (it holds {shown}).")
    if any(i.flag_bits & 0x1 for i in infos):
        raise RosterFileError("The XLSX file is encrypted; save an unprotected copy and upload that.")


def _cell_text(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return str(int(value)) if value.is_integer() and abs(value) < 1e15 else repr(value)
    if isinstance(value, datetime):
        return value.date().isoformat() if value.time() == time(0) else value.isoformat(sep=" ")
    if isinstance(value, date | time):
        return value.isoformat()
    return str(value).replace("\ufeff", "")


def read_xlsx(
    data: bytes, *, sheet: str | None = None, limits: ReadLimits = DEFAULT_LIMITS,
    max_rows: int | None = None,
) -> RawTable:
    """Read the first sheet (or ``sheet``) of a workbook; line numbers are Excel row numbers."""
    import openpyxl  # heavy; only needed for workbooks

    _check_zip(data, limits)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            wb = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=True)
        except Exception as exc:  # openpyxl raises KeyError, XML and zip errors for broken files
            raise RosterFileError(
                f"The XLSX workbook is damaged or not one openpyxl can read ({type(exc).__name__}: {exc})."
            ) from None
        try:
            sheets = tuple(wb.sheetnames)
            name = sheet if sheet is not None else (sheets[0] if sheets else None)
            if name is None or name not in sheets:
                listed = ", ".join(repr(s) for s in sheets) or "no sheets"
                what = f"no sheet named {sheet!r}" if sheet is not None else "no sheets"
                raise RosterFileError(f"The workbook has {what}; its sheets are: {listed}.")
            ws = wb[name]
            if not hasattr(ws, "iter_rows"):
                raise RosterFileError(f"Sheet {name!r} is a chart, not a table; choose another sheet.")
            table: RawTable | None = None
            deadline = monotonic() + limits.max_seconds
            for line, values in enumerate(ws.iter_rows(min_row=1, values_only=True), start=1):
                if line > limits.max_sheet_rows:
                    raise RosterFileError(
                        f"Sheet {name!r} has more than {limits.max_sheet_rows:,} rows (blank ones included); "
                        "delete the unused rows or save the roster as CSV.")
                if line % 1000 == 0 and monotonic() > deadline:
                    raise RosterFileError(
                        f"Reading sheet {name!r} took longer than {limits.max_seconds:g} s (stopped at row "
                        f"{line:,}); save the roster as CSV, which reads much faster.")
                row = [_cell_text(v) for v in values]
                while row and row[-1] == "":
                    row.pop()
                if table is None:
                    if row and any(c.strip() for c in row):
                        table = _start_table(row, line, limits)
                    continue
                if len(row) < len(table.headers):
                    row += [""] * (len(table.headers) - len(row))  # Excel omits trailing empty cells
                _add_row(table, line, row, limits)
                if max_rows is not None and len(table.rows) >= max_rows:
                    break
        except RosterFileError:
            raise
        except Exception as exc:
            raise RosterFileError(
                f"The XLSX workbook is damaged: reading it failed ({type(exc).__name__}: {exc})."
            ) from None
        finally:
            wb.close()
    if table is None:
        raise RosterFileError(f"Sheet {name!r} has no header row: it is empty.")
    table.sheet, table.sheets = name, sheets
    table.messages.extend(f"Workbook note: {w.message}" for w in caught)
    return table


def read_table(
    data: bytes, filename: str, *, encoding: str | None = None, sheet: str | None = None,
    limits: ReadLimits = DEFAULT_LIMITS, max_rows: int | None = None,
) -> RawTable:
    """Check whole-file limits, then read ``data`` as XLSX or CSV. ``filename`` is only a label."""
    if len(data) > limits.max_bytes:
        raise RosterFileError(f"The file is {_size(len(data))}; the upload limit is {_size(limits.max_bytes)}.")
    if not data:
        raise RosterFileError("The file is empty (0 bytes).")
    if looks_like_xlsx(data, filename):
        return read_xlsx(data, sheet=sheet, limits=limits, max_rows=max_rows)
    if filename.lower().endswith((".xlsx", ".xlsm")):
        raise RosterFileError(f"{filename!r} is named like an XLSX workbook but is not a zip archive.")
    text, used = decode_text(data, encoding)
    table = read_csv_text(text, limits=limits, max_rows=max_rows)
    table.encoding = used
    table.may_hold_nul = "\x00" in text
    return table


# -- dates -----------------------------------------------------------------------------------------
DATE_FORMATS = ("YYYY-MM-DD, DD/MM/YYYY or MM/DD/YYYY (with /, - or .), YYYYMMDD, DD-Mon-YYYY, "
                "Mon DD, YYYY or an Excel serial day number")
_TIME = r"(?:[T ]\d{1,2}:\d{2}(?::\d{2}(?:\.\d+)?)?Z?)?"
_ISO = re.compile(rf"^(\d{{4}})[-/.](\d{{1,2}})[-/.](\d{{1,2}}){_TIME}$")
_BASIC = re.compile(r"^(\d{4})(\d{2})(\d{2})$")
_NUMERIC = re.compile(rf"^(\d{{1,2}})[-/.](\d{{1,2}})[-/.](\d{{4}}){_TIME}$")
_DAY_MON = re.compile(r"^(\d{1,2})[- ]([A-Za-z]{3,9})\.?[- ](\d{4})$")
_MON_DAY = re.compile(r"^([A-Za-z]{3,9})\.? (\d{1,2}),? (\d{4})$")
_SERIAL = re.compile(r"^\d{5,7}(?:\.\d+)?$")
_MONTHS = {m: i for i, m in enumerate(
    ("jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec"), start=1)}
#: Excel's day 0 (the 1900 date system, with its phantom 29 Feb 1900 folded in)
_EXCEL_EPOCH = np.datetime64("1899-12-30", "D")
DateStatus = Literal["", "empty", "unparseable", "impossible", "out_of_range"]


@dataclass(frozen=True)
class ParsedDates:
    """Dates of one column: ISO text (or None), calendar year, and a status per value."""

    iso: pd.Series
    year: pd.Series
    status: pd.Series
    order: Literal["dmy", "mdy"]
    order_label: str
    message: str


def _parts(s: pd.Series, pattern: re.Pattern[str]) -> pd.DataFrame:
    return s.str.extract(pattern).apply(pd.to_numeric, errors="coerce")


def parse_dates(s: pd.Series, order: str = "auto", *, max_year: int) -> ParsedDates:
    """Parse a column of date text; day-first or month-first is decided once for the whole column.

    ``order="auto"``: a value whose first part exceeds 12 proves day-first, a second part over 12
    proves month-first; with no proof either way the column is read day-first (and a message says
    so); with proof both ways the majority wins and the others are reported as impossible dates.
    """
    n = len(s)
    y, m, d = (np.full(n, np.nan) for _ in range(3))

    def fill(parts: pd.DataFrame, yi: int, mi: int, di: int) -> None:
        hit = parts[yi].notna().to_numpy() & np.isnan(y)
        y[hit], m[hit], d[hit] = (parts[i].to_numpy(dtype=float)[hit] for i in (yi, mi, di))

    fill(_parts(s, _ISO), 0, 1, 2)
    fill(_parts(s, _BASIC), 0, 1, 2)
    num = _parts(s, _NUMERIC)
    first, second = num[0].to_numpy(dtype=float), num[1].to_numpy(dtype=float)
    day_first, month_first = int(np.sum(first > 12)), int(np.sum(second > 12))
    message = ""
    if order == "auto":
        chosen: Literal["dmy", "mdy"] = "mdy" if month_first > day_first else "dmy"
        if day_first and month_first:
            message = (f"the column mixes day-first ({day_first}) and month-first ({month_first}) dates; "
                       f"read as {'month/day' if chosen == 'mdy' else 'day/month'}/year.")
        elif not day_first and not month_first and num[0].notna().any():
            message = "no value shows whether day or month comes first; read as day/month/year."
    else:
        chosen = "mdy" if order == "mdy" else "dmy"
    fill(num, 2, 1, 0) if chosen == "dmy" else fill(num, 2, 0, 1)
    for pattern, yi, di in ((_DAY_MON, 2, 0), (_MON_DAY, 2, 1)):
        parts = s.str.extract(pattern)
        if parts[0].notna().any():
            mi = 1 if pattern is _DAY_MON else 0
            mon = parts[mi].str.lower().str[:3].map(_MONTHS)
            words = pd.DataFrame({yi: pd.to_numeric(parts[yi]).where(mon.notna()), mi: mon,
                                  di: pd.to_numeric(parts[di])})
            fill(words, yi, mi, di)
    serial = pd.to_numeric(s.where(s.str.fullmatch(_SERIAL)), errors="coerce").to_numpy(dtype=float)
    hit = ~np.isnan(serial) & np.isnan(y) & (serial <= 2958465)
    if hit.any():
        days = _EXCEL_EPOCH + np.floor(serial[hit]).astype("int64").astype("timedelta64[D]")
        y[hit] = days.astype("datetime64[Y]").astype("int64") + 1970
        m[hit] = days.astype("datetime64[M]").astype("int64") % 12 + 1
        d[hit] = (days - days.astype("datetime64[M]").astype("datetime64[D]")).astype("int64") + 1

    empty = (s == "").to_numpy()
    parsed = ~np.isnan(y)
    in_range = parsed & (y >= 1900) & (y <= max_year)
    ok = in_range & (m >= 1) & (m <= 12) & (d >= 1)
    months = np.where(ok, (y - 1970) * 12 + (m - 1), 0).astype("int64").astype("datetime64[M]")
    start = months.astype("datetime64[D]")
    days_in_month = ((months + 1).astype("datetime64[D]") - start).astype("int64")
    valid = ok & (d <= days_in_month)
    stamps = start + (np.where(valid, d, 1) - 1).astype("int64").astype("timedelta64[D]")
    iso = pd.Series(np.where(valid, stamps.astype(str), None), index=s.index, dtype=object)
    status = np.select(
        [empty, ~parsed, ~in_range, ~valid], ["empty", "unparseable", "out_of_range", "impossible"], "")
    return ParsedDates(
        iso=iso, year=pd.Series(np.where(valid, y, np.nan), index=s.index), status=pd.Series(status, index=s.index),
        order=chosen, order_label="day/month/year" if chosen == "dmy" else "month/day/year", message=message,
    )
