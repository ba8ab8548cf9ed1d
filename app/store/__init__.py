"""The one gateway to the database: every SQL statement of Helmshift lives in this package.

SQLAlchemy 2.0 Core over SQLite by default (any SQLAlchemy URL works). Methods return frozen dataclasses or
pandas DataFrames, never live ORM objects. The gateway is split by aggregate: ``rosters`` (rosters and
their records), ``mappings`` (mapping versions), ``runs`` (runs and replicates), ``universe`` (firm-years
per roster), ``cells`` (the counts pages read instead of the records), ``accounts`` and ``audit`` (team mode),
``briefing`` (what exports are signed with), ``spellings`` (how each reason code was written), ``profiles``
(intake profiles), on top of ``engine`` (connections and Alembic migrations, :mod:`app.store.migrations`)
and ``tables`` (the schema).
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from app.store.accounts import Account
    from app.store.audit import AuditEvent
    from app.store.departure_query import DepartureFilter
    from app.store.gateway import Store
    from app.store.mappings import MappingConflict
    from app.store.profiles import IntakeProfile
    from app.store.records import (
        MAX_ID,
        OVERRIDE_NOTE_MAX,
        BriefingSettings,
        CaseOverride,
        MappingVersion,
        RejectedRow,
        Roster,
        RosterSettings,
        Run,
        StoreError,
        Universe,
        now_iso,
    )
    from app.store.runs import INTERRUPTED, RunClaimLost
    from app.store.tables import DEPARTURE_FIELDS, HEAD_REVISION, departures, metadata

__all__ = [
    "Account", "AuditEvent", "BriefingSettings", "CaseOverride", "DEPARTURE_FIELDS", "DepartureFilter", "HEAD_REVISION",
    "INTERRUPTED", "IntakeProfile", "MAX_ID", "MappingConflict", "MappingVersion", "OVERRIDE_NOTE_MAX", "RejectedRow", "Roster",
    "RosterSettings", "Run", "RunClaimLost", "Store", "StoreError", "Universe", "departures", "metadata", "now_iso",
]

#: where each name lives. Importing ``app.store`` itself costs nothing: a name is imported on first use
#: (PEP 562), so ``app.store.quick`` (stdlib sqlite3 only) serves ``helmshift fit`` without loading
#: SQLAlchemy or pandas (issue 13, start-up)
_HOMES = {
    "Account": "accounts", "AuditEvent": "audit", "DepartureFilter": "departure_query", "Store": "gateway",
    "MappingConflict": "mappings", "IntakeProfile": "profiles", "INTERRUPTED": "runs", "RunClaimLost": "runs",
    **dict.fromkeys(("MAX_ID", "OVERRIDE_NOTE_MAX", "BriefingSettings", "CaseOverride", "MappingVersion", "RejectedRow", "Roster", "RosterSettings",
                     "Run", "StoreError", "Universe", "now_iso"), "records"),
    **dict.fromkeys(("DEPARTURE_FIELDS", "HEAD_REVISION", "departures", "metadata"), "tables"),
}


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{home}"), name)
    globals()[name] = value
    return value
