"""The first schema: rosters, departures, rejected rows, mappings and their versions, settings, runs.

Revision ID: 0001
Revises:
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "rosters",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String, nullable=False, unique=True),
        sa.Column("source_name", sa.String, nullable=False),
        sa.Column("sha256", sa.String(64), nullable=False, index=True),
        sa.Column("imported_at", sa.String, nullable=False),
        sa.Column("rows_total", sa.Integer, nullable=False),
        sa.Column("accepted", sa.Integer, nullable=False),
        sa.Column("rejected", sa.Integer, nullable=False),
        sa.Column("duplicates", sa.Integer, nullable=False),
        sa.Column("columns", sa.Text, nullable=False),
    )
    op.create_table(
        "departures",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("line", sa.Integer, nullable=False),
        sa.Column("firm_id", sa.String, nullable=False),
        sa.Column("firm_name", sa.String),
        sa.Column("sector", sa.String),
        sa.Column("year", sa.Integer, nullable=False),
        sa.Column("date", sa.String),
        sa.Column("reason", sa.String, nullable=False),
        sa.Column("executive", sa.String),
        sa.Column("age", sa.Float),
        sa.Column("tenure", sa.Float),
        sa.Column("interim", sa.Boolean),
        sa.Column("notes", sa.Text),
        sa.Column("raw", sa.Text, nullable=False),
    )
    op.create_table(
        "rejected_rows",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("line", sa.Integer, nullable=False),
        sa.Column("raw", sa.Text, nullable=False),
        sa.Column("reason", sa.Text, nullable=False),
    )
    op.create_table(
        "mappings",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("name", sa.String, nullable=False, unique=True),
        sa.Column("created_at", sa.String, nullable=False),
    )
    op.create_table(
        "mapping_versions",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("mapping_id", sa.Integer, sa.ForeignKey("mappings.id", ondelete="CASCADE"), nullable=False),
        sa.Column("version", sa.Integer, nullable=False),
        sa.Column("created_at", sa.String, nullable=False),
        sa.Column("author", sa.String, nullable=False),
        sa.Column("note", sa.Text, nullable=False),
        sa.UniqueConstraint("mapping_id", "version"),
    )
    op.create_table(
        "mapping_entries",
        sa.Column("version_id", sa.Integer, sa.ForeignKey("mapping_versions.id", ondelete="CASCADE"),
                  nullable=False, index=True),
        sa.Column("code", sa.String, nullable=False),
        sa.Column("category", sa.String, nullable=False),
        sa.Column("label", sa.String, nullable=False),
        sa.UniqueConstraint("version_id", "code"),
    )
    op.create_table(
        "roster_settings",
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("mapping_name", sa.String),
        sa.Column("window_from", sa.Integer),
        sa.Column("window_to", sa.Integer),
    )
    op.create_table(
        "runs",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("kind", sa.String, nullable=False),
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("status", sa.String, nullable=False),
        sa.Column("created_at", sa.String, nullable=False),
        sa.Column("started_at", sa.String),
        sa.Column("finished_at", sa.String),
        sa.Column("mapping_name", sa.String),
        sa.Column("mapping_version", sa.Integer),
        sa.Column("window_from", sa.Integer),
        sa.Column("window_to", sa.Integer),
        sa.Column("params", sa.Text, nullable=False),
        sa.Column("fingerprint", sa.String, nullable=False),
        sa.Column("progress_done", sa.Integer, nullable=False),
        sa.Column("progress_total", sa.Integer, nullable=False),
        sa.Column("cancel_requested", sa.Boolean, nullable=False),
        sa.Column("result", sa.Text),
        sa.Column("error", sa.Text),
        sa.Column("seconds", sa.Float),
    )
    op.create_table(
        "run_replicates",
        sa.Column("run_id", sa.Integer, sa.ForeignKey("runs.id", ondelete="CASCADE"), nullable=False, index=True),
        sa.Column("seq", sa.Integer, nullable=False),
        sa.Column("count", sa.Integer, nullable=False),
        sa.Column("data", sa.LargeBinary, nullable=False),
        sa.Column("failures", sa.LargeBinary, nullable=False),
        sa.UniqueConstraint("run_id", "seq"),
    )


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
