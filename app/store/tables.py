"""Table definitions of the store (SQLAlchemy Core metadata) and the schema revision they correspond to.

Team mode's tables live in :mod:`app.store.team_tables` (imported below); both declare on
:mod:`app.store.schema`'s metadata.

A fresh database is created from these definitions and stamped ``HEAD_REVISION``; an existing database is
brought up to it by the Alembic revisions in :mod:`app.store.migrations`. Change a table here and add a
revision there, in the same commit.
"""

from __future__ import annotations

from sqlalchemy import (
    Boolean,
    Column,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    Table,
    Text,
    UniqueConstraint,
    text,
)

from app.store.schema import metadata

# the team-mode tables are declared in their own module on the same metadata and imported here, so this
# module's metadata always holds every table (and the team tables can still be imported from here)
from app.store.team_tables import accounts, api_tokens, app_secrets, audit_events  # noqa: F401

#: the newest revision in app/store/migrations/versions (tests/test_store_migrations.py checks they agree)
HEAD_REVISION = "0017"

#: Alembic's own bookkeeping table, declared so that a fresh database is created and stamped in one go
alembic_version = Table("alembic_version", metadata, Column("version_num", String(32), primary_key=True))

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
    # the newest version (issue 14): the columns above describe it; every version is in roster_versions
    Column("version", Integer, nullable=False, server_default="1"),
    sqlite_autoincrement=True,  # ids a URL, a run or an export names are never handed out again
)

# Each import into a roster is a new version of it (a refresh: next week's file for the same roster). A version
# is a set of departure rows (``departures.version``); every version stays stored, so a run made on version 1
# reopens on exactly its rows after version 2 arrives.
roster_versions = Table(
    "roster_versions", metadata,
    Column("id", Integer, primary_key=True),
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("version", Integer, nullable=False),
    Column("source_name", String, nullable=False),
    Column("sha256", String(64), nullable=False, index=True),
    Column("imported_at", String, nullable=False),
    Column("rows_total", Integer, nullable=False),
    Column("accepted", Integer, nullable=False),
    Column("rejected", Integer, nullable=False),
    Column("duplicates", Integer, nullable=False),
    Column("columns", Text, nullable=False),  # JSON: role -> header used
    Column("author", String),
    UniqueConstraint("roster_id", "version"),
    sqlite_autoincrement=True,  # ids a URL, a run or an export names are never handed out again
)

DEPARTURE_FIELDS = (
    "line", "firm_id", "firm_name", "sector", "year", "date", "reason", "reason_raw", "executive",
    "age", "tenure", "interim", "notes", "announced", "notice_days", "raw",
)

#: the stored columns of ``departures`` (``raw``, the row as the file had it, lives in ``departure_raw``)
STORED_FIELDS = tuple(f for f in DEPARTURE_FIELDS if f != "raw")

departures = Table(
    "departures", metadata,
    Column("id", Integer, primary_key=True),
    # no index of its own on roster_id: ix_departures_roster_version starts with it (one index less to keep
    # up on a 1,000,000-row import, revision 0016)
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False),
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
    Column("announced", String),  # ISO date (or year-month) the departure was announced, or NULL (issue 16)
    # exit date minus announcement date in whole days; NULL unless both are whole days and the announcement
    # is not after the exit (app/intake/announced.py)
    Column("notice_days", Integer),
    Column("version", Integer, nullable=False, server_default="1"),  # the roster version this row belongs to
    Index("ix_departures_roster_version", "roster_id", "version"),
    # the rows with no departure date only (partial): where the rows still in post are counted apart (a read of
    # these few index entries, not of the roster; benchmarks/bench_in_post.py)
    Index("ix_departures_undated", "roster_id", "version", "year", "reason",
          sqlite_where=text("date IS NULL"), postgresql_where=text("date IS NULL")),
)

# The original rows of a roster version as JSON (provenance), one row per insert batch of up to 50,000
# departures: zlib-compressed JSON holding the batch's source lines and either the file's header and the rows'
# cells column by column (an import) or each row's JSON text (rows moved here by revision 0016). A TEXT column
# per departure cost ~2.5 s of a 1,000,000-row import and ~250 MB of the file (app/store/raw_rows.py).
departure_raw = Table(
    "departure_raw", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False),
    Column("version", Integer, nullable=False),
    Column("seq", Integer, nullable=False),  # 0, 1, ... in source-line order
    Column("first_line", Integer, nullable=False),
    Column("rows", Integer, nullable=False),
    Column("data", LargeBinary, nullable=False),
    UniqueConstraint("roster_id", "version", "seq"),
)

rejected_rows = Table(
    "rejected_rows", metadata,
    Column("id", Integer, primary_key=True),
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("line", Integer, nullable=False),
    Column("raw", Text, nullable=False),
    Column("reason", Text, nullable=False),
    Column("version", Integer, nullable=False, server_default="1"),
)

mappings = Table(
    "mappings", metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String, nullable=False, unique=True),
    Column("created_at", String, nullable=False),
    sqlite_autoincrement=True,  # ids a URL, a run or an export names are never handed out again
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
    sqlite_autoincrement=True,  # ids a URL, a run or an export names are never handed out again
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

# Classification rules of a mapping version (issue 16): evaluated in ``position`` order, first match wins.
mapping_rules = Table(
    "mapping_rules", metadata,
    Column("version_id", Integer, ForeignKey("mapping_versions.id", ondelete="CASCADE"), nullable=False,
           index=True),
    Column("position", Integer, nullable=False),
    Column("code", String, nullable=False),
    Column("field", String, nullable=False),
    Column("comparison", String, nullable=False),
    Column("value", Integer, nullable=False),
    Column("category", String, nullable=False),
    UniqueConstraint("version_id", "position"),
)

# Case-level overrides of a mapping version (issue 15): one departure of one roster counted as ``category``
# whatever its code and the rules say. A saved version never changes: adding or removing an override saves the
# next version with the same codes, labels and rules. No foreign key to rosters: like runs, a version stays
# readable after its roster is deleted. The departure is named by its refresh identity (app/intake/refresh.py)
# so the override follows it into the roster's next version; ``departure_id`` is the record it was set on.
mapping_overrides = Table(
    "mapping_overrides", metadata,
    Column("version_id", Integer, ForeignKey("mapping_versions.id", ondelete="CASCADE"), nullable=False,
           index=True),
    Column("position", Integer, nullable=False),
    Column("roster_id", Integer, nullable=False),
    Column("firm_id", String, nullable=False),
    Column("executive", String),
    Column("year", Integer, nullable=False),
    Column("reason", String, nullable=False),
    Column("occurrence", Integer, nullable=False, server_default="0"),
    Column("departure_id", Integer),
    Column("roster_version", Integer),
    Column("category", String, nullable=False),
    Column("note", Text, nullable=False),
    Column("author", String, nullable=False),
    Column("created_at", String, nullable=False),
    UniqueConstraint("version_id", "position"),
)

roster_settings = Table(
    "roster_settings", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), primary_key=True),
    Column("mapping_name", String),
    Column("window_from", Integer),
    Column("window_to", Integer),
)

#: what the analyst signs a roster's brief and deck with (remembered per roster; blank fields: the defaults)
briefing_settings = Table(
    "briefing_settings", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), primary_key=True),
    Column("title", String, nullable=False),
    Column("author", String, nullable=False),
    Column("marking", String, nullable=False),
    Column("date", String, nullable=False),  # ISO date, or "" for the day of the export
    Column("takeaways", Text, nullable=False),  # JSON object: finding name -> the analyst's sentence
    Column("updated_at", String, nullable=False),
)

runs = Table(
    "runs", metadata,
    Column("id", Integer, primary_key=True),
    Column("kind", String, nullable=False),
    # no foreign key: a deleted roster's runs stay readable ("roster deleted"); roster ids are never reused
    Column("roster_id", Integer, nullable=False, index=True),
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
    Column("author", String),
    Column("roster_version", Integer),  # the roster version the run read (NULL: made before versions = 1)
    # jobs across server processes: the worker holding a running run, and the database clock (seconds since
    # 1970) of its last heartbeat; a stale heartbeat means the worker died (app/analysis/jobs.py)
    Column("claimed_by", String),
    Column("heartbeat_at", Float),
    sqlite_autoincrement=True,  # ids a URL, a run or an export names are never handed out again
)

run_replicates = Table(
    "run_replicates", metadata,
    Column("run_id", Integer, ForeignKey("runs.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("seq", Integer, nullable=False),
    Column("count", Integer, nullable=False),
    Column("data", LargeBinary, nullable=False),  # zlib-compressed float64 replicates (NaN = failed)
    Column("failures", LargeBinary, nullable=False),  # zlib-compressed, one reason per line ("" = ok)
    # zlib-compressed float64 standard error of each resample's statistic (studentized intervals); NULL
    # where the statistic has none or the chunk predates revision 0006
    Column("standard_errors", LargeBinary),
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


def CELL_DETAIL_COLUMNS() -> tuple[Column[int], ...]:  # noqa: N802 - reads as the constant it stands for
    """Age and tenure in completed years, the interim flag and the notice in days (NULL where the record has
    none): the cell key's detail, so classification rules and the adjusted trend need no record reads (issue 16)."""
    return (Column("age", Integer), Column("tenure", Integer), Column("interim", Boolean),
            Column("notice_days", Integer))


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
    Column("version", Integer, nullable=False, server_default="1"),
)

# The same counts with the executive's age and tenure (completed years) and interim flag in the key (issue 16):
# what classification rules and the age/tenure mix read. Kept apart from ``roster_cells``: on a large roster
# with spread-out ages this key has nearly one row per departure (benchmarks/bench_rules_adjusted.py), so only
# a mapping version with rules, and the mix diagnostic, pay for reading it.
roster_detail_cells = Table(
    "roster_detail_cells", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("year", Integer, nullable=False),
    Column("sector", String),
    Column("reason", String, nullable=False),
    *CELL_DETAIL_COLUMNS(),
    Column("departures", Integer, nullable=False),
    Column("version", Integer, nullable=False, server_default="1"),
)

# How each shown reason code was written in the file, with counts (the Reason codes page's spellings): kept
# with the cells so that no page groups the departures themselves.
roster_spellings = Table(
    "roster_spellings", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("version", Integer, nullable=False, server_default="1"),
    Column("reason", String, nullable=False),
    Column("spelling", String, nullable=False),
    Column("departures", Integer, nullable=False),
)

# The same counts per firm, with the detailed key: what a firm bootstrap, the adjusted trend's clustered
# standard errors (and the roster's firm counts) need; read by jobs and on request, not by pages.
roster_firm_cells = Table(
    "roster_firm_cells", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), nullable=False, index=True),
    Column("firm_id", String, nullable=False),
    Column("year", Integer, nullable=False),
    Column("sector", String),
    Column("reason", String, nullable=False),
    *CELL_DETAIL_COLUMNS(),
    Column("departures", Integer, nullable=False),
    Column("version", Integer, nullable=False, server_default="1"),
)

# Which roster versions have their detailed and firm cells (the two tables above with ~one row per departure on
# a large roster): built on first read, in a transaction of their own, not by the import (revision 0016,
# app/store/cells.py ``ensure_detail_cells``). The primary key makes two processes building at once harmless.
roster_cell_builds = Table(
    "roster_cell_builds", metadata,
    Column("roster_id", Integer, ForeignKey("rosters.id", ondelete="CASCADE"), primary_key=True),
    Column("version", Integer, primary_key=True),
    Column("built_at", String, nullable=False),
)

# Intake profiles (issue 14): how one source's files are read (column roles, header row, date reading,
# fiscal-year end), saved under a name; a later file with the same header set is offered its profile.
intake_profiles = Table(
    "intake_profiles", metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String, nullable=False, unique=True),
    Column("headers", Text, nullable=False),  # JSON: the file's header names, sorted (how a file is recognised)
    Column("roles", Text, nullable=False),  # JSON: role -> header
    Column("header_row", Integer),  # 1-based line or sheet row; NULL: found by scoring
    Column("date_order", String, nullable=False),  # auto, dmy or mdy
    Column("fy_end", Integer, nullable=False),  # month in which fiscal years end
    Column("created_at", String, nullable=False),
    Column("updated_at", String, nullable=False),
    sqlite_autoincrement=True,  # ids a URL, a run or an export names are never handed out again
)
