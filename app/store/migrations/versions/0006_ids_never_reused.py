"""Ids that a URL, a run or an export names are never reused; a deleted roster's runs stay readable.

SQLite hands out the largest id + 1 unless a table is declared AUTOINCREMENT, so deleting the newest roster
made its id free again; and runs cascaded away with their roster. SQLite cannot change either in place, so
the four tables are rebuilt (Alembic's batch mode: create the new shape, copy, drop, rename), with foreign
keys off for the duration (the store sees to it and checks them afterwards). PostgreSQL's sequences never
reuse ids, so there only the runs' foreign key to rosters is dropped.

Revision ID: 0006
Revises: 0005
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def _shapes() -> dict[str, sa.Table]:
    """The four tables as they are after this revision (written out: a revision must not follow later code)."""
    meta = sa.MetaData()
    return {
        "rosters": sa.Table(
            "rosters", meta,
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
            sqlite_autoincrement=True),
        "mappings": sa.Table(
            "mappings", meta,
            sa.Column("id", sa.Integer, primary_key=True),
            sa.Column("name", sa.String, nullable=False, unique=True),
            sa.Column("created_at", sa.String, nullable=False),
            sqlite_autoincrement=True),
        "mapping_versions": sa.Table(
            "mapping_versions", meta,
            sa.Column("id", sa.Integer, primary_key=True),
            sa.Column("mapping_id", sa.Integer, sa.ForeignKey("mappings.id", ondelete="CASCADE"), nullable=False),
            sa.Column("version", sa.Integer, nullable=False),
            sa.Column("created_at", sa.String, nullable=False),
            sa.Column("author", sa.String, nullable=False),
            sa.Column("note", sa.Text, nullable=False),
            sa.UniqueConstraint("mapping_id", "version"),
            sqlite_autoincrement=True),
        "runs": sa.Table(
            "runs", meta,
            sa.Column("id", sa.Integer, primary_key=True),
            sa.Column("kind", sa.String, nullable=False),
            sa.Column("roster_id", sa.Integer, nullable=False, index=True),
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
            sa.Column("author", sa.String),
            sqlite_autoincrement=True),
    }


def upgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name != "sqlite":
        for fk in sa.inspect(bind).get_foreign_keys("runs"):
            name = fk.get("name")
            if fk["referred_table"] == "rosters" and name:
                op.drop_constraint(name, "runs", type_="foreignkey")
        return
    for name, shape in _shapes().items():
        # copy_from names the new shape; recreate="always" rebuilds the table into it and copies every row
        with op.batch_alter_table(name, copy_from=shape, recreate="always"):
            pass
        # the rebuild does not carry the plain indexes over: put back those the shape declares
        present = {tuple(ix["column_names"]) for ix in sa.inspect(bind).get_indexes(name)}
        for index in shape.indexes:
            columns = tuple(c.name for c in index.columns)
            if columns not in present:
                op.create_index(f"ix_{name}_{'_'.join(columns)}", name, list(columns))


def downgrade() -> None:
    raise NotImplementedError("Helmshift's store only moves forward; restore a backup to go back.")
