"""Each bootstrap resample's standard error of its statistic, stored beside its estimate (studentized intervals).

Revision ID: 0008
Revises: 0007
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0008"
down_revision = "0007"
branch_labels = None
depends_on = None


def upgrade() -> None:
    # NULL for chunks stored before this revision and for statistics without a standard error
    with op.batch_alter_table("run_replicates") as batch:
        batch.add_column(sa.Column("standard_errors", sa.LargeBinary))


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
