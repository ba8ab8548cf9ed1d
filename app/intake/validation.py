"""Row validation: type every column, reject what cannot be a departure (saying what and where), keep the rest.

Validation is vectorised with pandas; each rejected row keeps its 1-based source line number. Fiscal year:
from the year column where there is one, else from the departure date under the roster's fiscal-year end
(see :mod:`app.intake.dates`). Where both are given they may differ by at most one year, beyond that the
row is rejected. A row with no date whose reason says the executive is still in post is accepted and dated
to the latest fiscal year of the file (the executive was in post as of then); the mapping suggestion
excludes such codes from every model.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import date
from typing import Literal, get_args

import numpy as np
import pandas as pd

from app.intake.announced import KeptWithWarning, read_announcements
from app.intake.codes import CodeGroup, group_spellings
from app.intake.dates import DATE_FORMATS, parse_dates
from app.intake.in_post import is_still_in_post
from app.intake.rawtable import DEFAULT_LIMITS, RawTable, ReadLimits
from app.store import RejectedRow
from app.store.raw_rows import RawCells, row_json, shared_map

DateOrder = Literal["auto", "dmy", "mdy"]
DATE_ORDERS: tuple[DateOrder, ...] = get_args(DateOrder)

_INTERIM_VALUES = {"yes": True, "y": True, "true": True, "1": True, "no": False, "n": False,
                   "false": False, "0": False}


@dataclass
class Checked:
    """What validation found: records to store, rejected rows, and what the review step reports."""

    records: pd.DataFrame
    rejected: list[RejectedRow]
    duplicates: int
    messages: list[str]
    still_in_post: int = 0
    code_groups: list[CodeGroup] = field(default_factory=list)
    order_label: str = ""
    #: the date reading not chosen, and how many rows it would rescue ("" = no date column / no gain)
    other_order: str = ""
    other_order_rescues: int = 0
    #: accepted rows that lost a field (an unreadable or late announcement date), with their lines
    kept_with_warnings: list[KeptWithWarning] = field(default_factory=list)
    #: with ``lazy_raw``: the header and the accepted rows' cells, which the store keeps per batch as they are
    #: (``app.store.raw_rows``) instead of a ``raw`` column (all 1,000,000 rows' JSON at once is ~250 MB)
    raw_cells: RawCells | None = None


# Speed: a 100,000-row roster has few distinct values per typed column (years, dates, ages, flags), so
# each typed column is factorised once and parsed per distinct value; per-row Python work is limited
# to stripping free text, building the raw JSON, and wording the (rare) rejections.
class _Problems:
    """Reasons per row position; masks are mostly false, so only the hits cost Python time."""

    def __init__(self) -> None:
        self.by_row: dict[int, list[str]] = {}

    def add(self, mask: np.ndarray, message: str | Callable[[int], str]) -> None:
        for pos in np.flatnonzero(mask):
            text = message if isinstance(message, str) else message(int(pos))
            self.by_row.setdefault(int(pos), []).append(text)


#: roles parsed per distinct value; the free-text roles are only stripped
_TYPED_ROLES = ("year", "date", "reason", "age", "tenure", "interim", "announced")


@dataclass(frozen=True)
class _Column:
    """One column as (codes, distinct values stripped): value of row i is ``uniq[codes[i]]``."""

    codes: np.ndarray
    uniq: pd.Series
    raw: list[str]

    @classmethod
    def of(cls, values: np.ndarray) -> _Column:
        codes, uniq = pd.factorize(values)
        return cls(codes, pd.Series([str(u).strip() for u in uniq], dtype=object), [str(u) for u in uniq])

    def take(self, per_value: pd.Series | np.ndarray) -> np.ndarray:
        return np.asarray(per_value)[self.codes]

    def value(self, pos: int) -> str:
        return str(self.uniq.iloc[self.codes[pos]])


def _worded(template: str, value: Callable[[int], object]) -> Callable[[int], str]:
    """A rejection message for row ``i``: ``template`` filled with ``value(i)``."""
    return lambda i: template.format(value(i))


def _numbers(s: pd.Series) -> pd.Series:
    # "3,5" is a decimal comma (semicolon-delimited European exports), not a thousands separator
    fixed = s.where(~s.str.fullmatch(r"-?\d+,\d+"), s.str.replace(",", ".", regex=False))
    num = pd.to_numeric(fixed.where(fixed != ""), errors="coerce").astype("float64")
    return num.where(num.abs() != float("inf"))


#: rows an import keeps of the table's text after validation (what role detection samples)
ROLE_SAMPLE = 500
def _stripped(values: np.ndarray) -> np.ndarray:
    """Cells stripped of surrounding spaces, "" as None."""
    return shared_map(values, lambda u: u.strip() or None)


def validate(
    table: RawTable, roles: dict[str, str], *, date_order: DateOrder = "auto",
    limits: ReadLimits = DEFAULT_LIMITS, today: date | None = None, fy_end: int = 12,
) -> tuple[pd.DataFrame, list[RejectedRow], int, list[str]]:
    """Split ``table`` into accepted records (``DEPARTURE_FIELDS``), rejected rows, a duplicate count
    and messages (see :func:`check_rows`)."""
    c = check_rows(table, roles, date_order=date_order, limits=limits, today=today, fy_end=fy_end)
    return c.records, c.rejected, c.duplicates, c.messages


def check_rows(
    table: RawTable, roles: dict[str, str], *, date_order: DateOrder = "auto",
    limits: ReadLimits = DEFAULT_LIMITS, today: date | None = None, fy_end: int = 12, release_rows: bool = False,
    lazy_raw: bool = False,
) -> Checked:
    """Validate every row. Exact duplicate rows are dropped first (counted, never rejected).

    ``release_rows``: the caller needs ``table.rows`` no more than their first ``ROLE_SAMPLE``; the rest are let go
    once the columns are built (on 1,000,000 rows the row lists alone are ~150 MB). ``lazy_raw``: ``records``
    has no ``raw`` column; ``Checked.raw_cells`` holds the accepted rows' cells instead.
    """
    max_year = (today or date.today()).year + 1
    messages: list[str] = []
    order_label, other_label, other_rescues = "", "", 0
    if table.columns is not None and table.column_lines is not None:  # read by pandas (``fastcsv``)
        columns, all_lines = table.columns, table.column_lines
        if release_rows:
            table.columns = table.column_lines = None
    else:
        grid = np.empty((len(table.rows), len(table.headers)), dtype=object)
        if len(table.rows):
            grid[:] = table.rows  # every row has the header's width (``add_row``)
        columns = [grid[:, j] for j in range(grid.shape[1])]
        all_lines = np.array(table.lines, dtype=np.int64)
        del grid
        if release_rows:
            del table.rows[ROLE_SAMPLE:]
    total = len(all_lines)
    # exact duplicates: pandas compares the rows column by column (hashing each row's JSON instead would
    # need every row's JSON at once)
    as_frame = pd.DataFrame(dict(enumerate(columns)), copy=False)
    first = ~as_frame.duplicated(keep="first").to_numpy() if total else np.zeros(0, dtype=bool)
    del as_frame
    duplicates = total - int(np.sum(first))
    lines = all_lines
    if duplicates:
        columns, lines = [c[first] for c in columns], lines[first]
        messages.append(f"{duplicates:,} exact duplicate row(s) were counted and stored once.")
    if table.blank_rows:
        messages.append(f"{table.blank_rows:,} blank row(s) were skipped.")
    n = len(lines)
    by_header = dict(zip(table.headers, columns, strict=True))
    p = _Problems()
    for h, cells in by_header.items():
        if table.may_hold_nul and "\x00" in "".join(cells):
            p.add(np.array(["\x00" in c for c in cells]), f"NUL byte in column {h!r}")
        if n and max(map(len, cells)) > limits.max_cell_chars:
            lengths = np.fromiter(map(len, cells), dtype=np.int64, count=n)
            p.add(lengths > limits.max_cell_chars, _worded(
                f"cell in column {h!r} has {{:,}} characters (limit {limits.max_cell_chars:,})", lengths.__getitem__))
    head0 = table.headers[0]
    maybe_header = np.flatnonzero(shared_map(by_header[head0], str.strip) == head0)
    repeats_header = [int(i) for i in maybe_header
                      if all(by_header[h][i].strip() == h for h in table.headers)]

    col = {role: _Column.of(by_header[h])
           for role, h in roles.items() if role in _TYPED_ROLES}
    firm_id = shared_map(by_header[roles["firm_id"]], str.strip)
    p.add(firm_id == "", f"missing firm id (column {roles['firm_id']!r} is empty)")
    reason = col["reason"]
    p.add(reason.take(reason.uniq == ""), f"missing reason code (column {roles['reason']!r} is empty)")

    year = np.full(n, np.nan)
    if "year" in roles:
        c = col["year"]
        ys = c.uniq.str.replace(r"^FY\s*", "", case=False, regex=True)
        ok = ys.str.fullmatch(r"\d{1,4}(?:\.0+)?")
        year = c.take(pd.to_numeric(ys.where(ok), errors="coerce").astype("float64"))
        p.add(c.take((ys != "") & ~ok), lambda i: f"year {col['year'].value(i)!r} is not a whole number")
        p.add((year < 1900) | (year > max_year), lambda i: f"year {year[i]:.0f} is outside 1900..{max_year}")
    iso = np.full(n, None, dtype=object)
    date_year = np.full(n, np.nan)
    announced_order: str = date_order  # the announcement column follows the exit dates' proven order
    if "date" in roles:
        c = col["date"]
        parsed = parse_dates(c.uniq, date_order, max_year=max_year, fy_end=fy_end)
        iso, date_year, status = c.take(parsed.iso), c.take(parsed.year), c.take(parsed.status)
        p.add(status == "unparseable",
              lambda i: f"unparseable date {col['date'].value(i)!r}; expected {DATE_FORMATS}")
        p.add(status == "impossible", lambda i: (
            f"impossible date {col['date'].value(i)!r} (no such day when read as {parsed.order_label})"))
        p.add(status == "out_of_range", lambda i: f"date {col['date'].value(i)!r} is outside 1900..{max_year}")
        if parsed.message:
            messages.append(f"Dates in column {roles['date']!r}: {parsed.message}")
        order_label = parsed.order_label
        if date_order != "auto" or parsed.day_first or parsed.month_first:
            announced_order = parsed.order
        if parsed.order == "dmy" or parsed.order == "mdy":
            other: DateOrder = "mdy" if parsed.order == "dmy" else "dmy"
            alt = parse_dates(c.uniq, other, max_year=max_year, fy_end=fy_end)
            rescued = int(np.sum(c.take((alt.status == "") & (parsed.status != ""))))
            if rescued:
                other_label, other_rescues = alt.order_label, rescued
        p.add(~np.isnan(year) & ~np.isnan(date_year) & (np.abs(year - date_year) > 1),
              lambda i: f"year {year[i]:.0f} and date {iso[i]} disagree by more than one year")
    no_when = np.ones(n, dtype=bool)
    for role in ("year", "date"):
        if role in roles:
            no_when &= col[role].take(col[role].uniq == "")
    serving = reason.take(reason.uniq.map(is_still_in_post).astype(bool))
    p.add(no_when & ~serving, "missing year and date (a fiscal year or a departure date is needed)")
    in_post = no_when & serving

    num: dict[str, np.ndarray] = {}
    for role in ("age", "tenure"):
        num[role] = np.full(n, np.nan)
        if role in roles:
            c = col[role]
            values = _numbers(c.uniq)
            num[role] = v = c.take(values)
            p.add(c.take((c.uniq != "") & values.isna()), _worded(role + " {!r} is not a number", c.value))
            p.add(v < 0, _worded(f"negative {role} {{}}", c.value))
    if "age" in roles:
        a = num["age"]
        p.add((a >= 0) & ((a < 14) | (a > 110)), lambda i: f"age {col['age'].value(i)} is outside 14..110")
    interim = np.full(n, None, dtype=object)
    if "interim" in roles:
        c = col["interim"]
        flags = c.uniq.str.lower().map(_INTERIM_VALUES)
        interim = c.take(flags.astype(object).where(flags.notna(), None))
        p.add(c.take((c.uniq != "") & flags.isna()), lambda i: (
            f"interim flag {col['interim'].value(i)!r} not recognised; use yes/no, true/false, 1/0, y/n "
            "or leave it blank"))
    notice = (read_announcements(col["announced"].uniq, col["announced"].codes, iso, order=announced_order,
                                 max_year=max_year, fy_end=fy_end) if "announced" in roles else None)
    for pos in repeats_header:
        p.by_row[pos] = ["repeats the header row (were two files joined together?)"]

    bad = list(p.by_row)
    bad_raw = row_json(table.headers, [c[bad] for c in columns])
    rejected = [RejectedRow(line=int(lines[i]), raw=r, reason="; ".join(msgs))
                for (i, msgs), r in zip(p.by_row.items(), bad_raw, strict=True)]
    rejected = sorted(table.bad_rows + rejected, key=lambda r: r.line)
    keep = np.ones(n, dtype=bool)
    keep[list(p.by_row)] = False

    def text(role: str) -> np.ndarray:
        if role not in roles:
            return np.full(n, None, dtype=object)
        return _stripped(by_header[roles[role]])

    fiscal = np.where(np.isnan(year), date_year, year)
    known = fiscal[keep & ~in_post & ~np.isnan(fiscal)]
    as_of = float(known.max()) if known.size else float(max_year - 1)
    in_post_kept = int(np.sum(in_post & keep))
    if in_post_kept:
        fiscal = np.where(in_post & np.isnan(fiscal), as_of, fiscal)
        messages.append(f"{in_post_kept:,} still-in-post row(s) have no date; they are kept and dated to fiscal "
                        f"{as_of:.0f}, the latest year of the file (the suggested mapping excludes them).")
    raw_reason = reason.take(np.array(reason.raw, dtype=object))
    canonical, groups = group_spellings(pd.Series(raw_reason[keep], dtype=object))
    shown = pd.Series(raw_reason, dtype=object).map(canonical).to_numpy(dtype=object)
    if groups:
        messages.append(f"{len(groups):,} reason code(s) were written in more than one spelling (case, spaces, "
                        "dashes or quotes); each is one code under its most frequent spelling.")
    warnings = notice.warnings(lines, keep) if notice is not None else []
    messages += [f"{w.count:,} row(s): {w.reason}; line{'s' if w.count > 1 else ''} {_lines(w.lines)}."
                 for w in warnings]
    if notice is not None and notice.message:
        messages.append(f"Column {roles['announced']!r}, {notice.message}")
    columns_out = {
        "line": lines, "firm_id": firm_id, "firm_name": text("firm_name"), "sector": text("sector"),
        "year": fiscal, "date": iso, "reason": shown, "reason_raw": raw_reason,
        "executive": text("executive"), "age": num["age"], "tenure": num["tenure"], "interim": interim,
        "notes": text("notes"),
        "announced": notice.iso if notice is not None else np.full(len(lines), None, dtype=object),
        "notice_days": notice.notice_days if notice is not None else np.full(len(lines), np.nan),
    }
    raw_columns = [c[keep] for c in columns]
    if not lazy_raw:
        columns_out["raw"] = np.array(row_json(table.headers, raw_columns), dtype=object)
    del columns
    by_header.clear()  # the grid of text cells goes with it
    # each column filtered once, then the frame built without a second copy (on 1,000,000 rows every copy of
    # the object columns is ~100 MB)
    records = pd.DataFrame({k: v if k == "raw" else np.asarray(v)[keep] for k, v in columns_out.items()},
                           copy=False)
    del columns_out
    records["year"] = records["year"].astype("int64")
    records["notice_days"] = records["notice_days"].astype("Int64")
    return Checked(records, rejected, duplicates, messages, still_in_post=int(np.sum(serving & keep)), code_groups=groups,
                   order_label=order_label, other_order=other_label, other_order_rescues=other_rescues,
                   kept_with_warnings=warnings,
                   raw_cells=RawCells(list(table.headers), raw_columns) if lazy_raw else None)


def _lines(lines: tuple[int, ...], shown: int = 10) -> str:
    """"4, 9, 12" or "4, 9, ... (and 30 more)": a message names a few lines, the review lists them all."""
    head = ", ".join(map(str, lines[:shown]))
    return head if len(lines) <= shown else f"{head} (and {len(lines) - shown:,} more)"
