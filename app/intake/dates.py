"""Departure dates in every form an analyst meets, and the fiscal year each one falls in.

Forms read: real spreadsheet dates (arriving as ISO text from the workbook reader), ISO text, day-first
and month-first text (which of the two is decided once for the whole column, never row by row), YYYYMMDD,
"12-Jun-2015", "Jun 12, 2015", Excel serial day numbers, month and year ("Jun-2015", "06/2015",
"June 2015", "2015-06", "Jun-15") and a bare four-digit year ("2017", "FY2017"), which is read as that
fiscal year.

Fiscal years are named by the calendar year in which they end (common practice in company reporting):
with fiscal years ending in March, an exit on 2020-02-01 falls in fiscal 2020 and one on 2020-05-01 in
fiscal 2021. The default year end is December, where fiscal and calendar years coincide.
"""

from __future__ import annotations

import calendar
import re
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

DATE_FORMATS = ("YYYY-MM-DD, DD/MM/YYYY or MM/DD/YYYY (with /, - or .), YYYYMMDD, DD-Mon-YYYY, "
                "Mon DD, YYYY, an Excel serial day number, a month and year (Jun-2015, 06/2015, June 2015) "
                "or a bare year (2017)")
_TIME = r"(?:[T ]\d{1,2}:\d{2}(?::\d{2}(?:\.\d+)?)?Z?)?"
_ISO = re.compile(rf"^(\d{{4}})[-/.](\d{{1,2}})[-/.](\d{{1,2}}){_TIME}$")
_BASIC = re.compile(r"^(\d{4})(\d{2})(\d{2})$")
_NUMERIC = re.compile(rf"^(\d{{1,2}})[-/.](\d{{1,2}})[-/.](\d{{4}}){_TIME}$")
_DAY_MON = re.compile(r"^(\d{1,2})[- ]([A-Za-z]{3,9})\.?[- ](\d{4})$")
_MON_DAY = re.compile(r"^([A-Za-z]{3,9})\.? (\d{1,2}),? (\d{4})$")
_SERIAL = re.compile(r"^\d{5,7}(?:\.\d+)?$")
_MON_YEAR = re.compile(r"^([A-Za-z]{3,9})\.?[-/ ,]+(\d{4}|\d{2})$")
_NUM_MON_YEAR = re.compile(r"^(\d{1,2})[-/.](\d{4})$")
_YEAR_NUM_MON = re.compile(r"^(\d{4})[-/.](\d{1,2})$")
_BARE_YEAR = re.compile(r"^(?:FY\s*)?(\d{4})(?:\.0+)?$", re.IGNORECASE)
_MONTHS = {m: i for i, m in enumerate(
    ("jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec"), start=1)}
_MONTH_WORDS = {name.lower(): i for i, name in enumerate(calendar.month_name) if name} | {"sept": 9} | _MONTHS
#: Excel's day 0 (the 1900 date system, with its phantom 29 Feb 1900 folded in)
_EXCEL_EPOCH = np.datetime64("1899-12-30", "D")
DateStatus = Literal["", "empty", "unparseable", "impossible", "out_of_range"]
#: what a value gave: a whole date, a month and year, or only a (fiscal) year
Precision = Literal["", "day", "month", "year"]


def month_name(month: int) -> str:
    return calendar.month_name[month]


def fiscal_rule(fy_end: int) -> str:
    """One sentence stating the fiscal-year convention for a year ending in month ``fy_end``."""
    if fy_end == 12:
        return ("Fiscal years end in December, so a departure's fiscal year is its calendar year; "
                "a bare year (2017) is read as that fiscal year.")
    after = month_name(fy_end % 12 + 1)
    return (f"Fiscal years end in {month_name(fy_end)} and are named by the calendar year in which they end: "
            f"an exit on 1 {month_name(1 if fy_end > 1 else 2)} 2020 falls in fiscal 2020, one on 1 {after} 2020 in "
            "fiscal 2021; a bare year (2017) is read as that fiscal year.")


def fiscal_year(year: np.ndarray, month: np.ndarray, fy_end: int) -> np.ndarray:
    """Fiscal year of a (calendar year, month): the calendar year in which the fiscal year ends."""
    return np.where(month > fy_end, year + 1, year)


@dataclass(frozen=True)
class ParsedDates:
    """Dates of one column: ISO text (None for a bare year), fiscal year, status and precision per value."""

    iso: pd.Series
    year: pd.Series
    status: pd.Series
    precision: pd.Series
    order: Literal["dmy", "mdy"]
    order_label: str
    message: str
    #: values proving day-first and month-first (a value over 12 in that place)
    day_first: int = 0
    month_first: int = 0


def _parts(s: pd.Series, pattern: re.Pattern[str]) -> pd.DataFrame:
    return s.str.extract(pattern).apply(pd.to_numeric, errors="coerce")


def _month_words(col: pd.Series) -> pd.Series:
    return col.str.lower().str.rstrip(".").map(lambda w: _MONTH_WORDS.get(w, _MONTHS.get(str(w)[:3])))


def parse_dates(s: pd.Series, order: str = "auto", *, max_year: int, fy_end: int = 12) -> ParsedDates:
    """Parse a column of date text; day-first or month-first is decided once for the whole column.

    ``order="auto"``: a value whose first part exceeds 12 proves day-first, a second part over 12
    proves month-first; with no proof either way the column is read day-first (and a message says
    so); with proof both ways the majority wins and the others are reported as impossible dates.
    """
    s = s.astype(str).str.strip()
    n = len(s)
    y, m, d = (np.full(n, np.nan) for _ in range(3))
    prec = np.full(n, "", dtype=object)

    def fill(parts: pd.DataFrame, yi: int, mi: int, di: int | None, precision: str) -> None:
        hit = parts[yi].notna().to_numpy() & np.isnan(y)
        y[hit], m[hit] = (parts[i].to_numpy(dtype=float)[hit] for i in (yi, mi))
        d[hit] = parts[di].to_numpy(dtype=float)[hit] if di is not None else 1
        prec[hit] = precision

    fill(_parts(s, _ISO), 0, 1, 2, "day")
    fill(_parts(s, _BASIC), 0, 1, 2, "day")
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
    fill(num, 2, 1, 0, "day") if chosen == "dmy" else fill(num, 2, 0, 1, "day")
    for pattern, yi, mi, di in ((_DAY_MON, 2, 1, 0), (_MON_DAY, 2, 0, 1)):
        parts = s.str.extract(pattern)
        if parts[0].notna().any():
            mon = _month_words(parts[mi])
            fill(pd.DataFrame({yi: pd.to_numeric(parts[yi]).where(mon.notna()), mi: mon,
                               di: pd.to_numeric(parts[di])}), yi, mi, di, "day")
    # month and year; a two-digit year is 20YY unless that lies beyond max_year, then 19YY
    parts = s.str.extract(_MON_YEAR)
    if parts[0].notna().any():
        mon = _month_words(parts[0])
        yy = pd.to_numeric(parts[1])
        short = parts[1].str.len() == 2
        yy = yy.where(~short, np.where(2000 + yy <= max_year, 2000 + yy, 1900 + yy))
        fill(pd.DataFrame({0: yy.where(mon.notna()), 1: mon}), 0, 1, None, "month")
    fill(_parts(s, _NUM_MON_YEAR), 1, 0, None, "month")
    fill(_parts(s, _YEAR_NUM_MON), 0, 1, None, "month")
    serial = pd.to_numeric(s.where(s.str.fullmatch(_SERIAL)), errors="coerce").to_numpy(dtype=float)
    hit = ~np.isnan(serial) & np.isnan(y) & (serial <= 2958465)
    if hit.any():
        days = _EXCEL_EPOCH + np.floor(serial[hit]).astype("int64").astype("timedelta64[D]")
        y[hit] = days.astype("datetime64[Y]").astype("int64") + 1970
        m[hit] = days.astype("datetime64[M]").astype("int64") % 12 + 1
        d[hit] = (days - days.astype("datetime64[M]").astype("datetime64[D]")).astype("int64") + 1
        prec[hit] = "day"
    bare = pd.to_numeric(s.str.extract(_BARE_YEAR)[0], errors="coerce").to_numpy(dtype=float)
    hit = ~np.isnan(bare) & np.isnan(y)
    y[hit], m[hit], d[hit], prec[hit] = bare[hit], fy_end, 1, "year"

    empty = (s == "").to_numpy()
    parsed = ~np.isnan(y)
    in_range = parsed & (y >= 1900) & (y <= max_year)
    ok = in_range & (m >= 1) & (m <= 12) & (d >= 1)
    months = np.where(ok, (y - 1970) * 12 + (m - 1), 0).astype("int64").astype("datetime64[M]")
    start = months.astype("datetime64[D]")
    days_in_month = ((months + 1).astype("datetime64[D]") - start).astype("int64")
    valid = ok & (d <= days_in_month)
    stamps = start + (np.where(valid, d, 1) - 1).astype("int64").astype("timedelta64[D]")
    text = stamps.astype(str)
    iso = np.where(valid & (prec == "day"), text, np.where(valid & (prec == "month"), text.astype("U7"), None))
    fy = np.where(prec == "year", y, fiscal_year(y, m, fy_end))
    status = np.select(
        [empty, ~parsed, ~in_range, ~valid], ["empty", "unparseable", "out_of_range", "impossible"], "")
    return ParsedDates(
        iso=pd.Series(iso, index=s.index, dtype=object),
        year=pd.Series(np.where(valid, fy, np.nan), index=s.index),
        status=pd.Series(status, index=s.index), precision=pd.Series(np.where(valid, prec, ""), index=s.index),
        order=chosen, order_label="day/month/year" if chosen == "dmy" else "month/day/year", message=message,
        day_first=day_first, month_first=month_first,
    )


def date_rule(order_label: str, fy_end: int) -> str:
    """The reading rule as the confirm page and the dry run state it."""
    return (f"Dates are read as ISO (2015-06-30), {order_label} text (decided for the whole column), "
            "spreadsheet dates, Excel serial numbers, month and year (Jun-2015, 06/2015, June 2015, Jun-15 = "
            "June 2015) or a bare year. " + fiscal_rule(fy_end))
