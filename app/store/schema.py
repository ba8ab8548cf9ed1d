"""The one SQLAlchemy ``MetaData`` every table of the store is declared on (:mod:`app.store.tables`,
:mod:`app.store.team_tables`); a module of its own so the table modules can share it without importing each
other in a circle."""

from __future__ import annotations

from sqlalchemy import MetaData

metadata = MetaData()
