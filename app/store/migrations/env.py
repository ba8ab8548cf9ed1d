"""Alembic environment: the store hands in an open connection; migrations run inside its transaction."""

from __future__ import annotations

from alembic import context

from app.store.tables import metadata

connection = context.config.attributes["connection"]
# render_as_batch lets ALTER-style operations run on SQLite by copying the table (SQLite cannot ALTER much)
context.configure(connection=connection, target_metadata=metadata, render_as_batch=True)
with context.begin_transaction():
    context.run_migrations()
