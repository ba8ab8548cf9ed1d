"""Analysis inputs from the cell store, memoised per store: what pages read instead of the records.

A roster's counts by (year, sector, reason code) do not depend on the mapping, so the store keeps them from
import on (``Store.cell_counts``). Here a mapping version turns them into categories, and from those come
the coverage table, the unmapped codes and the ``Cells`` of every model, with the same values, order and
fingerprint as counting the records (``app.stats.cells.build_cells``; tests/test_cellstore.py checks it
on the demo roster).

The memo lives as long as its ``Store`` (a weak reference), is bounded, and is keyed by the roster's
id and fingerprint (which changes when a roster is replaced) and the mapping's name and version (a saved
version never changes), so repeated pages cost a dictionary look-up and nothing is ever served stale.
"""

from __future__ import annotations

import hashlib
import json
import threading
import weakref
from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from typing import Any, TypeVar

import numpy as np
import pandas as pd

from app.stats.cells import Cells, assign_categories
from app.stats.coverage import COUNT_COLUMNS
from app.stats.rules import RuleEffect, apply_rules
from app.store import MappingVersion, Roster, Store
from app.types import UNMAPPED, ClassificationRule

T = TypeVar("T")
#: entries kept per store (a roster's counts, a mapping's coverage, a window's cells each take one)
MEMO_ENTRIES = 256


def roster_fingerprint(roster: Roster) -> str:
    """Changes whenever the stored roster does: a new import (even under a reused id) has a new fingerprint."""
    payload = json.dumps([roster.id, roster.version, roster.sha256, roster.imported_at, roster.accepted,
                          roster.rows_total, roster.columns], sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()[:16]


def mapping_key(mapping: MappingVersion | None) -> tuple[str, int] | None:
    return None if mapping is None else (mapping.name, mapping.version)


class _Memo:
    """A small thread-safe LRU of computed values (two requests may compute the same entry; both agree)."""

    def __init__(self, size: int) -> None:
        self.size = size
        self._items: OrderedDict[tuple[Any, ...], Any] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: tuple[Any, ...], compute: Callable[[], T]) -> T:
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
                return self._items[key]
        value = compute()
        with self._lock:
            self._items[key] = value
            while len(self._items) > self.size:
                self._items.popitem(last=False)
        return value


_MEMOS: weakref.WeakKeyDictionary[Store, _Memo] = weakref.WeakKeyDictionary()
_MEMOS_LOCK = threading.Lock()


def memo(store: Store) -> _Memo:
    with _MEMOS_LOCK:
        found = _MEMOS.get(store)
        if found is None:
            found = _MEMOS[store] = _Memo(MEMO_ENTRIES)
        return found


def roster_counts(store: Store, roster: Roster) -> pd.DataFrame:
    """Departures per (year, sector, reason) of the roster (shared: do not modify the frame)."""
    return memo(store).get(("counts", roster.id, roster_fingerprint(roster)),
                           lambda: store.cell_counts(roster.id, roster.version))


def detail_counts(store: Store, roster: Roster) -> pd.DataFrame:
    """Departures per (year, sector, reason, age, tenure, interim): the key rules and the adjusted trend need
    (shared: do not modify the frame)."""
    return memo(store).get(("detail", roster.id, roster_fingerprint(roster)),
                           lambda: store.cell_counts(roster.id, roster.version, detail=True))


def categorise(counts: pd.DataFrame, mapping: MappingVersion | None) -> tuple[pd.DataFrame, list[RuleEffect]]:
    """``counts`` (cells or records) with each row's ``category``: its code's, then the version's rules."""
    return categorise_with(counts, mapping.categories if mapping else {}, mapping.rules if mapping else ())


def categorise_with(counts: pd.DataFrame, categories: Mapping[str, str],
                    rules: Sequence[ClassificationRule]) -> tuple[pd.DataFrame, list[RuleEffect]]:
    """``categorise`` for a reading that is not a saved version (robustness variants); rules need the
    detailed cells (``detail_counts``) or records."""
    base = assign_categories(counts["reason"], categories)
    if not rules:
        return counts.assign(category=base), []
    decided, effects = apply_rules(counts, np.asarray(base, dtype=object), rules)
    return counts.assign(category=decided), effects


def categorised_counts(store: Store, roster: Roster, mapping: MappingVersion | None) -> pd.DataFrame:
    """``roster_counts`` with a ``category`` column read through ``mapping`` (shared: do not modify).

    A version with classification rules reads the detailed cells (age, tenure, interim in the key) so the
    rules apply without reading a record; without rules the frame is keyed by (year, sector, reason) only.
    """
    def compute() -> pd.DataFrame:
        if mapping is not None and mapping.rules:
            return categorise(detail_counts(store, roster), mapping)[0]
        return categorise(roster_counts(store, roster), mapping)[0]
    return memo(store).get(("categorised", roster.id, roster_fingerprint(roster), mapping_key(mapping)), compute)


def rule_effects(store: Store, roster: Roster, mapping: MappingVersion | None) -> list[RuleEffect]:
    """What each rule of ``mapping`` did to this roster's departures (all years), from the detailed cells."""
    if mapping is None or not mapping.rules:
        return []
    return memoised(store, ("rule_effects", roster.id, roster_fingerprint(roster), mapping_key(mapping)),
                    lambda: categorise(detail_counts(store, roster), mapping)[1])


def memoised(store: Store, key: tuple[Any, ...], compute: Callable[[], T]) -> T:
    """Any other value derived from one roster version and mapping version (the key must say which)."""
    return memo(store).get(key, compute)


# -- counts -> the frames and cells the models read ---------------------------------------------------
def coverage_from_counts(counts: pd.DataFrame) -> pd.DataFrame:
    """``app.stats.coverage.coverage_table`` from counted cells (``year``, ``category``, ``departures``).

    Same columns, dtypes and values as the table built from one row per record.
    """
    if counts.empty:
        raise ValueError("coverage needs at least one record.")
    years = counts["year"].to_numpy(dtype=np.int64)
    span = np.arange(int(years.min()), int(years.max()) + 1, dtype=np.int64)
    summed = counts.groupby(["year", "category"])["departures"].sum().unstack(fill_value=0)
    summed = summed.reindex(index=span, columns=list(COUNT_COLUMNS), fill_value=0)
    table = pd.DataFrame({"year": span, "departures": summed.sum(axis=1).to_numpy(dtype=np.int64)})
    for column in COUNT_COLUMNS:
        table[column] = summed[column].to_numpy(dtype=np.int64)
    return table


def in_window(counts: pd.DataFrame, window: tuple[int, int]) -> pd.DataFrame:
    years = counts["year"]
    return counts.loc[(years >= window[0]) & (years <= window[1])]


def code_counts(counts: pd.DataFrame) -> pd.DataFrame:
    """Per reason code: ``code``, ``count``, ``first_year``, ``last_year``; most common first, then by code.

    The same table as ``Store.reason_counts`` (which counts the records in SQL).
    """
    grouped = counts.groupby("reason").agg(count=("departures", "sum"), first_year=("year", "min"),
                                           last_year=("year", "max")).reset_index()
    grouped = grouped.rename(columns={"reason": "code"}).sort_values(["count", "code"], ascending=[False, True],
                                                                     kind="stable")
    return grouped.reset_index(drop=True).astype({"count": np.int64, "first_year": np.int64,
                                                   "last_year": np.int64})


def without_in_post(counts: pd.DataFrame, in_post: pd.DataFrame | None) -> pd.DataFrame:
    """``year``, ``reason``, ``category``, ``departures`` of ``counts`` less the rows still in post (``in_post``:
    ``AnalysisInput.in_post_rows``, same columns): summed per key, what is left are departures. A cell may go
    negative (the rows are taken off as rows of their own); only sums per key are meant to be read."""
    key = ["year", "reason", "category", "departures"]
    if in_post is None or in_post.empty:
        return counts[key]
    return pd.concat([counts[key], in_post[key].assign(departures=-in_post["departures"])], ignore_index=True)


def code_counts_apart(counts: pd.DataFrame, in_post: pd.DataFrame | None) -> pd.DataFrame:
    """Per reason code: ``code``, ``count`` (its departures, every year), ``in_post`` (its rows still in post,
    which are no departure of any year), ``first_year`` and ``last_year`` (of its departures; of its rows still
    in post when it has none); most departures first, then most rows in post, then by code.

    Without rows still in post it is ``code_counts`` with an ``in_post`` column of zeros.
    """
    total = counts.groupby(["reason", "year"])["departures"].sum()
    held = (pd.Series(0, index=total.index, dtype=np.int64) if in_post is None or in_post.empty
            else in_post.groupby(["reason", "year"])["departures"].sum().reindex(total.index, fill_value=0))
    per = pd.DataFrame({"departures": total - held, "in_post": held}).reset_index()
    every = per.groupby("reason")["year"].agg(["min", "max"])
    dated = per.loc[per["departures"] > 0].groupby("reason")["year"].agg(["min", "max"])
    years = dated.reindex(every.index).fillna(every)
    sums = per.groupby("reason")[["departures", "in_post"]].sum()
    out = pd.DataFrame({"code": every.index.to_numpy(), "count": sums["departures"].to_numpy(),
                        "in_post": sums["in_post"].to_numpy(), "first_year": years["min"].to_numpy(),
                        "last_year": years["max"].to_numpy()})
    out = out.sort_values(["count", "in_post", "code"], ascending=[False, False, True], kind="stable")
    return out.reset_index(drop=True).astype({"count": np.int64, "in_post": np.int64, "first_year": np.int64,
                                              "last_year": np.int64})


def window_code_counts(counts: pd.DataFrame, window: tuple[int, int], *, category: str | None = None) -> pd.Series:
    """Departures per reason code inside ``window`` (only codes of ``category`` when given), most first."""
    inside = in_window(counts, window)
    if category is not None:
        inside = inside.loc[inside["category"] == category]
    summed = inside.groupby("reason")["departures"].sum()
    summed = summed[summed > 0]
    order = sorted(summed.index, key=lambda code: (-int(summed[code]), str(code)))
    return summed.reindex(order).astype(np.int64)


def unmapped_codes(counts: pd.DataFrame, window: tuple[int, int]) -> pd.DataFrame:
    """Codes without a category inside the window with their counts, most common first (then by code)."""
    found = window_code_counts(counts, window, category=UNMAPPED)
    return pd.DataFrame({"code": found.index.astype(str), "count": found.to_numpy(dtype=np.int64)})


def counted_window(counts: pd.DataFrame, window: tuple[int, int] | None) -> tuple[int, int]:
    """``build_cells``'s default window: the years with a forced or voluntary departure."""
    if window is not None:
        return int(window[0]), int(window[1])
    years = counts.loc[counts["category"].isin(["forced", "voluntary"]), "year"]
    return (int(years.min()), int(years.max())) if len(years) else (0, 0)


def cells_from_counts(counts: pd.DataFrame, window: tuple[int, int] | None = None, *,
                      by_sector: bool = False, categories: Mapping[str, str] | None = None) -> Cells:
    """``app.stats.cells.build_cells`` from counted cells; identical groups, order and fingerprint.

    ``counts`` has ``year``, ``sector``, ``reason``, ``departures`` and either ``category`` or, with
    ``categories``, the mapping to read the codes through. With a ``firm_id`` column the firm x cell matrix
    is built too (the counts of each firm: what a firm bootstrap needs); without it the matrix has no rows,
    which every bootstrap refuses (its rows must add up to the group counts), so it serves fits and
    fingerprints only.
    """
    from scipy import sparse  # lazy: a fit or a fingerprint needs no sparse matrix (start-up, issue 13)

    if categories is not None:
        counts = counts.assign(category=assign_categories(counts["reason"], categories))
    window = counted_window(counts, window)
    frame, keyed, forced, groups = _grouped(counts, window, by_sector)
    n = frame["departures"].to_numpy(dtype=np.int64)
    n_groups = len(groups)
    if "firm_id" not in frame:
        return Cells(groups=groups, firm_ids=np.array([], dtype=object),
                     firm_matrix=sparse.csr_matrix((0, 2 * n_groups), dtype=np.int64),
                     window=window, by_sector=by_sector)
    group_index = pd.MultiIndex.from_arrays([groups["sector"], groups["year"]])
    gpos = group_index.get_indexer(pd.MultiIndex.from_arrays([keyed["sector"], keyed["year"]]))
    firm_codes, firm_ids = pd.factorize(frame["firm_id"].astype(str).to_numpy(), sort=True)
    # a cell holds forced or voluntary departures only (one category per code), never both
    col = np.where(forced, gpos, gpos + n_groups)
    matrix = sparse.csr_matrix((n, (firm_codes, col)), shape=(len(firm_ids), 2 * n_groups))
    matrix.sum_duplicates()
    return Cells(groups=groups, firm_ids=np.asarray(firm_ids), firm_matrix=matrix, window=window,
                 by_sector=by_sector)


def groups_from_counts(counts: pd.DataFrame, window: tuple[int, int] | None = None, *,
                       by_sector: bool = False) -> pd.DataFrame:
    """The ``groups`` of ``cells_from_counts`` alone (no firm matrix): enough for a fingerprint."""
    return _grouped(counts, counted_window(counts, window), by_sector)[3]


def _grouped(counts: pd.DataFrame, window: tuple[int, int], by_sector: bool
             ) -> tuple[pd.DataFrame, pd.DataFrame, np.ndarray, pd.DataFrame]:
    year = counts["year"].to_numpy(dtype=np.int64)
    keep = (counts["category"].isin(["forced", "voluntary"]).to_numpy()
            & (year >= window[0]) & (year <= window[1]))
    frame = counts.loc[keep]
    sector = (frame["sector"].fillna("(none)").astype(str).to_numpy() if by_sector
              else np.full(len(frame), "", dtype=object))
    n = frame["departures"].to_numpy(dtype=np.int64)
    forced = (frame["category"] == "forced").to_numpy()
    keyed = pd.DataFrame({"sector": sector, "year": frame["year"].to_numpy(dtype=np.int64),
                          "forced": np.where(forced, n, 0), "total": n})
    grouped = keyed.groupby(["sector", "year"], sort=True)[["forced", "total"]].sum()
    groups = pd.DataFrame({
        "year": grouped.index.get_level_values("year").astype("int64"),
        "sector": grouped.index.get_level_values("sector").astype(str),
        "forced": grouped["forced"].to_numpy(dtype=np.int64),
        "voluntary": (grouped["total"] - grouped["forced"]).to_numpy(dtype=np.int64),
    })
    return frame, keyed, forced, groups
