"""Classification rules on mapping versions; cells keyed also by age, tenure and interim (issue 16).

Revision ID: 0010
Revises: 0009
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0010"
down_revision = "0009"
branch_labels = None
depends_on = None

# completed years, written to give the same integer on SQLite (CAST truncates) and PostgreSQL (CAST rounds)
_AGE = ("CASE WHEN age IS NULL THEN NULL WHEN CAST(age AS INTEGER) > age THEN CAST(age AS INTEGER) - 1 "
        "ELSE CAST(age AS INTEGER) END")
_TENURE = _AGE.replace("age", "tenure")


def upgrade() -> None:
    op.create_table(
        "mapping_rules",
        sa.Column("version_id", sa.Integer, sa.ForeignKey("mapping_versions.id", ondelete="CASCADE"),
                  nullable=False, index=True),
        sa.Column("position", sa.Integer, nullable=False),
        sa.Column("code", sa.String, nullable=False),
        sa.Column("field", sa.String, nullable=False),
        sa.Column("comparison", sa.String, nullable=False),
        sa.Column("value", sa.Integer, nullable=False),
        sa.Column("category", sa.String, nullable=False),
        sa.UniqueConstraint("version_id", "position"),
    )
    op.create_table(
        "roster_detail_cells",
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("year", sa.Integer, nullable=False),
        sa.Column("sector", sa.String),
        sa.Column("reason", sa.String, nullable=False),
        sa.Column("age", sa.Integer),
        sa.Column("tenure", sa.Integer),
        sa.Column("interim", sa.Boolean),
        sa.Column("departures", sa.Integer, nullable=False),
        sa.Column("version", sa.Integer, nullable=False, server_default="1"),
    )
    with op.batch_alter_table("roster_firm_cells") as batch:
        batch.add_column(sa.Column("age", sa.Integer))
        batch.add_column(sa.Column("tenure", sa.Integer))
        batch.add_column(sa.Column("interim", sa.Boolean))
    op.execute("DELETE FROM roster_firm_cells")
    # fill with the detailed key (written out: a revision must not change when the application code does)
    op.execute("INSERT INTO roster_detail_cells "
               "(roster_id, version, year, sector, reason, age, tenure, interim, departures) "
               f"SELECT roster_id, version, year, sector, reason, {_AGE}, {_TENURE}, interim, COUNT(*) "
               f"FROM departures GROUP BY roster_id, version, year, sector, reason, {_AGE}, {_TENURE}, interim")
    op.execute("INSERT INTO roster_firm_cells "
               "(roster_id, version, firm_id, year, sector, reason, age, tenure, interim, departures) "
               f"SELECT roster_id, version, firm_id, year, sector, reason, {_AGE}, {_TENURE}, interim, COUNT(*) "
               "FROM departures "
               f"GROUP BY roster_id, version, firm_id, year, sector, reason, {_AGE}, {_TENURE}, interim")


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
