"""Resampling pages: start a run (synchronous without a worker pool), run page, progress, cancel, extend."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from conftest import figure_handoff, make_client

from app.analysis.inputs import load_input
from app.analysis.jobs import bootstrap_params, create_bootstrap_run
from app.stats.bootstrap import bootstrap_trend
from app.stats.design import design_matrix, window_centre
from app.store import Store

ROSTER = 1


def start(client: Any, **form: str) -> Any:
    response = client.post(f"/rosters/{ROSTER}/resampling", data=form, follow_redirects=False)
    assert response.status_code == 303, response.text
    return int(response.headers["location"].rsplit("/", 1)[1])


def test_start_runs_and_the_run_page_shows_intervals(client: Any, demo_store: Store) -> None:
    run_id = start(client, unit="firm", resamples="300", seed="2024")
    run = demo_store.get_run(run_id)
    assert run.status == "done" and run.params == {"unit": "firm", "resamples": 300, "seed": 2024,
                                                    "model": "linear", "sampler": 4}
    response = client.get(f"/runs/{run_id}")
    assert response.status_code == 200 and response.template.name == "run.html"
    page = response.context["page"]
    methods = [r["method"] for r in page.rows]
    assert methods == ["percentile", "basic", "BCa", "normal", "studentized", "Wald", "profile likelihood"]
    # the same seed through app.stats.bootstrap directly
    inp = load_input(demo_store, ROSTER)
    cells = inp.cells()
    direct = bootstrap_trend(cells, design_matrix(cells.groups, "linear", window_centre(inp.window)),
                             unit="firm", resamples=300, seed=2024)
    assert page.rows[2]["interval"] == pytest.approx(list(direct.intervals["bca"]), rel=1e-12)
    # three decimals: the one odds-ratio convention of pages, sentences and exports (issue 15); was four
    assert f"{direct.intervals['bca'][0]:.3f}" in response.text
    assert page.comparison and "No finished departure-resampling run" in page.comparison
    spec = figure_handoff(response.text, "fig-bootstrap")
    assert spec["figure"]["data"]
    api = client.get(f"/api/runs/{run_id}").json()
    assert api["run"]["result"]["resamples"] == 300 and "figure" not in api
    listed = client.get(f"/rosters/{ROSTER}/resampling").context["page"]
    assert [r.id for r in listed.runs] == [run_id]
    assert client.get(f"/api/rosters/{ROSTER}/runs").json()["runs"][0]["id"] == run_id


def test_bad_start_parameters_show_the_form_again(client: Any, demo_store: Store) -> None:
    before = demo_store.counts()["runs"]
    response = client.post(f"/rosters/{ROSTER}/resampling", data={"unit": "firm", "resamples": "10"})
    assert response.status_code == 400 and response.template.name == "resampling.html"
    assert "resamples must be between 100" in response.context["page"].error
    response = client.post(f"/rosters/{ROSTER}/resampling", data={"unit": "firm", "resamples": "many"})
    assert response.status_code == 400 and "whole number" in response.context["page"].error
    assert demo_store.counts()["runs"] == before


def test_firm_and_departure_runs_are_compared(client: Any) -> None:
    firm = start(client, unit="firm", resamples="300", seed="7")
    departure = start(client, unit="departure", resamples="300", seed="7")
    page = client.get(f"/runs/{firm}").context["page"]
    assert page.comparison.startswith("Resampling whole firms")
    assert f"run {departure}" in page.comparison
    # widths on the log scale, as the sentence says
    firm_iv, dep_iv = (np.log(client.get(f"/api/runs/{i}").json()["run"]["result"]["conf_int"]["bca"])
                       for i in (firm, departure))
    change = (firm_iv[1] - firm_iv[0]) / (dep_iv[1] - dep_iv[0]) - 1
    if "barely changed" not in page.comparison:  # the noise threshold is the product's choice
        assert f"by {abs(change) * 100:.0f}%" in page.comparison
        assert ("widened" in page.comparison) == (change > 0)
    assert client.get(f"/runs/{departure}").context["page"].comparison == page.comparison.replace(
        f"run {departure}", f"run {firm}")


def test_progress_partial_and_cancel_before_start(client: Any, demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    run_id = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="firm", resamples=400, seed=1))
    partial = client.get(f"/runs/{run_id}/progress")
    assert partial.template.name == "_partials/run_progress.html"
    assert 'hx-trigger="every 1s"' in partial.text and "0 of 400 resamples" in partial.text
    assert "hx-refresh" not in partial.headers
    cancel = client.post(f"/runs/{run_id}/cancel", follow_redirects=False)
    assert cancel.status_code == 303
    client.app.state.jobs.submit(run_id)  # the worker sees the request before drawing anything
    assert demo_store.get_run(run_id).status == "cancelled"
    ended = client.get(f"/runs/{run_id}/progress")
    assert ended.headers["hx-refresh"] == "true" and "hx-trigger" not in ended.text
    page = client.get(f"/runs/{run_id}")
    assert "This run is <strong>cancelled</strong>" in page.text


def test_extend_through_the_page_keeps_the_first_replicates(client: Any, demo_store: Store) -> None:
    run_id = start(client, unit="departure", resamples="300", seed="31")
    first = demo_store.replicates(run_id).copy()
    response = client.post(f"/runs/{run_id}/extend", data={"extra": "200"}, follow_redirects=False)
    assert response.status_code == 303
    after = demo_store.replicates(run_id)
    assert len(after) == 500 and demo_store.get_run(run_id).status == "done"
    np.testing.assert_array_equal(after[:300], first)
    refused = client.post(f"/runs/{run_id}/extend", data={"extra": "99999999"})
    assert refused.status_code == 400 and "extra can add 0 to 199,500 resamples" in refused.context["page"]["message"]


def test_unknown_and_non_bootstrap_runs_are_404(client: Any, demo_store: Store) -> None:
    assert client.get("/runs/999").status_code == 404
    assert client.get("/api/runs/999").json()["error"].startswith("No run number 999")
    fit_run = client.get(f"/rosters/{ROSTER}/trend").context["page"].run_id
    assert client.get(f"/runs/{fit_run}").status_code == 404
    assert client.get(f"/runs/{fit_run}?method=median").status_code == 400


def test_app_start_marks_runs_without_a_live_worker_interrupted(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    params = bootstrap_params(unit="firm", resamples=200, seed=2)
    queued = create_bootstrap_run(demo_store, inp, params)
    running = create_bootstrap_run(demo_store, inp, params)
    demo_store.set_run_status(running, "running")  # running, held by no worker: its server died
    client = make_client(demo_store)  # create_app calls Store.reap_stale_runs
    assert client.app.state.interrupted_at_start == [running]
    assert demo_store.get_run(queued).status == "queued"  # waits for a worker in any server process
    page = client.get(f"/runs/{running}")
    assert page.context["page"].run.status == "interrupted"
    assert "Finish this run" in page.text
    # finishing it continues with the same seed and gives the stored-then-finished run
    client.post(f"/runs/{running}/extend", data={"extra": "0"})
    assert demo_store.get_run(running).status == "done"


def test_a_run_of_another_statistic_within_sectors_is_stored_and_shown(client: Any, demo_store: Store) -> None:
    # oracle: the same statistic and seed through app.stats directly (make_statistic + bootstrap_statistic)
    from app.stats.bootstrap import bootstrap_statistic
    from app.stats.statistics import firm_strata, make_statistic

    run_id = start(client, unit="firm", resamples="250", seed="77", statistic="period_difference",
                   periods="1998-2010:2011-2022", stratify="sector")
    run = demo_store.get_run(run_id)
    assert run.params == {"unit": "firm", "resamples": 250, "seed": 77, "model": "linear", "sampler": 4,
                          "statistic": "period_difference", "stratify": "sector",
                          "periods": [[1998, 2010], [2011, 2022]]}
    inp = load_input(demo_store, ROSTER)
    cells = inp.cells()
    statistic = make_statistic("period_difference", cells, centre=window_centre(inp.window),
                               periods=((1998, 2010), (2011, 2022)))
    direct = bootstrap_statistic(cells, statistic, unit="firm", resamples=250, seed=77,
                                 strata=firm_strata(inp.cells(by_sector=True))[0])
    assert run.result is not None and run.result["stratified"] and run.result["scale"] == "identity"
    for method in ("percentile", "bca", "normal", "studentized"):
        assert run.result["conf_int"][method] == pytest.approx(list(direct.intervals[method]), rel=1e-12)
    page = client.get(f"/runs/{run_id}?method=studentized")
    assert page.status_code == 200 and "difference in the forced share, 2011\u20132022 minus 1998\u20132010" in page.text
    assert "within sector" in page.text and "Wald" not in [r["method"] for r in page.context["page"].rows]
    listing = client.get(f"/rosters/{ROSTER}/resampling").text
    assert 'value="heterogeneity"' in listing and 'name="stratify"' in listing


@pytest.mark.parametrize(("form", "words"), [
    ({"statistic": "sector_slope"}, "needs a sector"),
    ({"statistic": "sector_slope", "sector": "Nowhere"}, "sector must be one of"),
    ({"statistic": "period_difference", "periods": "2010-2012"}, "Periods look like"),
    ({"unit": "departure", "stratify": "sector"}, "choose unit firm"),
])
def test_bad_statistic_choices_come_back_on_the_form(client: Any, demo_store: Store, form: dict, words: str) -> None:
    response = client.post(f"/rosters/{ROSTER}/resampling", data={"resamples": "200", **form},
                           follow_redirects=False)
    assert response.status_code == 400 and words in response.text
    assert demo_store.list_runs(ROSTER, "bootstrap") == []  # nothing stored
