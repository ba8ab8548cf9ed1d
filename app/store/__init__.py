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

from app.store.accounts import Account, AccountQueries
from app.store.audit import AuditEvent, AuditQueries
from app.store.briefing import BriefingQueries
from app.store.cells import CellQueries
from app.store.departure_query import DepartureFilter, DepartureQueries
from app.store.mappings import MappingConflict, MappingQueries
from app.store.profiles import IntakeProfile, ProfileQueries
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
from app.store.rosters import RosterQueries
from app.store.runs import INTERRUPTED, RunClaimLost, RunQueries
from app.store.spellings import SpellingQueries
from app.store.tables import DEPARTURE_FIELDS, HEAD_REVISION, departures, metadata
from app.store.universe import UniverseQueries

__all__ = [
    "Account", "AuditEvent", "BriefingSettings", "CaseOverride", "DEPARTURE_FIELDS", "DepartureFilter", "HEAD_REVISION",
    "INTERRUPTED", "IntakeProfile", "MAX_ID", "MappingConflict", "MappingVersion", "OVERRIDE_NOTE_MAX", "RejectedRow", "Roster",
    "RosterSettings", "Run", "RunClaimLost", "Store", "StoreError", "Universe", "departures", "metadata", "now_iso",
]


class Store(RosterQueries, DepartureQueries, MappingQueries, RunQueries, UniverseQueries, CellQueries,
            AccountQueries, AuditQueries, BriefingQueries, SpellingQueries,
            ProfileQueries):
    """Owns the engine; every read and write of Helmshift goes through one of its methods."""
