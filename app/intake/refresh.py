"""Roster refreshes: what changed between two versions of one roster.

A departure's identity is (firm id, executive, fiscal year) where the executive is known, else (firm id,
fiscal year, reason code). Firm ids and executives match after trimming and collapsing spaces (executives
also ignoring case); reason codes match by :func:`app.stats.cells.code_key`, as everywhere else. When one
version holds the same identity more than once, the n-th occurrence (in source-line order) is matched with
the n-th. A record is *changed* when its identity is in both versions and any other field differs (its
line in the file, the raw row and the code's spelling do not count: they are not facts about the departure).

The comparison is a pandas merge on the identity columns, so a refresh of a million-row roster costs a sort,
not a loop in Python.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from app.stats.cells import code_key
from app.store import Roster, Store, StoreError

#: the fields that make a record *changed* when they differ between versions (besides the identity)
COMPARED = ("firm_name", "sector", "date", "reason", "age", "tenure", "interim", "notes", "announced")
#: the fields a diff lists for each record
SHOWN = ("line", "firm_id", "firm_name", "sector", "year", "date", "executive", "reason", "age", "tenure",
         "interim", "notes", "announced")

IDENTITY_RULE = ("A departure is the same one in both versions when its firm id, executive and fiscal year "
                 "match (firm id, fiscal year and reason code where the executive is not given).")


@dataclass(frozen=True)
class ChangedRecord:
    """One departure present in both versions whose other fields differ."""

    before: dict[str, Any]
    after: dict[str, Any]
    fields: tuple[str, ...]


@dataclass(frozen=True)
class RosterDiff:
    """Added, removed and changed departures between two versions of one roster (lists cut at ``limit``)."""

    roster_id: int
    roster_name: str
    from_version: int
    to_version: int
    added: int
    removed: int
    changed: int
    unchanged: int
    added_records: list[dict[str, Any]] = field(default_factory=list)
    removed_records: list[dict[str, Any]] = field(default_factory=list)
    changed_records: list[ChangedRecord] = field(default_factory=list)
    rule: str = IDENTITY_RULE

    def as_dict(self) -> dict[str, Any]:
        """The JSON shape of ``helmshift roster diff --json``."""
        return {
            "roster": self.roster_name, "roster_id": self.roster_id, "from": self.from_version,
            "to": self.to_version, "added": self.added, "removed": self.removed, "changed": self.changed,
            "unchanged": self.unchanged, "rule": self.rule,
            "added_records": [_plain(r) for r in self.added_records],
            "removed_records": [_plain(r) for r in self.removed_records],
            "changed_records": [{"fields": list(c.fields), "before": _plain(c.before), "after": _plain(c.after)}
                                for c in self.changed_records],
        }


def _plain(record: dict[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in record.items():
        if isinstance(v, np.generic):
            v = v.item()
        out[k] = None if isinstance(v, float) and np.isnan(v) else v
    return out


def _text(values: pd.Series) -> pd.Series:
    """Trimmed text with runs of spaces collapsed; missing and empty become ""."""
    s = values.astype(object).where(values.notna(), "").astype(str)
    return s.str.strip().str.replace(r"\s+", " ", regex=True)


def _keyed(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with identity columns ``_firm``, ``_exec``, ``_year``, ``_code``, ``_n`` (occurrence)."""
    out = frame.sort_values("line", kind="stable").reset_index(drop=True)
    out["_firm"] = _text(out["firm_id"])
    out["_exec"] = _text(out["executive"]).str.casefold()
    out["_year"] = out["year"].astype(np.int64)
    codes = out["reason"].astype(str).map(code_key)
    # the reason code is part of the identity only where the executive is unknown
    out["_code"] = codes.where(out["_exec"] == "", "")
    out["_reason_key"] = codes
    keys = ["_firm", "_exec", "_year", "_code"]
    out["_n"] = out.groupby(keys, sort=False).cumcount()
    return out


KEYS = ["_firm", "_exec", "_year", "_code", "_n"]


def identity_keys(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` (with ``line``, ``firm_id``, ``executive``, ``year``, ``reason``) sorted by line, with the
    identity columns of :data:`KEYS`: what case overrides name a departure by (app/analysis/overrides.py)."""
    return _keyed(frame)


def _differs(a: pd.Series, b: pd.Series) -> np.ndarray:
    """Element-wise "not the same value", treating two missing values as equal."""
    if pd.api.types.is_numeric_dtype(a) and pd.api.types.is_numeric_dtype(b):
        x, y = a.to_numpy(dtype=float), b.to_numpy(dtype=float)
        both_missing = np.isnan(x) & np.isnan(y)
        return ~(both_missing | np.isclose(x, y, rtol=0, atol=1e-9, equal_nan=False))
    return (_text(a).to_numpy() != _text(b).to_numpy())


#: whole numbers that an outer merge turns into floats (the side without the record holds NaN)
_WHOLE = ("line", "year")


def _record(row: pd.Series, suffix: str = "") -> dict[str, Any]:
    """One side of a merged row as plain values: missing as None, line and year as whole numbers."""
    out: dict[str, Any] = {}
    for f in SHOWN:
        v = row.get(f + suffix)
        if isinstance(v, np.generic):
            v = v.item()
        if v is pd.NA or (isinstance(v, float) and np.isnan(v)):
            v = None
        elif f in _WHOLE and isinstance(v, float) and v.is_integer():
            v = int(v)
        out[f] = v
    return out


def diff_frames(before: pd.DataFrame, after: pd.DataFrame, *, limit: int | None = None
                ) -> tuple[int, int, int, int, list[dict[str, Any]], list[dict[str, Any]], list[ChangedRecord]]:
    """Counts (added, removed, changed, unchanged) and up to ``limit`` records of each between two sets of
    departures (columns of ``app.store.DEPARTURE_FIELDS``)."""
    a, b = _keyed(before), _keyed(after)
    merged = a.merge(b, on=KEYS, how="outer", suffixes=("_a", "_b"), indicator=True, sort=False)
    removed = merged[merged["_merge"] == "left_only"]
    added = merged[merged["_merge"] == "right_only"]
    both = merged[merged["_merge"] == "both"]
    masks = {}
    for f in COMPARED:
        if f == "reason":
            masks[f] = both["_reason_key_a"].to_numpy() != both["_reason_key_b"].to_numpy()
        else:
            masks[f] = _differs(both[f + "_a"], both[f + "_b"])
    any_change = np.zeros(len(both), dtype=bool)
    for m in masks.values():
        any_change |= m
    changed = both[any_change]
    cut = slice(None) if limit is None else slice(0, limit)
    added_records = [_record(r, "_b") for _, r in added.sort_values("line_b").iloc[cut].iterrows()]
    removed_records = [_record(r, "_a") for _, r in removed.sort_values("line_a").iloc[cut].iterrows()]
    changed_records = []
    positions = np.flatnonzero(any_change)
    for pos in positions[cut]:
        row = both.iloc[pos]
        fields = tuple(f for f in COMPARED if masks[f][pos])
        changed_records.append(ChangedRecord(_record(row, "_a"), _record(row, "_b"), fields))
    return (len(added), len(removed), len(changed), len(both) - len(changed),
            added_records, removed_records, changed_records)


def diff_versions(store: Store, roster_ref: int | str, from_version: int, to_version: int, *,
                  limit: int | None = 200) -> RosterDiff:
    """What changed from one stored version of a roster to another (either order)."""
    roster = store.get_roster(roster_ref)
    for v in (from_version, to_version):
        if not 1 <= v <= roster.latest_version:
            raise StoreError(f"Roster {roster.name!r} has versions 1 to {roster.latest_version}; "
                             f"there is no version {v}.")
    before = store.departures(roster.id, version=from_version)
    after = store.departures(roster.id, version=to_version)
    return _diff(roster, from_version, to_version, before, after, limit)


def _diff(roster: Roster, v1: int, v2: int, before: pd.DataFrame, after: pd.DataFrame,
          limit: int | None) -> RosterDiff:
    added, removed, changed, same, add_r, rem_r, chg_r = diff_frames(before, after, limit=limit)
    return RosterDiff(roster.id, roster.name, v1, v2, added, removed, changed, same, add_r, rem_r, chg_r)
