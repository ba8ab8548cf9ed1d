"""Case-level overrides of a mapping version (issue 15): one departure counted as a chosen category.

Revision ID: 0014
Revises: 0013
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0014"
down_revision = "0013"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "mapping_overrides",
        sa.Column("version_id", sa.Integer, sa.ForeignKey("mapping_versions.id", ondelete="CASCADE"),
                  nullable=False, index=True),
        sa.Column("position", sa.Integer, nullable=False),
        sa.Column("roster_id", sa.Integer, nullable=False),
        sa.Column("firm_id", sa.String, nullable=False),
        sa.Column("executive", sa.String),
        sa.Column("year", sa.Integer, nullable=False),
        sa.Column("reason", sa.String, nullable=False),
        sa.Column("occurrence", sa.Integer, nullable=False, server_default="0"),
        sa.Column("departure_id", sa.Integer),
        sa.Column("roster_version", sa.Integer),
        sa.Column("category", sa.String, nullable=False),
        sa.Column("note", sa.Text, nullable=False),
        sa.Column("author", sa.String, nullable=False),
        sa.Column("created_at", sa.String, nullable=False),
        sa.UniqueConstraint("version_id", "position"),
    )


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
