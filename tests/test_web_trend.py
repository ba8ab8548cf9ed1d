"""Trend page and its JSON twin against the stats engine and an independent statsmodels fit."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import profile_interval, read_mapping, statsmodels_trend, year_counts

from app.analysis.inputs import load_input
from app.stats.trend import fit_trend
from app.store import Store

ROSTER = 1
WINDOW = (1998, 2022)  # demo_data/README.md: full coverage 1998-2022


@pytest.fixture(scope="module")
def standard_counts(demo_clean: pd.DataFrame) -> pd.DataFrame:
    return year_counts(demo_clean, read_mapping("mapping-standard.csv"), WINDOW)


def test_page_context_and_html(client: Any, demo_store: Store, standard_counts: pd.DataFrame) -> None:
    response = client.get(f"/rosters/{ROSTER}/trend")
    assert response.status_code == 200
    assert response.template.name == "trend.html"
    page = response.context["page"]
    assert page.error is None and page.model == "linear" and page.window == WINDOW
    fit = page.fit
    # counts from pandas on demo_data/roster.csv with demo_data/mapping-standard.csv
    assert fit["departures"] == int(standard_counts["total"].sum())
    assert fit["forced"] == int(standard_counts["forced"].sum())
    # the stats engine on the same input (app.stats.trend.fit_trend)
    engine = fit_trend(load_input(demo_store, ROSTER).cells(), "linear")
    assert fit["odds_ratio"] == pytest.approx(engine.odds_ratio, rel=1e-12)
    assert fit["conf_int"]["wald"] == pytest.approx(list(engine.conf_int["wald"]), rel=1e-12)
    assert fit["conf_int"]["profile"] == pytest.approx(list(engine.conf_int["profile"]), rel=1e-12)
    assert page.sentence and page.sentence in response.text
    # three decimals: the one odds-ratio convention of pages, sentences and exports (issue 15); was four
    assert f"{fit['odds_ratio']:.3f}" in response.text
    assert f"{fit['odds_ratio']:.4f}" not in response.text
    assert 'data-figure-for="fig-trend"' in response.text


def test_odds_ratio_and_intervals_match_statsmodels(client: Any, standard_counts: pd.DataFrame) -> None:
    fit = client.get(f"/api/rosters/{ROSTER}/trend").json()["fit"]
    ref = statsmodels_trend(standard_counts, WINDOW)  # statsmodels GLM Binomial on the pandas counts
    b, se = float(ref.params[1]), float(ref.bse[1])
    assert math.log(fit["odds_ratio"]) == pytest.approx(b, rel=1e-8)
    assert fit["se"] == pytest.approx(se, rel=1e-6)
    wald = np.exp(np.asarray(ref.conf_int())[1])  # statsmodels' Wald interval, exponentiated
    assert fit["conf_int"]["wald"] == pytest.approx(wald.tolist(), rel=1e-8)
    # profile likelihood: offset refits in statsmodels + scipy brentq (conftest.profile_interval)
    assert fit["conf_int"]["profile"] == pytest.approx(list(profile_interval(standard_counts, WINDOW)), rel=1e-6)
    assert fit["deviance"] == pytest.approx(ref.deviance, rel=1e-8)
    assert fit["dispersion"] == pytest.approx(ref.pearson_chi2 / ref.df_resid, rel=1e-8)
    # demo_data/README.md: at the default seed the GLM over 1998-2022 gives 1.0298 (Wald 1.0149-1.0449)
    assert fit["odds_ratio"] == pytest.approx(1.0298, abs=5e-5)


def test_sector_model_matches_statsmodels_with_sector_intercepts(client: Any, demo_clean: pd.DataFrame) -> None:
    response = client.get(f"/rosters/{ROSTER}/trend?model=sector")
    page = response.context["page"]
    assert page.model == "sector" and page.error is None and page.fit["model"] == "sector"
    counts = year_counts(demo_clean, read_mapping("mapping-standard.csv"), WINDOW, by="Industry")
    ref = statsmodels_trend(counts, WINDOW, sectors=True)  # one intercept per sector + common slope
    assert math.log(page.fit["odds_ratio"]) == pytest.approx(float(ref.params[-1]), rel=1e-7)


def test_spline_model_reports_a_curvature_test(client: Any) -> None:
    page = client.get(f"/rosters/{ROSTER}/trend?model=spline&spline_df=3").context["page"]
    assert page.error is None and page.model == "spline"
    curvature = page.fit["curvature"]
    assert curvature is not None and curvature["df"] == 2 and 0.0 <= curvature["p"] <= 1.0
    assert client.get(f"/api/rosters/{ROSTER}/trend?model=cubic").status_code == 400
    assert client.get(f"/api/rosters/{ROSTER}/trend?model=spline&spline_df=9").status_code == 400


def test_short_window_gives_a_clear_message_not_a_500(client: Any) -> None:
    response = client.get(f"/rosters/{ROSTER}/trend?from=2001&to=2002")
    assert response.status_code == 200
    page = response.context["page"]
    assert page.fit is None and "at least 3 different years" in page.error
    assert page.error in response.text
    api = client.get(f"/api/rosters/{ROSTER}/trend?from=2001&to=2002")
    assert api.status_code == 422 and "at least 3" in api.json()["error"]
    assert client.get(f"/rosters/{ROSTER}/trend?from=2010&to=2001").status_code == 400


def test_no_forced_departures_gives_a_clear_message(client: Any, demo_store: Store) -> None:
    nothing_forced = {code: ("excluded" if cat == "forced" else cat)
                      for code, cat in read_mapping("mapping-standard.csv").items()}
    demo_store.save_mapping_version("nothing forced", nothing_forced)
    demo_store.update_settings(ROSTER, mapping_name="nothing forced")
    response = client.get(f"/rosters/{ROSTER}/trend")
    assert response.status_code == 200
    assert "no forced departures" in response.context["page"].error
    assert client.get(f"/api/rosters/{ROSTER}/trend").status_code == 422


def test_reloading_does_not_store_the_run_twice(client: Any, demo_store: Store) -> None:
    first = client.get(f"/rosters/{ROSTER}/trend").context["page"]
    before = len(demo_store.list_runs(ROSTER, "fit"))
    second = client.get(f"/rosters/{ROSTER}/trend").context["page"]
    assert second.run_id == first.run_id
    assert len(demo_store.list_runs(ROSTER, "fit")) == before
    run = demo_store.get_run(first.run_id)
    assert (run.kind, run.status, run.window, run.mapping_name, run.mapping_version) == (
        "fit", "done", WINDOW, "demo standard", 1)
    # a different window is a different run
    other = client.get(f"/rosters/{ROSTER}/trend?from=2000&to=2020").context["page"]
    assert other.run_id != first.run_id
    assert len(demo_store.list_runs(ROSTER, "fit")) == before + 1


def test_roster_without_mapping_explains_what_to_do(empty_client: Any, store: Store) -> None:
    from conftest import DEMO_CSV

    from app.intake.ingest import import_roster

    roster_id = import_roster(store, DEMO_CSV.read_bytes(), "roster.csv").roster.id
    page = empty_client.get(f"/rosters/{roster_id}/trend").context["page"]
    assert page.fit is None and "no reason-code mapping" in page.error
    assert empty_client.get("/rosters/999/trend").status_code == 404
