"""Classification rules of a mapping version: saving them, the academic preset, and what they did.

Rules are stored with a mapping version (a saved version never changes), so every run that records the
mapping version pins its rules too. Saving rules saves the next version of the mapping with the same codes.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

import pandas as pd

from app.analysis.browse import departure_filter, in_post_codes, stored_codes
from app.analysis.cellstore import categorise, mapping_key, memoised, roster_fingerprint, rule_effects
from app.analysis.overrides import resolve_overrides
from app.stats.codekeys import code_key
from app.stats.rules import RuleEffect
from app.store import MappingVersion, Roster, Store
from app.types import ClassificationRule

#: the preset the Reason codes and Robustness pages offer in one click
PRESET_NAME = "retirement below 60 counts as forced"
PRESET_SOURCE = ("the academic convention (Parrino 1997, Journal of Financial Economics 46: a departure "
                 "counts as forced when the executive leaves before 60 and the stated reason is retirement)")
PRESET_AGE = 60
#: how a code is recognised as a retirement: its text or its label mentions retiring
RETIREMENT_WORDS = ("retire", "retiring", "retirement", "retired")


def retirement_codes(mapping: MappingVersion | None, codes: Iterable[str]) -> list[str]:
    """Codes of ``codes`` that read as retirement (in the code or its label), sorted."""
    labels = mapping.labels if mapping else {}
    found = {str(c) for c in codes
             if any(w in f"{c} {labels.get(str(c), '')}".lower() for w in RETIREMENT_WORDS)}
    return sorted(found)


def preset_rules(mapping: MappingVersion | None, codes: Iterable[str]) -> tuple[ClassificationRule, ...]:
    """The academic preset for these codes: each retirement code counts as forced below age 60."""
    return tuple(ClassificationRule(code, "age", "below", PRESET_AGE, "forced")
                 for code in retirement_codes(mapping, codes))


#: the second preset, for rosters with announcement dates: the convention's notice test as far as single-field
#: rules, first match wins, can state it
NOTICE_PRESET_NAME = "retirement below 60 counts as forced unless announced at least six months ahead"
NOTICE_DAYS = 183  # about six months (365.25 / 2, rounded up)
NOTICE_PRESET_SOURCE = (
    "the academic convention (Parrino 1997, Journal of Financial Economics 46): a retirement before 60 counts as "
    "forced unless it was announced at least about six months ahead. Two rules per retirement code, in this "
    f"order: announced at least {NOTICE_DAYS} days ahead keeps the code's category; otherwise below 60 counts "
    "as forced. A retirement below 60 with no usable announcement date therefore counts as forced, as in the "
    "convention (only a long notice shows a planned retirement); one with no age keeps its category. Not "
    "captured: the press reading behind each code, departures with no stated reason, and reclassifying an "
    "executive who takes a comparable post elsewhere; these stay with the codes and the mapping")


def notice_preset_rules(mapping: MappingVersion | None, codes: Iterable[str]) -> tuple[ClassificationRule, ...]:
    """The notice preset for these codes. "Below 60 and announced less than 183 days ahead" is a conjunction;
    with first-match-wins single-field rules it is written as a guard (a long notice keeps the code's own
    category, or voluntary for a code without one) followed by the age rule, which only the rest reaches."""
    categories = mapping.categories if mapping else {}
    out: list[ClassificationRule] = []
    for code in retirement_codes(mapping, codes):
        keep = categories.get(code)
        out.append(ClassificationRule(code, "notice_days", "at_least", NOTICE_DAYS,
                                      keep if keep in ("forced", "voluntary", "excluded") else "voluntary"))
        out.append(ClassificationRule(code, "age", "below", PRESET_AGE, "forced"))
    return tuple(out)


def with_notice_preset(rules: Sequence[ClassificationRule],
                       preset: Sequence[ClassificationRule]) -> tuple[ClassificationRule, ...]:
    """``rules`` without the preset's own rules, then the preset: its guard must come before its age rule, so
    an age rule already present (the plain preset) moves after the guard."""
    return tuple(r for r in rules if r not in preset) + tuple(preset)


def with_preset(rules: Sequence[ClassificationRule],
                preset: Sequence[ClassificationRule]) -> tuple[ClassificationRule, ...]:
    """``rules`` followed by the preset rules not already among them (earlier rules keep precedence)."""
    return tuple(rules) + tuple(r for r in preset if r not in rules)


def save_rules(store: Store, mapping: MappingVersion, rules: Sequence[ClassificationRule], *, note: str,
               author: str = "analyst") -> MappingVersion:
    """The next version of ``mapping``: the same codes, categories and labels, with ``rules``."""
    unknown = sorted({r.category for r in rules} - {"forced", "voluntary", "excluded"})
    if unknown:
        raise ValueError(f"Unknown categories {unknown} in the rules.")
    return store.save_mapping_version(mapping.name, mapping.categories, mapping.labels, author=author, note=note,
                                      rules=rules)


def rules_to_list(store: Store, roster: Roster, mapping: MappingVersion | None) -> list[dict[str, Any]]:
    """Each rule with what it did to this roster's departures (all years): ``matched`` departures it decided,
    ``moved`` (of those, how many changed category), ``missing`` (reached the rule without the field: kept).
    Rows still in post are no departure, so they are left out of those three and counted apart:
    ``in_post_matched`` (rows still in post the rule decided) and ``in_post_missing`` (reached it without the
    field)."""
    effects = rule_effects(store, roster, mapping)
    held = in_post_effects(store, roster, mapping)
    return [{"position": i, "code": e.rule.code, "field": e.rule.field, "comparison": e.rule.comparison,
             "value": e.rule.value, "category": e.rule.category, "text": e.rule.describe(),
             "matched": e.matched - h.matched, "moved": e.moved - h.moved, "missing": e.missing - h.missing,
             "in_post_matched": h.matched, "in_post_missing": h.missing}
            for i, (e, h) in enumerate(zip(effects, held, strict=True), start=1)]


def in_post_effects(store: Store, roster: Roster, mapping: MappingVersion | None) -> list[RuleEffect]:
    """What each rule of ``mapping`` did to this roster's rows still in post (``app.analysis.browse``: no departure
    date, a code saying the executive has not left, not counted as forced or voluntary in the end), which
    ``rule_effects`` counts with the departures. Only a rule naming a still-in-post code can reach them; when
    none does, nothing is read. Rows still in post are few (one sitting chief a firm), so they are read as rows."""
    rules = mapping.rules if mapping else ()
    held = {code_key(c) for c in in_post_codes(stored_codes(store, roster))}
    if mapping is None or not any(code_key(r.code) in held for r in rules):
        return [RuleEffect(r, 0, 0, 0) for r in rules]

    def compute() -> list[RuleEffect]:
        flt = departure_filter(store, roster, mapping, resolve_overrides(store, roster, mapping),
                               version=roster.version, in_post="only")
        # notice_days is left out: it needs an exit date, which a row still in post has not (the rules read NaN)
        fields = ["reason", "age", "tenure", "interim"]
        rows = pd.DataFrame([[row[f] for f in fields] for row in store.iter_departures(roster.id, flt)],
                            columns=fields)
        if rows.empty:
            return [RuleEffect(r, 0, 0, 0) for r in rules]
        return categorise(rows, mapping)[1]
    return memoised(store, ("rule_in_post", roster.id, roster_fingerprint(roster), mapping_key(mapping)), compute)


def rules_label(mapping: MappingVersion | None) -> str:
    """One line for provenance: the rules a reading used."""
    if mapping is None or not mapping.rules:
        return "no classification rules (codes alone)"
    return f"{len(mapping.rules)} classification rule(s): " + "; ".join(r.describe() for r in mapping.rules)
