"""What a page or a command needs, gathered once: a roster read through a mapping version and a window.

Together with :mod:`app.analysis.runs` this is where the store meets ``app.stats``; routes and CLI
commands call these functions rather than either layer directly.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import pandas as pd

from app.stats.cells import Cells, assign_categories, build_cells
from app.stats.coverage import WindowSuggestion, YearFlag, coverage_table, flag_years, suggest_window
from app.store import MappingVersion, Roster, Run, Store, StoreError
from app.types import UNMAPPED

WindowSource = Literal["given", "chosen", "suggested"]


@dataclass(frozen=True)
class AnalysisInput:
    """A roster read through one mapping version and one window: everything a model needs.

    ``records`` holds every accepted departure with its ``category`` (forced, voluntary, excluded or
    unmapped); models use only forced and voluntary departures inside ``window``.
    """

    roster: Roster
    mapping: MappingVersion | None
    records: pd.DataFrame = field(repr=False)
    window: tuple[int, int]
    window_source: WindowSource
    coverage: pd.DataFrame = field(repr=False)
    suggestion: WindowSuggestion
    flags: list[YearFlag]

    @property
    def mapping_label(self) -> str:
        return f"{self.mapping.name} v{self.mapping.version}" if self.mapping else "no mapping"

    def in_window(self) -> pd.DataFrame:
        years = self.records["year"]
        return self.records.loc[(years >= self.window[0]) & (years <= self.window[1])]

    def unmapped_codes(self) -> pd.DataFrame:
        """Codes without a category that occur inside the window, with their counts, most common first."""
        inside = self.in_window()
        counts = inside.loc[inside["category"] == UNMAPPED, "reason"].value_counts()
        return pd.DataFrame({"code": counts.index.astype(str), "count": counts.to_numpy()})

    def cells(self, *, by_sector: bool = False) -> Cells:
        return build_cells(self.records, self.window, by_sector=by_sector)

    def warnings(self) -> list[str]:
        notes: list[str] = []
        unmapped = self.unmapped_codes()
        if len(unmapped):
            total = int(unmapped["count"].sum())
            notes.append(
                f"{len(unmapped)} reason code(s) covering {total} departure(s) in the window have no "
                "category and are left out; map them on the Reason codes page."
            )
        return notes


def parse_mapping_ref(ref: str) -> tuple[str, int | None]:
    """``NAME`` or ``NAME:VERSION``."""
    name, sep, version = ref.rpartition(":")
    if sep and version.isdigit():
        return name, int(version)
    return ref, None


def load_input(
    store: Store,
    roster_ref: int | str,
    *,
    mapping: str | None = None,
    window: tuple[int, int] | None = None,
    require_mapping: bool = True,
    threshold: float = 0.5,
) -> AnalysisInput:
    """Read a roster through a mapping (the roster's chosen one by default) and fix the window.

    The window is, in order of preference: the one given, the one chosen for the roster on the
    Coverage page, the suggested window of full coverage.
    """
    roster = store.get_roster(roster_ref)
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
    records = store.departures(roster.id)
    if records.empty:
        raise StoreError(f"Roster {roster.name!r} has no accepted departures.")
    records["category"] = assign_categories(records["reason"], version.categories if version else {})
    table = coverage_table(records["year"], records["category"])
    suggestion = suggest_window(table, threshold=threshold)
    source: WindowSource
    if window is not None:
        first, last = int(records["year"].min()), int(records["year"].max())
        if window[0] > last or window[1] < first:
            raise StoreError(f"The window {window[0]}-{window[1]} lies outside the roster's years {first}-{last}.")
        source = "given"
    elif settings.window is not None:
        window, source = settings.window, "chosen"
    else:
        window, source = suggestion.window, "suggested"
    return AnalysisInput(roster, version, records, window, source, table, suggestion,
                         flag_years(table, threshold=threshold))


def input_for_run(store: Store, run: Run) -> AnalysisInput:
    """The exact input a stored run used: its mapping version and window."""
    mapping = f"{run.mapping_name}:{run.mapping_version}" if run.mapping_name else None
    return load_input(store, run.roster_id, mapping=mapping, window=run.window)


