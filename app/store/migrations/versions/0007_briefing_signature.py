"""Briefing settings: the title, author, date, confidentiality marking and takeaways a roster's exports carry.

Revision ID: 0007
Revises: 0006
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "briefing_settings",
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("title", sa.String, nullable=False),
        sa.Column("author", sa.String, nullable=False),
        sa.Column("marking", sa.String, nullable=False),
        sa.Column("date", sa.String, nullable=False),
        sa.Column("takeaways", sa.Text, nullable=False),
        sa.Column("updated_at", sa.String, nullable=False),
    )


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
