"""The first ``helmshift fit`` of new counts on the quick path (app.analysis.quick_fit with ``fit_new``):
fitted by the engine's plain-Python trend (app.stats.trend_line) and recorded through stdlib sqlite3.

The reference is the ordinary path on another copy of the same store: ``fit_summary(..., reuse=False)``
through SQLAlchemy and pandas, which fits with the same engine (``fit_trend`` builds its ``TrendFit`` from
``fit_line``; statsmodels is the outside check in tests/test_stats_plain.py and tests/test_stats_trend.py).
Both must print the same bytes and record the same run and audit event, and the rest of the app must read
the quick path's run as its own.
"""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from conftest import copy_database
from test_quick_fit import CASES, DEMO, ROOT, _ordinary, generated_roster_db

from app.analysis.inputs import input_for_run, load_input
from app.analysis.quick_fit import LOCAL_ACTOR, quick_summary
from app.analysis.runs import fit_summary
from app.store import Store
from app.store.audit import LOCAL_ACTOR as STORE_LOCAL_ACTOR
from app.types import ClassificationRule

#: run columns that hold the time of writing (everything else must be equal between the two paths)
CLOCK = ("created_at", "finished_at", "seconds", "started_at")


def _rows(db: Path, sql: str) -> list[dict[str, Any]]:
    conn = sqlite3.connect(db)
    conn.row_factory = sqlite3.Row
    try:
        return [dict(row) for row in conn.execute(sql)]
    finally:
        conn.close()


def _runs(db: Path) -> list[dict[str, Any]]:
    rows = _rows(db, "SELECT * FROM runs ORDER BY id")
    for row in rows:
        for key in CLOCK:
            row.pop(key)
        row["result"] = json.loads(row["result"]) if row["result"] else None
    return rows


def _audit(db: Path) -> list[dict[str, Any]]:
    return [{k: v for k, v in row.items() if k != "at"} for row in _rows(db, "SELECT * FROM audit_events ORDER BY id")]


def test_local_actor_agrees_with_the_store() -> None:
    assert LOCAL_ACTOR == STORE_LOCAL_ACTOR


@pytest.mark.parametrize("roster", ["demo", "generated"])
def test_first_fit_prints_and_records_what_the_ordinary_path_does(shared_demo_db: Path, tmp_path: Path,
                                                                  roster: str) -> None:
    """Every case of test_quick_fit, in turn on two copies: byte-identical JSON (numbers, sentences, headline,
    warnings, run id), the same run rows (params, fingerprint, window, versions, author, result with its
    profile ends and engine tag) and the same audit events; then every reader of the app takes the quick
    path's run. On the demo roster and on a generated one whose second mapping leaves codes unmapped."""
    source, name = (shared_demo_db, DEMO) if roster == "demo" else generated_roster_db(tmp_path)
    quick_db = copy_database(source, tmp_path / "quick.db")
    plain_db = copy_database(source, tmp_path / "ordinary.db")
    quick_url = f"sqlite:///{quick_db}"
    ordinary = Store(f"sqlite:///{plain_db}")
    reader = Store(quick_url)
    try:
        for case in CASES:
            assert quick_summary(quick_url, name, **case) is None  # nothing recorded: without fit_new, no answer
            first = quick_summary(quick_url, name, fit_new=True, **case)
            assert first is not None, case
            expected = _ordinary(ordinary, name, case, reuse=False)
            assert json.dumps(first) == json.dumps(expected), case
            # the quick path's run serves the next call on both paths, printing the same bytes
            assert quick_summary(quick_url, name, **case) == first
            assert json.dumps(_ordinary(reader, name, case, reuse=True)) == json.dumps(first), case
            # a second first fit of the same counts records nothing new (as ``_record_run``)
            assert quick_summary(quick_url, name, fit_new=True, **case) == first
        assert _runs(quick_db) == _runs(plain_db)
        assert _audit(quick_db) == _audit(plain_db)
        for run in reader.list_runs(kind="fit"):  # the Store reads every run; the run's input reopens
            again = reader.get_run(run.id)
            assert again.status == "done" and again.author == LOCAL_ACTOR and again.result is not None
            inp = input_for_run(reader, again)
            assert inp.window == again.window
    finally:
        ordinary.dispose()
        reader.dispose()


def _without_clock(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _without_clock(v) for k, v in value.items() if k not in CLOCK}
    if isinstance(value, list):
        return [_without_clock(v) for v in value]
    return value


def _pages(db: Path, run_id: int, tmp_path: Path) -> dict[str, Any]:
    """What the app's readers of a fit run say about it: run page and API (status), the roster's run list,
    the replication pack's files, the Trend page's JSON."""
    from fastapi.testclient import TestClient

    from app.analysis.replication import write_pack
    from app.config import Settings
    from app.web.app import create_app

    url = f"sqlite:///{db}"
    store = Store(url)
    try:
        pack = write_pack(store, run_id, tmp_path / f"pack-{db.stem}.zip", records=False)
        roster = store.get_roster(DEMO)
        with TestClient(create_app(Settings(db_url=url), store, start_jobs=False)) as client:
            seen = {"run_page": client.get(f"/runs/{run_id}").status_code,
                    "run_api": client.get(f"/api/runs/{run_id}").status_code,
                    "runs": client.get(f"/api/rosters/{roster.id}/runs").json(),
                    "pack": sorted(pack.files), "pack_run": pack.run_id}
            trend = client.get(f"/api/rosters/{roster.id}/trend")
            assert trend.status_code == 200
            seen["trend"] = {k: v for k, v in trend.json().items() if k not in ("figure", "figures")}
        # the page fitted nothing new: its fit of these counts is the run already recorded
        seen["fit_runs"] = [run.id for run in store.list_runs(roster.id, "fit")]
        return dict(_without_clock(seen))
    finally:
        store.dispose()


def test_recorded_run_reads_as_the_ordinary_paths(shared_demo_db: Path, tmp_path: Path) -> None:
    """The run page, the run list, the replication pack and the Trend page say the same about the quick
    path's run as about the ordinary path's run of the same counts."""
    quick_db = copy_database(shared_demo_db, tmp_path / "quick.db")
    plain_db = copy_database(shared_demo_db, tmp_path / "ordinary.db")
    first = quick_summary(f"sqlite:///{quick_db}", DEMO, fit_new=True)
    assert first is not None
    ordinary = Store(f"sqlite:///{plain_db}")
    expected = _ordinary(ordinary, DEMO, {}, reuse=False)
    ordinary.dispose()
    seen = _pages(quick_db, first["run"], tmp_path)
    assert seen["fit_runs"] == [first["run"]]
    assert json.dumps(seen, sort_keys=True) == json.dumps(_pages(plain_db, expected["run"], tmp_path), sort_keys=True)


def test_first_fit_stands_aside(shared_demo_db: Path, tmp_path: Path) -> None:
    """Rules, other models and bad input leave the first fit to the ordinary path (None), recording nothing."""
    db = copy_database(shared_demo_db, tmp_path / "demo.db")
    url = f"sqlite:///{db}"
    assert quick_summary(url, DEMO, model="sector", fit_new=True) is None
    assert quick_summary(url, DEMO, window=(1700, 1800), fit_new=True) is None
    assert quick_summary(url, DEMO, mapping="no such mapping", fit_new=True) is None
    store = Store(url)
    try:
        chosen = load_input(store, DEMO).mapping
        assert chosen is not None
        store.save_mapping_version(chosen.name, chosen.categories,
                                   rules=(ClassificationRule("Retired", "age", "below", 60, "forced"),))
        assert quick_summary(url, DEMO, fit_new=True) is None
        assert store.list_runs(kind="fit") == []
    finally:
        store.dispose()


def test_first_fit_with_too_few_years_leaves_the_error_to_the_ordinary_path(shared_demo_db: Path,
                                                                            tmp_path: Path) -> None:
    db = copy_database(shared_demo_db, tmp_path / "demo.db")
    url = f"sqlite:///{db}"
    assert quick_summary(url, DEMO, window=(2001, 2002), fit_new=True) is None
    store = Store(url)
    try:
        with pytest.raises(ValueError, match="at least 3 different years"):
            fit_summary(store, load_input(store, DEMO, window=(2001, 2002)), reuse=False)
    finally:
        store.dispose()


def test_two_processes_fitting_at_once_record_one_run(shared_demo_db: Path, tmp_path: Path) -> None:
    """Two ``helmshift fit`` processes of the same new counts at once: the second writer waits for the first
    (BEGIN IMMEDIATE, busy timeout), finds its run and prints it; one run, ids from AUTOINCREMENT."""
    db = copy_database(shared_demo_db, tmp_path / "demo.db")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    argv = [sys.executable, "-m", "app.cli", "fit", "--roster", DEMO, "--db", str(db), "--json"]
    running = [subprocess.Popen(argv, cwd=tmp_path, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True) for _ in range(2)]
    outputs = [process.communicate(timeout=120) for process in running]
    assert [process.returncode for process in running] == [0, 0], outputs
    printed = [json.loads(out) for out, _ in outputs]
    assert printed[0] == printed[1]
    runs = _rows(db, "SELECT id FROM runs WHERE kind = 'fit'")
    assert [row["id"] for row in runs] == [printed[0]["run"]]
    # a run deleted is never handed out again: the next first fit gets a new id
    conn = sqlite3.connect(db)
    conn.execute("DELETE FROM runs")
    conn.commit()
    conn.close()
    again = quick_summary(f"sqlite:///{db}", DEMO, fit_new=True)
    assert again is not None and again["run"] > printed[0]["run"]


def test_a_locked_store_falls_back(shared_demo_db: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A writer that cannot get the lock within the busy timeout gives None: the ordinary path then waits or
    says what is wrong; nothing half-written."""
    import app.store.quick as quick

    db = copy_database(shared_demo_db, tmp_path / "demo.db")
    monkeypatch.setattr(quick, "BUSY_TIMEOUT", 0)
    holder = sqlite3.connect(db, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")
    try:
        assert quick_summary(f"sqlite:///{db}", DEMO, fit_new=True) is None
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    assert _rows(db, "SELECT id FROM runs") == []
