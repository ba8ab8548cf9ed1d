"""Reason-code spellings kept with the cells, so the Reason codes page never groups the departures.

Revision ID: 0013
Revises: 0012
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0013"
down_revision = "0012"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "roster_spellings",
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("version", sa.Integer, nullable=False, server_default="1"),
        sa.Column("reason", sa.String, nullable=False),
        sa.Column("spelling", sa.String, nullable=False),
        sa.Column("departures", sa.Integer, nullable=False),
    )
    # written out (a revision must not follow later code): a record without a raw spelling counts under its code
    op.execute("INSERT INTO roster_spellings (roster_id, version, reason, spelling, departures) "
               "SELECT roster_id, version, reason, COALESCE(reason_raw, reason), COUNT(*) FROM departures "
               "GROUP BY roster_id, version, reason, COALESCE(reason_raw, reason)")


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
