"""Shared literal types and aliases used across layers."""

from __future__ import annotations

from typing import Literal, get_args

Category = Literal["forced", "voluntary", "excluded"]
CATEGORIES: tuple[Category, ...] = get_args(Category)
#: what a reason code counts as when no mapping entry assigns it
UNMAPPED = "unmapped"

Role = Literal[
    "firm_id", "firm_name", "sector", "year", "date", "reason",
    "executive", "age", "tenure", "interim", "notes",
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
