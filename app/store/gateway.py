"""The ``Store``: one object owning the engine, with every query mixin of the package."""

from __future__ import annotations

from app.store.accounts import AccountQueries
from app.store.audit import AuditQueries
from app.store.briefing import BriefingQueries
from app.store.cells import CellQueries
from app.store.departure_query import DepartureQueries
from app.store.mappings import MappingQueries
from app.store.profiles import ProfileQueries
from app.store.rosters import RosterQueries
from app.store.runs import RunQueries
from app.store.spellings import SpellingQueries
from app.store.universe import UniverseQueries


class Store(RosterQueries, DepartureQueries, MappingQueries, RunQueries, UniverseQueries, CellQueries,
            AccountQueries, AuditQueries, BriefingQueries, SpellingQueries,
            ProfileQueries):
    """Owns the engine; every read and write of Helmshift goes through one of its methods."""
