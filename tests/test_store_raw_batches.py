"""Revision 0016: raw rows per batch, detailed and firm cells built on first read; a store at 0015 upgrades
with every number and every raw row unchanged, on SQLite and PostgreSQL.

tests/data/store-0015.sql was written by Helmshift's own store code at revision 0015 (main at commit 0f15610:
``import_roster`` of an invented 8-row roster with awkward cells, then a refresh as version 2) and dumped with
sqlite3's ``iterdump``; its rows are invented. On PostgreSQL the same rows are copied into a database brought
to revision 0015 by Alembic, then upgraded.
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from alembic import command
from alembic.config import Config
from sqlalchemy import MetaData, create_engine, inspect, select, text

from app.intake.ingest import import_roster
from app.store import Store
from app.store.engine import MIGRATIONS_DIR
from app.store.raw_rows import unpack
from app.store.tables import departure_raw, roster_cell_builds

DUMP_0015 = Path(__file__).parent / "data" / "store-0015.sql"
CELL_TABLES = ("roster_cells", "roster_detail_cells", "roster_firm_cells", "roster_spellings")


def _at_0015(url: str, tmp_path: Path) -> None:
    """The 0015 store of the dump at ``url`` (SQLite: the dump itself; else Alembic to 0015 and a row copy)."""
    source = tmp_path / "dump.db"
    con = sqlite3.connect(source)
    con.executescript(DUMP_0015.read_text(encoding="utf-8"))
    con.close()
    if url.startswith("sqlite"):
        Path(url.removeprefix("sqlite:///")).write_bytes(source.read_bytes())
        return
    target = create_engine(url)
    with target.begin() as conn:
        config = Config()
        config.set_main_option("script_location", str(MIGRATIONS_DIR))
        config.attributes["connection"] = conn
        command.upgrade(config, "0015")
    old = create_engine(f"sqlite:///{source}")
    have, want = MetaData(), MetaData()
    have.reflect(old)
    want.reflect(target)
    with old.connect() as src, target.begin() as dst:
        for table in want.sorted_tables:
            if table.name == "alembic_version":
                continue
            rows = [dict(r._mapping) for r in src.execute(select(have.tables[table.name]))]
            if rows:
                dst.execute(table.insert(), rows)
        for table in want.sorted_tables:  # the copied ids must not be handed out again
            if "id" in table.c and table.c.id.autoincrement is not False and table.c.id.primary_key:
                dst.execute(text(f"SELECT setval(pg_get_serial_sequence('{table.name}', 'id'), "
                                 f"coalesce((SELECT max(id) FROM {table.name}), 0) + 1, false)"))
    old.dispose()
    target.dispose()


def _read_0015(url: str) -> dict[str, Any]:
    """What a 0015 store holds: each departure's raw JSON by (version, line), and every cell table's rows."""
    engine = create_engine(url)
    with engine.connect() as conn:
        raw = {(int(v), int(line)): str(r) for v, line, r in
               conn.execute(text("SELECT version, line, raw FROM departures"))}
        cells = {t: _rows(conn, t) for t in CELL_TABLES}
    engine.dispose()
    return {"raw": raw, "cells": cells}


def _rows(conn: Any, table: str) -> list[tuple[Any, ...]]:
    rows = conn.execute(text(f"SELECT * FROM {table}")).all()
    return sorted((tuple(bool(x) if isinstance(x, bool) else x for x in r) for r in rows), key=repr)


def test_a_0015_store_upgrades_with_its_raw_rows_and_cells_unchanged(databases: Any, tmp_path: Path) -> None:
    url = databases.new()
    _at_0015(url, tmp_path)
    before = _read_0015(url)
    assert len(before["raw"]) == 14 and all(before["cells"].values())
    store = Store(url)  # upgrades to the head revision
    try:
        with store.engine.connect() as conn:
            assert "raw" not in {c["name"] for c in inspect(conn).get_columns("departures")}
            # the versions stored so far keep their detailed and firm cells: marked built, not rebuilt
            assert sorted(tuple(r) for r in conn.execute(
                select(roster_cell_builds.c.roster_id, roster_cell_builds.c.version))) == [(1, 1), (1, 2)]
            assert {t: _rows(conn, t) for t in CELL_TABLES} == before["cells"]
        for version in (1, 2):
            frame = store.departures(1, with_raw=True, version=version)
            assert {(version, int(line)): raw for line, raw in zip(frame["line"], frame["raw"], strict=True)} == {
                k: v for k, v in before["raw"].items() if k[0] == version}
        # a roster imported after the upgrade sits beside the moved ones; deleting one removes its batches
        report = import_roster(store, b"Firm,FY,Reason\nX1,2010,Retired\n", "new.csv", name="After")
        assert json.loads(store.departures(report.roster.id, with_raw=True)["raw"].iloc[0]) == {
            "Firm": "X1", "FY": "2010", "Reason": "Retired"}
        store.delete_roster(1)
        with store.engine.connect() as conn:
            left = conn.execute(select(departure_raw.c.roster_id).distinct()).scalars().all()
        assert left == [report.roster.id]
    finally:
        store.dispose()


def test_detailed_cells_built_on_first_read_equal_the_stored_ones_of_0015(databases: Any, tmp_path: Path) -> None:
    """Dropping a version's detailed and firm cells and its mark, the next read builds them from the records:
    the same rows the 0015 import stored (pandas here, SQLite's or PostgreSQL's own GROUP BY there)."""
    url = databases.new()
    _at_0015(url, tmp_path)
    before = _read_0015(url)["cells"]
    store = Store(url)
    try:
        with store.engine.begin() as conn:
            for table in ("roster_detail_cells", "roster_firm_cells", "roster_cell_builds"):
                conn.execute(text(f"DELETE FROM {table}"))
        for version in (1, 2):
            store.cell_counts(1, version, detail=True)
        store.firm_counts(1, version=1)  # built already: nothing added twice
        with store.engine.connect() as conn:
            assert {t: _rows(conn, t) for t in CELL_TABLES} == before
    finally:
        store.dispose()


def test_raw_batches_hold_lines_and_cells_by_column(store: Store, monkeypatch: Any) -> None:
    from app.store import raw_rows

    monkeypatch.setattr(raw_rows, "RAW_BATCH", 2)
    data = "Firm,FY,Reason,Note\nA,2001,Retired,\"x, y\"\nB,2002,Fired,é\nC,2003,Retired,\nD,2004,Health,q\"\n"
    roster = import_roster(store, data.encode(), "b.csv").roster
    with store.engine.connect() as conn:
        stored = conn.execute(select(departure_raw.c.seq, departure_raw.c.first_line, departure_raw.c.rows,
                                     departure_raw.c.data).order_by(departure_raw.c.seq)).all()
    assert [(s, f, n) for s, f, n, _ in stored] == [(0, 2, 2), (1, 4, 2)]
    lines, rows = unpack(bytes(stored[1][3]))
    assert lines == [4, 5] and [json.loads(r) for r in rows] == [
        {"Firm": "C", "FY": "2003", "Reason": "Retired", "Note": ""},
        {"Firm": "D", "FY": "2004", "Reason": "Health", "Note": 'q"'}]
    frame = store.departures(roster.id, with_raw=True)
    assert isinstance(frame, pd.DataFrame) and json.loads(frame["raw"].iloc[0])["Note"] == "x, y"


def _cell_rows(store: Store) -> dict[str, list[tuple[Any, ...]]]:
    with store.engine.connect() as conn:
        return {t: _rows(conn, t) for t in (*CELL_TABLES, "roster_cell_builds")}


ROSTER_CSV = ("Firm,FY,Reason,Age,Tenure\n" + "".join(
    f"F{i % 13},{2000 + i % 9},{('Retired', 'Dismissed', 'Health')[i % 3]},{40 + i % 30},{i % 11}\n"
    for i in range(400))).encode()


def test_two_stores_building_the_cells_at_once_leave_one_set(store: Store) -> None:
    """Two gateways (as two server processes would) ask for the detailed cells of a fresh version at once."""
    import threading

    roster = import_roster(store, ROSTER_CSV, "two.csv").roster
    other = Store(store.url)
    try:
        barrier = threading.Barrier(2)
        errors: list[BaseException] = []

        def read(s: Store) -> None:
            try:
                barrier.wait()
                s.firm_cell_counts(roster.id, detail=True)
            except BaseException as exc:  # noqa: BLE001 - reported below
                errors.append(exc)

        threads = [threading.Thread(target=read, args=(s,)) for s in (store, other)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert errors == []
        built = _cell_rows(store)
        assert len(built["roster_cell_builds"]) == 1
        with store.engine.begin() as conn:  # the reference: one build on its own
            for table in ("roster_detail_cells", "roster_firm_cells", "roster_cell_builds"):
                conn.execute(text(f"DELETE FROM {table}"))
        store.ensure_detail_cells(roster.id)
        again = _cell_rows(store)
        assert {k: v for k, v in again.items() if k != "roster_cell_builds"} == {
            k: v for k, v in built.items() if k != "roster_cell_builds"}
    finally:
        other.dispose()


def test_a_build_that_fails_half_way_leaves_nothing_and_the_next_read_builds(store: Store, monkeypatch: Any) -> None:
    from app.store import cells

    roster = import_roster(store, ROSTER_CSV, "half.csv").roster
    real = cells._insert_counts

    def failing(conn: Any, table: Any, *args: Any) -> None:
        if table.name == "roster_firm_cells":  # after the mark and the detailed cells were written
            raise RuntimeError("killed")
        real(conn, table, *args)

    monkeypatch.setattr(cells, "_insert_counts", failing)
    with pytest.raises(RuntimeError, match="killed"):
        store.cell_counts(roster.id, detail=True)
    rows = _cell_rows(store)
    assert rows["roster_detail_cells"] == rows["roster_firm_cells"] == rows["roster_cell_builds"] == []
    monkeypatch.setattr(cells, "_insert_counts", real)
    detail = store.cell_counts(roster.id, detail=True)
    assert int(detail["departures"].sum()) == 400 and len(_cell_rows(store)["roster_cell_builds"]) == 1
