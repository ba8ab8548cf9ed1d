"""A roster as text (header, rows with their source line numbers, notes) and the limits that bound it.

Everything a roster can contain is read as text; typing and validation happen in
``app.intake.validation``. Whole-file problems raise ``RosterFileError`` with one sentence saying what
and where; row-level problems met while reading come back as ``RejectedRow`` entries.
"""

from __future__ import annotations

import json
import re
from collections import Counter
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from app.config import max_rows_from_env, upload_limit_from_env
from app.store import RejectedRow


class RosterFileError(ValueError):
    """The uploaded file as a whole cannot be imported; the message says what and where."""


def shown(text: str, most: int = 80) -> str:
    """``text`` quoted for a message, cut to ``most`` characters with its full length said: an error that echoes a
    100,000-character column name back whole buries what it says (found probing a served instance)."""
    return repr(text) if len(text) <= most else f"{text[:most]!r}... ({len(text):,} characters)"


@dataclass(frozen=True)
class ReadLimits:
    """Bounds that keep a hostile upload from exhausting memory or time."""

    #: HELMSHIFT_UPLOAD_LIMIT (default 50 MB); a 1,000,000-row roster is about 100 MB of CSV
    max_bytes: int = field(default_factory=upload_limit_from_env)
    max_columns: int = 200
    max_cell_chars: int = 10_000
    max_uncompressed: int = 200 * 1024 * 1024
    max_zip_entries: int = 10_000
    #: HELMSHIFT_MAX_ROWS (default 2,000,000): far above any real roster; stops a small, highly compressed
    #: workbook from tying up the server
    max_data_rows: int = field(default_factory=max_rows_from_env)
    #: every sheet row openpyxl hands over, blank ones included (a sheet of empty rows is cheap to send)
    max_sheet_rows: int = 1_000_000
    #: wall-clock bound on parsing one workbook
    max_seconds: float = 120.0


DEFAULT_LIMITS = ReadLimits()


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
    #: lines above the header (title block, notes) and trailing footer lines, left out with a note
    skipped_above: list[int] = field(default_factory=list)
    footer_lines: list[int] = field(default_factory=list)
    #: how the header row was chosen ("found": scored; "given": the analyst's choice) and why
    header_how: str = "found"
    header_why: str = ""
    #: read by pandas (``app.intake.fastcsv``): every kept row as columns and their line numbers; ``rows`` and
    #: ``lines`` then hold only the first rows (role detection, previews)
    columns: list[np.ndarray] | None = None
    column_lines: np.ndarray | None = None


_DATA_LIKE = re.compile(r"[-+]?\d[\d.,/: -]*")


def looks_like_data(cell: str) -> bool:
    """A number, date or time rather than a word."""
    return bool(_DATA_LIKE.fullmatch(cell.strip()))


def start_table(header: list[str], line: int, limits: ReadLimits) -> RawTable:
    """A table with ``header`` as its column names, refusing headers no roster has."""
    header = list(header)
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
            "the header row should name the columns."
        )
    names = [h.strip() or f"(column {i})" for i, h in enumerate(header, start=1)]
    filled = [h for h in names if not h.startswith("(column ")]
    if filled and sum(looks_like_data(h) for h in filled) * 2 > len(filled):
        raise RosterFileError(
            f"The header row (line {line}) looks like data, not column names ({', '.join(filled[:4])}); "
            "add a header row naming each column, or choose the header row."
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


def add_row(table: RawTable, line: int, row: list[str], limits: ReadLimits = DEFAULT_LIMITS) -> None:
    """Append one data row, or count it blank, or reject it for its number of fields."""
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
    if len(table.rows) % SHARE_BLOCK == 0:
        share_equal_cells(table.rows, len(table.rows) - SHARE_BLOCK)


#: rows per block whose equal cells are made one string object (see ``share_equal_cells``)
SHARE_BLOCK = 65_536


def share_equal_cells(rows: list[list[str]], start: int) -> None:
    """Make equal cells of ``rows[start:]`` one string object per column, where a column repeats itself.

    A parser hands over a new string for every cell: 11 million of them (~630 MB) for a 1,000,000-row
    roster, most of them years, dates, sectors and codes seen before. Factorising each column of a block
    and rebuilding it from its distinct values keeps one object per value (pandas' own CSV parser does the
    same); columns of mostly distinct values (names, notes) are left alone. Rows must share one width.
    """
    block = np.array(rows[start:], dtype=object)
    if block.ndim != 2:
        return
    for j in range(block.shape[1]):
        codes, uniq = pd.factorize(block[:, j])
        if len(uniq) * 2 < len(block):
            block[:, j] = uniq[codes]
    rows[start:] = block.tolist()
