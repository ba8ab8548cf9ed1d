"""The database engine, SQLite's connection settings and schema migration: the base of every query mixin."""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from typing import Any

from sqlalchemy import (
    Connection,
    Engine,
    Table,
    create_engine,
    event,
    func,
    insert,
    select,
    text,
)

from app.store.tables import (
    MIGRATIONS,
    SCHEMA_VERSION,
    departures,
    mapping_versions,
    mappings,
    metadata,
    rejected_rows,
    rosters,
    runs,
    schema_version,
)


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
        with self.engine.begin() as conn:
            metadata.create_all(conn)
            current = conn.execute(select(func.max(schema_version.c.version))).scalar()
            if current is None:
                conn.execute(insert(schema_version).values(version=SCHEMA_VERSION))
                return
            for i in range(current - 1, len(MIGRATIONS)):
                conn.execute(text(MIGRATIONS[i]))
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

    def counts(self) -> dict[str, int]:
        """Row counts of the main tables (for health checks and tests of all-or-nothing writes)."""
        tables: Iterable[Table] = (rosters, departures, rejected_rows, mappings, mapping_versions, runs)
        with self.engine.connect() as conn:
            return {t.name: int(conn.execute(select(func.count()).select_from(t)).scalar_one()) for t in tables}
