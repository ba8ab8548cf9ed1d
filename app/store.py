"""The one gateway to the database: every SQL statement of Helmshift lives here.

SQLAlchemy 2.0 Core over SQLite by default (any SQLAlchemy URL works). Functions return frozen
dataclasses or pandas DataFrames, never live ORM objects. Schema changes go through the numbered
``MIGRATIONS`` list, recorded in ``schema_version``.
"""

from __future__ import annotations

import json
import zlib
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, cast

import numpy as np
import pandas as pd
from sqlalchemy import (
    Boolean,
    Column,
    Connection,
    Engine,
    Float,
    ForeignKey,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
    create_engine,
    delete,
    event,
    func,
    insert,
    select,
    text,
    update,
)
from sqlalchemy.schema import CreateIndex, CreateTable

from app.types import CATEGORIES, Category, RunKind, RunStatus

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
    sqlite_autoincrement=True,  # ids a URL or export names are never handed out again (migration 2)
)

DEPARTURE_FIELDS = (
    "line", "firm_id", "firm_name", "sector", "year", "date", "reason", "executive",
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
    Column("reason", String, nullable=False),
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
    sqlite_autoincrement=True,
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
    sqlite_autoincrement=True,
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
    sqlite_autoincrement=True,
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

#: tables whose ids a URL, a run or an export names (issue 11): never reuse an id
NEVER_REUSED = (rosters, mappings, mapping_versions, runs)


def _rebuild_with_unique_ids(engine: Engine, version: int) -> None:
    """Migration 2: rebuild ``NEVER_REUSED`` with AUTOINCREMENT and runs without the cascade, keeping data.

    SQLite cannot add AUTOINCREMENT or drop a foreign key in place, so each table is rebuilt the way the
    SQLite manual prescribes ("Making Other Kinds Of Table Schema Changes"): foreign keys off (only possible
    outside a transaction), then in one transaction create, copy, drop, rename, re-index, check the keys.
    Other backends (PostgreSQL sequences never reuse ids) need nothing but the version record.
    """
    if engine.dialect.name != "sqlite":
        with engine.begin() as conn:
            conn.execute(insert(schema_version).values(version=version))
        return
    raw = engine.raw_connection()
    dbapi: Any = raw.driver_connection
    saved = dbapi.isolation_level
    dbapi.isolation_level = None  # we issue BEGIN / COMMIT ourselves
    cur = dbapi.cursor()
    try:
        cur.execute("PRAGMA foreign_keys=OFF")
        cur.execute("BEGIN IMMEDIATE")
        try:
            if cur.execute("SELECT max(version) FROM schema_version").fetchone()[0] < version:
                for table in NEVER_REUSED:
                    ddl = str(CreateTable(table).compile(dialect=engine.dialect))
                    cur.execute(ddl.replace(f"CREATE TABLE {table.name} ", f"CREATE TABLE _new_{table.name} ", 1))
                    cols = ", ".join(f'"{c.name}"' for c in table.columns)
                    cur.execute(f"INSERT INTO _new_{table.name} ({cols}) SELECT {cols} FROM {table.name}")
                    cur.execute(f"DROP TABLE {table.name}")
                    cur.execute(f"ALTER TABLE _new_{table.name} RENAME TO {table.name}")
                    for index in table.indexes:
                        cur.execute(str(CreateIndex(index).compile(dialect=engine.dialect)))
                broken = cur.execute("PRAGMA foreign_key_check").fetchall()
                if broken:
                    raise StoreError(f"The database has rows pointing at missing rows ({broken[:3]}); "
                                     "it was not upgraded.")
                cur.execute("INSERT INTO schema_version (version) VALUES (?)", (version,))
            cur.execute("COMMIT")
        except BaseException:
            cur.execute("ROLLBACK")
            raise
    finally:
        cur.execute("PRAGMA foreign_keys=ON")
        cur.close()
        dbapi.isolation_level = saved
        raw.close()


#: ordered schema migrations; index i+1 is the version after applying MIGRATIONS[i].
#: Version 1 is the ``metadata.create_all`` above; later changes append SQL here, or a function
#: ``(engine, version)`` that applies the change and records ``version`` in one transaction.
MIGRATIONS: list[str | Callable[[Engine, int], None]] = [_rebuild_with_unique_ids]
SCHEMA_VERSION = 1 + len(MIGRATIONS)


class StoreError(ValueError):
    """A request the store cannot satisfy (unknown roster, duplicate name, ...)."""


MAX_ID = 2**63 - 1  # SQLite INTEGER range; larger ids cannot exist and must not reach the driver


def now_iso() -> str:
    return datetime.now(UTC).replace(microsecond=0).isoformat()


@dataclass(frozen=True)
class Roster:
    id: int
    name: str
    source_name: str
    sha256: str
    imported_at: str
    rows_total: int
    accepted: int
    rejected: int
    duplicates: int
    columns: dict[str, str]


@dataclass(frozen=True)
class RejectedRow:
    line: int
    raw: str
    reason: str


@dataclass(frozen=True)
class MappingVersion:
    """One saved version of a named mapping: code -> (category, label)."""

    name: str
    version: int
    created_at: str
    author: str
    note: str
    categories: dict[str, Category]
    labels: dict[str, str]


@dataclass(frozen=True)
class RosterSettings:
    roster_id: int
    mapping_name: str | None
    window: tuple[int, int] | None


@dataclass(frozen=True)
class Run:
    id: int
    kind: RunKind
    roster_id: int
    status: RunStatus
    created_at: str
    started_at: str | None
    finished_at: str | None
    mapping_name: str | None
    mapping_version: int | None
    window: tuple[int, int] | None
    params: dict[str, Any]
    fingerprint: str
    progress_done: int
    progress_total: int
    cancel_requested: bool
    result: dict[str, Any] | None
    error: str | None
    seconds: float | None


def _sqlite_pragmas(dbapi_conn: Any, _record: Any) -> None:
    cur = dbapi_conn.cursor()
    cur.execute("PRAGMA journal_mode=WAL")
    cur.execute("PRAGMA busy_timeout=30000")
    cur.execute("PRAGMA foreign_keys=ON")
    cur.execute("PRAGMA synchronous=NORMAL")
    cur.close()


class Store:
    """Owns the engine; every read and write of Helmshift goes through one of its methods."""

    def __init__(self, url: str) -> None:
        self.url = url
        is_sqlite = url.startswith("sqlite")
        kwargs: dict[str, Any] = {}
        if is_sqlite:
            kwargs["connect_args"] = {"check_same_thread": False, "timeout": 30}
        self.engine: Engine = create_engine(url, **kwargs)
        if is_sqlite:
            event.listen(self.engine, "connect", _sqlite_pragmas)
        self._migrate()

    # -- schema --------------------------------------------------------------------------------
    def _migrate(self) -> None:
        with self.engine.begin() as conn:
            metadata.create_all(conn)
            current = conn.execute(select(func.max(schema_version.c.version))).scalar()
            if current is None:
                conn.execute(insert(schema_version).values(version=SCHEMA_VERSION))
                return
        for i in range(current - 1, len(MIGRATIONS)):
            step = MIGRATIONS[i]
            if callable(step):
                step(self.engine, i + 2)
                continue
            with self.engine.begin() as conn:
                conn.execute(text(step))
                conn.execute(insert(schema_version).values(version=i + 2))

    def schema_version(self) -> int:
        with self.engine.connect() as conn:
            return int(conn.execute(select(func.max(schema_version.c.version))).scalar_one())

    def integrity_check(self) -> str:
        with self.engine.connect() as conn:
            return str(conn.execute(text("PRAGMA integrity_check")).scalar_one())

    @contextmanager
    def _tx(self) -> Iterator[Connection]:
        with self.engine.begin() as conn:
            yield conn

    def dispose(self) -> None:
        self.engine.dispose()

    # -- rosters -------------------------------------------------------------------------------
    def save_import(
        self,
        *,
        name: str,
        source_name: str,
        sha256: str,
        rows_total: int,
        duplicates: int,
        columns: Mapping[str, str],
        records: pd.DataFrame,
        rejected: Sequence[RejectedRow],
    ) -> Roster:
        """Store one roster with all its accepted and rejected rows in a single transaction.

        ``records`` has the columns of ``DEPARTURE_FIELDS``. Either everything lands or nothing does.
        """
        missing = [c for c in DEPARTURE_FIELDS if c not in records.columns]
        if missing:
            raise StoreError(f"records lack columns {missing}")
        with self._tx() as conn:
            if conn.execute(select(rosters.c.id).where(rosters.c.name == name)).first():
                raise StoreError(f"A roster named {name!r} already exists; choose another name.")
            roster_id = conn.execute(
                insert(rosters).values(
                    name=name, source_name=source_name, sha256=sha256, imported_at=now_iso(),
                    rows_total=rows_total, accepted=len(records), rejected=len(rejected),
                    duplicates=duplicates, columns=json.dumps(dict(columns)),
                )
            ).inserted_primary_key[0]  # type: ignore[index]
            if len(records):
                frame = records.loc[:, list(DEPARTURE_FIELDS)].astype(object)
                frame = frame.where(pd.notna(frame), None)
                frame.insert(0, "roster_id", roster_id)
                self._bulk_insert(conn, departures, frame)
            if rejected:
                conn.execute(
                    insert(rejected_rows),
                    [{"roster_id": roster_id, "line": r.line, "raw": r.raw, "reason": r.reason}
                     for r in rejected],
                )
            conn.execute(insert(roster_settings).values(roster_id=roster_id))
        return self.get_roster(int(roster_id))

    @staticmethod
    def _bulk_insert(conn: Connection, table: Table, frame: pd.DataFrame) -> None:
        """Insert many rows inside the caller's transaction.

        SQLAlchemy's per-row parameter processing costs ~3x the insert itself on 100,000 rows, so for
        positional DBAPI parameter styles the rows go to ``executemany`` as plain tuples.
        """
        marker = {"qmark": "?", "format": "%s", "pyformat": "%s"}.get(conn.dialect.paramstyle)
        if marker is None:
            conn.execute(insert(table), cast(list[dict[str, Any]], frame.to_dict("records")))
            return
        columns = ", ".join(frame.columns)
        sql = f"INSERT INTO {table.name} ({columns}) VALUES ({', '.join([marker] * len(frame.columns))})"
        conn.exec_driver_sql(sql, list(frame.itertuples(index=False, name=None)))

    def _roster_from_row(self, row: Any) -> Roster:
        m = row._mapping
        return Roster(
            id=m["id"], name=m["name"], source_name=m["source_name"], sha256=m["sha256"],
            imported_at=m["imported_at"], rows_total=m["rows_total"], accepted=m["accepted"],
            rejected=m["rejected"], duplicates=m["duplicates"], columns=json.loads(m["columns"]),
        )

    def list_rosters(self) -> list[Roster]:
        with self.engine.connect() as conn:
            return [self._roster_from_row(r) for r in conn.execute(select(rosters).order_by(rosters.c.id))]

    def get_roster(self, ref: int | str) -> Roster:
        """Find a roster by id or by name; raise ``StoreError`` naming what was asked for."""
        with self.engine.connect() as conn:
            row = None
            numeric = isinstance(ref, int) or (isinstance(ref, str) and ref.isdigit())
            if numeric and 0 < int(ref) <= MAX_ID:
                row = conn.execute(select(rosters).where(rosters.c.id == int(ref))).first()
            if row is None:
                row = conn.execute(select(rosters).where(rosters.c.name == str(ref))).first()
        if row is None:
            names = [r.name for r in self.list_rosters()]
            known = f"stored rosters: {', '.join(repr(n) for n in names[:10])}" if names else "no roster is stored yet"
            raise StoreError(f"No roster called {ref!r}; {known}.")
        return self._roster_from_row(row)

    def find_roster_by_sha(self, sha256: str) -> Roster | None:
        with self.engine.connect() as conn:
            row = conn.execute(select(rosters).where(rosters.c.sha256 == sha256)).first()
        return None if row is None else self._roster_from_row(row)

    def roster_name_taken(self, name: str) -> bool:
        with self.engine.connect() as conn:
            return conn.execute(select(rosters.c.id).where(rosters.c.name == name)).first() is not None

    def delete_roster(self, roster_id: int) -> None:
        """Delete a roster with its rows and settings; its runs stay (readable as "roster deleted"),
        and the ones still queued or running are asked to stop."""
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.roster_id == roster_id, runs.c.status.in_(("queued", "running")))
                         .values(cancel_requested=True))
            conn.execute(delete(rosters).where(rosters.c.id == roster_id))

    def departures(self, roster_id: int, *, with_raw: bool = False) -> pd.DataFrame:
        """All accepted departures of a roster, one row each, in source-line order."""
        cols = [departures.c[f] for f in DEPARTURE_FIELDS if with_raw or f != "raw"]
        with self.engine.connect() as conn:
            result = conn.execute(
                select(departures.c.id, *cols).where(departures.c.roster_id == roster_id)
                .order_by(departures.c.line)
            )
            frame = pd.DataFrame(result.fetchall(), columns=list(result.keys()))
        frame["year"] = frame["year"].astype("int64")
        for c in ("age", "tenure"):
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype("float64")
        return frame

    def rejected(self, roster_id: int) -> list[RejectedRow]:
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(rejected_rows.c.line, rejected_rows.c.raw, rejected_rows.c.reason)
                .where(rejected_rows.c.roster_id == roster_id).order_by(rejected_rows.c.line)
            )
            return [RejectedRow(line=r.line, raw=r.raw, reason=r.reason) for r in rows]

    def reason_counts(self, roster_id: int) -> pd.DataFrame:
        """Reason code, departures with it, first and last year seen."""
        with self.engine.connect() as conn:
            result = conn.execute(
                select(
                    departures.c.reason.label("code"), func.count().label("count"),
                    func.min(departures.c.year).label("first_year"),
                    func.max(departures.c.year).label("last_year"),
                )
                .where(departures.c.roster_id == roster_id)
                .group_by(departures.c.reason).order_by(func.count().desc(), departures.c.reason)
            )
            return pd.DataFrame(result.fetchall(), columns=list(result.keys()))

    # -- roster settings -----------------------------------------------------------------------
    def settings(self, roster_id: int) -> RosterSettings:
        with self.engine.connect() as conn:
            row = conn.execute(select(roster_settings).where(roster_settings.c.roster_id == roster_id)).first()
        if row is None:
            return RosterSettings(roster_id, None, None)
        window = None
        if row.window_from is not None and row.window_to is not None:
            window = (int(row.window_from), int(row.window_to))
        return RosterSettings(roster_id, row.mapping_name, window)

    def update_settings(
        self, roster_id: int, *, mapping_name: str | None = None,
        window: tuple[int, int] | None = None, clear_window: bool = False,
    ) -> RosterSettings:
        values: dict[str, Any] = {}
        if mapping_name is not None:
            values["mapping_name"] = mapping_name
        if window is not None:
            values["window_from"], values["window_to"] = window
        if clear_window:
            values["window_from"] = values["window_to"] = None
        with self._tx() as conn:
            exists = conn.execute(
                select(roster_settings.c.roster_id).where(roster_settings.c.roster_id == roster_id)
            ).first()
            if exists is None:
                conn.execute(insert(roster_settings).values(roster_id=roster_id, **values))
            elif values:
                conn.execute(update(roster_settings).where(roster_settings.c.roster_id == roster_id)
                             .values(**values))
        return self.settings(roster_id)

    # -- mappings ------------------------------------------------------------------------------
    def save_mapping_version(
        self,
        name: str,
        categories: Mapping[str, str],
        labels: Mapping[str, str] | None = None,
        *,
        author: str = "analyst",
        note: str = "",
    ) -> MappingVersion:
        """Save ``categories`` (code -> category) as the next version of mapping ``name``."""
        bad = sorted({c for c in categories.values() if c not in CATEGORIES})
        if bad:
            raise StoreError(f"Unknown categories {bad}; allowed: {', '.join(CATEGORIES)}.")
        labels = labels or {}
        with self._tx() as conn:
            row = conn.execute(select(mappings.c.id).where(mappings.c.name == name)).first()
            mapping_id = row.id if row else conn.execute(
                insert(mappings).values(name=name, created_at=now_iso())
            ).inserted_primary_key[0]  # type: ignore[index]
            last = conn.execute(
                select(func.max(mapping_versions.c.version)).where(mapping_versions.c.mapping_id == mapping_id)
            ).scalar()
            version = (last or 0) + 1
            version_id = conn.execute(
                insert(mapping_versions).values(
                    mapping_id=mapping_id, version=version, created_at=now_iso(), author=author, note=note,
                )
            ).inserted_primary_key[0]  # type: ignore[index]
            if categories:
                conn.execute(insert(mapping_entries), [
                    {"version_id": version_id, "code": code, "category": cat, "label": labels.get(code, "")}
                    for code, cat in categories.items()
                ])
        return self.get_mapping(name, version)

    def list_mappings(self) -> list[tuple[str, int]]:
        """Every mapping name with its latest version number."""
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(mappings.c.name, func.max(mapping_versions.c.version))
                .join(mapping_versions, mapping_versions.c.mapping_id == mappings.c.id)
                .group_by(mappings.c.name).order_by(mappings.c.name)
            )
            return [(r[0], int(r[1])) for r in rows]

    def mapping_history(self, name: str) -> list[tuple[int, str, str, str]]:
        """(version, created_at, author, note) for each version of a mapping, oldest first."""
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(mapping_versions.c.version, mapping_versions.c.created_at,
                       mapping_versions.c.author, mapping_versions.c.note)
                .join(mappings, mapping_versions.c.mapping_id == mappings.c.id)
                .where(mappings.c.name == name).order_by(mapping_versions.c.version)
            )
            return [(int(r[0]), r[1], r[2], r[3]) for r in rows]

    def get_mapping(self, name: str, version: int | None = None) -> MappingVersion:
        """A version of a mapping (the latest when ``version`` is None)."""
        if version is not None and not 0 < version <= MAX_ID:
            raise StoreError(f"No version {version} of mapping {name!r} is stored.")
        with self.engine.connect() as conn:
            q = (select(mapping_versions).join(mappings, mapping_versions.c.mapping_id == mappings.c.id)
                 .where(mappings.c.name == name))
            q = (q.where(mapping_versions.c.version == version) if version is not None
                 else q.order_by(mapping_versions.c.version.desc()).limit(1))
            row = conn.execute(q).first()
            if row is None:
                what = f"version {version} of mapping {name!r}" if version is not None else f"mapping {name!r}"
                raise StoreError(f"No {what} is stored.")
            entries = conn.execute(
                select(mapping_entries.c.code, mapping_entries.c.category, mapping_entries.c.label)
                .where(mapping_entries.c.version_id == row.id).order_by(mapping_entries.c.code)
            ).fetchall()
        return MappingVersion(
            name=name, version=int(row.version), created_at=row.created_at, author=row.author,
            note=row.note, categories={e.code: e.category for e in entries},
            labels={e.code: e.label for e in entries if e.label},
        )

    # -- runs ----------------------------------------------------------------------------------
    def create_run(
        self, *, kind: RunKind, roster_id: int, params: Mapping[str, Any], fingerprint: str,
        mapping_name: str | None, mapping_version: int | None, window: tuple[int, int] | None,
        status: RunStatus = "queued", progress_total: int = 0,
    ) -> int:
        with self._tx() as conn:
            return int(conn.execute(insert(runs).values(
                kind=kind, roster_id=roster_id, status=status, created_at=now_iso(),
                mapping_name=mapping_name, mapping_version=mapping_version,
                window_from=window[0] if window else None, window_to=window[1] if window else None,
                params=json.dumps(dict(params)), fingerprint=fingerprint, progress_done=0,
                progress_total=progress_total, cancel_requested=False,
            )).inserted_primary_key[0])  # type: ignore[index]

    def _run_from_row(self, row: Any) -> Run:
        m = row._mapping
        window = (m["window_from"], m["window_to"]) if m["window_from"] is not None else None
        return Run(
            id=m["id"], kind=m["kind"], roster_id=m["roster_id"], status=m["status"],
            created_at=m["created_at"], started_at=m["started_at"], finished_at=m["finished_at"],
            mapping_name=m["mapping_name"], mapping_version=m["mapping_version"], window=window,
            params=json.loads(m["params"]), fingerprint=m["fingerprint"],
            progress_done=m["progress_done"], progress_total=m["progress_total"],
            cancel_requested=bool(m["cancel_requested"]),
            result=json.loads(m["result"]) if m["result"] else None, error=m["error"], seconds=m["seconds"],
        )

    def get_run(self, run_id: int) -> Run:
        if not 0 < run_id <= MAX_ID:
            raise StoreError(f"No run number {run_id} is stored.")
        with self.engine.connect() as conn:
            row = conn.execute(select(runs).where(runs.c.id == run_id)).first()
        if row is None:
            raise StoreError(f"No run number {run_id} is stored.")
        return self._run_from_row(row)

    def list_runs(self, roster_id: int | None = None, kind: RunKind | None = None) -> list[Run]:
        q = select(runs).order_by(runs.c.id.desc())
        if roster_id is not None:
            q = q.where(runs.c.roster_id == roster_id)
        if kind is not None:
            q = q.where(runs.c.kind == kind)
        with self.engine.connect() as conn:
            return [self._run_from_row(r) for r in conn.execute(q)]

    def set_run_status(self, run_id: int, status: RunStatus, *, error: str | None = None) -> None:
        values: dict[str, Any] = {"status": status}
        if status == "running":
            values["started_at"] = now_iso()
        if status in ("done", "failed", "cancelled", "interrupted"):
            values["finished_at"] = now_iso()
        if error is not None:
            values["error"] = error
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(**values))

    def set_run_progress(self, run_id: int, done: int, total: int | None = None) -> None:
        values: dict[str, Any] = {"progress_done": done}
        if total is not None:
            values["progress_total"] = total
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(**values))

    def finish_run(self, run_id: int, result: Mapping[str, Any], *, seconds: float,
                   status: RunStatus = "done") -> None:
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(
                status=status, result=json.dumps(dict(result)), seconds=seconds, finished_at=now_iso(),
            ))

    def update_run_params(self, run_id: int, params: Mapping[str, Any], *, status: RunStatus) -> None:
        """Change a run's parameters (extending B) and its status, keeping its stored replicates."""
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(
                params=json.dumps(dict(params)), status=status, cancel_requested=False, error=None,
                progress_total=int(params.get("resamples", 0)), finished_at=None,
            ))

    def request_cancel(self, run_id: int) -> None:
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(cancel_requested=True))

    def cancel_requested(self, run_id: int) -> bool:
        with self.engine.connect() as conn:
            return bool(conn.execute(select(runs.c.cancel_requested).where(runs.c.id == run_id)).scalar())

    def mark_interrupted(self) -> list[int]:
        """Mark every run left queued or running (by a crash or a stop) as interrupted."""
        with self._tx() as conn:
            ids = [r[0] for r in conn.execute(
                select(runs.c.id).where(runs.c.status.in_(("queued", "running"))))]
            if ids:
                conn.execute(update(runs).where(runs.c.id.in_(ids)).values(
                    status="interrupted", finished_at=now_iso(),
                    error="The server stopped while this run was in progress; start it again to finish it.",
                ))
        return ids

    def append_replicates(self, run_id: int, values: np.ndarray, failures: Sequence[str] | None = None) -> None:
        """Append a block of replicate estimates (float64) and their failure reasons to a run, compressed."""
        data = zlib.compress(np.ascontiguousarray(values, dtype="<f8").tobytes(), 6)
        reasons = list(failures) if failures is not None else [""] * len(values)
        if len(reasons) != len(values):
            raise StoreError("one failure reason per replicate is needed")
        packed = zlib.compress("\n".join(str(r) for r in reasons).encode(), 6)
        with self._tx() as conn:
            seq = conn.execute(
                select(func.coalesce(func.max(run_replicates.c.seq), -1)).where(run_replicates.c.run_id == run_id)
            ).scalar_one() + 1
            conn.execute(insert(run_replicates).values(run_id=run_id, seq=seq, count=len(values), data=data,
                                                       failures=packed))

    def replicates(self, run_id: int) -> np.ndarray:
        """All stored replicate estimates of a run, in resample order."""
        return self.replicates_with_failures(run_id)[0]

    def replicates_with_failures(self, run_id: int) -> tuple[np.ndarray, np.ndarray]:
        """(estimates, failure reasons) of a run, in resample order; reason "" means the fit worked."""
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(run_replicates.c.data, run_replicates.c.failures, run_replicates.c.count)
                .where(run_replicates.c.run_id == run_id).order_by(run_replicates.c.seq)).fetchall()
        if not rows:
            return np.empty(0), np.empty(0, dtype=object)
        values = np.concatenate([np.frombuffer(zlib.decompress(r[0]), dtype="<f8") for r in rows])
        reasons: list[str] = []
        for r in rows:
            part = zlib.decompress(r[1]).decode().split("\n")
            reasons.extend(part if r[2] else [])
        return values, np.array(reasons, dtype=object)

    def counts(self) -> dict[str, int]:
        """Row counts of the main tables (for health checks and tests of all-or-nothing writes)."""
        tables: Iterable[Table] = (rosters, departures, rejected_rows, mappings, mapping_versions, runs)
        with self.engine.connect() as conn:
            return {t.name: int(conn.execute(select(func.count()).select_from(t)).scalar_one()) for t in tables}
