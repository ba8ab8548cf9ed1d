"""A clean CSV's rows read by pandas' C reader, as columns, with the same outcome as ``read_csv_text``.

The ``csv`` module hands over a Python list and a new string per cell: ~14 s of CPU and ~400 MB for a
1,000,000-row roster; pandas' own tokenizer reads the same file in ~2.5 s and shares equal cells. pandas
cannot say on which line a row was, nor how many fields a short row had, and it accepts text after a
closing quote that the ``csv`` module (strict) rejects; so this path is taken only for files where none
of that can matter, checked on the bytes first: UTF-8, no NUL, no lone CR line ends, no stray byte-order
mark, no "sep=" line, every quoted cell closed on its own line and followed by a delimiter or line end.
Then row ``i`` of the body is line ``header + 1 + i`` (checked: rows == lines after the header). The header
is found by the ``csv`` module path on the first lines (``assemble``), and blank rows, short or long rows,
footers and the row limit are applied as ``assemble`` and ``add_row`` do, on the few rows concerned.
Anything else returns None and the caller reads the file line by line as before.
"""

from __future__ import annotations

import csv
import io
import json
import re

import numpy as np
import pandas as pd

from app.intake.headers import _footer_like, _note
from app.intake.rawtable import RawTable, ReadLimits, RosterFileError
from app.store import RejectedRow

#: bytes per slice when scanning the file (quote check, line starts): bounds the temporary copies
_CHUNK = 8 * 1024 * 1024
#: rows kept as lists for role detection and previews (``validation.ROLE_SAMPLE``)
SAMPLE_ROWS = 500


def clean_bytes(data: bytes, used: str, text: str, delimiter: str) -> bool:
    """True when pandas and the line-by-line reader cannot differ on ``data`` (see the module docstring)."""
    if used not in ("utf-8", "utf-8-sig") or b"\x00" in data or "\ufeff" in text:
        return False
    if data.count(b"\r") != data.count(b"\r\n") or re.match(r"sep=(.)\r?\n", text):
        return False
    if delimiter == '"' or delimiter in "\r\n":
        return False
    # a quoted cell, closed on its line before a delimiter or the line end (possessive: no backtracking)
    closed = re.compile(rb'"(?:[^"\r\n]++|"")*+"(?=' + re.escape(delimiter.encode()) + rb"|[\r\n]|\Z)")
    pos = 0
    while pos < len(data):
        end = data.find(b"\n", pos + _CHUNK)
        end = len(data) if end < 0 else end + 1
        part = data[pos:end]
        if b'"' in part and b'"' in closed.sub(b"", part):
            return False
        pos = end
    return True


def _line_offset(data: bytes, line: int) -> int:
    """Byte offset where 1-based ``line`` + 1 starts (len(data) past the end)."""
    off = 0
    for _ in range(line):
        nl = data.find(b"\n", off)
        if nl < 0:
            return len(data)
        off = nl + 1
    return off


def _line_starts(data: bytes, off: int) -> np.ndarray:
    parts = [np.array([off], dtype=np.int64)]
    for s in range(off, len(data), _CHUNK):
        block = np.frombuffer(data, dtype=np.uint8, count=min(_CHUNK, len(data) - s), offset=s)
        parts.append(np.flatnonzero(block == 10).astype(np.int64) + s + 1)
    return np.concatenate(parts)


def _split(line: bytes, delimiter: str) -> list[str]:
    text = line.decode("utf-8-sig")
    text = text[:-2] if text.endswith("\r\n") else text[:-1] if text.endswith("\n") else text
    return next(csv.reader([text], delimiter=delimiter, strict=True), [])


def _blank(cells: np.ndarray) -> np.ndarray:
    """Per cell: only whitespace (computed once per distinct value)."""
    codes, uniq = pd.factorize(cells)
    return np.array([not str(u).strip() for u in uniq], dtype=bool)[codes] if len(uniq) else np.zeros(0, bool)


def read_clean_body(data: bytes, head: RawTable, limits: ReadLimits) -> RawTable | None:
    """The rows below ``head``'s header line, read by pandas; None when the caller must read line by line."""
    delim = head.delimiter or ","
    line0 = head.header_line
    start = _line_offset(data, line0 - 1)
    off = _line_offset(data, line0)
    width_read = len(_split(data[start:off], delim))  # the header as read, trailing empty cells included
    first_end = data.find(b"\n", off)
    if off < len(data) and len(_split(data[off:len(data) if first_end < 0 else first_end + 1], delim)) > width_read:
        return None  # pandas would widen the table to the first row silently
    buf = io.BytesIO(data)
    buf.seek(off)
    try:
        frame = pd.read_csv(buf, sep=delim, header=None, names=list(range(width_read)), dtype=object,
                            na_filter=False, skip_blank_lines=False, index_col=False, engine="c",
                            encoding="utf-8", doublequote=True, quotechar='"')
    except pd.errors.ParserError:
        return None  # a row longer than the header: read line by line, which rejects it with its line
    except pd.errors.EmptyDataError:
        frame = pd.DataFrame({j: np.empty(0, dtype=object) for j in range(width_read)})
    n = len(frame)
    if n != data.count(b"\n", off) + (off < len(data) and not data.endswith(b"\n")):
        return None
    arrays = [frame[j].to_numpy(dtype=object) for j in range(width_read)]
    del frame
    lines = np.arange(line0 + 1, line0 + 1 + n, dtype=np.int64)
    # rows that may be short (pandas pads them with ""): their fields are counted by the csv module
    short: dict[int, list[str]] = {}
    maybe = np.flatnonzero(arrays[-1] == "") if n else np.zeros(0, np.int64)
    if maybe.size:
        starts = _line_starts(data, off)
        sep = delim.encode()
        for i in maybe.tolist():
            end = int(starts[i + 1]) if i + 1 < len(starts) else len(data)
            line = data[int(starts[i]):end]
            # without a quote the fields are counted on the bytes (a file with an empty last column has
            # this for most rows); the csv module splits only the rest
            if b'"' not in line and (line.count(sep) + 1 if line.strip(b"\r\n") else 0) == width_read:
                continue
            fields = _split(line, delim)
            if len(fields) != width_read:
                short[i] = fields
    blank_idx = np.flatnonzero(_blank(arrays[0])) if n else np.zeros(0, np.int64)
    for a in arrays[1:]:
        if not blank_idx.size:
            break
        blank_idx = blank_idx[_blank(a[blank_idx])]
    blank = np.zeros(n, dtype=bool)
    blank[blank_idx] = True
    table = head
    width = len(table.headers)

    def row(i: int) -> list[str]:
        return short[i] if i in short else [str(a[i]) for a in arrays]

    # the trailing footer: from the first footer-like row after which only footer-like or blank rows follow
    k = n
    for i in range(n - 1, -1, -1):
        if _footer_like(row(i), width):
            k = i
        elif not blank[i]:
            break
    filled = np.flatnonzero(~blank[:k])
    if filled.size >= limits.max_data_rows and int(filled[limits.max_data_rows - 1]) + 1 < k:
        beyond = int(lines[int(filled[limits.max_data_rows - 1]) + 1])
        raise RosterFileError(
            f"The file has more than {limits.max_data_rows:,} data rows (line {beyond}); a roster that large is "
            "almost certainly not a departures roster. Split it or filter it before importing."
        )
    bad = np.zeros(n, dtype=bool)
    reasons: dict[int, int] = {}
    if width_read > width:
        extra = np.zeros(n, dtype=bool)
        for a in arrays[width:]:
            extra |= ~_blank(a)
        for i in np.flatnonzero(extra[:k] & ~blank[:k]).tolist():
            bad[i], reasons[i] = True, width_read
    for i, fields in short.items():
        if i >= k or blank[i]:
            continue
        cells = fields[:width] if len(fields) > width and not "".join(fields[width:]).strip() else fields
        if len(cells) != width:
            bad[i], reasons[i] = True, len(fields)
        else:
            bad[i] = False
            reasons.pop(i, None)
            for j, c in enumerate(cells):
                arrays[j][i] = c
    table.bad_rows = [
        RejectedRow(line=int(lines[i]), raw=json.dumps(row(i)[: width + 20], ensure_ascii=False),
                    reason=f"wrong number of fields: {reasons[i]:,} where the header has {width}")
        for i in sorted(reasons)]
    keep = ~blank & ~bad
    keep[k:] = False
    table.blank_rows = int(np.sum(blank[:k]))
    pending = list(range(k, n))
    while pending and blank[pending[-1]]:
        pending.pop()
        table.blank_rows += 1
    table.footer_lines = [int(lines[i]) for i in pending if not blank[i]]
    table.blank_rows += len(pending) - len(table.footer_lines)
    idx = np.flatnonzero(keep)
    table.columns = [a[idx] for a in arrays[:width]]
    arrays.clear()  # the unfiltered columns
    table.column_lines = lines[idx]
    table.rows = [list(r) for r in zip(*(c[:SAMPLE_ROWS].tolist() for c in table.columns), strict=True)]
    table.lines = table.column_lines[:SAMPLE_ROWS].tolist()
    table.messages = []
    _note(table)
    table.may_hold_nul = False
    return table

