"""The record browser's filter, classified as the counts are (issue 15: every count links to its records).

The store lists departures with one CASE expression (app.store.departure_query); this module gives it what
the counts use: the category of each code spelling the roster version stores, matched by code key
(``app.stats.cells.assign_categories``, as ``categorise`` does), the mapping version's classification rules
in order, and its case overrides located in the roster version. The store applies override, then rules,
then code, so "category=forced" lists exactly the departures a forced count counted.

Rows still in post (no departure date, a code whose words say the executive has not left:
``app.intake.in_post.is_still_in_post``), unless the mapping or a case override counts them as forced or
voluntary, are not departures: every year filter leaves them out, and Coverage counts them apart
(``in_post_counts``), so a year's count and the records it links to agree.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import pandas as pd

from app.analysis.cellstore import roster_counts
from app.analysis.overrides import ResolvedOverride
from app.intake.in_post import is_still_in_post
from app.stats.cells import assign_categories
from app.stats.codekeys import code_key
from app.store import DepartureFilter, MappingVersion, Roster, Store
from app.types import ClassificationRule


def stored_codes(store: Store, roster: Roster, version: int | None = None) -> list[str]:
    """The distinct reason codes (as stored) of a roster version (default: the roster's), sorted."""
    counts = (roster_counts(store, roster) if version is None or version == roster.version
              else store.cell_counts(roster.id, version))
    return sorted({str(r) for r in counts["reason"].dropna()})


def code_categories(store: Store, roster: Roster, mapping: MappingVersion | None,
                    version: int | None = None) -> tuple[tuple[str, str], ...]:
    """(stored reason code, category) for every code of the roster version, read as the counts read it."""
    if mapping is None:
        return ()
    reasons = pd.Series(stored_codes(store, roster, version), dtype=object)
    categories = assign_categories(reasons, mapping.categories)
    return tuple(zip(reasons.tolist(), categories.tolist(), strict=True))


def in_post_codes(reasons: Sequence[str]) -> tuple[str, ...]:
    """The stored reason codes whose words say the executive is still in post (their undated rows are no
    departure), sorted."""
    return tuple(sorted({str(r) for r in reasons if is_still_in_post(str(r))}))


def in_post_counts(store: Store, roster: Roster, mapping: MappingVersion | None,
                   resolved: Sequence[ResolvedOverride] = ()) -> pd.DataFrame:
    """``year``, ``reason``, ``category``, ``departures``: the roster version's still-in-post rows per (stored)
    year, code and category (excluded or unmapped: a row counted as forced or voluntary is a departure), classified
    as the counts classify them; empty when the roster has none."""
    if not in_post_codes(stored_codes(store, roster)):
        return pd.DataFrame({"year": pd.Series(dtype="int64"), "reason": pd.Series(dtype=object),
                             "category": pd.Series(dtype=object), "departures": pd.Series(dtype="int64")})
    flt = departure_filter(store, roster, mapping, resolved, version=roster.version, in_post="only")
    return store.category_counts(roster.id, flt)


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
        in_post_codes=in_post_codes(stored_codes(store, roster, values.get("version"))), codes=codes,
        rules=spelled_rules(mapping.rules, codes) if mapping else (), **values)
