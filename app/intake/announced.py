"""Announcement dates of departures, and the notice they give: exit date minus announcement date, whole days.

Read with every date form of :mod:`app.intake.dates`, in the day/month order the exit-date column settled
on when that column proved one (or the analyst chose one); otherwise the order is decided over the
announcement column's own values, as for any date column.

What an analyst gets (issue 16), row by row; the departure itself is never rejected for its announcement,
since it is a valid departure whatever its notice, and dropping it would move every count:

- an announcement date that cannot be read: the record is kept with no announcement and no notice days,
  and the review lists it under "announcement date unreadable" with its line numbers;
- an announcement after the exit date (compared at the coarser of the two precisions, so "2020-07" is after
  "2020-06-15"): the record is kept with the announcement as read and no notice days, listed under
  "announcement date after the exit date";
- notice days only where both dates are whole days: a month-and-year or bare-year date on either side gives
  no notice days (a month's uncertainty is up to 30 days, too coarse for a threshold such as 183 days), and
  such rows are counted too (as are announcements of rows with no exit date: still in post, or a year
  column only). An announcement on the exit day gives 0.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from app.intake.dates import parse_dates

#: how the confirm page and the dry run state the rule
NOTICE_RULE = ("Announcement dates are read the same way; notice days (exit minus announcement) are counted where "
               "both are whole days. A row whose announcement cannot be read, or comes after the exit, is kept "
               "without notice days and listed below.")
UNREADABLE = "announcement date unreadable (kept without notice days)"
AFTER_EXIT = "announcement date after the exit date (kept without notice days)"
COARSE = "no notice days: the exit or announcement date is only a month or a year, or there is no exit date"


@dataclass(frozen=True)
class KeptWithWarning:
    """Accepted rows that lost a field, grouped by why, with their 1-based source lines."""

    reason: str
    lines: tuple[int, ...]

    @property
    def count(self) -> int:
        return len(self.lines)


@dataclass(frozen=True)
class Announcements:
    """Per row: the announcement as ISO text (day or month; None), notice days (NaN where none) and what
    went wrong."""

    iso: np.ndarray
    notice_days: np.ndarray
    unreadable: np.ndarray
    after_exit: np.ndarray
    coarse: np.ndarray
    message: str

    def warnings(self, lines: np.ndarray, keep: np.ndarray) -> list[KeptWithWarning]:
        """The kept rows each problem applies to (largest group first)."""
        found = [KeptWithWarning(reason, tuple(int(x) for x in lines[mask & keep]))
                 for reason, mask in ((UNREADABLE, self.unreadable), (AFTER_EXIT, self.after_exit),
                                      (COARSE, self.coarse))]
        return sorted((w for w in found if w.lines), key=lambda w: -w.count)


def read_announcements(uniq: pd.Series, codes: np.ndarray, exit_iso: np.ndarray, *, order: str, max_year: int,
                       fy_end: int = 12) -> Announcements:
    """Announcement dates of a column given as distinct stripped values ``uniq`` and each row's index into
    them (``codes``), against each row's exit date ``exit_iso`` (ISO day or month text, None)."""
    parsed = parse_dates(uniq, order, max_year=max_year, fy_end=fy_end)
    status = parsed.status.to_numpy(dtype=object)[codes]
    precision = parsed.precision.to_numpy(dtype=object)[codes]
    iso = parsed.iso.to_numpy(dtype=object)[codes]
    unreadable = (status != "") & (status != "empty")
    ann = pd.Series(iso, dtype=object)
    ext = pd.Series(exit_iso, dtype=object)
    both = (ann.notna() & ext.notna()).to_numpy()
    days = both & (ann.str.len() == 10).to_numpy() & (ext.str.len() == 10).to_numpy()
    # ISO text orders as the dates do; at month precision compare the months only
    after = both & np.where(days, (ann > ext).to_numpy(), (ann.str[:7] > ext.str[:7]).to_numpy())
    notice = np.full(len(codes), np.nan)
    ok = days & ~after
    if ok.any():
        notice[ok] = (ext[ok].to_numpy(dtype="datetime64[D]")
                      - ann[ok].to_numpy(dtype="datetime64[D]")).astype("int64")
    given = (precision != "") & ~after
    message = f"announcement dates: {parsed.message}" if parsed.message and given.any() else ""
    return Announcements(iso=iso, notice_days=notice, unreadable=unreadable, after_exit=after,
                         coarse=given & ~ok, message=message)
