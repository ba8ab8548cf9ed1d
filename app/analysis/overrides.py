"""Case-level overrides: one departure counted as a chosen category by a mapping version, with a note.

An override is stored with a mapping version (a saved version never changes), so adding or removing one saves
the next version with the same codes, labels and rules; every run that records the mapping version pins its
overrides too. An override names its departure by the identity that survives roster refreshes
(:func:`app.intake.refresh.identity_keys`: firm id, executive and fiscal year, else firm id, fiscal year and
reason code; the n-th such record in line order), so it follows the record into the roster's next version.
A record that the roster version no longer holds is reported as not applied, never silently dropped.

Overrides take precedence over codes and rules: the record's count moves from the category its code and the
rules give it to the override's category, in the same cell (year, sector, code, age, tenure, interim, firm),
so coverage, fits, the firm bootstrap and the adjusted trend all see the same move.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from app.analysis.cellstore import categorise, mapping_key, memoised, roster_fingerprint
from app.intake.refresh import KEYS, identity_keys
from app.store import CaseOverride, MappingVersion, Roster, Store, StoreError, now_iso
from app.store.audit import LOCAL_ACTOR, current_actor
from app.types import CATEGORIES

#: the columns of a cell key an override's record is located by (those a frame has)
CELL_KEY = ("firm_id", "year", "sector", "reason", "age", "tenure", "interim")
#: an override's note as exports quote it (the whole note is in the pack, the JSON and the Reason codes page)
NOTE_SHOWN = 120


@dataclass(frozen=True)
class ResolvedOverride:
    """An override read against one roster version: the record it names there, or why it names none."""

    override: CaseOverride
    #: position in the mapping version's list, from 1 (what ``override remove`` and the delete route take)
    position: int
    departure_id: int | None
    line: int | None
    #: the record's cell key (``CELL_KEY``), None when not applied
    key: tuple[Any, ...] | None
    not_applied: str = ""
    #: the category the record's code and the mapping's rules give it (what the override moves it from)
    counted_as: str | None = None

    @property
    def applied(self) -> bool:
        return self.key is not None


def _completed(value: Any) -> int | None:
    """Completed whole years, as the cell store keys them (app.store.cells.completed)."""
    return None if value is None or pd.isna(value) else int(math.floor(float(value)))


def _cell_key(record: pd.Series | dict[str, Any]) -> tuple[Any, ...]:
    def plain(v: Any) -> Any:
        return None if v is None or (not isinstance(v, str) and pd.isna(v)) else v
    interim = plain(record["interim"])
    return (str(record["firm_id"]), int(record["year"]), plain(record["sector"]), str(record["reason"]),
            _completed(record["age"]), _completed(record["tenure"]), None if interim is None else bool(interim))


def _override_keys(overrides: Sequence[CaseOverride]) -> pd.DataFrame:
    frame = pd.DataFrame({"line": range(len(overrides)), "firm_id": [o.firm_id for o in overrides],
                          "executive": [o.executive for o in overrides], "year": [o.year for o in overrides],
                          "reason": [o.reason for o in overrides]})
    keyed = identity_keys(frame)
    keyed["_n"] = [overrides[int(i)].occurrence for i in keyed["line"]]
    return keyed


def resolve_overrides(store: Store, roster: Roster, mapping: MappingVersion | None) -> tuple[ResolvedOverride, ...]:
    """The overrides of ``mapping`` for ``roster`` (others' are ignored), each located in this roster version
    (memoised: a page costs one small query the first time)."""
    mine = [(i, o) for i, o in enumerate(mapping.overrides if mapping else (), start=1) if o.roster_id == roster.id]
    if not mine:
        return ()

    def compute() -> tuple[ResolvedOverride, ...]:
        records = identity_keys(store.departures_in_years(roster.id, {o.year for _, o in mine}, roster.version))
        wanted = _override_keys([o for _, o in mine])
        found = wanted[KEYS + ["line"]].merge(records, on=KEYS, how="left", suffixes=("_o", ""))
        found["counted_as"] = categorise(found.assign(reason=found["reason"].fillna("")), mapping)[0]["category"]
        by_override = {int(r["line_o"]): r for _, r in found.iterrows()}
        out = []
        for j, (position, o) in enumerate(mine):
            row = by_override[j]
            if pd.isna(row["id"]):
                out.append(ResolvedOverride(o, position, None, None, None, (
                    f"not applied: version {roster.version} of roster {roster.name!r} holds no such departure "
                    "(a refresh removed it or changed its firm, executive or year)")))
            else:
                out.append(ResolvedOverride(o, position, int(row["id"]), int(row["line"]), _cell_key(row),
                                            counted_as=str(row["counted_as"])))
        return tuple(out)

    return memoised(store, ("case_overrides", roster.id, roster_fingerprint(roster), mapping_key(mapping)), compute)


def apply_overrides(frame: pd.DataFrame, resolved: Sequence[ResolvedOverride]) -> pd.DataFrame:
    """``frame`` (categorised cells with ``departures``, or records with ``id``) with each applied override's
    record counted as the override's category. Cells: one count moves from the record's cell row to a new
    row with the same key and the override's category (rows left empty are dropped). Returns a new frame."""
    moves = [r for r in resolved if r.applied]
    if not moves or frame.empty:
        return frame
    if "departures" not in frame:  # one row per record
        wanted = {r.departure_id: r.override.category for r in moves}
        out = frame.copy()
        decided = out["id"].map(wanted)
        out["category"] = decided.where(decided.notna(), out["category"]).to_numpy(dtype=object)
        return out
    columns = [(i, c) for i, c in enumerate(CELL_KEY) if c in frame]
    counts = frame["departures"].to_numpy(dtype=np.int64).copy()
    categories = frame["category"].to_numpy(dtype=object)
    # one pass over the frame to index its rows by key (missing values as None), then a look-up per override:
    # a mask per override would cost overrides x cells (benchmarks/README.md)
    # (only the rows of the overrides' years: the year is part of every key)
    near = np.flatnonzero(frame["year"].isin({m.key[1] for m in moves if m.key is not None}).to_numpy())
    part = frame.iloc[near]
    plain = [part[c].astype(object).where(part[c].notna(), None).tolist() for _, c in columns]
    rows_of: dict[tuple[Any, ...], list[int]] = {}
    for row, key in zip(near.tolist(), zip(*plain, strict=True), strict=True):
        rows_of.setdefault(key, []).append(row)
    taken: list[int] = []
    moved_to: list[str] = []
    for move in moves:
        assert move.key is not None
        rows = [r for r in rows_of.get(tuple(move.key[i] for i, _ in columns), ()) if counts[r] > 0]
        if not rows or categories[rows[0]] == move.override.category:
            continue  # already counted as the override says (or outside this frame)
        counts[rows[0]] -= 1
        taken.append(int(rows[0]))
        moved_to.append(move.override.category)
    if not taken:
        return frame
    out = frame.assign(departures=counts)
    extra = frame.iloc[taken].assign(departures=np.ones(len(taken), dtype=np.int64),
                                     category=np.asarray(moved_to, dtype=object))
    out = pd.concat([out, extra], ignore_index=True)
    return out.loc[out["departures"].to_numpy() > 0].reset_index(drop=True)


def not_applied(resolved: Sequence[ResolvedOverride]) -> list[ResolvedOverride]:
    return [r for r in resolved if not r.applied]


# -- adding and removing (each saves the next mapping version) ---------------------------------------------
def override_for(store: Store, roster: Roster, departure_id: int, category: str, note: str, *,
                 author: str = "analyst") -> CaseOverride:
    """An override of one record of ``roster``'s current version (named by its refresh identity)."""
    if category not in CATEGORIES:
        raise StoreError(f"category must be one of {', '.join(CATEGORIES)}; got {category!r}.")
    record = store.get_departure(roster.id, departure_id, roster.version)
    keyed = identity_keys(store.departures_in_years(roster.id, {int(record["year"])}, roster.version))
    occurrence = int(keyed.loc[keyed["id"] == departure_id, "_n"].iloc[0])
    executive = " ".join(str(record["executive"] or "").split()) or None
    return CaseOverride(roster_id=roster.id, firm_id=str(record["firm_id"]), executive=executive,
                        year=int(record["year"]), reason=str(record["reason"]), category=category,
                        note=note.strip(), author=author, created_at=now_iso(), occurrence=occurrence,
                        departure_id=departure_id, roster_version=roster.version)


def add_override(store: Store, roster: Roster, mapping: MappingVersion, departure_id: int, category: str,
                 note: str, *, author: str = "analyst") -> MappingVersion:
    """The next version of ``mapping`` with this record counted as ``category`` (replacing an override of
    the same record); refused with ``MappingConflict`` when ``mapping`` is no longer the newest version."""
    if current_actor() != LOCAL_ACTOR:
        author = current_actor()  # in team mode and on the command line: who is signed in, not a typed name
    new = override_for(store, roster, departure_id, category, note, author=author)
    kept = [o for o in mapping.overrides if o.identity() != new.identity()]
    return store.save_mapping_version(
        mapping.name, mapping.categories, mapping.labels, author=author, rules=mapping.rules,
        note=f"case override: {new.describe()} counts as {category} ({new.note})",
        based_on=mapping.version, overrides=[*kept, new])


def remove_override(store: Store, mapping: MappingVersion, position: int, *, author: str = "analyst",
                    roster: Roster | None = None) -> MappingVersion:
    """The next version of ``mapping`` without its ``position``-th override (from 1; of ``roster`` when given)."""
    if not 1 <= position <= len(mapping.overrides) or (
            roster is not None and mapping.overrides[position - 1].roster_id != roster.id):
        raise StoreError(f"Mapping {mapping.name!r} version {mapping.version} has no override number {position}"
                         + (f" for roster {roster.name!r}" if roster is not None else "") + ".")
    gone = mapping.overrides[position - 1]
    return store.save_mapping_version(
        mapping.name, mapping.categories, mapping.labels, author=author, rules=mapping.rules,
        note=f"case override removed: {gone.describe()} ({gone.category})", based_on=mapping.version,
        overrides=[o for i, o in enumerate(mapping.overrides, start=1) if i != position])


def override_line(r: ResolvedOverride) -> str:
    """One line for exports' methods sections: record, from -> to, note, author and date."""
    o = r.override
    moved = f"{r.counted_as} \u2192 {o.category}" if r.applied else f"counted as {o.category}; {r.not_applied}"
    note = o.note if len(o.note) <= NOTE_SHOWN else o.note[:NOTE_SHOWN - 1].rstrip() + "\u2026"
    return f"{o.describe()}: {moved} \u2014 \u201c{note}\u201d ({o.author}, {o.created_at[:10]})"


def overrides_to_list(resolved: Sequence[ResolvedOverride], mapping: MappingVersion | None) -> list[dict[str, Any]]:
    """The JSON/list form of each override: record, from (codes and rules) -> to, note, author, date, and
    whether it applies to this roster version (and why not)."""
    out = []
    for r in resolved:
        o = r.override
        out.append({
            "position": r.position, "record": o.describe(), "firm_id": o.firm_id, "executive": o.executive,
            "year": o.year, "reason": o.reason, "counted_as": r.counted_as,
            "category": o.category, "note": o.note, "author": o.author, "created_at": o.created_at,
            "departure_id": r.departure_id, "line": r.line, "applied": r.applied, "not_applied": r.not_applied,
            "mapping": f"{mapping.name}:{mapping.version}" if mapping else None,
        })
    return out


def departure_at_line(store: Store, roster: Roster, line: int) -> int:
    """The id of the departure on source line ``line`` of the roster's current version."""
    records = store.departures(roster.id, version=roster.version)
    hit = records.loc[records["line"] == line, "id"]
    if hit.empty:
        raise StoreError(f"Version {roster.version} of roster {roster.name!r} has no accepted departure on line "
                         f"{line}.")
    return int(hit.iloc[0])
