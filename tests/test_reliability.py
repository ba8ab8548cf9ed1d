"""Reliability of the real server process: concurrent jobs and pages, crashes, restarts.

Every server here is a `helmshift serve` subprocess on a free loopback port (tests/conftest.py); all
traffic goes to 127.0.0.1, bounded in count and time. SQLite facts relied on (WAL lets readers run
beside one writer; a transaction killed before COMMIT leaves no trace) are from the SQLite
documentation on WAL and atomic commit; that they hold for our store is what is tested.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from app.store import Store

pytestmark = pytest.mark.slow

DONE_STATES = ("done", "failed", "cancelled", "interrupted")


def post_form(server: Any, path: str, data: dict[str, str]) -> httpx.Response:
    return httpx.post(f"{server.base_url}{path}", data=data, headers={"origin": server.base_url},
                      follow_redirects=False, timeout=60)


def start_run(server: Any, resamples: int, seed: int, unit: str = "firm") -> int:
    r = post_form(server, "/rosters/1/resampling", {"unit": unit, "resamples": str(resamples), "seed": str(seed)})
    assert r.status_code == 303, (r.status_code, r.text[:300])
    return int(r.headers["location"].rstrip("/").rsplit("/", 1)[-1])


def run_json(server: Any, run_id: int) -> dict[str, Any]:
    r = httpx.get(f"{server.base_url}/api/runs/{run_id}", timeout=30)
    assert r.status_code == 200, r.text[:300]
    run: dict[str, Any] = r.json()["run"]
    return run


def wait_for_end(server: Any, run_id: int, timeout: float = 90) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        run = run_json(server, run_id)
        if run["status"] in DONE_STATES:
            return run
        time.sleep(0.2)
    raise AssertionError(f"run {run_id} did not end within {timeout} s")


def test_store_uses_wal_and_a_busy_timeout(tmp_path: Path) -> None:
    store = Store(f"sqlite:///{tmp_path / 'wal.db'}")
    with store.engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert int(conn.exec_driver_sql("PRAGMA busy_timeout").scalar()) >= 5000
        assert int(conn.exec_driver_sql("PRAGMA foreign_keys").scalar()) == 1
    assert store.integrity_check() == "ok"
    store.dispose()


def test_jobs_and_pages_at_the_same_time(demo_db: Path, live_server: Any) -> None:
    server = live_server(demo_db)
    run_ids = [start_run(server, 20_000, seed) for seed in (11, 12, 13, 14)]
    pages = ["/rosters", "/rosters/1", "/rosters/1/reasons", "/rosters/1/coverage", "/rosters/1/resampling",
             "/api/rosters/1/runs", "/api/health", f"/runs/{run_ids[0]}", f"/runs/{run_ids[-1]}/progress",
             "/api/rosters/1/coverage"]
    # the trend page stores a fit run: writes from page requests race the jobs' writes
    urls = [pages[i % len(pages)] if i % 20 else "/rosters/1/trend" for i in range(100)]

    def fetch(url: str) -> tuple[str, int, str]:
        r = httpx.get(f"{server.base_url}{url}", timeout=90, follow_redirects=False)
        return url, r.status_code, r.text if r.status_code >= 400 else ""

    with ThreadPoolExecutor(max_workers=8) as pool:
        answers = list(pool.map(fetch, urls))
    bad = [(u, s, t[:200]) for u, s, t in answers if s not in (200, 303)]
    assert bad == []
    ends = [wait_for_end(server, run_id, timeout=120) for run_id in run_ids]
    assert [e["status"] for e in ends] == ["done"] * 4, [(e["status"], e.get("error")) for e in ends]
    assert all(e["progress_done"] == 20_000 for e in ends)
    log = server.log.read_text(errors="replace")
    assert "database is locked" not in log and "Traceback" not in log, log[-2000:]
    server.stop()
    store = Store(f"sqlite:///{demo_db}")
    assert store.integrity_check() == "ok"
    store.dispose()


def test_run_cut_by_a_crash_is_marked_and_can_be_finished(demo_db: Path, live_server: Any) -> None:
    resamples, seed = 30_000, 424242
    server = live_server(demo_db)
    run_id = start_run(server, resamples, seed)
    deadline = time.monotonic() + 60
    progress = 0
    while time.monotonic() < deadline:
        progress = run_json(server, run_id)["progress_done"]
        if progress >= 1000:
            break
        time.sleep(0.02)
    server.stop(signal.SIGKILL)
    assert 0 < progress < resamples, f"the kill did not land mid-run (progress {progress})"

    server = live_server(demo_db)
    run = run_json(server, run_id)
    assert run["status"] == "interrupted", run
    assert "start it again" in run["error"]
    page = httpx.get(f"{server.base_url}/runs/{run_id}", timeout=30).text
    assert "interrupted" in page and "Finish this run" in page
    r = post_form(server, f"/runs/{run_id}/extend", {"extra": "0"})
    assert r.status_code == 303
    finished = wait_for_end(server, run_id)
    assert finished["status"] == "done" and finished["progress_done"] == resamples
    server.stop()

    # a clean run with the same inputs and seed, from the command line on the same database
    out = subprocess.run([sys.executable, "-m", "app.cli", "bootstrap", "--db", str(demo_db), "--roster", "1",
                          "--resamples", str(resamples), "--seed", str(seed), "--unit", "firm", "--json"],
                         capture_output=True, text=True, timeout=120, check=True)
    clean = json.loads(out.stdout)
    store = Store(f"sqlite:///{demo_db}")
    resumed_reps, clean_reps = store.replicates(run_id), store.replicates(int(clean["run"]))
    assert len(resumed_reps) == resamples
    np.testing.assert_array_equal(resumed_reps, clean_reps)
    resumed = store.get_run(run_id).result
    assert resumed is not None
    assert resumed["conf_int"] == clean["conf_int"]
    assert store.integrity_check() == "ok"
    store.dispose()


def big_roster(path: Path, rows: int) -> None:
    rng = np.random.default_rng(20261201)
    firms = rng.integers(0, 20_000, rows)
    years = rng.integers(1995, 2023, rows)
    reasons = np.array(["Retired", "Dismissed by board", "Left for another post", "Health reasons"])
    picks = reasons[rng.integers(0, len(reasons), rows)]
    with path.open("w", encoding="utf-8") as f:
        f.write("Issuer Code,Issuer Name,Industry,FY,Exit Reason,Executive\n")
        f.writelines(f"F{firm},Firm {firm},Sector {firm % 7},{year},{why},Person {i}\n"
                     for i, (firm, year, why) in enumerate(zip(firms, years, picks, strict=True)))


@pytest.mark.parametrize("kill_at_wal_bytes", [512 * 1024, 6 * 1024 * 1024])
def test_import_is_all_or_nothing_when_killed(tmp_path: Path, kill_at_wal_bytes: int) -> None:
    rows = 200_000
    source = tmp_path / "big.csv"
    big_roster(source, rows)
    db = tmp_path / "import.db"
    Store(f"sqlite:///{db}").dispose()  # schema in place, so the WAL grows only with the import itself
    wal = Path(f"{db}-wal")
    base = wal.stat().st_size if wal.exists() else 0
    proc = subprocess.Popen([sys.executable, "-m", "app.cli", "import", str(source), "--db", str(db), "--json"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    killed_while_running = False
    while time.monotonic() < deadline and proc.poll() is None:
        if wal.exists() and wal.stat().st_size - base >= kill_at_wal_bytes:
            proc.send_signal(signal.SIGKILL)
            killed_while_running = True
            break
        time.sleep(0.005)
    proc.wait(30)
    assert killed_while_running, "the import ended before the kill; raise the row count"
    store = Store(f"sqlite:///{db}")
    rosters = store.list_rosters()
    counts = store.counts()
    # the whole import writes ~50 MB of pages and its commit frame comes last, so a kill at these WAL
    # sizes lands inside the transaction: nothing of it may survive (and never a part of it)
    assert rosters == [], rosters
    assert counts["departures"] == 0 and counts["rejected_rows"] == 0
    assert store.integrity_check() == "ok"
    store.dispose()


def api_state(server: Any, run_ids: list[int]) -> dict[str, Any]:
    def get(path: str) -> Any:
        r = httpx.get(f"{server.base_url}{path}", timeout=60)
        assert r.status_code == 200, (path, r.status_code)
        return r.json()

    runs = get("/api/rosters/1/runs")  # default_seed included: derived from the roster, so it survives a restart
    return {
        "rosters": get("/api/rosters"), "roster": get("/api/rosters/1"), "reasons": get("/api/rosters/1/reasons"),
        "coverage": get("/api/rosters/1/coverage"), "runs": runs,
        "run pages": [get(f"/api/runs/{i}") for i in run_ids],
    }


def test_restart_keeps_rosters_mappings_and_runs(demo_db: Path, live_server: Any) -> None:
    server = live_server(demo_db)
    r = post_form(server, "/rosters/1/reasons", {"mapping_name": "restart check", "code-1": "Retired",
                                                  "cat-1": "voluntary", "code-2": "Dismissed by board",
                                                  "cat-2": "forced", "note": "before restart"})
    assert r.status_code == 303
    assert post_form(server, "/rosters/1/window", {"window_from": "1998", "window_to": "2020"}).status_code == 303
    run_ids = [start_run(server, 500, 5, unit) for unit in ("firm", "departure")]
    assert all(wait_for_end(server, i)["status"] == "done" for i in run_ids)
    before = api_state(server, run_ids)
    assert before["reasons"]["mapping"]["name"] == "restart check"
    for sig in (signal.SIGTERM, signal.SIGINT):
        # uvicorn shuts down gracefully, then re-raises the signal: exit status 0 or -signal
        assert server.stop(sig) in (0, -sig)
        assert "Traceback" not in server.log.read_text(errors="replace")
        server = live_server(demo_db)
        assert api_state(server, run_ids) == before
    server.stop()
    store = Store(f"sqlite:///{demo_db}")
    assert store.integrity_check() == "ok"
    store.dispose()
