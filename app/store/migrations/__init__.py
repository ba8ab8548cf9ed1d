"""Alembic's schema history for the store, for SQLite and PostgreSQL alike.

The store runs it itself (:meth:`app.store.engine.Gateway._migrate`); there is no alembic.ini. A fresh
database is created from the current table definitions and stamped with the head revision; an existing one is
upgraded revision by revision. A new schema change is a new file in ``versions/`` whose ``down_revision`` is
the previous head, and ``HEAD_REVISION`` in :mod:`app.store.tables` names it (a test checks the two agree).
"""
