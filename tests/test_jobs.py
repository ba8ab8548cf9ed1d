"""Bootstrap jobs: stored runs, chunked execution, extension, cancel, failure and crash recovery."""

from __future__ import annotations

import threading
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from app.analysis.inputs import load_input
from app.analysis.jobs import (
    CHUNK,
    JobRunner,
    bootstrap_params,
    create_bootstrap_run,
    execute_bootstrap,
    extend_run,
    replicate_odds_ratios,
    run_bootstrap_now,
)
from app.stats.bootstrap import bootstrap_trend, draw_replicates
from app.stats.design import design_matrix, window_centre
from app.store import RunClaimLost, Store, StoreError

ROSTER = 1


def engine_inputs(store: Store, model: str = "linear") -> tuple:
    inp = load_input(store, ROSTER)
    cells = inp.cells(by_sector=model == "sector")
    return inp, cells, design_matrix(cells.groups, model, window_centre(inp.window))


@pytest.mark.parametrize(("unit", "resamples"), [("firm", CHUNK + 250), ("departure", 300)])
def test_job_intervals_equal_the_engine_with_the_same_seed(demo_store: Store, unit: str, resamples: int) -> None:
    inp, cells, design = engine_inputs(demo_store)
    result = run_bootstrap_now(demo_store, inp, unit=unit, resamples=resamples, seed=4321)
    # the job draws in chunks of CHUNK and stores them; app.stats.bootstrap.bootstrap_trend draws at once
    direct = bootstrap_trend(cells, design, unit=unit, resamples=resamples, seed=4321)
    for method in ("percentile", "basic", "bca"):
        assert result["conf_int"][method] == pytest.approx(list(direct.intervals[method]), rel=1e-12, abs=1e-12)
    assert result["odds_ratio"] == pytest.approx(direct.odds_ratio, rel=1e-12)
    assert (result["resamples"], result["failed"], result["unit"], result["seed"]) == (
        resamples, direct.failed, unit, 4321)
    run = demo_store.get_run(result["run"])
    assert run.status == "done" and run.progress_done == resamples == run.progress_total
    np.testing.assert_array_equal(demo_store.replicates(run.id), direct.replicates)
    np.testing.assert_array_equal(replicate_odds_ratios(demo_store, run.id), np.exp(direct.replicates))


def test_extend_keeps_the_first_replicates_and_equals_one_longer_run(demo_store: Store) -> None:
    inp, cells, design = engine_inputs(demo_store)
    run_id = run_bootstrap_now(demo_store, inp, unit="firm", resamples=300, seed=99)["run"]
    first = demo_store.replicates(run_id).copy()
    extend_run(demo_store, run_id, 200)
    assert demo_store.get_run(run_id).status == "queued"
    result = execute_bootstrap(demo_store, run_id)
    after = demo_store.replicates(run_id)
    assert len(after) == 500 and result["resamples"] == 500
    np.testing.assert_array_equal(after[:300], first)
    longer = draw_replicates(cells, design, unit="firm", resamples=500, seed=99)
    np.testing.assert_array_equal(after, longer.estimates)
    direct = bootstrap_trend(cells, design, unit="firm", resamples=500, seed=99)
    assert result["conf_int"]["bca"] == pytest.approx(list(direct.intervals["bca"]), rel=1e-12)


def test_a_run_whose_data_changed_fails_with_its_reason(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    run_id = demo_store.create_run(
        kind="bootstrap", roster_id=ROSTER, params=bootstrap_params(unit="firm", resamples=200, seed=1),
        fingerprint="0000000000000000", mapping_name=inp.mapping.name, mapping_version=inp.mapping.version,
        window=inp.window, progress_total=200)
    JobRunner(demo_store).submit(run_id)
    run = demo_store.get_run(run_id)
    assert run.status == "failed"
    assert "fingerprint" in run.error
    assert len(demo_store.replicates(run_id)) == 0


def test_cancel_before_start_marks_the_run_cancelled(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    run_id = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="firm", resamples=500, seed=3))
    demo_store.request_cancel(run_id)
    JobRunner(demo_store).submit(run_id)
    run = demo_store.get_run(run_id)
    assert run.status == "cancelled" and run.progress_done == 0
    assert len(demo_store.replicates(run_id)) == 0


def test_threaded_runner_finishes_submitted_and_found_runs(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    runner = JobRunner(demo_store, workers=1, heartbeat=0.2, stale_after=5, poll=0.1)
    runner.start()
    try:
        run_id = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="departure", resamples=200, seed=5))
        runner.submit(run_id)
        # queued without a submit here, as another server process would: the runner finds it by polling
        found = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="departure", resamples=200, seed=6))
        runner.wait(run_id, timeout=60)
        runner.wait(found, timeout=60)
    finally:
        runner.shutdown()
    assert [demo_store.get_run(i).status for i in (run_id, found)] == ["done", "done"]
    assert [len(demo_store.replicates(i)) for i in (run_id, found)] == [200, 200]


def test_shutdown_leaves_a_held_run_interrupted_and_resumable(demo_store: Store) -> None:
    inp, cells, design = engine_inputs(demo_store)
    runner = JobRunner(demo_store, workers=1, heartbeat=0.2, stale_after=5, poll=0.1)
    runner.start()
    run_id = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="firm", resamples=20 * CHUNK, seed=5))
    runner.submit(run_id)
    deadline = time.monotonic() + 60
    while demo_store.get_run(run_id).progress_done == 0 and time.monotonic() < deadline:
        time.sleep(0.02)
    runner.shutdown()
    run = demo_store.get_run(run_id)
    assert run.status == "interrupted" and "start it again" in (run.error or "")
    assert 0 < run.progress_done < 20 * CHUNK == run.progress_total
    kept = demo_store.replicates(run_id)
    assert len(kept) == run.progress_done and len(kept) % CHUNK == 0
    # the stored chunks are the seeded stream's first ones (app.stats.sampling: block i from seed, start)
    np.testing.assert_array_equal(kept, draw_replicates(cells, design, unit="firm", resamples=len(kept),
                                                        seed=5).estimates)


def test_stale_heartbeats_are_reaped_and_fresh_ones_kept(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    params = bootstrap_params(unit="firm", resamples=200, seed=8)
    queued = create_bootstrap_run(demo_store, inp, params)
    legacy = create_bootstrap_run(demo_store, inp, params)
    demo_store.set_run_status(legacy, "running")  # running without a claim: left by a version before claims
    alive = create_bootstrap_run(demo_store, inp, params, claimed_by="host:1:alive")
    dying = create_bootstrap_run(demo_store, inp, params, claimed_by="host:2:dying")
    done = run_bootstrap_now(demo_store, inp, unit="firm", resamples=200, seed=8)["run"]
    assert demo_store.reap_stale_runs(60) == [legacy]
    time.sleep(1.2)
    assert demo_store.heartbeat("host:1:alive", [alive, dying]) == [alive]  # a worker beats only its own runs
    assert demo_store.reap_stale_runs(1.0) == [dying]
    assert [demo_store.get_run(i).status for i in (queued, legacy, alive, dying, done)] == [
        "queued", "interrupted", "running", "interrupted", "done"]
    assert "start it again" in demo_store.get_run(dying).error
    # the dead worker, should it wake up, can no longer write: its claim is gone
    with pytest.raises(RunClaimLost):
        demo_store.append_replicates(dying, np.zeros(3), worker="host:2:dying", progress=3)
    assert len(demo_store.replicates(dying)) == 0


def test_claims_are_exclusive_across_stores_and_threads(demo_store: Store) -> None:
    """Eight claimers on four engines (as four server processes would have) race for 30 queued runs:
    every run is claimed exactly once (SELECT ... FOR UPDATE SKIP LOCKED on PostgreSQL, the conditional
    UPDATE on SQLite)."""
    inp = load_input(demo_store, ROSTER)
    params = bootstrap_params(unit="firm", resamples=200, seed=8)
    queued = [create_bootstrap_run(demo_store, inp, params) for _ in range(30)]
    stores = [Store(demo_store.url) for _ in range(4)]
    start = threading.Barrier(8)

    def claimer(k: int) -> list[int]:
        store, worker, got = stores[k % 4], f"test:{k}", []
        start.wait()
        while (run_id := store.claim_run(worker)) is not None:
            got.append(run_id)
        return got

    try:
        with ThreadPoolExecutor(8) as pool:
            claims = list(pool.map(claimer, range(8)))
    finally:
        for s in stores:
            s.dispose()
    flat = sorted(i for got in claims for i in got)
    assert flat == queued
    assert sum(1 for got in claims if got) >= 2  # more than one claimer won something: a real race
    for k, got in enumerate(claims):
        for run_id in got:
            assert demo_store.heartbeat(f"test:{k}", [run_id]) == [run_id]
    assert demo_store.claim_run("late") is None


@pytest.mark.parametrize(("kwargs", "words"), [
    ({"unit": "year", "resamples": 200, "seed": 1}, "unit must be one of departure, firm"),
    ({"unit": "firm", "resamples": 50, "seed": 1}, "resamples must be between 100"),
    ({"unit": "firm", "resamples": 200, "seed": -1}, "seed must be a non-negative"),
    ({"unit": "firm", "resamples": 200, "seed": 1, "model": "spline"}, "model must be one of linear, sector"),
])
def test_bad_parameters_name_the_allowed_values(kwargs: dict, words: str) -> None:
    with pytest.raises(ValueError, match=words):
        bootstrap_params(**kwargs)


def test_sector_model_bootstrap_runs(demo_store: Store) -> None:
    inp, cells, design = engine_inputs(demo_store, "sector")
    result = run_bootstrap_now(demo_store, inp, unit="firm", resamples=200, seed=12, model="sector")
    direct = bootstrap_trend(cells, design, unit="firm", resamples=200, seed=12)
    assert result["conf_int"]["percentile"] == pytest.approx(list(direct.intervals["percentile"]), rel=1e-12)


def test_a_run_keeps_the_sampler_it_was_started_with(demo_store: Store, monkeypatch: pytest.MonkeyPatch) -> None:
    # oracle: app.stats draws of the same seed by each sampler; a run stored before samplers were recorded
    # (no "sampler" in its params) drew with sampler 1 and must be continued with it
    from app.stats import draws

    inp, cells, design = engine_inputs(demo_store)
    monkeypatch.setattr(draws, "SPAN", max(2, cells.firm_matrix.shape[0] // 3))  # several ranges: samplers differ
    by = {s: draw_replicates(cells, design, unit="firm", resamples=400, seed=31, sampler=s).estimates
          for s in (1, 2, 3, 4)}
    assert not np.array_equal(by[1], by[2]) and not np.array_equal(by[2], by[3]) and not np.array_equal(by[3], by[4])
    new = run_bootstrap_now(demo_store, inp, unit="firm", resamples=300, seed=31)
    assert demo_store.get_run(new["run"]).params["sampler"] == 4 == new["sampler"]
    np.testing.assert_array_equal(demo_store.replicates(new["run"]), by[4][:300])
    params = bootstrap_params(unit="firm", resamples=300, seed=31)
    del params["sampler"]
    old = create_bootstrap_run(demo_store, inp, params)
    assert execute_bootstrap(demo_store, old)["sampler"] == 1
    extend_run(demo_store, old, 100)
    assert "sampler" not in demo_store.get_run(old).params
    assert execute_bootstrap(demo_store, old)["sampler"] == 1
    np.testing.assert_array_equal(demo_store.replicates(old), by[1])


def test_two_extensions_from_one_reading_do_not_lose_one(demo_store: Store) -> None:
    # probe (session 7): two servers extending one ended run at once both read "done, 300 resamples" and both
    # wrote "queued, 300 + extra": the later write replaced the earlier one (one analyst's resamples silently
    # lost) and could re-queue a run another worker had already claimed. The write now holds only while the
    # run is as it was read; the second analyst is told to reload.
    inp, _, _ = engine_inputs(demo_store)
    run_id = run_bootstrap_now(demo_store, inp, unit="firm", resamples=300, seed=5)["run"]
    seen = demo_store.get_run(run_id)  # what the second process read, before the first one wrote
    extend_run(demo_store, run_id, 200)
    with pytest.raises(StoreError, match="changed while you were extending it"):
        demo_store.update_run_params(run_id, {**seen.params, "resamples": 300 + 100}, status="queued", was=seen)
    run = demo_store.get_run(run_id)
    assert (run.status, run.params["resamples"], run.progress_total) == ("queued", 500, 500)


def test_a_queued_or_running_run_is_not_extended(demo_store: Store) -> None:
    inp, _, _ = engine_inputs(demo_store)
    run_id = run_bootstrap_now(demo_store, inp, unit="firm", resamples=300, seed=6)["run"]
    extend_run(demo_store, run_id, 200)  # queued now
    with pytest.raises(StoreError, match="still going"):
        extend_run(demo_store, run_id, 100)
    assert demo_store.claim_run("worker-a", run_id) == run_id  # running now
    with pytest.raises(StoreError, match="still going"):
        extend_run(demo_store, run_id, 100)
    run = demo_store.get_run(run_id)
    assert (run.status, run.params["resamples"]) == ("running", 500)


def test_an_extension_past_the_limit_names_extra_and_what_is_left(demo_store: Store) -> None:
    # probe (session 7): extra=10**20 was refused as "resamples must be between 100 and 200000; got
    # 100000000000000000300", a number the analyst never typed
    from app.analysis.run_params import MAX_RESAMPLES

    inp, _, _ = engine_inputs(demo_store)
    run_id = run_bootstrap_now(demo_store, inp, unit="firm", resamples=300, seed=8)["run"]
    left = MAX_RESAMPLES - 300
    for extra in (10**20, left + 1, -1):
        with pytest.raises(ValueError, match=f"extra can add 0 to {left:,} resamples to this run"):
            extend_run(demo_store, run_id, extra)
    assert demo_store.get_run(run_id).status == "done"
