"""The database engine, SQLite's connection settings and schema migration: the base of every query mixin."""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, cast

import numpy as np
import pandas as pd
from sqlalchemy import (
    Connection,
    Engine,
    Table,
    create_engine,
    event,
    func,
    insert,
    inspect,
    select,
    text,
)
from sqlalchemy.exc import OperationalError

from app.store.records import StoreError
from app.store.tables import (
    HEAD_REVISION,
    alembic_version,
    departures,
    mapping_versions,
    mappings,
    metadata,
    rejected_rows,
    rosters,
    runs,
)

MIGRATIONS_DIR = Path(__file__).resolve().parent / "migrations"

#: rows per executemany batch: bounds the Python tuples alive at once on a 1,000,000-row import
BATCH_ROWS = 50_000


def bulk_insert(
    conn: Connection, table: Table, frame: pd.DataFrame, same: dict[str, Any] | None = None,
    columns: list[str] | None = None,
) -> None:
    """Insert ``frame``'s rows (its ``columns``, default all, plus the columns ``same``, one value for every
    row) inside the caller's transaction, ``BATCH_ROWS`` at a time, missing values as NULL.

    SQLAlchemy's per-row parameter processing costs ~3x the insert itself on 100,000 rows, so for positional
    DBAPI parameter styles the rows go to ``executemany`` as plain tuples; batches keep the tuples of a
    1,000,000-row import from all being alive at once.
    """
    same = same or {}
    picked = list(frame.columns) if columns is None else columns
    names = [*same, *picked]
    marker = {"qmark": "?", "format": "%s", "pyformat": "%s"}.get(conn.dialect.paramstyle)
    sql = f"INSERT INTO {table.name} ({', '.join(names)}) VALUES ({', '.join([marker or '?'] * len(names))})"
    for start in range(0, len(frame), BATCH_ROWS):
        part = frame.iloc[start:start + BATCH_ROWS]
        cells: dict[str, Any] = dict(same)
        for name in picked:
            column = part[name]
            if column.dtype == object:  # text: NaN (a group-by's missing key) becomes NULL too
                values = column.to_numpy()
                missing = pd.isna(values)
                if missing.any():
                    values = values.copy()
                    values[missing] = None
                cells[name] = values
            else:  # numbers: NaN / <NA> become NULL, numpy scalars Python ones
                cells[name] = column.astype(object).where(column.notna(), None).to_numpy()
        rows = list(zip(*(c if isinstance(c, np.ndarray) else [c] * len(part) for c in cells.values()),
                        strict=True))
        if marker is None:
            conn.execute(insert(table), cast(list[dict[str, Any]], [dict(zip(names, r, strict=True)) for r in rows]))
        else:
            conn.exec_driver_sql(sql, rows)


def _adopt_legacy_schema(conn: Connection) -> str:
    """A store made by Helmshift 0.1 (its own ``schema_version`` table) joins Alembic's history at 0001."""
    legacy = conn.execute(text("SELECT max(version) FROM schema_version")).scalar()
    if legacy != 1:
        raise StoreError(f"This database has schema version {legacy}, which this Helmshift does not know.")
    metadata.tables["alembic_version"].create(conn)
    conn.execute(insert(alembic_version).values(version_num="0001"))
    conn.execute(text("DROP TABLE schema_version"))
    return "0001"


def _upgrade(conn: Connection) -> None:
    """Run Alembic's revisions up to head on this open connection, inside its transaction."""
    from alembic import command
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    config.attributes["connection"] = conn
    command.upgrade(config, "head")


def _sqlite_pragmas(dbapi_conn: Any, _record: Any) -> None:
    cur = dbapi_conn.cursor()
    cur.execute("PRAGMA journal_mode=WAL")
    cur.execute("PRAGMA busy_timeout=30000")
    cur.execute("PRAGMA foreign_keys=ON")
    cur.execute("PRAGMA synchronous=NORMAL")
    cur.close()


class Gateway:
    """Owns the engine and the schema; the query mixins of :class:`app.store.Store` build on it."""

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

    def _migrate(self) -> None:
        """Create a fresh database at the head revision, or bring an existing one up to it (Alembic)."""
        sqlite = self.engine.dialect.name == "sqlite"
        if sqlite and self._at_head():
            return
        with self.engine.connect() as conn:
            if sqlite:
                # Rebuilding a table in SQLite (the only way to change a key) must run with foreign keys off,
                # or dropping the old table would cascade into its children; the pragma only takes effect
                # outside a transaction, and the check after the upgrade makes sure no row was orphaned.
                conn.exec_driver_sql("PRAGMA foreign_keys=OFF")
                conn.commit()
            try:
                with conn.begin():
                    if sqlite:
                        # the write lock first: two processes opening one new or old file at once would
                        # otherwise both see no tables (or an old revision) and both create or upgrade them
                        # ("table alembic_version already exists"); the second now waits, then finds it done
                        conn.exec_driver_sql("BEGIN IMMEDIATE")
                    self._migrate_in(conn)
                    if sqlite:
                        broken = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                        if broken:
                            raise StoreError(f"The database has rows pointing at missing rows ({broken[:3]}); "
                                             "it was not upgraded.")
            finally:
                if sqlite:
                    conn.exec_driver_sql("PRAGMA foreign_keys=ON")
                    conn.commit()

    def _at_head(self) -> bool:
        """One query: is this SQLite store already at the head revision? Opening a current store then costs no
        reflection, no foreign-key pass and no Alembic import (the command line's start-up, issue 13)."""
        with self.engine.connect() as conn:
            try:
                current = conn.execute(select(alembic_version.c.version_num)).scalar()
            except OperationalError:  # no alembic_version table: a new file or a 0.1 store; _migrate decides
                return False
        return bool(current == HEAD_REVISION)

    @staticmethod
    def _migrate_in(conn: Connection) -> None:
        if conn.dialect.name == "postgresql":
            # several server processes may start at once on a shared store: one migrates, the rest wait
            conn.execute(text("SELECT pg_advisory_xact_lock(7349201)"))
        names = set(inspect(conn).get_table_names())
        if "alembic_version" in names:
            current = conn.execute(select(alembic_version.c.version_num)).scalar()
        elif "schema_version" in names:
            current = _adopt_legacy_schema(conn)
        else:
            metadata.create_all(conn)
            conn.execute(insert(alembic_version).values(version_num=HEAD_REVISION))
            return
        if current != HEAD_REVISION:
            _upgrade(conn)

    def schema_version(self) -> int:
        """The database's schema revision as a number (revision ids are zero-padded counters)."""
        with self.engine.connect() as conn:
            return int(conn.execute(select(alembic_version.c.version_num)).scalar_one())

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    def integrity_check(self) -> str:
        """SQLite's own consistency check ("ok" when sound); a server database checks itself, so "ok" there."""
        if self.dialect != "sqlite":
            return "ok"
        with self.engine.connect() as conn:
            return str(conn.execute(text("PRAGMA integrity_check")).scalar_one())

    @contextmanager
    def _tx(self) -> Iterator[Connection]:
        with self.engine.begin() as conn:
            yield conn

    def dispose(self) -> None:
        self.engine.dispose()

    def counts(self) -> dict[str, int]:
        """Row counts of the main tables (for health checks and tests of all-or-nothing writes)."""
        tables: Iterable[Table] = (rosters, departures, rejected_rows, mappings, mapping_versions, runs)
        with self.engine.connect() as conn:
            return {t.name: int(conn.execute(select(func.count()).select_from(t)).scalar_one()) for t in tables}
