"""The cell store: counts per (year, sector, reason code), and per firm, filled for every stored roster.

Revision ID: 0005
Revises: 0004
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "roster_cells",
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("year", sa.Integer, nullable=False),
        sa.Column("sector", sa.String),
        sa.Column("reason", sa.String, nullable=False),
        sa.Column("departures", sa.Integer, nullable=False),
    )
    op.create_table(
        "roster_firm_cells",
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("firm_id", sa.String, nullable=False),
        sa.Column("year", sa.Integer, nullable=False),
        sa.Column("sector", sa.String),
        sa.Column("reason", sa.String, nullable=False),
        sa.Column("departures", sa.Integer, nullable=False),
    )
    # the same statements the store uses to fill a roster's cells on import (written out: a revision must not
    # change when the application code does)
    op.execute("INSERT INTO roster_cells (roster_id, year, sector, reason, departures) "
               "SELECT roster_id, year, sector, reason, COUNT(*) FROM departures "
               "GROUP BY roster_id, year, sector, reason")
    op.execute("INSERT INTO roster_firm_cells (roster_id, firm_id, year, sector, reason, departures) "
               "SELECT roster_id, firm_id, year, sector, reason, COUNT(*) FROM departures "
               "GROUP BY roster_id, firm_id, year, sector, reason")


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
