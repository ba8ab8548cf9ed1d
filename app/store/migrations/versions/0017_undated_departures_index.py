"""A partial index of the departures with no date: the rows still in post are counted apart from it.

Revision ID: 0017
Revises: 0016
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0017"
down_revision = "0016"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_index("ix_departures_undated", "departures", ["roster_id", "version", "year", "reason"],
                    sqlite_where=sa.text("date IS NULL"), postgresql_where=sa.text("date IS NULL"))


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
