"""Team mode's tables: accounts, their API tokens, the audit trail, and secrets shared by every server process.

Declared on the store's one metadata (:mod:`app.store.schema`) and imported by :mod:`app.store.tables`, so a
fresh database gets them and ``tables.metadata`` lists them; change them there too with an Alembic revision.
"""

from __future__ import annotations

from sqlalchemy import Column, ForeignKey, Integer, String, Table, Text

from app.store.schema import metadata

accounts = Table(
    "accounts", metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String, nullable=False, unique=True),
    Column("role", String, nullable=False),
    Column("password_hash", String, nullable=False),  # argon2id, never the password
    Column("created_at", String, nullable=False),
    Column("session_epoch", Integer, nullable=False, default=0),  # bumped to sign every session out
    sqlite_autoincrement=True,
)

api_tokens = Table(
    "api_tokens", metadata,
    Column("id", Integer, primary_key=True),
    Column("account_id", Integer, ForeignKey("accounts.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("token_sha256", String(64), nullable=False, unique=True),  # the token itself is shown once
    Column("created_at", String, nullable=False),
    sqlite_autoincrement=True,
)

audit_events = Table(
    "audit_events", metadata,
    Column("id", Integer, primary_key=True),
    Column("at", String, nullable=False, index=True),
    Column("actor", String, nullable=False, index=True),
    Column("action", String, nullable=False),
    Column("target", String, nullable=False),
    Column("detail", Text, nullable=False),  # JSON
    sqlite_autoincrement=True,
)

app_secrets = Table(
    "app_secrets", metadata,
    Column("name", String, primary_key=True),
    Column("value", String, nullable=False),
)
