"""A look into a SQLite store through the standard library alone: what ``helmshift fit`` needs (issue 13).

``helmshift fit`` on counts it has already fitted prints the recorded run again, and on new counts fits them
and records the run, in under 0.5 s. SQLAlchemy and pandas alone take longer than that to import on the
2-core machine, so this module reads the few rows involved (roster, its settings, a mapping version, the
roster's cells, its fit runs) with ``sqlite3`` on a read-only connection, and :func:`record_fit_run` writes
a finished fit run (and its audit event) exactly as ``Store.create_run`` + ``finish_run`` would, in one
transaction. It answers only for a SQLite file stamped at the schema's head revision (found from the
revision files, so it never reads or writes a schema older or newer than the one it was written for);
everywhere else ``open_quick`` returns None and the caller takes the ordinary path through ``Store``.
The queries mirror the ``Store`` methods named in each docstring; tests/test_quick_fit.py compares them.
"""

from __future__ import annotations

import json
import re
import sqlite3
from collections.abc import Callable, Iterator
from contextlib import closing
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import unquote

VERSIONS = Path(__file__).resolve().parent / "migrations" / "versions"
_REVISION = re.compile(r"""^revision\s*=\s*["']([^"']+)["']""", re.MULTILINE)
#: ids above this are "unknown" on every backend (``app.store.records.MAX_ID``, kept equal by a test)
MAX_ID = 2**31 - 1
#: seconds a writer waits for another's lock (``app.store.engine``: ``timeout=30``, ``busy_timeout=30000``)
BUSY_TIMEOUT = 30


def head_revision() -> str | None:
    """The revision of the highest-numbered file in migrations/versions (``HEAD_REVISION``; a test checks)."""
    files = sorted(p for p in VERSIONS.glob("[0-9]*.py"))
    if not files:
        return None
    found = _REVISION.search(files[-1].read_text(encoding="utf-8"))
    return found.group(1) if found else None


@dataclass(frozen=True)
class QuickRoster:
    id: int
    name: str
    version: int


@dataclass(frozen=True)
class QuickMapping:
    name: str
    version: int
    categories: dict[str, str]
    has_rules: bool
    #: case overrides move single departures between categories: only the ordinary path applies them
    has_overrides: bool = False


class QuickReader:
    """One read-only SQLite connection; every method returns plain values (None where ``Store`` would raise)."""

    def __init__(self, conn: sqlite3.Connection) -> None:
        self.conn = conn

    def close(self) -> None:
        self.conn.close()

    def _rows(self, sql: str, *params: Any) -> list[tuple[Any, ...]]:
        with closing(self.conn.execute(sql, params)) as cursor:
            return cursor.fetchall()

    def roster(self, ref: int | str) -> QuickRoster | None:
        """``Store.get_roster(ref)`` (newest version): by id when ``ref`` is a number in range, else by name."""
        row = None
        if (isinstance(ref, int) or str(ref).isdecimal()) and 0 < int(ref) <= MAX_ID:
            row = next(iter(self._rows("SELECT id, name, version FROM rosters WHERE id = ?", int(ref))), None)
        if row is None:
            row = next(iter(self._rows("SELECT id, name, version FROM rosters WHERE name = ?", str(ref))), None)
        return None if row is None else QuickRoster(int(row[0]), str(row[1]), int(row[2]))

    def settings(self, roster_id: int) -> tuple[str | None, tuple[int, int] | None]:
        """``Store.settings``: the roster's chosen mapping name and window."""
        rows = self._rows("SELECT mapping_name, window_from, window_to FROM roster_settings WHERE roster_id = ?",
                          roster_id)
        if not rows:
            return None, None
        name, first, last = rows[0]
        return name, (int(first), int(last)) if first is not None and last is not None else None

    def mapping(self, name: str, version: int | None = None) -> QuickMapping | None:
        """``Store.get_mapping`` (the newest version when ``version`` is None); None when not stored."""
        if version is not None and not 0 < version <= MAX_ID:
            return None
        sql = ("SELECT v.id, v.version FROM mapping_versions v JOIN mappings m ON v.mapping_id = m.id "
               "WHERE m.name = ?")
        rows = (self._rows(sql + " AND v.version = ?", name, version) if version is not None
                else self._rows(sql + " ORDER BY v.version DESC LIMIT 1", name))
        if not rows:
            return None
        version_id, number = rows[0]
        entries = self._rows("SELECT code, category FROM mapping_entries WHERE version_id = ? ORDER BY code",
                             version_id)
        rules = self._rows("SELECT count(*) FROM mapping_rules WHERE version_id = ?", version_id)[0][0]
        overrides = self._rows("SELECT count(*) FROM mapping_overrides WHERE version_id = ?", version_id)[0][0]
        return QuickMapping(name, int(number), {str(c): str(k) for c, k in entries}, bool(rules), bool(overrides))

    def cells(self, roster_id: int, version: int) -> list[tuple[int, str | None, str, int]]:
        """``Store.cell_counts``: departures per (year, sector, reason) of one roster version."""
        return [(int(y), s, str(r), int(n)) for y, s, r, n in self._rows(
            "SELECT year, sector, reason, departures FROM roster_cells WHERE roster_id = ? AND version = ? "
            "ORDER BY year, sector, reason", roster_id, version)]

    def undated_counts(self, roster_id: int, version: int, reasons: list[str]) -> list[tuple[int, str, int]]:
        """Rows with no departure date per (year, reason) among ``reasons`` of one roster version: the
        still-in-post rows ``app.analysis.browse.in_post_counts`` counts (no rules or overrides here)."""
        if not reasons:
            return []
        marks = ", ".join("?" * len(reasons))
        return [(int(y), str(r), int(n)) for y, r, n in self._rows(
            f"SELECT year, reason, count(*) FROM departures WHERE roster_id = ? AND version = ? AND date IS NULL "
            f"AND reason IN ({marks}) GROUP BY year, reason ORDER BY year, reason", roster_id, version, *reasons)]

    def fit_runs(self, roster_id: int) -> Iterator[dict[str, Any]]:
        """The roster's finished fit runs, newest first (``Store.list_runs(roster_id, "fit")``, done only)."""
        yield from fit_runs(self.conn, roster_id)


def fit_runs(conn: sqlite3.Connection, roster_id: int) -> Iterator[dict[str, Any]]:
    """The finished fit runs of a roster on ``conn``, newest first, as plain values."""
    with closing(conn.execute(
            "SELECT id, params, fingerprint, window_from, window_to, roster_version, mapping_name, "
            "mapping_version, result FROM runs WHERE roster_id = ? AND kind = 'fit' AND status = 'done' "
            "AND result IS NOT NULL ORDER BY id DESC", (roster_id,))) as cursor:
        rows = cursor.fetchall()
    for row in rows:
        yield {"id": int(row[0]), "params": json.loads(row[1]), "fingerprint": row[2],
               "window": (row[3], row[4]) if row[3] is not None else None, "roster_version": row[5],
               "mapping_name": row[6], "mapping_version": row[7], "result": json.loads(row[8])}


def now_iso() -> str:
    """``app.store.records.now_iso``: UTC to the second."""
    return datetime.now(UTC).replace(microsecond=0).isoformat()


def record_fit_run(url: str, *, roster_id: int, roster_version: int, params: dict[str, Any], fingerprint: str,
                   mapping: tuple[str, int], window: tuple[int, int], result: dict[str, Any], seconds: float,
                   actor: str, existing: Callable[[dict[str, Any]], bool]) -> int | None:
    """Record a finished fit run as ``app.analysis.runs._record_run`` does through ``Store`` (``create_run``:
    the row and its ``run_start`` audit event; ``finish_run``: result, seconds, status done), in one
    ``BEGIN IMMEDIATE`` transaction, so a second writer waits for the first (busy timeout as the Store's) and
    run ids come from the table's AUTOINCREMENT (never reused). Returns the id of the run, or of a matching
    run (``existing``) another process recorded meanwhile; None when the file is not at the head revision or
    the roster has changed since it was read (the caller then takes the ordinary path)."""
    path = sqlite_path(url)
    if path is None or not path.is_file():
        return None
    conn = sqlite3.connect(str(path), timeout=BUSY_TIMEOUT, isolation_level=None)
    try:
        conn.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT * 1000}")
        conn.execute("PRAGMA foreign_keys=ON")
        conn.execute("PRAGMA synchronous=NORMAL")  # as the Store's connections (app.store.engine)
        conn.execute("BEGIN IMMEDIATE")
        try:
            stamped = [row[0] for row in conn.execute("SELECT version_num FROM alembic_version")]
            version = conn.execute("SELECT version FROM rosters WHERE id = ?", (roster_id,)).fetchall()
            if stamped != [head_revision()] or [tuple(row) for row in version] != [(roster_version,)]:
                conn.execute("ROLLBACK")
                return None
            for run in fit_runs(conn, roster_id):
                if existing(run):
                    conn.execute("COMMIT")
                    return int(run["id"])
            at = now_iso()
            cursor = conn.execute(
                "INSERT INTO runs (kind, roster_id, status, created_at, finished_at, mapping_name, mapping_version, "
                "window_from, window_to, params, fingerprint, progress_done, progress_total, cancel_requested, "
                "result, seconds, author, roster_version) VALUES ('fit', ?, 'done', ?, ?, ?, ?, ?, ?, ?, ?, 0, 0, 0, "
                "?, ?, ?, ?)",
                (roster_id, at, at, mapping[0], mapping[1], window[0], window[1], json.dumps(dict(params)),
                 fingerprint, json.dumps(dict(result)), seconds, actor, roster_version))
            run_id = int(cursor.lastrowid or 0)
            conn.execute("INSERT INTO audit_events (at, actor, action, target, detail) VALUES (?, ?, ?, ?, ?)",
                         (at, actor, "run_start", f"run:{run_id}",
                          json.dumps({"kind": "fit", "roster": roster_id, **params}, sort_keys=True, default=str)))
            conn.execute("COMMIT")
            return run_id
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
    finally:
        conn.close()


def sqlite_path(url: str) -> Path | None:
    """The file of a ``sqlite:///`` URL without query options, or None (other backends, memory, options)."""
    prefix = "sqlite:///"
    if not url.startswith(prefix) or "?" in url:
        return None
    path = unquote(url[len(prefix):])
    return Path(path) if path not in ("", ":memory:") else None


def open_quick(url: str) -> QuickReader | None:
    """A reader for the SQLite file at ``url`` when it exists and is stamped at the head revision, else None."""
    path = sqlite_path(url)
    head = head_revision()
    if path is None or head is None or not path.is_file():
        return None
    try:
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    except sqlite3.Error:
        return None
    try:
        stamped = conn.execute("SELECT version_num FROM alembic_version").fetchall()
    except sqlite3.Error:
        stamped = []
    if [row[0] for row in stamped] != [head]:
        conn.close()
        return None
    return QuickReader(conn)
