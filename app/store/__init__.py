"""The one gateway to the database: every SQL statement of Helmshift lives in this package.

SQLAlchemy 2.0 Core over SQLite by default (any SQLAlchemy URL works). Methods return frozen dataclasses or
pandas DataFrames, never live ORM objects. The gateway is split by aggregate: ``rosters`` (rosters and
their records), ``mappings`` (mapping versions), ``runs`` (runs and replicates), on top of ``engine``
(connections and migrations) and ``tables`` (the schema).
"""

from __future__ import annotations

from app.store.departure_query import DepartureFilter, DepartureQueries
from app.store.mappings import MappingQueries
from app.store.records import (
    MAX_ID,
    MappingVersion,
    RejectedRow,
    Roster,
    RosterSettings,
    Run,
    StoreError,
    now_iso,
)
from app.store.rosters import RosterQueries
from app.store.runs import RunQueries
from app.store.tables import DEPARTURE_FIELDS, MIGRATIONS, SCHEMA_VERSION, departures, metadata

__all__ = [
    "DEPARTURE_FIELDS", "DepartureFilter", "MAX_ID", "MIGRATIONS", "SCHEMA_VERSION", "MappingVersion", "RejectedRow", "Roster",
    "RosterSettings", "Run", "Store", "StoreError", "departures", "metadata", "now_iso",
]


class Store(RosterQueries, DepartureQueries, MappingQueries, RunQueries):
    """Owns the engine; every read and write of Helmshift goes through one of its methods."""
