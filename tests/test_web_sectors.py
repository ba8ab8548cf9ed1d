"""Sectors and Robustness pages on the demo roster, against separate statsmodels fits."""

from __future__ import annotations

import math
from typing import Any

import pandas as pd
import pytest
from conftest import read_mapping, statsmodels_trend, year_counts

ROSTER = 1
WINDOW = (1998, 2022)  # demo_data/README.md: full coverage


def test_sectors_page_finds_the_steep_and_falling_sectors(client: Any, demo_truth: dict[str, Any],
                                                          demo_clean: pd.DataFrame) -> None:
    response = client.get(f"/rosters/{ROSTER}/sectors")
    assert response.status_code == 200 and response.template.name == "sectors.html"
    page = response.context["page"]
    assert page.error is None and page.window == WINDOW
    fitted = {t.sector: t for t in page.result.sectors if t.status == "fitted"}
    assert len(fitted) == 10
    ors = {s: t.odds_ratio for s, t in fitted.items()}
    # demo_data/README.md: Technology is steep, Utilities falling; sector x year LR test p = 0.0012
    assert max(ors, key=ors.get) == demo_truth["steep_sector"]
    assert min(ors, key=ors.get) == demo_truth["falling_sector"]
    assert page.result.heterogeneity.p < 0.05
    assert f"Steepest: {demo_truth['steep_sector']}" in page.verdict and page.verdict in response.text
    # each sector alone: statsmodels GLM on that sector's pandas counts
    counts = year_counts(demo_clean, read_mapping("mapping-standard.csv"), WINDOW, by="Industry")
    for sector, trend in fitted.items():
        ref = statsmodels_trend(counts.loc[counts["Industry"] == sector], WINDOW)
        assert math.log(trend.odds_ratio) == pytest.approx(float(ref.params[1]), rel=1e-7), sector
        assert trend.departures == int(counts.loc[counts["Industry"] == sector, "total"].sum())
    api = client.get(f"/api/rosters/{ROSTER}/sectors").json()
    assert api["result"]["heterogeneity"]["p"] == pytest.approx(page.result.heterogeneity.p)
    assert "figure" not in api


def test_sectors_min_departures_skips_small_sectors(client: Any) -> None:
    page = client.get(f"/rosters/{ROSTER}/sectors?min_departures=10000").context["page"]
    assert page.result.heterogeneity is None
    assert page.result.sectors, "no sector listed: the check below would pass on nothing"
    assert all(t.status != "fitted" for t in page.result.sectors)
    assert client.get(f"/rosters/{ROSTER}/sectors?min_departures=zero").status_code == 400


def test_robustness_under_the_strict_mapping_matches_a_direct_fit(client: Any, demo_clean: pd.DataFrame) -> None:
    response = client.get(f"/rosters/{ROSTER}/robustness", params={"mapping": "demo strict:1"})
    assert response.status_code == 200 and response.template.name == "robustness.html"
    page = response.context["page"]
    assert page.error is None and page.chosen == ["demo strict:1"]
    # identical readings are merged into one row ("demo strict v1 = ambiguous codes excluded")
    strict = next(v for v in page.result.variants if v.label.startswith("demo strict v1"))
    counts = year_counts(demo_clean, read_mapping("mapping-strict.csv"), WINDOW)  # pandas + shipped CSV
    ref = statsmodels_trend(counts, WINDOW)
    assert math.log(strict.odds_ratio) == pytest.approx(float(ref.params[1]), rel=1e-8)
    assert strict.departures == int(counts["total"].sum()) and strict.forced == int(counts["forced"].sum())
    assert "Stepped down under pressure: forced → excluded" in strict.changes
    reference = page.result.variants[0]
    assert reference.kind == "reference" and reference.label == "demo standard v1"
    assert page.result.sentence in response.text


def test_robustness_vary_moves_a_code(client: Any, demo_clean: pd.DataFrame) -> None:
    payload = client.get(f"/api/rosters/{ROSTER}/robustness", params={"vary": "Retired"}).json()
    variants = {v["label"]: v for v in payload["result"]["variants"]}
    assert variants["Retired as forced"]["changes"] == ["Retired: voluntary → forced"]
    assert variants["Retired as excluded"]["changes"] == ["Retired: voluntary → excluded"]
    retired = int(((demo_clean["Exit Reason"] == "Retired") & demo_clean["year"].between(*WINDOW)).sum())
    reference = payload["result"]["variants"][0]
    assert variants["Retired as excluded"]["departures"] == reference["departures"] - retired
    assert variants["Retired as forced"]["forced"] == reference["forced"] + retired
    bad = client.get(f"/rosters/{ROSTER}/robustness", params={"vary": "No such code"}).context["page"]
    assert bad.result is None and "does not occur" in bad.error


def test_robustness_page_without_any_estimable_reading_explains_instead_of_drawing(client: Any,
                                                                                      demo_store: Any) -> None:
    # a mapping that calls nothing forced leaves no reading with a trend to estimate: the table must say
    # why (the trend engine's message) and the page must not try to draw an empty forest plot
    codes = demo_store.reason_counts(ROSTER)["code"].astype(str)
    demo_store.save_mapping_version("nothing forced", {c: "voluntary" for c in codes})
    demo_store.update_settings(ROSTER, mapping_name="nothing forced")
    response = client.get(f"/rosters/{ROSTER}/robustness?mapping=nothing forced:1")
    assert response.status_code == 200
    page = response.context["page"]
    assert page.error is None and page.figure is None
    assert page.result.variants, "no variant listed: the check below would pass on nothing"
    assert all(v.odds_ratio is None and v.error for v in page.result.variants)
    assert "fig-robustness" not in response.text
