"""Announcement dates and notice days on departures; the detailed cells keyed also by notice days (issue 16).

Revision ID: 0015
Revises: 0014
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0015"
down_revision = "0014"
branch_labels = None
depends_on = None


def upgrade() -> None:
    # rosters stored before this revision had no announcement column: their departures and cells read NULL,
    # which is the key the cells already have, so nothing is refilled
    with op.batch_alter_table("departures") as batch:
        batch.add_column(sa.Column("announced", sa.String))
        batch.add_column(sa.Column("notice_days", sa.Integer))
    for table in ("roster_detail_cells", "roster_firm_cells"):
        with op.batch_alter_table(table) as batch:
            batch.add_column(sa.Column("notice_days", sa.Integer))


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
