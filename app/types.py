"""Shared literal types and aliases used across layers."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, get_args

Category = Literal["forced", "voluntary", "excluded"]
CATEGORIES: tuple[Category, ...] = get_args(Category)
#: what a reason code counts as when no mapping entry assigns it
UNMAPPED = "unmapped"

Role = Literal[
    "firm_id", "firm_name", "sector", "year", "date", "reason",
    "executive", "age", "tenure", "interim", "notes", "announced",
]
ROLES: tuple[Role, ...] = get_args(Role)
REQUIRED_ROLES: tuple[Role, ...] = ("firm_id", "reason")

Unit = Literal["departure", "firm"]
UNITS: tuple[Unit, ...] = get_args(Unit)

AccountRole = Literal["viewer", "analyst", "admin"]
#: in rising order of what a role may do: viewers read and export, analysts also change, admins also delete
ACCOUNT_ROLES: tuple[AccountRole, ...] = get_args(AccountRole)

RunKind = Literal["fit", "bootstrap"]
RunStatus = Literal["queued", "running", "done", "failed", "cancelled", "interrupted"]
RUN_STATUSES: tuple[RunStatus, ...] = get_args(RunStatus)


def check_choice(value: str, allowed: tuple[str, ...], what: str) -> str:
    """Return ``value`` if it is one of ``allowed``; otherwise raise naming the allowed values."""
    if value not in allowed:
        raise ValueError(f"{what} must be one of {', '.join(allowed)}; got {value!r}.")
    return value


# -- classification rules (issue 16): a mapping version may reassign a code's category by a record field ------
RuleField = Literal["age", "tenure", "interim", "notice_days"]
RULE_FIELDS: tuple[RuleField, ...] = get_args(RuleField)
RuleComparison = Literal["below", "at_least", "equals"]
RULE_COMPARISONS: tuple[RuleComparison, ...] = get_args(RuleComparison)


@dataclass(frozen=True)
class ClassificationRule:
    """Departures with reason ``code`` whose ``field`` compares to ``value`` count as ``category``.

    Age and tenure compare in completed years (``below 60``: younger than 60; ``at_least 65``: 65 or older),
    so a rule reads the same whether applied to a record or to the cell store's whole-year keys; interim
    compares with ``equals`` 1 (interim) or 0; ``notice_days`` (exit date minus announcement date, whole days,
    only where the roster has announcement dates) with ``below`` or ``at_least``. Rules of a mapping version are evaluated in order and the
    first that matches decides; a departure without the field is not matched by the rule (and is counted).
    """

    code: str
    field: RuleField
    comparison: RuleComparison
    value: int
    category: Category

    def describe(self) -> str:
        words = {"below": "below", "at_least": "at least", "equals": "equal to"}[self.comparison]
        if self.field == "interim":
            subject = "interim" if self.value else "not interim"
            return f"{self.code!r} counts as {self.category} when {subject}"
        if self.field == "notice_days":
            return (f"{self.code!r} counts as {self.category} when announced {words} {self.value} days before "
                    "the exit")
        return f"{self.code!r} counts as {self.category} when {self.field} is {words} {self.value} years"
