"""Schema history (Alembic) on SQLite and PostgreSQL: fresh stores, upgrades in place, revisions = tables.

The 0.1 database in tests/data/store-0.1.sql was written by Helmshift 0.1.0's own store code (commit 4303222,
its ``schema_version`` mechanism) and dumped with sqlite3's ``iterdump``; its rows are invented.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path
from typing import Any

import pytest
from alembic.config import Config
from alembic.script import ScriptDirectory
from sqlalchemy import create_engine, inspect, text

from app.store import HEAD_REVISION, Store, StoreError
from app.store.engine import MIGRATIONS_DIR, _upgrade
from app.store.tables import metadata

LEGACY_DUMP = Path(__file__).parent / "data" / "store-0.1.sql"


def script() -> ScriptDirectory:
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    return ScriptDirectory.from_config(config)


def test_head_revision_constant_names_the_newest_revision_file() -> None:
    heads = script().get_heads()
    assert heads == [HEAD_REVISION]


def test_revisions_form_one_line_of_history() -> None:
    revisions = list(script().walk_revisions())
    assert revisions, "no revision files found"
    assert sum(r.down_revision is None for r in revisions) == 1


def test_fresh_store_is_stamped_at_head(db_url: str) -> None:
    store = Store(db_url)  # a database with no tables (the ``store`` fixture is a copy of one made like this)
    try:
        with store.engine.connect() as conn:
            assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar_one() == HEAD_REVISION
        assert store.schema_version() == int(HEAD_REVISION)
    finally:
        store.dispose()


def shape(url: str) -> dict[str, object]:
    """Tables -> (columns with nullability and type family, unique sets, indexed columns), backend-neutral."""
    engine = create_engine(url)
    try:
        insp = inspect(engine)
        out: dict[str, object] = {}
        for table in sorted(insp.get_table_names()):
            cols = tuple(sorted((c["name"], bool(c["nullable"]), type(c["type"]).__name__)
                                for c in insp.get_columns(table)))
            uniques = sorted(tuple(sorted(u["column_names"])) for u in insp.get_unique_constraints(table))
            indexed = sorted(tuple(sorted(i["column_names"])) for i in insp.get_indexes(table)
                             if not i.get("unique"))
            pk = tuple(sorted(insp.get_pk_constraint(table)["constrained_columns"]))
            fks = sorted((tuple(fk["constrained_columns"]), fk["referred_table"], fk.get("options", {}).get("ondelete"))
                         for fk in insp.get_foreign_keys(table))
            auto = None
            if engine.dialect.name == "sqlite":
                with engine.connect() as conn:
                    ddl = conn.exec_driver_sql("SELECT sql FROM sqlite_master WHERE name = ?", (table,)).scalar()
                auto = "AUTOINCREMENT" in str(ddl).upper()
            out[table] = (cols, uniques, indexed, pk, fks, auto)
        return out
    finally:
        engine.dispose()


def test_revisions_build_the_same_schema_as_the_table_definitions(databases: Any) -> None:
    """Upgrading an empty database through every revision gives exactly what ``create_all`` gives."""
    by_revisions, by_metadata = databases.new(), databases.new()
    engine = create_engine(by_revisions)
    with engine.begin() as conn:
        _upgrade(conn)
    engine.dispose()
    engine = create_engine(by_metadata)
    with engine.begin() as conn:
        metadata.create_all(conn)
    engine.dispose()
    left, right = shape(by_revisions), shape(by_metadata)
    assert set(left) >= {"rosters", "departures", "runs", "mapping_versions", "alembic_version"}
    assert left == right


@pytest.mark.sqlite_only
def test_a_0_1_database_upgrades_in_place_keeping_its_data(tmp_path: Path) -> None:
    path = tmp_path / "old.db"
    con = sqlite3.connect(path)
    con.executescript(LEGACY_DUMP.read_text(encoding="utf-8"))
    con.close()
    store = Store(f"sqlite:///{path}")
    try:
        assert store.schema_version() == int(HEAD_REVISION)
        roster = store.get_roster("Legacy roster")
        records = store.departures(roster.id)
        assert sorted(records["reason"]) == ["Dismissed", "Dismissed", "Resigned", "Retired"]
        assert [r.reason for r in store.rejected(roster.id)] == ["no year"]
        assert store.get_mapping("legacy-map").categories["Dismissed"] == "forced"
        run = store.list_runs(roster.id)[0]
        values, reasons = store.replicates_with_failures(run.id)
        assert values[0] == 1.0 and list(reasons) == ["", "separation"]
        with store.engine.connect() as conn:
            assert "schema_version" not in inspect(conn).get_table_names()
        assert store.integrity_check() == "ok"
    finally:
        store.dispose()
    # opening it again is a no-op
    again = Store(f"sqlite:///{path}")
    assert again.schema_version() == int(HEAD_REVISION)
    again.dispose()


@pytest.mark.sqlite_only
def test_an_unknown_legacy_version_is_refused_in_one_sentence(tmp_path: Path) -> None:
    path = tmp_path / "odd.db"
    con = sqlite3.connect(path)
    con.executescript("CREATE TABLE schema_version (version INTEGER NOT NULL); INSERT INTO schema_version VALUES (7);")
    con.close()
    with pytest.raises(StoreError, match="schema version 7"):
        Store(f"sqlite:///{path}")


OPEN_STORE = ("import sys; from app.store import Store; s = Store(sys.argv[1]); "
              "print(s.schema_version(), len(s.list_rosters())); s.dispose()")


@pytest.mark.parametrize("start", ["new", "0.1"])
def test_several_processes_opening_one_file_at_once_create_or_upgrade_it_once(tmp_path: Path, start: str) -> None:
    # before the write lock was taken first, two processes opening a new file at once both created the tables
    # and one stopped with "table alembic_version already exists"
    import subprocess
    import sys

    for attempt in range(2):
        path = tmp_path / f"{start}-{attempt}.db"
        if start == "0.1":
            con = sqlite3.connect(path)
            con.executescript(LEGACY_DUMP.read_text(encoding="utf-8"))
            con.close()
        procs = [subprocess.Popen([sys.executable, "-c", OPEN_STORE, f"sqlite:///{path}"], stdout=subprocess.PIPE,
                                  stderr=subprocess.PIPE, text=True) for _ in range(3)]
        for proc in procs:
            out, err = proc.communicate(timeout=120)
            assert proc.returncode == 0, err[-1500:]
            assert out.split() == [str(int(HEAD_REVISION)), "1" if start == "0.1" else "0"]
        store = Store(f"sqlite:///{path}")
        try:
            assert store.integrity_check() == "ok"
        finally:
            store.dispose()
