"""Table definitions and the ordered schema migrations of the store (SQLAlchemy Core metadata).

Version 1 is ``metadata.create_all``; each later change appends SQL to ``MIGRATIONS``; ``schema_version``
records what a database has applied.
"""

from __future__ import annotations

from sqlalchemy import (
    Boolean,
    Column,
    Float,
    ForeignKey,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

metadata = MetaData()

schema_version = Table("schema_version", metadata, Column("version", Integer, nullable=False))

rosters = Table(
    "rosters", metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String, nullable=False, unique=True),
    Column("source_name", String, nullable=False),
    Column("sha256", String(64), nullable=False, index=True),
    Column("imported_at", String, nullable=False),
    Column("rows_total", Integer, nullable=False),
    Column("accepted", Integer, nullable=False),
    Column("rejected", Integer, nullable=False),
    Column("duplicates", Integer, nullable=False),
    Column("columns", Text, nullable=False),  # JSON: role -> header used
)

DEPARTURE_FIELDS = (
    "line", "firm_id", "firm_name", "sector", "year", "date", "reason", "reason_raw", "executive",
    "age", "tenure", "interim", "notes", "raw",
)

departures = Table(
    "departures", metadata,
    Column("id", Integer, primary_key=True),
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("line", Integer, nullable=False),
    Column("firm_id", String, nullable=False),
    Column("firm_name", String),
    Column("sector", String),
    Column("year", Integer, nullable=False),
    Column("date", String),  # ISO date or NULL
    Column("reason", String, nullable=False),  # the code as shown: its most frequent spelling in the roster
    Column("reason_raw", String),  # this row's own spelling of the code, as in the file
    Column("executive", String),
    Column("age", Float),
    Column("tenure", Float),
    Column("interim", Boolean),
    Column("notes", Text),
    Column("raw", Text, nullable=False),  # the original row as JSON, for provenance
)

rejected_rows = Table(
    "rejected_rows", metadata,
    Column("id", Integer, primary_key=True),
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("line", Integer, nullable=False),
    Column("raw", Text, nullable=False),
    Column("reason", Text, nullable=False),
)

mappings = Table(
    "mappings", metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String, nullable=False, unique=True),
    Column("created_at", String, nullable=False),
)

mapping_versions = Table(
    "mapping_versions", metadata,
    Column("id", Integer, primary_key=True),
    Column("mapping_id", Integer, ForeignKey("mappings.id", ondelete="CASCADE"), nullable=False),
    Column("version", Integer, nullable=False),
    Column("created_at", String, nullable=False),
    Column("author", String, nullable=False),
    Column("note", Text, nullable=False),
    UniqueConstraint("mapping_id", "version"),
)

mapping_entries = Table(
    "mapping_entries", metadata,
    Column("version_id", Integer, ForeignKey("mapping_versions.id", ondelete="CASCADE"), nullable=False,
           index=True),
    Column("code", String, nullable=False),
    Column("category", String, nullable=False),
    Column("label", String, nullable=False, default=""),
    UniqueConstraint("version_id", "code"),
)

roster_settings = Table(
    "roster_settings", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), primary_key=True),
    Column("mapping_name", String),
    Column("window_from", Integer),
    Column("window_to", Integer),
)

runs = Table(
    "runs", metadata,
    Column("id", Integer, primary_key=True),
    Column("kind", String, nullable=False),
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("status", String, nullable=False),
    Column("created_at", String, nullable=False),
    Column("started_at", String),
    Column("finished_at", String),
    Column("mapping_name", String),
    Column("mapping_version", Integer),
    Column("window_from", Integer),
    Column("window_to", Integer),
    Column("params", Text, nullable=False),  # JSON: model, unit, B, seed, ...
    Column("fingerprint", String, nullable=False),
    Column("progress_done", Integer, nullable=False, default=0),
    Column("progress_total", Integer, nullable=False, default=0),
    Column("cancel_requested", Boolean, nullable=False, default=False),
    Column("result", Text),  # JSON
    Column("error", Text),
    Column("seconds", Float),
)

run_replicates = Table(
    "run_replicates", metadata,
    Column("run_id", Integer, ForeignKey("runs.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("seq", Integer, nullable=False),
    Column("count", Integer, nullable=False),
    Column("data", LargeBinary, nullable=False),  # zlib-compressed float64 replicates (NaN = failed)
    Column("failures", LargeBinary, nullable=False),  # zlib-compressed, one reason per line ("" = ok)
    UniqueConstraint("run_id", "seq"),
)

# A universe: which firms were in the index in which fiscal years (the denominator of a rate). Each import
# (or derivation from the roster) is a new universe with a new id; a roster's current one is its latest.
universes = Table(
    "universes", metadata,
    Column("id", Integer, primary_key=True),
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("source", String, nullable=False),  # "file" or "derived" (an approximation from the roster)
    Column("source_name", String, nullable=False),
    Column("sha256", String(64), nullable=False),
    Column("fingerprint", String, nullable=False),  # sha256 of the sorted firm-years
    Column("imported_at", String, nullable=False),
    Column("shape", String, nullable=False),  # "firm_years" or "spans"
    Column("rows_total", Integer, nullable=False),
    Column("rejected", Integer, nullable=False),
    Column("firms", Integer, nullable=False),
    Column("firm_years", Integer, nullable=False),
    Column("columns", Text, nullable=False),  # JSON: role -> header used
)

universe_firm_years = Table(
    "universe_firm_years", metadata,
    Column("universe_id", Integer, ForeignKey("universes.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("firm_id", String, nullable=False),
    Column("year", Integer, nullable=False),
    UniqueConstraint("universe_id", "firm_id", "year"),
)

universe_rejected = Table(
    "universe_rejected", metadata,
    Column("id", Integer, primary_key=True),
    Column("universe_id", Integer, ForeignKey("universes.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("line", Integer, nullable=False),
    Column("raw", Text, nullable=False),
    Column("reason", Text, nullable=False),
)

# The cell store (issue 13). Counts per (year, sector, reason code) do not depend on the mapping (a mapping
# only says which category a code counts as), so they are computed once when a roster is imported and every
# page reads them instead of the records. ``sector`` keeps the record's value (NULL when missing).
roster_cells = Table(
    "roster_cells", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("year", Integer, nullable=False),
    Column("sector", String),
    Column("reason", String, nullable=False),
    Column("departures", Integer, nullable=False),
)

# The same counts per firm: what a firm bootstrap (and the roster's firm counts) needs; read by jobs, not pages.
roster_firm_cells = Table(
    "roster_firm_cells", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("firm_id", String, nullable=False),
    Column("year", Integer, nullable=False),
    Column("sector", String),
    Column("reason", String, nullable=False),
    Column("departures", Integer, nullable=False),
)

#: fill both cell tables from ``departures`` for every roster that has none yet (used by the migration, by
#: ``save_import`` for the roster it stores, and to repair a roster stored by an older version)
FILL_ROSTER_CELLS = (
    "INSERT INTO roster_cells (roster_id, year, sector, reason, departures) "
    "SELECT roster_id, year, sector, reason, COUNT(*) FROM departures "
    "WHERE roster_id NOT IN (SELECT DISTINCT roster_id FROM roster_cells) "
    "GROUP BY roster_id, year, sector, reason"
)
FILL_ROSTER_FIRM_CELLS = (
    "INSERT INTO roster_firm_cells (roster_id, firm_id, year, sector, reason, departures) "
    "SELECT roster_id, firm_id, year, sector, reason, COUNT(*) FROM departures "
    "WHERE roster_id NOT IN (SELECT DISTINCT roster_id FROM roster_firm_cells) "
    "GROUP BY roster_id, firm_id, year, sector, reason"
)

#: ordered schema migrations; index i+1 is the version after applying MIGRATIONS[i].
MIGRATIONS: list[str] = [
    # 2: each departure keeps its raw spelling of the reason code beside the shown code (one code per spelling)
    "ALTER TABLE departures ADD COLUMN reason_raw VARCHAR",
    # 3: rows stored before version 2 were imported spelling by spelling, so the raw spelling is the code
    "UPDATE departures SET reason_raw = reason WHERE reason_raw IS NULL",
    # 4-9: universes of firm-years
    "CREATE TABLE IF NOT EXISTS universes (id INTEGER NOT NULL PRIMARY KEY, roster_id INTEGER NOT NULL "
    "REFERENCES rosters (id) ON DELETE CASCADE, source VARCHAR NOT NULL, source_name VARCHAR NOT NULL, "
    "sha256 VARCHAR(64) NOT NULL, fingerprint VARCHAR NOT NULL, imported_at VARCHAR NOT NULL, "
    "shape VARCHAR NOT NULL, rows_total INTEGER NOT NULL, rejected INTEGER NOT NULL, firms INTEGER NOT NULL, "
    "firm_years INTEGER NOT NULL, columns TEXT NOT NULL)",
    "CREATE INDEX IF NOT EXISTS ix_universes_roster_id ON universes (roster_id)",
    "CREATE TABLE IF NOT EXISTS universe_firm_years (universe_id INTEGER NOT NULL REFERENCES universes (id) "
    "ON DELETE CASCADE, firm_id VARCHAR NOT NULL, year INTEGER NOT NULL, UNIQUE (universe_id, firm_id, year))",
    "CREATE INDEX IF NOT EXISTS ix_universe_firm_years_universe_id ON universe_firm_years (universe_id)",
    "CREATE TABLE IF NOT EXISTS universe_rejected (id INTEGER NOT NULL PRIMARY KEY, universe_id INTEGER NOT "
    "NULL REFERENCES universes (id) ON DELETE CASCADE, line INTEGER NOT NULL, raw TEXT NOT NULL, "
    "reason TEXT NOT NULL)",
    "CREATE INDEX IF NOT EXISTS ix_universe_rejected_universe_id ON universe_rejected (universe_id)",
    # 10-15: the cell store, filled for the rosters already stored
    "CREATE TABLE IF NOT EXISTS roster_cells (roster_id INTEGER NOT NULL REFERENCES rosters (id) "
    "ON DELETE CASCADE, year INTEGER NOT NULL, sector VARCHAR, reason VARCHAR NOT NULL, "
    "departures INTEGER NOT NULL)",
    "CREATE INDEX IF NOT EXISTS ix_roster_cells_roster_id ON roster_cells (roster_id)",
    "CREATE TABLE IF NOT EXISTS roster_firm_cells (roster_id INTEGER NOT NULL REFERENCES rosters (id) "
    "ON DELETE CASCADE, firm_id VARCHAR NOT NULL, year INTEGER NOT NULL, sector VARCHAR, "
    "reason VARCHAR NOT NULL, departures INTEGER NOT NULL)",
    "CREATE INDEX IF NOT EXISTS ix_roster_firm_cells_roster_id ON roster_firm_cells (roster_id)",
    FILL_ROSTER_CELLS,
    FILL_ROSTER_FIRM_CELLS,
]
SCHEMA_VERSION = 1 + len(MIGRATIONS)
