"""What the store hands out: frozen dataclasses of stored things, and the store's one error type.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from app.types import Category, ClassificationRule, RunKind, RunStatus


class StoreError(ValueError):
    """A request the store cannot satisfy (unknown roster, duplicate name, ...)."""


MAX_ID = 2**31 - 1  # the INTEGER id columns on PostgreSQL are 32-bit: larger ids cannot exist and must not
# reach the driver (it would refuse them with a DataError); SQLite counters never get near it either


#: the longest roster or mapping name: it heads pages, exports and the audit trail
NAME_MAX = 120


def check_name(name: str, what: str) -> None:
    """Refuse a ``what`` name (a roster name, a mapping name) over ``NAME_MAX`` characters or holding a control or
    invisible character (NUL, tab, a zero-width space, a right-to-left override that reverses what follows it):
    names are shown on every page and in every export, where such characters hide or scramble text."""
    if len(name) > NAME_MAX:
        raise StoreError(f"A {what} is at most {NAME_MAX} characters; this one has {len(name):,} characters.")
    odd = next((ch for ch in name if not (ch == " " or ch.isprintable())), None)
    if odd is not None:
        raise StoreError(f"A {what} cannot hold a control or invisible character U+{ord(odd):04X} (at character "
                         f"{name.index(odd) + 1}); type it again without it.")


def now_iso() -> str:
    return datetime.now(UTC).replace(microsecond=0).isoformat()


@dataclass(frozen=True)
class Roster:
    id: int
    name: str
    source_name: str
    sha256: str
    imported_at: str
    rows_total: int
    accepted: int
    rejected: int
    duplicates: int
    columns: dict[str, str]
    #: the version these figures describe (a refresh adds the next one; every version stays stored)
    version: int = 1
    #: the roster's newest version
    latest_version: int = 1

    @property
    def is_latest(self) -> bool:
        return self.version == self.latest_version


@dataclass(frozen=True)
class RejectedRow:
    line: int
    raw: str
    reason: str


@dataclass(frozen=True)
class MappingVersion:
    """One saved version of a named mapping: code -> (category, label)."""

    name: str
    version: int
    created_at: str
    author: str
    note: str
    categories: dict[str, Category]
    labels: dict[str, str]
    #: classification rules pinned to this version, in evaluation order (first match wins)
    rules: tuple[ClassificationRule, ...] = ()
    #: case-level overrides pinned to this version (they take precedence over codes and rules)
    overrides: tuple[CaseOverride, ...] = ()


#: the longest note an override may carry (it is quoted in exports' methods sections)
OVERRIDE_NOTE_MAX = 500


@dataclass(frozen=True)
class CaseOverride:
    """One departure of one roster counted as ``category`` by a mapping version, whatever its code and the
    rules say, with the analyst's ``note`` (required: why, e.g. "board statement of 3 May").

    The departure is named by the identity that survives roster refreshes (app/intake/refresh.py): firm id,
    executive and fiscal year, or firm id, fiscal year and reason code where the executive is not given, and
    ``occurrence`` (the n-th such record in source-line order, from 0); ``departure_id`` and
    ``roster_version`` say which stored record it was set on.
    """

    roster_id: int
    firm_id: str
    executive: str | None
    year: int
    reason: str
    category: Category
    note: str
    author: str
    created_at: str
    occurrence: int = 0
    departure_id: int | None = None
    roster_version: int | None = None

    def identity(self) -> tuple[int, str, str, int, str, int]:
        """What makes two overrides name the same departure (the refresh identity, normalised)."""
        executive = " ".join((self.executive or "").split()).casefold()
        reason = "" if executive else " ".join(self.reason.split()).casefold()
        return (self.roster_id, " ".join(self.firm_id.split()), executive, int(self.year), reason,
                int(self.occurrence))

    def describe(self) -> str:
        """The record in words: "firm F001, A. Person, FY2012"."""
        who = f", {self.executive}" if self.executive else f", code {self.reason!r}"
        nth = f" (record {self.occurrence + 1} of that kind)" if self.occurrence else ""
        return f"firm {self.firm_id}{who}, FY{self.year}{nth}"


@dataclass(frozen=True)
class RosterSettings:
    roster_id: int
    mapping_name: str | None
    window: tuple[int, int] | None


@dataclass(frozen=True)
class Run:
    id: int
    kind: RunKind
    roster_id: int
    status: RunStatus
    created_at: str
    started_at: str | None
    finished_at: str | None
    mapping_name: str | None
    mapping_version: int | None
    window: tuple[int, int] | None
    params: dict[str, Any]
    fingerprint: str
    progress_done: int
    progress_total: int
    cancel_requested: bool
    result: dict[str, Any] | None
    error: str | None
    seconds: float | None
    #: who started it: the signed-in account in team mode, the local analyst otherwise
    author: str | None = None
    #: the roster version it read (runs made before versions existed read version 1)
    roster_version: int = 1


@dataclass(frozen=True)
class Universe:
    """One stored universe of firm-years for a roster (imported from a file or derived from the roster)."""

    id: int
    roster_id: int
    source: str  # "file" or "derived"
    source_name: str
    sha256: str
    fingerprint: str
    imported_at: str
    shape: str  # "firm_years" or "spans"
    rows_total: int
    rejected: int
    firms: int
    firm_years: int
    columns: dict[str, str]

    @property
    def approximate(self) -> bool:
        """Derived from the roster's own years rather than from an index membership file."""
        return self.source == "derived"


@dataclass(frozen=True)
class BriefingSettings:
    """What a roster's brief and deck are signed with; empty strings mean "use the default"."""

    roster_id: int
    title: str = ""
    author: str = ""
    marking: str = ""
    date: str = ""
    takeaways: dict[str, str] | None = None
    updated_at: str | None = None
