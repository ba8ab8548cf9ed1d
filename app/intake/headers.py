"""Find the header row under a title block, and leave trailing footer lines out, while rows stream by.

Exports often carry a title, a "Generated on ..." line, blank rows or notes above the header, and
"Source: ..." or totals lines below the data. The first ``HEADER_SCAN`` non-blank rows are scored: how many
cells are filled, how many read as words rather than numbers or dates, how many are roster header words,
whether the cells are distinct, and whether the rows below share the row's shape. The best score wins
(the earliest on a tie); ``header_row`` (1-based line or sheet row) overrides the choice.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

from app.intake.rawtable import (
    DEFAULT_LIMITS,
    RawTable,
    ReadLimits,
    RosterFileError,
    add_row,
    looks_like_data,
    start_table,
)
from app.intake.roles import is_header_word
from app.store import RejectedRow

HEADER_SCAN = 30
_BELOW = 8
#: first cell of a footer line: common practice in exported tables
_FOOTER = re.compile(
    r"^\s*(?:sources?|notes?|n\.?b\.?|totals?|grand total|sum|count|generated|prepared|exported|compiled|"
    r"produced|copyright|end of (?:report|file|data)|©|\(c\)|\*+|†)\b",
    re.IGNORECASE)

#: (line, cells or None for a malformed line, reason, raw text)
SourceRow = tuple[int, list[str] | None, str, str]


@dataclass(frozen=True)
class HeaderCandidate:
    line: int
    score: float
    why: str


def _filled(row: list[str]) -> list[str]:
    return [c.strip() for c in row if c.strip()]


def score_row(row: list[str], below: list[list[str]]) -> HeaderCandidate | None:
    """How much ``row`` looks like the header of the rows ``below`` it (None: it cannot be one)."""
    cells = _filled(row)
    if not cells:
        return None
    words = sum(not looks_like_data(c) for c in cells) / len(cells)
    known = sum(is_header_word(c) for c in cells)
    distinct = len(set(cells)) == len(cells)
    shaped = [b for b in below if 0.6 * len(cells) <= len(_filled(b)) <= len(row) + 1]
    shape = len(shaped) / len(below) if below else 0.0
    long_cells = sum(len(c) > 60 for c in cells)
    score = (len(cells) * words * (1 + shape) + 2 * known - (0 if distinct else len(cells) / 2) - 3 * long_cells
             - (3 if len(cells) == 1 else 0))
    why = (f"{len(cells)} filled cells, {words:.0%} words, {known} known column name(s), "
           f"{shape:.0%} of the next rows share its shape")
    return HeaderCandidate(0, score, why)


def _footer_like(row: list[str], width: int) -> bool:
    # the first filled cell decides before the rest are looked at: this runs once per data row
    first = next((c for c in row if c and not c.isspace()), None)
    if first is None or not _FOOTER.match(first):
        return False
    return len(_filled(row)) <= max(2, width // 2)


def _lines_label(lines: list[int]) -> str:
    if len(lines) == 1:
        return f"line {lines[0]}"
    return f"lines {lines[0]}-{lines[-1]}" if lines[-1] - lines[0] == len(lines) - 1 else \
        "lines " + ", ".join(map(str, lines[:6])) + (" ..." if len(lines) > 6 else "")


def assemble(
    source: Iterable[SourceRow], *, limits: ReadLimits = DEFAULT_LIMITS, header_row: int | None = None,
    max_rows: int | None = None, pad: bool = False,
) -> RawTable:
    """Build the table: find (or take) the header row, add the rows below, hold back a trailing footer.

    ``pad``: short rows are padded to the header width (a workbook omits trailing empty cells).
    """
    it: Iterator[SourceRow] = iter(source)
    head: list[tuple[int, list[str]]] = []  # rows read before the header is settled
    early_bad: list[SourceRow] = []
    filled = 0
    for line, row, reason, raw in it:
        if row is None:
            early_bad.append((line, row, reason, raw))
            continue
        head.append((line, row))
        filled += any(c.strip() for c in row)
        if header_row is None and filled >= HEADER_SCAN + _BELOW:
            break
        if header_row is not None and line >= header_row + _BELOW:
            break
    solid = [i for i, (_, row) in enumerate(head) if any(c.strip() for c in row)]
    if not solid:
        raise RosterFileError("The file has no header row: every line is blank.")
    if header_row is not None:
        at_or_none = next((i for i in solid if head[i][0] == header_row), None)
        if at_or_none is None:
            last = head[-1][0] if head else 0
            where = "is blank" if header_row <= last else f"is past the end of the file (last line: {last})"
            raise RosterFileError(f"Header row {header_row} {where}; choose a line that names the columns.")
        at, why = at_or_none, "chosen by you"
    else:
        best: tuple[int, HeaderCandidate] | None = None
        for k, i in enumerate(solid[:HEADER_SCAN]):
            if len(head[i][1]) > limits.max_columns and k:
                continue  # an overlong row below the first is a broken data row, never the header
            cand = score_row(head[i][1], [head[j][1] for j in solid[k + 1:k + 1 + _BELOW]])
            if cand is not None and (best is None or cand.score > best[1].score):
                best = (i, cand)
        at, why = (best[0], best[1].why) if best else (solid[0], "")
    line0, header = head[at]
    table = start_table(header, line0, limits)
    table.header_how, table.header_why = ("given" if header_row is not None else "found"), why
    table.skipped_above = [line for line, row in head[:at] if any(c.strip() for c in row)]
    width = len(table.headers)
    for line, _, reason, raw in early_bad:
        if line > line0:
            table.bad_rows.append(RejectedRow(line=line, raw=_json_list(raw), reason=reason))
    pending: list[tuple[int, list[str]]] = []

    def push(line: int, row: list[str]) -> bool:
        """Add one row (through the footer hold); True when ``max_rows`` data rows are in."""
        if pad and len(row) < width:
            row = row + [""] * (width - len(row))
        if _footer_like(row, width):
            pending.append((line, row))
            return False
        if pending and not any(c.strip() for c in row):
            pending.append((line, row))
            return False
        for held in pending:
            add_row(table, held[0], held[1], limits)
        pending.clear()
        add_row(table, line, row, limits)
        return max_rows is not None and len(table.rows) >= max_rows

    done = False
    for line, row in head[at + 1:]:
        if push(line, row):
            done = True
            break
    if not done:
        for line, row, reason, raw in it:
            if row is None:
                table.bad_rows.append(RejectedRow(line=line, raw=_json_list(raw), reason=reason))
                continue
            if push(line, row):
                done = True
                break
    if not done:
        while pending and not any(c.strip() for c in pending[-1][1]):
            pending.pop()
            table.blank_rows += 1
        table.footer_lines = [line for line, row in pending if any(c.strip() for c in row)]
        table.blank_rows += len(pending) - len(table.footer_lines)
    else:
        for held in pending:
            add_row(table, held[0], held[1], limits)
    _note(table)
    return table


def _json_list(raw: str) -> str:
    return json.dumps([raw], ensure_ascii=False)


def _note(table: RawTable) -> None:
    if table.skipped_above:
        one = len(table.skipped_above) == 1
        table.messages.append(
            f"The header is line {table.header_line}; {_lines_label(table.skipped_above)} above it "
            f"(a title block or notes) {'was' if one else 'were'} left out.")
    if table.footer_lines:
        one = len(table.footer_lines) == 1
        label = _lines_label(table.footer_lines)
        table.messages.append(
            f"{label[0].upper()}{label[1:]} after the data {'looks' if one else 'look'} like a footer (source, "
            f"notes or totals) and {'was' if one else 'were'} left out, not rejected.")
