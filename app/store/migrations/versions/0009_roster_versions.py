"""Roster versions: a refresh imports next week's file as the roster's next version; every version stays.

Adds ``roster_versions`` (one row per import, filled with version 1 for every stored roster), the newest
version number on ``rosters``, a ``version`` on departures, rejected rows and both cell tables (existing
rows are version 1), and the version a run read on ``runs`` (existing runs read version 1, the only one).
Adding a column with a default is an in-place ``ALTER TABLE`` on SQLite and PostgreSQL alike.

Revision ID: 0009
Revises: 0008
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0009"
down_revision = "0008"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "roster_versions",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("version", sa.Integer, nullable=False),
        sa.Column("source_name", sa.String, nullable=False),
        sa.Column("sha256", sa.String(64), nullable=False, index=True),
        sa.Column("imported_at", sa.String, nullable=False),
        sa.Column("rows_total", sa.Integer, nullable=False),
        sa.Column("accepted", sa.Integer, nullable=False),
        sa.Column("rejected", sa.Integer, nullable=False),
        sa.Column("duplicates", sa.Integer, nullable=False),
        sa.Column("columns", sa.Text, nullable=False),
        sa.Column("author", sa.String),
        sa.UniqueConstraint("roster_id", "version"),
        sqlite_autoincrement=True,
    )
    for table in ("rosters", "departures", "rejected_rows", "roster_cells", "roster_firm_cells"):
        op.add_column(table, sa.Column("version", sa.Integer, nullable=False, server_default="1"))
    op.add_column("runs", sa.Column("roster_version", sa.Integer))
    op.create_index("ix_departures_roster_version", "departures", ["roster_id", "version"])
    op.execute("INSERT INTO roster_versions (roster_id, version, source_name, sha256, imported_at, rows_total, "
               "accepted, rejected, duplicates, columns) "
               "SELECT id, 1, source_name, sha256, imported_at, rows_total, accepted, rejected, duplicates, columns "
               "FROM rosters ORDER BY id")
    op.execute("UPDATE runs SET roster_version = 1")


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
