"""Universes of firm-years per roster (the denominator of turnover rates) and their rejected rows.

Revision ID: 0004
Revises: 0003
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "universes",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("source", sa.String, nullable=False),
        sa.Column("source_name", sa.String, nullable=False),
        sa.Column("sha256", sa.String(64), nullable=False),
        sa.Column("fingerprint", sa.String, nullable=False),
        sa.Column("imported_at", sa.String, nullable=False),
        sa.Column("shape", sa.String, nullable=False),
        sa.Column("rows_total", sa.Integer, nullable=False),
        sa.Column("rejected", sa.Integer, nullable=False),
        sa.Column("firms", sa.Integer, nullable=False),
        sa.Column("firm_years", sa.Integer, nullable=False),
        sa.Column("columns", sa.Text, nullable=False),
    )
    op.create_table(
        "universe_firm_years",
        sa.Column("universe_id", sa.Integer, sa.ForeignKey("universes.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("firm_id", sa.String, nullable=False),
        sa.Column("year", sa.Integer, nullable=False),
        sa.UniqueConstraint("universe_id", "firm_id", "year"),
    )
    op.create_table(
        "universe_rejected",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("universe_id", sa.Integer, sa.ForeignKey("universes.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("line", sa.Integer, nullable=False),
        sa.Column("raw", sa.Text, nullable=False),
        sa.Column("reason", sa.Text, nullable=False),
    )


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
