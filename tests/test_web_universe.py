"""Universe page (upload, derive, flags, rejected rows) and the Rates sections of Coverage and Trend.

Roster and universe come from the recipe in test_universe_rates (flat forced rate, rising voluntary exits,
growing universe); expected values are counted by hand from it, intervals from statsmodels (Garwood).
"""

from __future__ import annotations

from typing import Any

import pytest
from conftest import make_client
from statsmodels.stats.rates import confint_poisson
from test_universe_rates import YEARS, firms_in, recipe, roster_csv, spans_csv

from app.analysis.mapping_files import import_mapping_file
from app.analysis.rates import SHARE_VS_RATE
from app.intake.ingest import import_roster
from app.store import Store
from app.web.coverage import CoverageBody
from app.web.trend import TrendBody
from app.web.universe import UniverseBody


@pytest.fixture
def client(store: Store) -> Any:
    roster = import_roster(store, roster_csv(), "recipe.csv", name="Recipe").roster
    import_mapping_file(store, b"code,category\nDismissed,forced\nRetired,voluntary\nStill in post,excluded\n",
                        roster="Recipe", name="recipe map")
    store.update_settings(roster.id, mapping_name="recipe map", window=(2000, 2019))
    return make_client(store)


def test_without_a_universe_the_page_offers_import_and_derivation(client: Any) -> None:
    r = client.get("/rosters/1/universe")
    assert r.status_code == 200 and r.template.name == "universe.html"
    page = r.context["page"]
    assert page.universe is None and page.caution == SHARE_VS_RATE
    assert '/rosters/1/universe/derive"' in r.text and "no universe yet" in r.text
    assert '/rosters/1/universe"' in client.get("/rosters/1").text  # reachable from the roster
    cov = client.get("/api/rosters/1/coverage").json()
    CoverageBody.model_validate(cov)
    assert cov["rates"]["universe_id"] is None and "Universe page" in cov["rates"]["error"]


def test_upload_shows_summary_and_rates_on_coverage_and_trend(client: Any) -> None:
    r = client.post("/rosters/1/universe", files={"file": ("index.csv", spans_csv(), "text/csv")},
                    follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"].endswith("/rosters/1/universe")
    body = client.get("/api/rosters/1/universe").json()
    UniverseBody.model_validate(body)
    assert (body["universe"]["firms"], body["universe"]["firm_years"]) == (390, sum(firms_in(y) for y in YEARS))
    assert [y["firms"] for y in body["years"]] == [firms_in(y) for y in YEARS]
    assert body["flag_messages"] == [] and body["approximate_note"] is None

    cov = client.get("/rosters/1/coverage")
    rates = cov.context["page"].rates
    assert rates.forced is None and len(rates.years) == 20  # Coverage shows the table, Trend fits
    assert SHARE_VS_RATE in cov.text and "Rates per 100 firm-years" in cov.text
    # 2019: forced by the recipe in 390 firm-years, exact interval from statsmodels (Garwood)
    forced_2019 = recipe()[2019][0]
    lo, hi = confint_poisson(forced_2019, 390.0, method="exact-c")
    last = rates.years[-1]
    assert (last["year"], last["firm_years"], last["forced"]) == (2019, 390, forced_2019)
    assert last["interval"] == pytest.approx([100 * lo, 100 * hi], rel=1e-9)

    trend = client.get("/api/rosters/1/trend").json()
    TrendBody.model_validate(trend)
    section = trend["rates"]
    assert section["forced"]["conf_int"]["profile"][0] < 1 < section["forced"]["conf_int"]["profile"][1]
    assert "the forced share fell because voluntary exits rose" in section["sentence"]
    html = client.get("/rosters/1/trend").text
    assert 'id="rates-finding"' in html and SHARE_VS_RATE in html
    # the rate run is recorded but kept out of the share's list of stored fits
    assert trend["runs"] and all(run["params"]["model"] != "rate" for run in trend["runs"])


def test_bad_upload_shows_the_page_again_with_why_and_stores_nothing(client: Any, store: Store) -> None:
    r = client.post("/rosters/1/universe", files={"file": ("x.csv", b"firm,colour\nA,red\n", "text/csv")})
    assert r.status_code == 400 and r.template.name == "universe.html"
    assert "first- and last-year columns" in r.context["page"].message
    r = client.post("/rosters/1/universe", data={"column_year": "Nope"},
                    files={"file": ("x.csv", b"firm,year\nA,2001\n", "text/csv")})
    assert r.status_code == 400 and "No column 'Nope'" in r.context["page"].message
    assert store.universe_count() == 0
    ok = client.post("/rosters/1/universe", files={"file": ("fy.csv", b"firm,year\nF000,2001\nB,20x1\n", "text/csv")})
    assert ok.status_code == 200  # followed the redirect
    page = client.get("/rosters/1/universe").context["page"]
    assert [(r.line, r.reason) for r in page.rejected] == [(3, "year '20x1' is not a whole number")]
    csv = client.get("/rosters/1/universe/rejected.csv")
    assert csv.headers["content-type"].startswith("text/csv") and "20x1" in csv.text
    # flags: 2000-2019 roster rows but the universe holds only F000 in 2001
    assert page.flags.missing_count > 0 and page.flag_messages


def test_derived_universe_is_marked_approximate_everywhere(client: Any) -> None:
    assert client.post("/rosters/1/universe/derive", follow_redirects=False).status_code == 303
    r = client.get("/rosters/1/universe")
    assert r.context["page"].approximate_note and 'id="approximate"' in r.text
    rates = client.get("/api/rosters/1/trend").json()["rates"]
    assert rates["approximate"] is True and "approximation" in rates["universe_label"]
    assert "approximation" in rates["messages"][0]
    assert client.get("/rosters/999/universe").status_code == 404
