"""Classification rules of a mapping version: saving them, the academic preset, and what they did.

Rules are stored with a mapping version (a saved version never changes), so every run that records the
mapping version pins its rules too. Saving rules saves the next version of the mapping with the same codes.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

from app.analysis.cellstore import rule_effects
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
    """Each rule with what it did to this roster (all years): ``matched`` departures it decided, ``moved``
    (of those, how many changed category), ``missing`` (reached the rule without the field: kept)."""
    return [{"position": i, "code": e.rule.code, "field": e.rule.field, "comparison": e.rule.comparison,
             "value": e.rule.value, "category": e.rule.category, "text": e.rule.describe(),
             "matched": e.matched, "moved": e.moved, "missing": e.missing}
            for i, e in enumerate(rule_effects(store, roster, mapping), start=1)]


def rules_label(mapping: MappingVersion | None) -> str:
    """One line for provenance: the rules a reading used."""
    if mapping is None or not mapping.rules:
        return "no classification rules (codes alone)"
    return f"{len(mapping.rules)} classification rule(s): " + "; ".join(r.describe() for r in mapping.rules)
