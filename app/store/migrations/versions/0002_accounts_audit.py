"""Team mode: accounts with roles, API tokens, the audit trail, shared secrets.

Revision ID: 0002
Revises: 0001
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "accounts",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String, nullable=False, unique=True),
        sa.Column("role", sa.String, nullable=False),
        sa.Column("password_hash", sa.String, nullable=False),
        sa.Column("created_at", sa.String, nullable=False),
        sa.Column("session_epoch", sa.Integer, nullable=False),
        sqlite_autoincrement=True,
    )
    op.create_table(
        "api_tokens",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("account_id", sa.Integer, sa.ForeignKey("accounts.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("token_sha256", sa.String(64), nullable=False, unique=True),
        sa.Column("created_at", sa.String, nullable=False),
        sqlite_autoincrement=True,
    )
    op.create_table(
        "audit_events",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("at", sa.String, nullable=False, index=True),
        sa.Column("actor", sa.String, nullable=False, index=True),
        sa.Column("action", sa.String, nullable=False),
        sa.Column("target", sa.String, nullable=False),
        sa.Column("detail", sa.Text, nullable=False),
        sqlite_autoincrement=True,
    )
    with op.batch_alter_table("runs") as batch:
        batch.add_column(sa.Column("author", sa.String))
    op.create_table(
        "app_secrets",
        sa.Column("name", sa.String, primary_key=True),
        sa.Column("value", sa.String, nullable=False),
    )


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
