"""Intake profiles: column roles, header row, date reading and fiscal-year end saved under a name (issue 14).

Revision ID: 0011
Revises: 0010
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0011"
down_revision = "0010"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "intake_profiles",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String, nullable=False, unique=True),
        sa.Column("headers", sa.Text, nullable=False),
        sa.Column("roles", sa.Text, nullable=False),
        sa.Column("header_row", sa.Integer),
        sa.Column("date_order", sa.String, nullable=False),
        sa.Column("fy_end", sa.Integer, nullable=False),
        sa.Column("created_at", sa.String, nullable=False),
        sa.Column("updated_at", sa.String, nullable=False),
        sqlite_autoincrement=True,
    )


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
