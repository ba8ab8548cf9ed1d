"""The record browser's filter, classified as the counts are (issue 15: every count links to its records).

The store lists departures with one CASE expression (app.store.departure_query); this module gives it what
the counts use: the category of each code spelling the roster version stores, matched by code key
(``app.stats.cells.assign_categories``, as ``categorise`` does), the mapping version's classification rules
in order, and its case overrides located in the roster version. The store applies override, then rules,
then code, so "category=forced" lists exactly the departures a forced count counted.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import pandas as pd

from app.analysis.cellstore import roster_counts
from app.analysis.overrides import ResolvedOverride
from app.stats.cells import assign_categories
from app.store import DepartureFilter, MappingVersion, Roster, Store


def code_categories(store: Store, roster: Roster, mapping: MappingVersion | None,
                    version: int | None = None) -> tuple[tuple[str, str], ...]:
    """(stored reason code, category) for every code of the roster version, read as the counts read it."""
    if mapping is None:
        return ()
    counts = (roster_counts(store, roster) if version is None or version == roster.version
              else store.cell_counts(roster.id, version))
    reasons = pd.Series(sorted({str(r) for r in counts["reason"].dropna()}), dtype=object)
    categories = assign_categories(reasons, mapping.categories)
    return tuple(zip(reasons.tolist(), categories.tolist(), strict=True))


def departure_filter(store: Store, roster: Roster, mapping: MappingVersion | None,
                     resolved: Sequence[ResolvedOverride] = (), **values: Any) -> DepartureFilter:
    """A ``DepartureFilter`` on ``values`` (year, sector, category, ...) whose categories are the counts'.

    ``resolved``: the mapping version's overrides located in this roster version (``resolve_overrides``);
    raises ``StoreError`` for a bad filter value.
    """
    overrides = tuple((int(r.departure_id), r.override.category) for r in resolved if r.departure_id is not None)
    return DepartureFilter(
        mapping=(mapping.name, mapping.version) if mapping else None, overrides=overrides if mapping else (),
        codes=code_categories(store, roster, mapping, values.get("version")),
        rules=tuple(mapping.rules) if mapping else (), **values)
