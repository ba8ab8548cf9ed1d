"""Yearly coverage of a roster: counts per year, the suggested window, and years that look wrong.

Rosters are often thin in the first and last years of a compilation (common practice: analysts trim
those years before fitting a trend). The rules here are deliberately simple so the page can state them
in one sentence, and every threshold is a parameter.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
import pandas as pd

from app.stats.window_rule import longest_run
from app.types import CATEGORIES, UNMAPPED, check_choice

Basis = Literal["not_excluded", "departures", "counted"]
BASES: tuple[Basis, ...] = get_args(Basis)
FlagKind = Literal["drop", "spike", "repeat", "below_cutoff"]
FLAG_KINDS: tuple[FlagKind, ...] = get_args(FlagKind)

#: the category columns of a coverage table, in order
COUNT_COLUMNS: tuple[str, ...] = (*CATEGORIES, UNMAPPED)
TABLE_COLUMNS: tuple[str, ...] = ("year", "departures", *COUNT_COLUMNS)

_BASIS_WORDS: dict[str, str] = {
    "not_excluded": "counted records (all but excluded codes)",
    "departures": "records",
    "counted": "forced plus voluntary departures",
}


def coverage_table(years: pd.Series, categories: pd.Series) -> pd.DataFrame:
    """Count records per fiscal year and category, with every year from first to last present.

    Parameters
    ----------
    years : pandas.Series of int
        Fiscal year of each record.
    categories : pandas.Series of str
        ``forced``, ``voluntary``, ``excluded`` or ``unmapped`` for each record, aligned with ``years``.

    Returns
    -------
    pandas.DataFrame
        One row per year from ``min(years)`` to ``max(years)``, with columns ``year``, ``departures``
        (every record of the year, whatever its category), ``forced``, ``voluntary``, ``excluded`` and
        ``unmapped``, all int64. A year with no records shows as zeros, so a gap stays visible.
    """
    if len(years) != len(categories):
        raise ValueError(f"years and categories differ in length ({len(years)} and {len(categories)}).")
    if len(years) == 0:
        raise ValueError("coverage needs at least one record.")
    cats = pd.Series(np.asarray(categories, dtype=object))
    unknown = sorted(set(cats.unique()) - set(COUNT_COLUMNS), key=str)
    if unknown:
        raise ValueError(f"category must be one of {', '.join(COUNT_COLUMNS)}; got {unknown[0]!r}.")
    yrs = pd.Series(np.asarray(years, dtype=np.int64))
    span = np.arange(int(yrs.min()), int(yrs.max()) + 1, dtype=np.int64)
    counts = pd.crosstab(yrs, cats).reindex(index=span, columns=list(COUNT_COLUMNS), fill_value=0)
    table = pd.DataFrame({"year": span, "departures": counts.sum(axis=1).to_numpy(dtype=np.int64)})
    for column in COUNT_COLUMNS:
        table[column] = counts[column].to_numpy(dtype=np.int64)
    return table


@dataclass(frozen=True)
class WindowSuggestion:
    """The suggested window of fiscal years and the rule that produced it.

    Attributes
    ----------
    window : (int, int)
        First and last year of the suggested window, inclusive.
    median : float
        Median yearly count over every year of the table (gap years count as zero).
    cutoff : float
        ``threshold * median``: a year needs at least this many to be in a run.
    threshold : float
    basis : {"not_excluded", "departures", "counted"}
        Which count was compared with the cutoff.
    rule : str
        The rule in one sentence, with the numbers filled in.
    below_cutoff : tuple of int
        Every year whose count is under the cutoff (or zero).
    """

    window: tuple[int, int]
    median: float
    cutoff: float
    threshold: float
    basis: Basis
    rule: str
    below_cutoff: tuple[int, ...]


def basis_counts(table: pd.DataFrame, basis: Basis) -> np.ndarray:
    """The yearly count a window rule compares: see :func:`suggest_window` for the bases."""
    check_choice(basis, BASES, "basis")
    _check_table(table)
    if basis == "departures":
        counts = table["departures"]
    elif basis == "counted":
        counts = table["forced"] + table["voluntary"]
    else:
        counts = table["departures"] - table["excluded"]
    return counts.to_numpy(dtype=np.int64)


def suggest_window(table: pd.DataFrame, *, threshold: float = 0.5,
                   basis: Basis = "not_excluded") -> WindowSuggestion:
    """Suggest the span of well-covered fiscal years.

    A year *passes* when its count is positive and at least ``threshold`` times the median yearly
    count. The window is the longest run of consecutive passing years; among equally long runs the
    one with the larger total wins, then the later one (recent years matter most to a trend read
    today). If every year passes, the window is the whole table.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`coverage_table`.
    threshold : float
        Share of the median year a year must reach, in (0, 1]. Default 0.5.
    basis : {"not_excluded", "departures", "counted"}
        What counts as coverage. ``not_excluded`` (default): every record not mapped to excluded, so
        unmapped codes still count before a mapping exists, while still-in-post rows and data errors,
        which say nothing about how completely departures were recorded, do not. ``departures``:
        every record. ``counted``: forced plus voluntary only, the sample a trend model uses.

    Returns
    -------
    WindowSuggestion

    Raises
    ------
    ValueError
        If the threshold is out of range, the basis unknown, or no year has any count.
    """
    if not 0 < threshold <= 1:
        raise ValueError(f"threshold must be in (0, 1]; got {threshold!r}.")
    counts = basis_counts(table, basis)
    if counts.sum() <= 0:
        raise ValueError(f"no year has any {_BASIS_WORDS[basis]}; cannot suggest a window.")
    years = table["year"].to_numpy(dtype=np.int64)
    median, cutoff, passing, (first, last) = longest_run(counts.tolist(), threshold)
    passes = np.asarray(passing, dtype=bool)
    rule = (f"the longest run of consecutive years whose {_BASIS_WORDS[basis]} are at least "
            f"{threshold * 100:g}% of the median year (median {median:g}, so at least {cutoff:g}); "
            "a year with none breaks a run; among equally long runs the one with more records wins, "
            "then the later one")
    return WindowSuggestion(
        window=(int(years[first]), int(years[last])), median=median, cutoff=cutoff,
        threshold=float(threshold), basis=basis, rule=rule,
        below_cutoff=tuple(int(y) for y in years[~passes]),
    )


@dataclass(frozen=True)
class YearFlag:
    """A year worth a second look, with a message that states the rule it broke."""

    year: int
    kind: FlagKind
    message: str


def flag_years(table: pd.DataFrame, *, threshold: float = 0.5, basis: Basis = "not_excluded",
               min_count: int = 10) -> list[YearFlag]:
    """Flag years whose counts look wrong against the rest of the roster.

    Rules (each message repeats its rule with the numbers):

    - ``below_cutoff``: the year fails the window rule of :func:`suggest_window`.
    - ``drop``: the count is less than half the mean of the neighbouring years (one neighbour at either
      end of the table), when that mean is at least ``min_count``.
    - ``spike``: the count is more than double that mean and at least ``min_count``.
    - ``repeat``: the year's category counts (forced, voluntary, excluded, unmapped) are exactly those of
      another year, with at least ``min_count`` records; copied rows are a classic compilation slip.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`coverage_table`.
    threshold, basis
        As for :func:`suggest_window`.
    min_count : int
        Smallest count that can raise a drop, spike or repeat flag; below it, noise dominates.

    Returns
    -------
    list of YearFlag
        Sorted by year, then by kind in the order below_cutoff, drop, spike, repeat.
    """
    suggestion = suggest_window(table, threshold=threshold, basis=basis)
    counts = basis_counts(table, basis)
    years = table["year"].to_numpy(dtype=np.int64)
    words = _BASIS_WORDS[basis]
    flags: list[YearFlag] = []
    below = set(suggestion.below_cutoff)
    for i, year in enumerate(years.tolist()):
        count = int(counts[i])
        if year in below:
            flags.append(YearFlag(year, "below_cutoff",
                                  f"{year}: {count} {words}, below {suggestion.cutoff:g} "
                                  f"({suggestion.threshold * 100:g}% of the median year, {suggestion.median:g})."))
        neighbours = counts[max(i - 1, 0):i].tolist() + counts[i + 1:i + 2].tolist()
        if not neighbours:
            continue
        ref = float(np.mean(neighbours))
        if ref >= min_count and count < ref / 2:
            flags.append(YearFlag(year, "drop", f"{year}: {count} {words}, less than half the mean of "
                                                f"its neighbouring years ({ref:g})."))
        elif count >= min_count and count > 2 * ref:
            flags.append(YearFlag(year, "spike", f"{year}: {count} {words}, more than double the mean "
                                                 f"of its neighbouring years ({ref:g})."))
    flags.extend(_repeats(table, min_count))
    order = {kind: n for n, kind in enumerate(("below_cutoff", "drop", "spike", "repeat"))}
    return sorted(flags, key=lambda f: (f.year, order[f.kind]))


def _repeats(table: pd.DataFrame, min_count: int) -> list[YearFlag]:
    cells = table[list(COUNT_COLUMNS)].to_numpy(dtype=np.int64)
    years = table["year"].to_numpy(dtype=np.int64).tolist()
    seen: dict[tuple[int, ...], list[int]] = {}
    for year, counts in zip(years, cells.tolist(), strict=True):
        if sum(counts) >= min_count:
            seen.setdefault(tuple(counts), []).append(year)
    flags = []
    for row, same in seen.items():
        if len(same) < 2:
            continue
        shown = ", ".join(f"{c} {n}" for c, n in zip(COUNT_COLUMNS, row, strict=True) if n)
        for year in same:
            others = ", ".join(str(y) for y in same if y != year)
            flags.append(YearFlag(year, "repeat", f"{year}: category counts ({shown}) exactly repeat "
                                                  f"those of {others}; check for copied rows."))
    return flags


def _check_table(table: pd.DataFrame) -> None:
    missing = [c for c in TABLE_COLUMNS if c not in table.columns]
    if missing:
        raise ValueError(f"coverage table lacks column(s) {', '.join(missing)}; "
                         f"expected {', '.join(TABLE_COLUMNS)}.")
    if table.empty:
        raise ValueError("coverage table has no years.")
