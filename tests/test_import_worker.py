"""Imports through the web run in a worker process (app/web/import_worker.py): the same roster as the command
line's import, the signed-in user in the audit trail, nothing stored when the worker is killed mid-write, and
``into`` / ``profile`` on ``POST /api/rosters``.

The rosters are invented here, row by row, so every expected count is a hand count of what was written.
"""

from __future__ import annotations

import contextlib
import os
import signal
import sqlite3
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import create_engine, func, select, text

from app.cli import main as cli_main
from app.config import Settings
from app.store import Store
from app.store.tables import audit_events, departures, rejected_rows, roster_versions, rosters
from app.web import import_worker
from app.web.app import create_app

REASONS = ("dismissed", "retired", "resigned", "health")


def roster_csv(n: int, *, bad_every: int = 0, executive: bool = False) -> bytes:
    """``n`` invented departures: firm F<i % 97>, year 1995 + i % 25, a reason from REASONS in turn; every
    ``bad_every``-th row has the year "n/a" (rejected). Firm-year-reason repeats are exact duplicates unless an
    executive column makes each row unique."""
    head = "firm_id,year,reason" + (",executive" if executive else "")
    lines = [head]
    for i in range(n):
        year = "n/a" if bad_every and i % bad_every == bad_every - 1 else str(1995 + i % 25)
        row = f"F{i % 97},{year},{REASONS[i % len(REASONS)]}"
        lines.append(row + (f",Exec {i}" if executive else ""))
    return ("\n".join(lines) + "\n").encode()


def table_counts(url: str) -> dict[str, int]:
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            return {t.name: int(conn.execute(select(func.count()).select_from(t)).scalar_one())
                    for t in (rosters, roster_versions, departures, rejected_rows, audit_events)}
    finally:
        engine.dispose()


def test_api_import_in_the_worker_matches_the_cli_import(empty_client: TestClient, store: Store,
                                                        databases: Any, tmp_path: Path) -> None:
    # 600 rows with an executive each (so none is a duplicate), every 50th with an unreadable year
    data = roster_csv(600, bad_every=50, executive=True)
    r = empty_client.post("/api/rosters", files={"file": ("desk.csv", data)}, data={"name": "desk"})
    assert r.status_code == 201, r.text
    body = r.json()
    # hand count: 600 rows, 12 of them (lines with i = 49, 99, ..., 599) have the year "n/a"
    assert (body["rows"], body["accepted"], body["rejected"], body["duplicates"]) == (600, 588, 12, 0)
    assert body["version"] == 1 and body["added"] == 588
    pids = import_worker.worker_pids()
    assert pids and os.getpid() not in pids  # the import ran in another process

    path = tmp_path / "desk.csv"
    path.write_bytes(data)
    cli_url = databases.new()
    try:
        assert cli_main(["import", str(path), "--db", cli_url, "--name", "desk"]) == 0
        cli_store = Store(cli_url)
        try:
            by_cli, by_api = cli_store.get_roster("desk"), store.get_roster(body["id"])
            assert (by_api.rows_total, by_api.accepted, by_api.rejected, by_api.duplicates, by_api.columns) == (
                by_cli.rows_total, by_cli.accepted, by_cli.rejected, by_cli.duplicates, by_cli.columns)
            api_rows = store.departures(by_api.id).reset_index(drop=True)
            cli_rows = cli_store.departures(by_cli.id).reset_index(drop=True)
            assert len(api_rows) == 588
            assert api_rows.drop(columns=["roster_id"], errors="ignore").equals(
                cli_rows.drop(columns=["roster_id"], errors="ignore"))
            assert [(x.line, x.reason) for x in store.rejected(by_api.id)] == [
                (x.line, x.reason) for x in cli_store.rejected(by_cli.id)]
        finally:
            cli_store.dispose()
    finally:
        databases.drop(cli_url)


def test_errors_from_the_worker_answer_as_before(empty_client: TestClient) -> None:
    data = roster_csv(40)
    assert empty_client.post("/api/rosters", files={"file": ("a.csv", data)}).status_code == 201
    again = empty_client.post("/api/rosters", files={"file": ("a.csv", data)})
    assert again.status_code == 409 and "already imported as roster 'a'" in again.json()["error"]
    # every row rejected: 400 naming the first line and why (line 2 is the first data row)
    bad = empty_client.post("/api/rosters", files={"file": ("b.csv", b"firm_id,year,reason\nF1,n/a,retired\n")})
    assert bad.status_code == 400 and "line 2" in bad.json()["error"]
    taken = empty_client.post("/api/rosters", files={"file": ("c.csv", roster_csv(41))}, data={"name": "a"})
    assert taken.status_code == 400 and "already exists" in taken.json()["error"]


def test_the_audit_row_names_the_signed_in_user(store: Store) -> None:
    store.add_account("analyst7", "analyst", "correct horse battery")
    token = store.create_token("analyst7")
    app = create_app(Settings(db_url=store.url), store, start_jobs=False)
    with TestClient(app) as client:
        r = client.post("/api/rosters", files={"file": ("team.csv", roster_csv(30))},
                        headers={"authorization": f"Bearer {token}"})
        assert r.status_code == 201, r.text
        roster_id = r.json()["id"]
        refreshed = client.post("/api/rosters", files={"file": ("team2.csv", roster_csv(35))},
                                data={"into": str(roster_id)}, headers={"authorization": f"Bearer {token}"})
        assert refreshed.status_code == 201, refreshed.text
    events = {e.action: e for e in store.audit_events(user="analyst7")}
    assert events["import"].target == f"roster:{roster_id}"
    assert events["import_version"].target == f"roster:{roster_id}"
    assert store.get_roster(roster_id).version == 2


def _writer_active(url: str) -> bool:
    """True while another connection holds a write transaction on the database."""
    if url.startswith("sqlite"):
        conn = sqlite3.connect(url.removeprefix("sqlite:///"), timeout=0)
        try:
            conn.execute("BEGIN IMMEDIATE")
            conn.rollback()
            return False
        except sqlite3.OperationalError:  # "database is locked": the worker is writing
            return True
        finally:
            conn.close()
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            # a backend with a transaction id has written something (PostgreSQL docs, pg_stat_activity)
            return bool(conn.execute(text(
                "SELECT count(*) FROM pg_stat_activity WHERE datname = current_database() "
                "AND pid <> pg_backend_pid() AND backend_xid IS NOT NULL")).scalar_one())
    finally:
        engine.dispose()


def test_a_worker_killed_mid_import_leaves_nothing(empty_client: TestClient, store: Store) -> None:
    data = roster_csv(120_000, executive=True)
    answer: dict[str, Any] = {}

    def upload() -> None:
        answer["r"] = empty_client.post("/api/rosters", files={"file": ("big.csv", data)}, data={"name": "big"})

    thread = threading.Thread(target=upload)
    thread.start()
    killed = False
    deadline = time.monotonic() + 300
    while thread.is_alive() and time.monotonic() < deadline:
        pids = import_worker.worker_pids()
        if pids and _writer_active(store.url):  # inside save_import's transaction
            for pid in pids:
                os.kill(pid, signal.SIGKILL)
            killed = True
            break
        time.sleep(0.005)
    thread.join(300)
    assert killed, "the import ended before its write transaction was seen"
    r = answer["r"]
    assert r.status_code == 503 and "nothing was stored" in r.json()["error"]
    counts = table_counts(store.url)
    assert counts == {"rosters": 0, "roster_versions": 0, "departures": 0, "rejected_rows": 0, "audit_events": 0}
    # a new worker takes the next import, and the database is not left locked
    again = empty_client.post("/api/rosters", files={"file": ("small.csv", roster_csv(50))})
    assert again.status_code == 201, again.text


def test_into_stores_the_next_version_with_its_diff(empty_client: TestClient, store: Store) -> None:
    first = empty_client.post("/api/rosters", files={"file": ("v1.csv", roster_csv(20, executive=True))})
    assert first.status_code == 201
    roster_id = first.json()["id"]
    # version 2 by hand: rows 0-17 kept, rows 18 and 19 dropped, three new executives, row 2's reason changed
    lines = roster_csv(18, executive=True).decode().splitlines()
    assert lines[3] == "F2,1997,resigned,Exec 2"  # data row i=2, line 4 of the file
    lines[3] = "F2,1997,health,Exec 2"
    lines += ["F200,2001,retired,New A", "F201,2002,dismissed,New B", "F202,2003,resigned,New C"]
    second = empty_client.post("/api/rosters", files={"file": ("v2.csv", ("\n".join(lines) + "\n").encode())},
                               data={"into": str(roster_id)})
    assert second.status_code == 201, second.text
    body = second.json()
    assert (body["id"], body["version"], body["added"], body["removed"], body["changed"]) == (roster_id, 2, 3, 2, 1)
    assert store.get_roster(roster_id).accepted == 21 and len(store.list_rosters()) == 1

    missing = empty_client.post("/api/rosters", files={"file": ("v3.csv", roster_csv(22))}, data={"into": "9999"})
    assert missing.status_code == 404 and "No roster number 9999" in missing.json()["error"]
    wrong = empty_client.post("/api/rosters", files={"file": ("v3.csv", roster_csv(22))}, data={"into": "first"})
    assert wrong.status_code == 400 and "into" in wrong.json()["error"]
    assert len(store.list_rosters()) == 1


def test_profile_supplies_the_roles_and_the_date_reading(empty_client: TestClient, store: Store) -> None:
    # headers no detection would take for the roles, and day-first dates; fiscal years end in March
    store.save_profile("desk export", headers=["Ref", "When", "Why"],
                       roles={"firm_id": "Ref", "date": "When", "reason": "Why"}, header_row=None,
                       date_order="dmy", fy_end=3)
    data = b"Ref,When,Why\nA1,01/02/2020,retired\nA2,05/04/2020,dismissed\n"
    r = empty_client.post("/api/rosters", files={"file": ("desk.csv", data)}, data={"profile": "desk export"})
    assert r.status_code == 201, r.text
    assert r.json()["columns"] == {"firm_id": "Ref", "date": "When", "reason": "Why"}
    years = sorted(store.departures(r.json()["id"])["year"].tolist())
    # issue 14's convention: with a March year end, 1 Feb 2020 falls in fiscal 2020 and 5 Apr 2020 in 2021
    assert years == [2020, 2021]

    # a field given with the profile wins over the profile's value: December year end, both in 2020
    r2 = empty_client.post("/api/rosters", files={"file": ("desk2.csv", data + b"A3,06/06/2019,retired\n")},
                           data={"profile": "desk export", "fy_end": "12"})
    assert r2.status_code == 201, r2.text
    assert sorted(store.departures(r2.json()["id"])["year"].tolist()) == [2019, 2020, 2020]

    unknown = empty_client.post("/api/rosters", files={"file": ("desk3.csv", data + b"A4,01/01/2001,x\n")},
                                data={"profile": "no such profile"})
    assert unknown.status_code == 400 and "no such profile" in unknown.json()["error"]
    assert len(store.list_rosters()) == 2


@pytest.fixture(autouse=True)
def _fresh_pool() -> Any:
    yield
    import_worker.shutdown()


def _descendants(pid: int) -> set[int]:
    parents: dict[int, int] = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                parents[int(entry.name)] = int((entry / "stat").read_text().rsplit(")", 1)[1].split()[1])
            except OSError:
                continue
    found, frontier = set(), [pid]
    while frontier:
        parent = frontier.pop()
        children = {c for c, p in parents.items() if p == parent} - found
        found |= children
        frontier.extend(children)
    return found


def _running(pid: int) -> bool:
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads the process tree from /proc")
def test_a_server_killed_mid_import_takes_its_worker_with_it(tmp_path: Path, live_server: Any) -> None:
    import httpx

    db = tmp_path / "served.db"
    Store(f"sqlite:///{db}").dispose()
    server = live_server(db)
    data = roster_csv(120_000, executive=True)

    def upload() -> None:
        with contextlib.suppress(httpx.TransportError):  # the server is killed: no answer
            httpx.post(f"{server.base_url}/api/rosters", files={"file": ("big.csv", data)}, timeout=300)

    thread = threading.Thread(target=upload, daemon=True)
    thread.start()
    url = f"sqlite:///{db}"
    deadline = time.monotonic() + 300
    while not _writer_active(url):
        assert time.monotonic() < deadline and thread.is_alive(), "the import was not seen writing"
        time.sleep(0.005)
    below = _descendants(server.proc.pid)  # the forkserver and the worker
    server.stop(signal.SIGKILL)
    assert below
    deadline = time.monotonic() + 60
    while any(_running(pid) for pid in below):
        assert time.monotonic() < deadline, "the import worker outlived the server"
        time.sleep(0.05)
    thread.join(60)
    assert table_counts(url) == {"rosters": 0, "roster_versions": 0, "departures": 0, "rejected_rows": 0,
                                 "audit_events": 0}


def _workers(server_pid: int) -> set[int]:
    """The import workers of a live server: forks of its forkserver, so grandchildren of the server."""
    below = _descendants(server_pid)
    return below - {pid for pid in below if _parent(pid) == server_pid}


def _parent(pid: int) -> int | None:
    try:
        return int(Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[1])
    except OSError:
        return None


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads the process tree from /proc")
def test_a_dying_worker_fails_only_its_own_import(tmp_path: Path, live_server: Any) -> None:
    """kill -9 of one worker mid-import (as the out-of-memory killer would): that import answers 503 and
    leaves nothing; the import running beside it on the other worker is stored; the next import succeeds."""
    import httpx

    db = tmp_path / "served.db"
    url = f"sqlite:///{db}"
    Store(url).dispose()
    server = live_server(db)
    answers: dict[str, httpx.Response] = {}

    def upload(name: str, data: bytes) -> None:
        answers[name] = httpx.post(f"{server.base_url}/api/rosters", files={"file": (f"{name}.csv", data)},
                                   data={"name": name}, timeout=300)

    big = threading.Thread(target=upload, args=("big", roster_csv(200_000, executive=True)))
    big.start()
    deadline = time.monotonic() + 300
    while not _writer_active(url):  # the big import is inside its write transaction
        assert time.monotonic() < deadline and big.is_alive(), "the big import was not seen writing"
        time.sleep(0.005)
    (doomed,) = _workers(server.proc.pid)
    # 3,000 rows with an executive each: none rejected, none a duplicate (hand count as in roster_csv)
    beside = threading.Thread(target=upload, args=("beside", roster_csv(3_000, executive=True)))
    beside.start()
    while len(_workers(server.proc.pid)) < 2:  # the second worker has taken the other import
        assert time.monotonic() < deadline and beside.is_alive(), "no second worker took the other import"
        time.sleep(0.005)
    assert big.is_alive(), "the big import ended before its worker could be killed"
    os.kill(doomed, signal.SIGKILL)
    big.join(300)
    beside.join(300)

    assert answers["big"].status_code == 503 and "nothing was stored" in answers["big"].json()["error"]
    assert answers["beside"].status_code == 201, answers["beside"].text
    assert answers["beside"].json()["accepted"] == 3_000
    upload("after", roster_csv(50))
    assert answers["after"].status_code == 201, answers["after"].text
    store = Store(url)
    try:
        assert sorted((r.name, r.accepted) for r in store.list_rosters()) == [("after", 50), ("beside", 3_000)]
        assert table_counts(url)["departures"] == 3_050
    finally:
        store.dispose()
    assert doomed not in _workers(server.proc.pid)


def test_two_imports_after_a_worker_died_idle_both_get_a_worker(empty_client: TestClient, store: Store) -> None:
    """Two requests arriving together after the idle workers were killed: each gets a fresh worker, neither
    answers 503, and never more than two workers run."""
    barrier = threading.Barrier(2)
    answers: dict[int, Any] = {}

    def upload(i: int) -> None:
        barrier.wait()
        answers[i] = empty_client.post("/api/rosters", files={"file": (f"t{i}.csv", roster_csv(3_000 + i))})

    for round_ in range(3):
        for pid in import_worker.worker_pids():
            os.kill(pid, signal.SIGKILL)
        threads = [threading.Thread(target=upload, args=(i,)) for i in (2 * round_, 2 * round_ + 1)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join(120)
        assert len(import_worker.worker_pids()) <= import_worker.WORKERS
    assert sorted(r.status_code for r in answers.values()) == [201] * 6, [r.text for r in answers.values()]
    assert sorted(r.accepted for r in store.list_rosters()) == [3_000 + i for i in range(6)]
