"""Bootstrap runs of the rate ratio and the adjusted odds ratio: jobs, extend, the command line, the Resampling
and run pages, replicates as data.

Oracles: statsmodels' Poisson GLM with offset log(firm-years) on yearly counts made here with pandas from the
demo roster's CSV and the derived universe (each firm from its first to its last row, counted by hand here), and
``helmshift fit --model adjusted`` (itself checked against statsmodels' record-level clustered logit in
tests/test_cli_rules.py) for the adjusted odds ratio's estimate.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import make_client, read_mapping, year_counts

from app.analysis.adjusted import adjusted_summary
from app.analysis.inputs import load_input
from app.analysis.jobs import execute_bootstrap, extend_run, run_bootstrap_now
from app.analysis.replication import replicates_payload
from app.cli import main
from app.intake.universe import derive_universe
from app.store import Store


@pytest.fixture
def universe_store(demo_store: Store) -> Store:
    derive_universe(demo_store, 1)
    return demo_store


def hand_rate(demo_clean: pd.DataFrame, window: tuple[int, int]) -> float:
    """statsmodels' slope on yearly forced counts and firm-years made from the CSV: a firm is in the derived
    universe from its first to its last row of any kind (still-in-post rows too)."""
    spans = demo_clean.groupby("Issuer Code")["year"].agg(["min", "max"])
    years = np.arange(window[0], window[1] + 1)
    exposure = np.array([((spans["min"] <= y) & (spans["max"] >= y)).sum() for y in years], dtype=float)
    counts = (year_counts(demo_clean, read_mapping("mapping-standard.csv"), window).set_index("year")["forced"]
              .reindex(years, fill_value=0).to_numpy(dtype=float))
    keep = exposure > 0
    X = sm.add_constant(years[keep] - (window[0] + window[1]) / 2)
    res = sm.GLM(counts[keep], X, family=sm.families.Poisson(), offset=np.log(exposure[keep])).fit(tol=1e-12)
    return float(res.params[1])


def test_rate_ratio_run_equals_statsmodels_and_extends(universe_store: Store, demo_clean: pd.DataFrame) -> None:
    inp = load_input(universe_store, 1)
    result = run_bootstrap_now(universe_store, inp, unit="firm", resamples=250, seed=7, statistic="rate_ratio")
    assert result["statistic"] == "rate_ratio" and result["failed"] == 0
    assert result["label"] == "forced departures per 100 firm-years, ratio per year"
    assert result["log_odds_ratio"] == pytest.approx(hand_rate(demo_clean, inp.window), abs=1e-8)  # statsmodels
    run = universe_store.get_run(result["run"])
    assert run.params["universe_id"] == universe_store.current_universe(1).id
    lo, hi = result["conf_int"]["bca"]
    assert lo < result["odds_ratio"] < hi
    first = universe_store.replicates(run.id).copy()
    extend_run(universe_store, run.id, 250)
    more = execute_bootstrap(universe_store, run.id)
    assert more["resamples"] == 500
    np.testing.assert_array_equal(universe_store.replicates(run.id)[:250], first)  # the first ones are kept
    payload = replicates_payload(universe_store, run.id)
    spans = demo_clean.groupby("Issuer Code")["year"].agg(["min", "max"])
    firms = int(((spans["min"] <= inp.window[1]) & (spans["max"] >= inp.window[0])).sum())
    assert len(payload["replicates"]) == 500 and len(payload["jackknife"]) == firms  # every universe firm in the window


def test_rate_ratio_refusals_say_why(demo_store: Store) -> None:
    inp = load_input(demo_store, 1)
    with pytest.raises(ValueError, match="no universe of firm-years yet"):
        run_bootstrap_now(demo_store, inp, unit="firm", resamples=100, seed=1, statistic="rate_ratio")
    with pytest.raises(ValueError, match="Departure resampling does not make sense for a rate"):
        run_bootstrap_now(demo_store, inp, unit="departure", resamples=100, seed=1, statistic="rate_ratio")
    with pytest.raises(ValueError, match="share statistics only"):
        run_bootstrap_now(demo_store, inp, unit="firm", resamples=100, seed=1, statistic="adjusted_odds_ratio",
                          stratify="sector")


def test_cli_bootstrap_adjusted_odds_ratio_equals_the_adjusted_fit(capsys: pytest.CaptureFixture[str],
                                                                  demo_store: Store) -> None:
    inp = load_input(demo_store, 1)
    fit = adjusted_summary(demo_store, inp, "age,tenure")
    code = main(["bootstrap", "--roster", "1", "--statistic", "adjusted_odds_ratio", "--adjust", "age,tenure",
                 "--resamples", "250", "--seed", "3", "--db", demo_store.url, "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    payload = json.loads(out)
    assert payload["odds_ratio"] == pytest.approx(fit["odds_ratio"], rel=1e-10)
    assert payload["label"] == "odds ratio per year adjusted for age, tenure"
    assert demo_store.get_run(payload["run"]).params["adjust"] == ["age", "tenure"]
    code = main(["bootstrap", "--roster", "1", "--statistic", "adjusted_odds_ratio", "--adjust", "colour",
                 "--db", demo_store.url])
    assert code != 0 and "The adjustments are age, tenure, sector" in capsys.readouterr().err


def test_pages_start_and_show_a_rate_ratio_run(universe_store: Store) -> None:
    client = make_client(universe_store)
    page = client.get("/rosters/1/resampling")
    assert 'value="rate_ratio"' in page.text and 'name="adjust"' in page.text
    response = client.post("/rosters/1/resampling", data={"unit": "firm", "resamples": "250", "seed": "5",
                                                           "statistic": "rate_ratio"}, follow_redirects=False)
    assert response.status_code == 303, response.text
    run_url = response.headers["location"]
    html = client.get(run_url).text
    assert "forced departures per 100 firm-years, ratio per year" in html
    assert "Poisson fit of the forced rate (model-based)" in html and "No change (ratio 1)" in html
    run_id = int(run_url.rstrip("/").rsplit("/", 1)[1])
    api = client.get(f"/api/runs/{run_id}").json()
    rows = {r["method"]: r for r in api["rows"]}
    assert rows["profile likelihood"]["interval"][0] < api["run"]["result"]["odds_ratio"]
    assert client.get(f"/runs/{run_id}/replicates.csv").text.startswith("index,log_odds_ratio,odds_ratio")
    assert len(client.get(f"/api/runs/{run_id}/replicates").json()["replicates"]) == 250
    bad = client.post("/rosters/1/resampling", data={"unit": "departure", "resamples": "250", "seed": "5",
                                                      "statistic": "rate_ratio"})
    assert bad.status_code == 400 and "Departure resampling does not make sense for a rate" in bad.text
    adjusted = client.post("/rosters/1/resampling", data={"unit": "departure", "resamples": "250", "seed": "5",
                                                           "statistic": "adjusted_odds_ratio", "adjust": "sector"},
                           follow_redirects=False)
    assert adjusted.status_code == 303
    shown = client.get(adjusted.headers["location"]).text
    assert "odds ratio per year adjusted for sector" in shown and "firm-clustered Wald" in shown

