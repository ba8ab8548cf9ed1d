"""Neutralise spreadsheet formula injection in every CSV the tool writes.

A cell that starts with ``=``, ``+``, ``-`` or ``@`` (or a tab, carriage return or line feed, which
some spreadsheet programs skip before looking for those) is run as a formula when the CSV is opened
in Excel, LibreOffice or Google Sheets. Rosters come from outside, so any text cell may carry such a
payload (``=HYPERLINK(...)``, ``@SUM(...)``, DDE strings). The defence here is common practice
(the OWASP "CSV injection" advice): prefix the cell with an apostrophe, which spreadsheets show as
text and do not evaluate.

Decision: a cell that is *only* a plain decimal number (``-3``, ``+1.5``, ``-2e3``) is left alone.
Spreadsheets read it as that number either way, nothing is evaluated, and an apostrophe would turn
a negative age into text for the analyst who re-opens a rejected-rows file. Anything else that
starts with a trigger character (``-3+cmd|' /C calc'!A0``, ``=1+1``) gets the apostrophe.
"""

from __future__ import annotations

import csv
import io
import re
from collections.abc import Iterable, Sequence

#: characters that make a spreadsheet treat the cell as a formula (or skip ahead to one)
FORMULA_TRIGGERS = ("=", "+", "-", "@", "\t", "\r", "\n")

_PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")


def neutralise_formula(text: str) -> str:
    """Return ``text`` with a leading apostrophe if a spreadsheet would run it as a formula.

    Plain decimal numbers such as ``-3`` are returned unchanged (see the module docstring).
    """
    if not text or not text.startswith(FORMULA_TRIGGERS):
        return text
    if _PLAIN_NUMBER.fullmatch(text):
        return text
    return "'" + text


def _cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, float) and value != value:  # NaN from pandas means "no value"
        return ""
    return neutralise_formula(str(value))


def safe_csv(rows: Iterable[Sequence[object]], header: Sequence[str]) -> str:
    """Write ``header`` and ``rows`` as CSV text with every cell neutralised.

    ``None`` and NaN become empty cells; other values are written with ``str``. Quoting follows the
    csv module's minimal style, so cells holding commas, quotes or newlines survive a round trip.
    """
    buf = io.StringIO(newline="")
    writer = csv.writer(buf, lineterminator="\r\n")
    writer.writerow([_cell(h) for h in header])
    for row in rows:
        writer.writerow([_cell(v) for v in row])
    return buf.getvalue()
