"""Classification rules: a code's category reassigned by a departure's age, tenure, interim flag or notice days.

The same function reads one row per record (``age`` 58.7) or one row per cell of the cell store (``age``
58, whole years, with a ``departures`` weight): rules compare completed years, and for a whole-number
threshold ``v`` "age below v" is "floor(age) below v", so both paths give the same categories. Notice days
(exit minus announcement date) are whole days on both paths.
Written by hand: it is a few vectorised comparisons, and no library evaluates this small rule table.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from app.stats.codekeys import code_key
from app.types import CATEGORIES, RULE_COMPARISONS, RULE_FIELDS, ClassificationRule

#: thresholds the rule table accepts (whole years or days; interim 0 or 1)
VALUE_RANGE = {"age": (0, 120), "tenure": (0, 80), "interim": (0, 1), "notice_days": (0, 3660)}
#: what each field may be compared with
COMPARISONS = {"age": ("below", "at_least"), "tenure": ("below", "at_least"), "interim": ("equals",),
               "notice_days": ("below", "at_least")}


class RuleError(ValueError):
    """A rule that cannot be used; the message says which part and what is allowed."""


def make_rule(code: str, field: str, comparison: str, value: str | int | float, category: str) -> ClassificationRule:
    """Check one rule's parts and build it (``value`` may be text from a form or a CSV cell)."""
    code = str(code).strip()
    if not code:
        raise RuleError("The rule's code is empty.")
    field = str(field).strip().lower()
    if field not in RULE_FIELDS:
        raise RuleError(f"field must be one of {', '.join(RULE_FIELDS)}; got {field!r}.")
    comparison = str(comparison).strip().lower().replace(" ", "_")
    if comparison not in RULE_COMPARISONS or comparison not in COMPARISONS[field]:
        raise RuleError(f"{field} compares with {' or '.join(COMPARISONS[field])}; got {comparison!r}.")
    number = _whole(value, field)
    low, high = VALUE_RANGE[field]
    if not low <= number <= high:
        raise RuleError(f"{field} value must be a whole number from {low} to {high}; got {value!r}.")
    category = str(category).strip().lower()
    if category not in CATEGORIES:
        raise RuleError(f"category must be one of {', '.join(CATEGORIES)}; got {category!r}.")
    return ClassificationRule(code, field, comparison, number, category)


def _whole(value: str | int | float, field: str) -> int:
    text = str(value).strip().lower()
    if field == "interim" and text in ("yes", "true", "y", "no", "false", "n"):
        return int(text in ("yes", "true", "y"))
    try:
        number = float(text)
    except ValueError:
        raise RuleError(f"{field} value must be a whole number; got {value!r}.") from None
    if not np.isfinite(number) or number != int(number):
        unit = "days" if field == "notice_days" else "years"
        raise RuleError(f"{field} value must be a whole number (thresholds are in whole {unit}); got {value!r}.")
    return int(number)


@dataclass(frozen=True)
class RuleEffect:
    """What one rule did: departures it decided, how many of those changed category, and how many of the
    code's departures reached it without the field (kept their category as far as this rule goes)."""

    rule: ClassificationRule
    matched: int
    moved: int
    missing: int


def field_values(frame: pd.DataFrame, field: str) -> np.ndarray:
    """The field in completed units as floats (NaN where missing): floor of age/tenure, 0/1 for interim, whole
    notice days as stored."""
    column = frame[field]
    present = column.notna().to_numpy()
    values = np.full(len(frame), np.nan)
    values[present] = column[present].astype(float).to_numpy()
    return np.floor(values) if field in ("age", "tenure") else values


def apply_rules(frame: pd.DataFrame, categories: np.ndarray,
                rules: Sequence[ClassificationRule]) -> tuple[np.ndarray, list[RuleEffect]]:
    """Categories after the rules, and each rule's effect.

    ``frame`` has ``reason`` and the fields the rules use (one row per record, or per cell with a
    ``departures`` weight); ``categories`` is each row's category from its code alone.
    """
    result = np.asarray(categories, dtype=object).copy()
    weight = (frame["departures"].to_numpy(dtype=np.int64) if "departures" in frame
              else np.ones(len(frame), dtype=np.int64))
    # a rule names its code as the mapping does: matched by code key, like the mapping's categories, so a
    # rule for "RETIRED" reaches a roster that stores the code as "Retired"
    reasons = frame["reason"].astype(str)
    reason = reasons.map({r: code_key(r) for r in reasons.unique()}).to_numpy(dtype=object)
    decided = np.zeros(len(frame), dtype=bool)
    effects: list[RuleEffect] = []
    cache: dict[str, np.ndarray] = {}
    for rule in rules:
        if rule.field not in cache:
            cache[rule.field] = (field_values(frame, rule.field) if rule.field in frame
                                 else np.full(len(frame), np.nan))
        values = cache[rule.field]
        reach = (reason == code_key(rule.code)) & ~decided
        present = ~np.isnan(values)
        with np.errstate(invalid="ignore"):
            test = {"below": values < rule.value, "at_least": values >= rule.value,
                    "equals": values == rule.value}[rule.comparison]
        hit = reach & present & test
        moved = hit & (result != rule.category)
        effects.append(RuleEffect(rule, int(weight[hit].sum()), int(weight[moved].sum()),
                                  int(weight[reach & ~present].sum())))
        result[hit] = rule.category
        decided |= hit
    return result, effects
