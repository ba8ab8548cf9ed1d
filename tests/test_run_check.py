"""``helmshift run check``: a finished bootstrap run redrawn with this installation and compared with what it
stored (app/analysis/run_check.py).

Oracles: the stored replicates of runs drawn by each firm sampler (1, 3, 4), extended across chunk boundaries,
and by departures (the check must find them equal bit for bit, and its recomputed summary equal to the stored
one); a stored replicate or interval bound changed by hand here (the check must name exactly that resample or
that key, by the size of the change made).
"""

from __future__ import annotations

import json
import zlib
from typing import Any

import numpy as np
import pytest
from sqlalchemy import select, update

from app.analysis.inputs import load_input
from app.analysis.jobs import create_bootstrap_run, execute_bootstrap, extend_run, run_bootstrap_now
from app.analysis.run_check import SUMMARY_TOLERANCE, check_run
from app.analysis.run_params import bootstrap_params
from app.analysis.runs import run_trend
from app.cli import main
from app.store import Store, StoreError
from app.store.tables import run_replicates, runs


def _url(store: Store) -> str:
    return store.engine.url.render_as_string(hide_password=False)


def _cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, Any, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, json.loads(out) if out.strip().startswith("{") else out, err


@pytest.mark.parametrize("sampler", [1, 3, 4])
def test_runs_of_each_sampler_redraw_bit_for_bit(demo_store: Store, sampler: int) -> None:
    inp = load_input(demo_store, 1)
    params = bootstrap_params(unit="firm", resamples=300, seed=17, sampler=sampler)
    run_id = create_bootstrap_run(demo_store, inp, params)
    execute_bootstrap(demo_store, run_id)
    extend_run(demo_store, run_id, 130)  # a second stretch starting mid-chunk
    execute_bootstrap(demo_store, run_id)
    check = check_run(demo_store, run_id)
    assert (check.resamples, check.sampler, check.differing, check.first_difference) == (430, sampler, 0, None)
    assert check.largest_estimate_difference == 0.0
    assert check.largest_summary_difference <= SUMMARY_TOLERANCE and check.passed
    assert "every replicate" in check.sentence()


def test_a_departure_run_and_a_sector_run_redraw_bit_for_bit(demo_store: Store) -> None:
    inp = load_input(demo_store, 1)
    for options in ({"unit": "departure"}, {"unit": "firm", "model": "sector"}):
        run_id = run_bootstrap_now(demo_store, inp, resamples=200, seed=3, **options)["run"]
        check = check_run(demo_store, run_id)
        assert check.differing == 0 and check.largest_summary_difference <= SUMMARY_TOLERANCE, options


def test_a_changed_replicate_is_found_where_it_was_changed(demo_store: Store, capsys: pytest.CaptureFixture[str]
                                                           ) -> None:
    inp = load_input(demo_store, 1)
    run_id = run_bootstrap_now(demo_store, inp, unit="firm", resamples=200, seed=9)["run"]
    with demo_store.engine.begin() as conn:
        row = conn.execute(select(run_replicates.c.seq, run_replicates.c.data)
                           .where(run_replicates.c.run_id == run_id).order_by(run_replicates.c.seq)).first()
        assert row is not None
        values = np.frombuffer(zlib.decompress(row.data), dtype="<f8").copy()
        values[7] += 0.001  # resample 7's log odds ratio moved by 0.001
        conn.execute(update(run_replicates).where(run_replicates.c.run_id == run_id, run_replicates.c.seq == row.seq)
                     .values(data=zlib.compress(values.tobytes())))
    check = check_run(demo_store, run_id)
    assert (check.differing, check.first_difference) == (1, 7)
    assert check.largest_estimate_difference == pytest.approx(0.001, rel=1e-9)
    assert "do not quote them as reproduced" in check.sentence()
    code, body, _ = _cli(capsys, "run", "check", str(run_id), "--db", _url(demo_store), "--json")
    assert code == 1 and body["differing"] == 1 and body["identical"] is False


def test_a_changed_interval_bound_is_named(demo_store: Store, capsys: pytest.CaptureFixture[str]) -> None:
    inp = load_input(demo_store, 1)
    run_id = run_bootstrap_now(demo_store, inp, unit="firm", resamples=200, seed=9)["run"]
    code, body, _ = _cli(capsys, "run", "check", str(run_id), "--db", _url(demo_store), "--json")
    assert code == 0 and body["identical"] is True, body
    result = demo_store.get_run(run_id).result
    assert result is not None
    lower = result["conf_int"]["bca"][0]
    result["conf_int"]["bca"][0] = lower * (1 + 1e-6)
    with demo_store.engine.begin() as conn:
        conn.execute(update(runs).where(runs.c.id == run_id).values(result=json.dumps(result)))
    check = check_run(demo_store, run_id)
    assert check.differing == 0
    assert check.summary_key == "conf_int.bca.0"
    assert check.largest_summary_difference == pytest.approx(1e-6, rel=1e-3)
    code, text, _ = _cli(capsys, "run", "check", str(run_id), "--db", _url(demo_store))
    assert code == 1 and "conf_int.bca.0" in text


def test_only_a_finished_bootstrap_run_is_checked(demo_store: Store, capsys: pytest.CaptureFixture[str]) -> None:
    inp = load_input(demo_store, 1)
    queued = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="firm", resamples=100, seed=1))
    with pytest.raises(StoreError, match="only a finished bootstrap run"):
        check_run(demo_store, queued)
    with pytest.raises(StoreError, match="done fit run; only a finished bootstrap run"):
        check_run(demo_store, run_trend(demo_store, inp).run_id)  # a fit draws nothing
    code, _, err = _cli(capsys, "run", "check", "999999", "--db", _url(demo_store))
    assert code != 0 and "999999" in err


def test_the_run_page_names_the_check(client: Any, demo_store: Store) -> None:
    inp = load_input(demo_store, 1)
    run_id = run_bootstrap_now(demo_store, inp, unit="firm", resamples=200, seed=9)["run"]
    assert f"helmshift run check {run_id}" in client.get(f"/runs/{run_id}").text
