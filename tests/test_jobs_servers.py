"""Jobs across server processes: two `helmshift serve` processes on one store (a SQLite file, or with
``--backend postgresql`` a PostgreSQL database) share the run queue.

A run started on one server is claimed by exactly one worker and finishes once, with exactly the requested
replicates, seen from the other; a worker killed with SIGKILL, or frozen with SIGSTOP (alive, but silent),
loses its run to the other server, which marks it interrupted within the stale limit; finished again, the run
holds the same replicates as the seeded stream drawn in one go (app.stats.sampling: resample i comes from
seeded block i // 250), so nothing was lost or written twice.
"""

from __future__ import annotations

import signal
import time
from collections.abc import Iterator
from typing import Any

import httpx
import numpy as np
import pytest
from conftest import Databases, LiveServer
from sqlalchemy import select

from app.analysis.inputs import load_input
from app.stats.bootstrap import draw_replicates
from app.stats.design import design_matrix, window_centre
from app.store import Store
from app.store.tables import run_replicates, runs

pytestmark = pytest.mark.slow

HEARTBEAT, STALE_AFTER = 0.3, 4.0
#: the seconds a run may take to be marked interrupted after its worker went silent: the stale limit, one
#: heartbeat of the reaping server, and slack for a machine shared with other work
NOTICED_WITHIN = STALE_AFTER + HEARTBEAT + 6.0
ENDED = ("done", "failed", "cancelled", "interrupted")


@pytest.fixture
def shared_url(databases: Databases, shared_demo_url: str) -> Iterator[str]:
    """A private copy of the demo store on the chosen backend, for the servers to share."""
    url = databases.new(template=shared_demo_url)
    yield url
    databases.drop(url)


@pytest.fixture
def two_servers(shared_url: str, live_server: Any) -> tuple[LiveServer, LiveServer]:
    env = {"HELMSHIFT_JOB_HEARTBEAT": str(HEARTBEAT), "HELMSHIFT_JOB_STALE_AFTER": str(STALE_AFTER)}
    return live_server(shared_url, env=env), live_server(shared_url, env=env)


def post_form(server: LiveServer, path: str, data: dict[str, str]) -> httpx.Response:
    return httpx.post(f"{server.base_url}{path}", data=data, headers={"origin": server.base_url},
                      follow_redirects=False, timeout=60)


def start_run(server: LiveServer, unit: str, resamples: int, seed: int) -> int:
    r = post_form(server, "/rosters/1/resampling", {"unit": unit, "resamples": str(resamples), "seed": str(seed)})
    assert r.status_code == 303, (r.status_code, r.text[:300])
    return int(r.headers["location"].rstrip("/").rsplit("/", 1)[-1])


def run_json(server: LiveServer, run_id: int) -> dict[str, Any]:
    r = httpx.get(f"{server.base_url}/api/runs/{run_id}", timeout=30)
    assert r.status_code == 200, r.text[:300]
    run: dict[str, Any] = r.json()["run"]
    return run


def wait_status(server: LiveServer, run_id: int, states: tuple[str, ...], timeout: float) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        run = run_json(server, run_id)
        if run["status"] in states:
            return run
        time.sleep(0.05)
    raise AssertionError(f"run {run_id} not {states} within {timeout} s: {run_json(server, run_id)}")


def holder(url: str, run_id: int, servers: tuple[LiveServer, ...]) -> LiveServer:
    """The server whose worker holds the run (its process id is in the worker's name)."""
    store = Store(url)
    try:
        with store.engine.connect() as conn:
            worker = conn.execute(select(runs.c.claimed_by).where(runs.c.id == run_id)).scalar_one()
    finally:
        store.dispose()
    pid = int(worker.rsplit(":", 2)[1])
    owners = [s for s in servers if s.proc.pid == pid]
    assert len(owners) == 1, (worker, [s.proc.pid for s in servers])
    return owners[0]


def wait_progress(server: LiveServer, run_id: int, at_least: int, timeout: float = 60) -> int:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        run = run_json(server, run_id)
        if run["progress_done"] >= at_least or run["status"] in ENDED:
            return int(run["progress_done"])
        time.sleep(0.02)
    raise AssertionError(f"run {run_id} made no progress within {timeout} s")


def stored_chunks(url: str, run_id: int) -> tuple[list[int], np.ndarray]:
    store = Store(url)
    try:
        with store.engine.connect() as conn:
            seqs = list(conn.execute(select(run_replicates.c.seq).where(run_replicates.c.run_id == run_id)
                                     .order_by(run_replicates.c.seq)).scalars())
        return seqs, store.replicates(run_id)
    finally:
        store.dispose()


def seeded_stream(url: str, resamples: int, seed: int) -> np.ndarray:
    store = Store(url)
    try:
        inp = load_input(store, 1)
        cells = inp.cells(by_sector=False)
        design = design_matrix(cells.groups, "linear", window_centre(inp.window))
        return draw_replicates(cells, design, unit="firm", resamples=resamples, seed=seed).estimates
    finally:
        store.dispose()


def test_runs_started_on_one_server_finish_exactly_once_seen_from_the_other(
        two_servers: tuple[LiveServer, LiveServer], shared_url: str) -> None:
    a, b = two_servers
    ids = [start_run(a, "departure", 3000, seed) for seed in (21, 22, 23, 24)]
    ends = [wait_status(b, run_id, ENDED, timeout=180) for run_id in ids]
    assert [(e["status"], e["progress_done"], e["progress_total"]) for e in ends] == [("done", 3000, 3000)] * 4, ends
    for run_id in ids:
        assert run_json(b, run_id)["result"]["resamples"] == 3000
        seqs, values = stored_chunks(shared_url, run_id)
        assert len(values) == 3000 and seqs == list(range(len(seqs)))  # every chunk once, none twice
    for server in (a, b):
        log = server.log.read_text(errors="replace")
        assert "Traceback" not in log and "failed" not in log, log[-2000:]


def test_a_killed_worker_loses_its_run_to_the_other_server(two_servers: tuple[LiveServer, LiveServer],
                                                           shared_url: str) -> None:
    resamples, seed = 15_000, 77
    a, b = two_servers
    run_id = start_run(a, "firm", resamples, seed)
    assert wait_progress(b, run_id, 1000) < resamples
    owner = holder(shared_url, run_id, (a, b))
    other = b if owner is a else a
    owner.stop(signal.SIGKILL)
    killed = time.monotonic()
    run = wait_status(other, run_id, ("interrupted",), timeout=NOTICED_WITHIN + 30)
    assert time.monotonic() - killed < NOTICED_WITHIN, "noticed too late"
    assert "start it again" in run["error"] and 0 < run["progress_done"] < resamples

    assert post_form(other, f"/runs/{run_id}/extend", {"extra": "0"}).status_code == 303
    done = wait_status(other, run_id, ENDED, timeout=240)
    assert (done["status"], done["progress_done"]) == ("done", resamples), done
    seqs, values = stored_chunks(shared_url, run_id)
    assert seqs == list(range(len(seqs)))
    np.testing.assert_array_equal(values, seeded_stream(shared_url, resamples, seed))


def test_a_frozen_worker_is_found_by_its_heartbeat_and_cannot_write_after(
        two_servers: tuple[LiveServer, LiveServer], shared_url: str) -> None:
    resamples, seed = 15_000, 78
    a, b = two_servers
    run_id = start_run(b, "firm", resamples, seed)
    assert wait_progress(a, run_id, 1000) < resamples
    owner = holder(shared_url, run_id, (a, b))
    other = b if owner is a else a
    owner.proc.send_signal(signal.SIGSTOP)  # alive (its process exists) but silent: only the heartbeat tells
    try:
        frozen = time.monotonic()
        run = wait_status(other, run_id, ("interrupted",), timeout=NOTICED_WITHIN + 30)
        waited = time.monotonic() - frozen
        assert STALE_AFTER - 1.0 < waited < NOTICED_WITHIN, waited  # by the heartbeat, not sooner
        stopped_at = run["progress_done"]
        assert post_form(other, f"/runs/{run_id}/extend", {"extra": "0"}).status_code == 303
        wait_progress(other, run_id, stopped_at + 1000)
    finally:
        owner.proc.send_signal(signal.SIGCONT)
    # woken, the old worker finds its claim gone at its next write and leaves the run to its new holder
    done = wait_status(other, run_id, ENDED, timeout=240)
    assert (done["status"], done["progress_done"]) == ("done", resamples), done
    deadline = time.monotonic() + 30
    while "was taken from" not in owner.log.read_text(errors="replace") and time.monotonic() < deadline:
        time.sleep(0.1)
    assert "was taken from" in owner.log.read_text(errors="replace")
    seqs, values = stored_chunks(shared_url, run_id)
    assert seqs == list(range(len(seqs)))
    np.testing.assert_array_equal(values, seeded_stream(shared_url, resamples, seed))
