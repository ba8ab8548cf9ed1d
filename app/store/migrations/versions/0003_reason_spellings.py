"""One code per spelling: each departure keeps its own spelling of the reason code beside the shown code.

Revision ID: 0003
Revises: 0002
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("departures") as batch:
        batch.add_column(sa.Column("reason_raw", sa.String))
    # rows stored before this were imported spelling by spelling, so their raw spelling is the code itself
    op.execute("UPDATE departures SET reason_raw = reason WHERE reason_raw IS NULL")


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
