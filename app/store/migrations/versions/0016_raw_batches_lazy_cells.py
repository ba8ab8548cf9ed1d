"""Raw rows stored per batch; detailed and firm cells built on first read (issue 14, the 1,000,000-row import).

* ``departures.raw`` (each row as JSON, a TEXT per departure) moves to ``departure_raw``: one row per 50,000
  departures of a roster version, zlib-compressed JSON with the batch's source lines and each row's text
  byte for byte (``"rows"``; new imports store the cells column by column, app/store/raw_rows.py).
* ``roster_cell_builds`` marks the roster versions whose detailed and firm cells are stored: every version
  that has them now (built at its import); a version without them is built on its first read.
* ``departures`` loses its index on ``roster_id`` alone (``ix_departures_roster_version`` starts with it).

Revision ID: 0016
Revises: 0015
"""

from __future__ import annotations

import json
import zlib

import sqlalchemy as sa
from alembic import op

revision = "0016"
down_revision = "0015"
branch_labels = None
depends_on = None

#: rows per stored batch (written out: a revision must not follow later code)
BATCH = 50_000


def _pack(lines: list[int], rows: list[str]) -> bytes:
    payload = {"lines": lines, "rows": rows}
    return zlib.compress(json.dumps(payload, ensure_ascii=False, separators=(",", ":")).encode("utf-8"), 1)


def upgrade() -> None:
    raw_table = op.create_table(
        "departure_raw",
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False),
        sa.Column("version", sa.Integer, nullable=False),
        sa.Column("seq", sa.Integer, nullable=False),
        sa.Column("first_line", sa.Integer, nullable=False),
        sa.Column("rows", sa.Integer, nullable=False),
        sa.Column("data", sa.LargeBinary, nullable=False),
        sa.UniqueConstraint("roster_id", "version", "seq"),
    )
    op.create_table(
        "roster_cell_builds",
        sa.Column("roster_id", sa.Integer, sa.ForeignKey("rosters.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("version", sa.Integer, primary_key=True),
        sa.Column("built_at", sa.String, nullable=False),
    )
    conn = op.get_bind()
    assert raw_table is not None
    versions = conn.execute(sa.text("SELECT DISTINCT roster_id, version FROM departures "
                                    "ORDER BY roster_id, version")).all()
    for roster_id, version in versions:
        # streamed (a server-side cursor on PostgreSQL): one version's rows are never all in memory at once
        result = conn.execute(
            sa.text("SELECT line, raw FROM departures WHERE roster_id = :r AND version = :v ORDER BY line")
            .execution_options(stream_results=True, yield_per=BATCH), {"r": roster_id, "v": version})
        batches = []
        for seq, part in enumerate(result.partitions(BATCH)):
            lines, rows = [int(r[0]) for r in part], [str(r[1]) for r in part]
            batches.append({"roster_id": roster_id, "version": version, "seq": seq, "first_line": lines[0],
                            "rows": len(lines), "data": _pack(lines, rows)})
            if len(batches) >= 4:
                conn.execute(raw_table.insert(), batches)
                batches = []
        result.close()
        if batches:
            conn.execute(raw_table.insert(), batches)
    # the versions stored so far got their detailed and firm cells at import (or from revisions 0005/0010)
    op.execute("INSERT INTO roster_cell_builds (roster_id, version, built_at) "
               "SELECT DISTINCT roster_id, version, '' FROM roster_detail_cells")
    with op.batch_alter_table("departures") as batch:
        batch.drop_index("ix_departures_roster_id")
        batch.drop_column("raw")


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
