"""Neutralise spreadsheet formula injection in every CSV the tool writes.

A cell that starts with ``=``, ``+``, ``-`` or ``@`` (or a tab, carriage return or line feed, which
some spreadsheet programs skip before looking for those, also after invisible characters such as a
zero-width space or a byte-order mark) is run as a formula when the CSV is opened
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


#: invisible or blank characters a spreadsheet (or a person reading the cell) may pass over before the
#: trigger: zero-width space/joiners, word joiner, byte-order mark, no-break and other Unicode spaces
INVISIBLE_PREFIX = " \u00a0\u180e\u200b\u200c\u200d\u2060\ufeff\u202f\u205f\u3000" + "".join(
    chr(c) for c in range(0x2000, 0x200B))


def neutralise_formula(text: str) -> str:
    """Return ``text`` with a leading apostrophe if a spreadsheet would run it as a formula.

    Invisible prefixes (``INVISIBLE_PREFIX``, e.g. a zero-width space or a byte-order mark) do not hide a
    trigger behind them. Plain decimal numbers such as ``-3`` are returned unchanged (see the module docstring).
    """
    visible = text.lstrip(INVISIBLE_PREFIX)
    if not visible or not visible.startswith(FORMULA_TRIGGERS):
        return text
    if visible == text and _PLAIN_NUMBER.fullmatch(text):
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
