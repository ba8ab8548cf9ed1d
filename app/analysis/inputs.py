"""What a page or a command needs, gathered once: a roster read through a mapping version and a window.

Together with :mod:`app.analysis.runs` this is where the store meets ``app.stats``; routes and CLI
commands call these functions rather than either layer directly.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import Any, Literal

import numpy as np
import pandas as pd

from app.analysis.browse import in_post_counts
from app.analysis.cellstore import (
    categorise,
    categorised_counts,
    cells_from_counts,
    coverage_from_counts,
    mapping_key,
    memoised,
    roster_fingerprint,
    unmapped_codes,
    without_in_post,
)
from app.analysis.overrides import ResolvedOverride, apply_overrides, not_applied, resolve_overrides
from app.analysis.quick_fit import parse_mapping_ref, warning_notes
from app.stats.cells import Cells
from app.stats.coverage import COUNT_COLUMNS, WindowSuggestion, YearFlag, flag_years, suggest_window
from app.store import MappingVersion, Roster, Run, Store, StoreError

WindowSource = Literal["given", "chosen", "suggested"]


@dataclass(frozen=True)
class AnalysisInput:
    """A roster read through one mapping version and one window: everything a model needs.

    ``counts`` holds the roster's departures counted by (year, sector, reason) with each code's
    ``category`` (forced, voluntary, excluded or unmapped), from the cell store; models use only forced
    and voluntary departures inside ``window``. ``records`` (every departure, one row each) is read from
    the store only when asked for; no page asks on a normal request.
    """

    roster: Roster
    mapping: MappingVersion | None
    counts: pd.DataFrame = field(repr=False)
    window: tuple[int, int]
    window_source: WindowSource
    coverage: pd.DataFrame = field(repr=False)
    suggestion: WindowSuggestion
    flags: list[YearFlag]
    store: Store = field(repr=False, compare=False)
    #: rows still in post (no departure date, a code saying the executive has not left, not counted as forced or
    #: voluntary by the mapping or a case override) per ``year``, ``reason`` and ``category``, as ``departures``:
    #: no departure of any year, so ``coverage`` and the unmapped codes leave them out and pages name them apart
    #: (``counts`` still holds them, as excluded or unmapped: no model counts them); None: not counted
    in_post_rows: pd.DataFrame | None = field(default=None, repr=False, compare=False)

    @property
    def in_post(self) -> int:
        """How many rows are still in post."""
        return 0 if self.in_post_rows is None else int(self.in_post_rows["departures"].sum())

    @property
    def mapping_label(self) -> str:
        return f"{self.mapping.name} v{self.mapping.version}" if self.mapping else "no mapping"

    @property
    def mapping_words(self) -> str:
        """``mapping NAME vN``, or "no mapping chosen" (exports and source lines: never "mapping none v0")."""
        return f"mapping {self.mapping_label}" if self.mapping else "no mapping chosen"

    @property
    def key(self) -> tuple[Any, ...]:
        """What this input's values depend on: roster version, mapping version and window (memo keys)."""
        return (self.roster.id, roster_fingerprint(self.roster), mapping_key(self.mapping), self.window)

    @cached_property
    def records(self) -> pd.DataFrame:
        """Every accepted departure with its ``category`` (a full read of the roster: jobs and exports only)."""
        records = self.store.departures(self.roster.id, version=self.roster.version)
        records["category"] = self.categorised(records)["category"].to_numpy()
        return records

    @cached_property
    def overrides(self) -> tuple[ResolvedOverride, ...]:
        """The mapping version's case overrides of this roster, located in this roster version."""
        return resolve_overrides(self.store, self.roster, self.mapping)

    def categorised(self, frame: pd.DataFrame) -> pd.DataFrame:
        """``frame`` (cells or records of this roster version) with each row's ``category``: its code's, then
        the mapping's rules, then the case overrides (which take precedence)."""
        return apply_overrides(categorise(frame, self.mapping)[0], self.overrides)

    def in_window(self) -> pd.DataFrame:
        """The records inside the window (reads the whole roster; pages use ``counts`` instead)."""
        years = self.records["year"]
        return self.records.loc[(years >= self.window[0]) & (years <= self.window[1])]

    def unmapped_codes(self) -> pd.DataFrame:
        """Codes without a category that occur inside the window, with their counts, most common first."""
        if not self.in_post:
            return unmapped_codes(self.counts, self.window)
        return unmapped_codes(without_in_post(self.counts, self.in_post_rows), self.window)

    def group_cells(self, *, by_sector: bool = False) -> Cells:
        """The group counts of the window, without the firm matrix: for fits and fingerprints (memoised)."""
        cells = memoised(self.store, ("cells", *self.key, by_sector), lambda: cells_from_counts(self.counts, self.window, by_sector=by_sector))
        return replace(cells, groups=cells.groups.copy())

    @property
    def reclassifies(self) -> bool:
        """True when the mapping version moves departures away from their code's category: it has rules, or
        case overrides applied to this roster version (then counts keyed by code alone are not enough)."""
        return (self.mapping is not None and bool(self.mapping.rules)) or any(r.applied for r in self.overrides)

    def categorised_firms(self) -> pd.DataFrame:
        """The firm cells of this roster version (per firm, year, sector, code[, age, tenure, interim, notice
        days]) with each row's ``category`` as the share counts it: code, then rules, then case overrides.
        Reads the firm counts (jobs, and the rates of a version that reclassifies); not memoised (callers
        memoise what they derive)."""
        rules = self.mapping is not None and bool(self.mapping.rules)
        firms = self.store.firm_cell_counts(self.roster.id, self.roster.version, detail=rules)
        return self.categorised(firms)

    def cells(self, *, by_sector: bool = False) -> Cells:
        """The group counts and the firm x cell matrix (reads the firm counts: for bootstrap jobs)."""
        return cells_from_counts(self.categorised_firms(), self.window, by_sector=by_sector)

    def counts_nothing(self) -> bool:
        """True when the mapping counts no departure as forced or voluntary (every code excluded)."""
        return not self.counts["category"].isin(["forced", "voluntary"]).any()

    def warnings(self) -> list[str]:
        unmapped = self.unmapped_codes()
        notes = warning_notes(self.mapping is not None and self.counts_nothing(),
                              [(str(c), int(n)) for c, n in zip(unmapped["code"], unmapped["count"], strict=True)])
        if missing := not_applied(self.overrides):
            notes.append(f"{len(missing)} case override(s) of this mapping name departures that version "
                         f"{self.roster.version} of the roster does not hold, so they are not applied: "
                         + "; ".join(r.override.describe() for r in missing[:5])
                         + ("; \u2026" if len(missing) > 5 else "") + ".")
        return notes


def current_mapping(store: Store, roster: Roster, mapping: str | None = None) -> MappingVersion:
    """The mapping version overrides of ``roster`` are added to: ``mapping`` (NAME or NAME:VERSION) or the
    roster's chosen mapping, newest version."""
    name = mapping or store.settings(roster.id).mapping_name
    if not name:
        raise StoreError(f"Roster {roster.name!r} has no reason-code mapping yet; choose one on the Reason codes "
                         "page before overriding a record.")
    ref, version = parse_mapping_ref(name)
    return store.get_mapping(ref, version)


def load_input(
    store: Store,
    roster_ref: int | str,
    *,
    mapping: str | None = None,
    window: tuple[int, int] | None = None,
    require_mapping: bool = True,
    threshold: float = 0.5,
    roster_version: int | None = None,
) -> AnalysisInput:
    """Read a roster (its newest version unless ``roster_version`` names another) through a mapping (the
    roster's chosen one by default) and fix the window.

    The window is, in order of preference: the one given, the one chosen for the roster on the
    Coverage page, the suggested window of full coverage.
    """
    roster = store.get_roster(roster_ref, version=roster_version)
    settings = store.settings(roster.id)
    version: MappingVersion | None = None
    if mapping:
        name, number = parse_mapping_ref(mapping)
        version = store.get_mapping(name, number)
    elif settings.mapping_name:
        version = store.get_mapping(settings.mapping_name)
    if version is None and require_mapping:
        raise StoreError(
            f"Roster {roster.name!r} has no reason-code mapping yet; confirm the suggested categories on "
            "the Reason codes page or run `helmshift mapping import`."
        )
    counts = categorised_counts(store, roster, version)
    if resolved := resolve_overrides(store, roster, version):
        plain = counts
        counts = memoised(store, ("overridden", roster.id, roster_fingerprint(roster), mapping_key(version)),
                          lambda: apply_overrides(plain, resolved))
    if counts.empty:
        raise StoreError(f"Roster {roster.name!r} has no accepted departures.")
    key = ("coverage", roster.id, roster_fingerprint(roster), mapping_key(version), threshold)
    table, suggestion, flags, in_post = memoised(
        store, key, lambda: _coverage(counts, in_post_counts(store, roster, version, resolved), threshold))
    source: WindowSource
    if window is not None:
        first, last = int(counts["year"].min()), int(counts["year"].max())
        if window[0] > last or window[1] < first:
            raise StoreError(f"The window {window[0]}\u2013{window[1]} lies outside the roster's years {first}\u2013{last}.")
        # years beyond the roster's hold no departures: the window is the part that has data (so what a run
        # records is what it used, and a year like 10**30 never reaches the database)
        window = (max(int(window[0]), first), min(int(window[1]), last))
        source = "given"
    elif settings.window is not None:
        window, source = settings.window, "chosen"
    else:
        window, source = suggestion.window, "suggested"
    return AnalysisInput(roster, version, counts.copy(), window, source, table.copy(), suggestion, list(flags),
                         store, in_post)


def _coverage(counts: pd.DataFrame, in_post: pd.DataFrame, threshold: float
              ) -> tuple[pd.DataFrame, WindowSuggestion, list[YearFlag], pd.DataFrame]:
    table = departures_only(coverage_from_counts(counts), in_post)
    try:
        return table, suggest_window(table, threshold=threshold), flag_years(table, threshold=threshold), in_post
    except ValueError:
        # a valid mapping that excludes every code: nothing to suggest from; every page shows the whole
        # span and says why no trend can be fitted (NOTHING_COUNTED), instead of failing
        return table, _whole_span(table, threshold), [], in_post


def departures_only(table: pd.DataFrame, in_post: pd.DataFrame) -> pd.DataFrame:
    """The coverage ``table`` without the still-in-post rows (``in_post``: per year, [reason,] category): they are no
    departure of the year they are filed under. Years at either end left with no record are dropped (unless
    every year would be), so the span is the departures'."""
    if in_post.empty:
        return table
    less = (in_post.pivot_table(index="year", columns="category", values="departures", aggfunc="sum")
            .reindex(index=table["year"], columns=list(COUNT_COLUMNS)).fillna(0).to_numpy(dtype=np.int64))
    out = table.copy()
    for i, column in enumerate(COUNT_COLUMNS):
        out[column] = out[column].to_numpy(dtype=np.int64) - less[:, i]
    out["departures"] = out["departures"].to_numpy(dtype=np.int64) - less.sum(axis=1)
    kept = out.index[out["departures"] > 0]
    return out if kept.empty else out.loc[kept.min():kept.max()].reset_index(drop=True)


def _whole_span(table: pd.DataFrame, threshold: float) -> WindowSuggestion:
    years = table["year"].astype(int)
    return WindowSuggestion(
        window=(int(years.min()), int(years.max())), median=0.0, cutoff=0.0, threshold=float(threshold),
        basis="not_excluded", rule="no year has any counted record (every code is excluded), so the whole span "
        "of years is shown", below_cutoff=(),
    )


def input_for_run(store: Store, run: Run) -> AnalysisInput:
    """The exact input a stored run used: its roster version, mapping version and window."""
    mapping = f"{run.mapping_name}:{run.mapping_version}" if run.mapping_name else None
    return load_input(store, run.roster_id, mapping=mapping, window=run.window,
                      roster_version=run.roster_version)


