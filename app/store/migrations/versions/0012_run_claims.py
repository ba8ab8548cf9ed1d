"""Runs are claimed by one worker at a time and kept alive by its heartbeat (jobs across server processes).

``claimed_by`` names the worker (host, process, runner) that holds a running run; ``heartbeat_at`` is the
database clock (seconds since 1970) of that worker's last sign of life. A running run whose heartbeat is older
than the stale limit is marked interrupted by any other server on the same store.

Revision ID: 0012
Revises: 0011
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0012"
down_revision = "0011"
branch_labels = None
depends_on = None


def upgrade() -> None:
    # nullable columns: a plain ALTER TABLE ADD COLUMN on both SQLite and PostgreSQL, no rebuild
    op.add_column("runs", sa.Column("claimed_by", sa.String))
    op.add_column("runs", sa.Column("heartbeat_at", sa.Float))


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
