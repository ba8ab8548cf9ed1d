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
from app.stats.codekeys import code_key
from app.store import DepartureFilter, MappingVersion, Roster, Store
from app.types import ClassificationRule


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


def spelled_rules(rules: Sequence[ClassificationRule],
                   codes: Sequence[tuple[str, str]]) -> tuple[ClassificationRule, ...]:
    """Each rule once per stored spelling of its code (matched by code key, as ``apply_rules`` matches), in the
    rules' order: the store's CASE compares stored codes exactly. A rule whose code the roster does not hold
    is kept as written (it matches nothing, as in the counts)."""
    spellings: dict[str, list[str]] = {}
    for stored, _ in codes:
        spellings.setdefault(code_key(stored), []).append(stored)
    out: list[ClassificationRule] = []
    for rule in rules:
        for stored in spellings.get(code_key(rule.code), [rule.code]):
            out.append(ClassificationRule(stored, rule.field, rule.comparison, rule.value, rule.category))
    return tuple(out)


def departure_filter(store: Store, roster: Roster, mapping: MappingVersion | None,
                     resolved: Sequence[ResolvedOverride] = (), **values: Any) -> DepartureFilter:
    """A ``DepartureFilter`` on ``values`` (year, sector, category, ...) whose categories are the counts'.

    ``resolved``: the mapping version's overrides located in this roster version (``resolve_overrides``);
    raises ``StoreError`` for a bad filter value.
    """
    overrides = tuple((int(r.departure_id), r.override.category) for r in resolved if r.departure_id is not None)
    codes = code_categories(store, roster, mapping, values.get("version"))
    return DepartureFilter(
        mapping=(mapping.name, mapping.version) if mapping else None, overrides=overrides if mapping else (),
        codes=codes, rules=spelled_rules(mapping.rules, codes) if mapping else (), **values)
