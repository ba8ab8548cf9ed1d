"""Sector trends and the test of equal trends (budworm per Venables & Ripley; statsmodels as oracle)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import sparse, stats

from app.stats.cells import Cells, build_cells
from app.stats.sectors import fit_sector_trends, sector_trends_to_dict

DATA = Path(__file__).parent / "data"


def sector_cells(frame: pd.DataFrame, window: tuple[int, int]) -> Cells:
    """Cells from columns year, sector, forced, voluntary (the firm matrix is not used here)."""
    groups = frame[["year", "sector", "forced", "voluntary"]].astype(
        {"year": "int64", "sector": str, "forced": "int64", "voluntary": "int64"})
    groups = groups.sort_values(["sector", "year"]).reset_index(drop=True)
    return Cells(groups=groups, firm_ids=np.array([], dtype=object),
                 firm_matrix=sparse.csr_matrix((0, 2 * len(groups)), dtype=np.int64),
                 window=window, by_sector=True)


def sm_glm(forced, totals, X):
    import statsmodels.api as sm

    endog = np.column_stack([forced, np.asarray(totals) - np.asarray(forced)])
    return sm.GLM(endog, X, family=sm.families.Binomial()).fit(tol=1e-12)


@pytest.fixture
def budworm() -> pd.DataFrame:
    d = pd.read_csv(DATA / "budworm.csv")
    # sex plays the part of the sector and log2_dose the part of the year
    return pd.DataFrame({"year": d["log2_dose"], "sector": d["sex"], "forced": d["dead"],
                         "voluntary": d["exposed"] - d["dead"]})


def test_budworm_heterogeneity_lr_test(budworm: pd.DataFrame) -> None:
    result = fit_sector_trends(sector_cells(budworm, (0, 5)), centre=0.0)
    h = result.heterogeneity
    assert h is not None and h.sectors == ("F", "M")
    # Venables & Ripley MASS 4th ed. §7.2 (memory, per tests/data/README.md): additive D 6.757 on 9 df,
    # with interaction 4.9937 on 8 df
    assert h.deviance_additive == pytest.approx(6.757, abs=5e-4)
    assert h.deviance_interaction == pytest.approx(4.9937, abs=5e-5)
    assert h.statistic == pytest.approx(6.757 - 4.9937, abs=6e-4)
    assert h.df == 1
    # and exactly the deviance difference of nested statsmodels fits, p from scipy's chi2
    male = (budworm["sector"] == "M").to_numpy(dtype=float)
    dose = budworm["year"].to_numpy(dtype=float)
    n = budworm["forced"] + budworm["voluntary"]
    additive = sm_glm(budworm["forced"], n, np.column_stack([np.ones(12), male, dose]))
    interaction = sm_glm(budworm["forced"], n, np.column_stack([np.ones(12), male, dose, male * dose]))
    assert h.statistic == pytest.approx(additive.deviance - interaction.deviance, rel=1e-9)
    assert h.p == pytest.approx(stats.chi2.sf(h.statistic, 1), rel=1e-12)


def test_budworm_common_trend_is_the_additive_model(budworm: pd.DataFrame) -> None:
    result = fit_sector_trends(sector_cells(budworm, (0, 5)), centre=0.0)
    common = result.common
    assert common is not None and common.model == "sector"
    # OR per doubling 2.898560, Wald (2.241862, 3.747621) (per tests/data/README.md)
    assert common.odds_ratio == pytest.approx(2.898560, abs=5e-7)
    np.testing.assert_allclose(common.conf_int["wald"], [2.241862, 3.747621], atol=5e-7)
    # profile: exact deviance roots (0.8228545, 1.3390388) on the log scale (per tests/data/README.md)
    np.testing.assert_allclose(np.log(common.conf_int["profile"]), [0.8228545, 1.3390388], atol=1e-6)
    assert common.deviance == pytest.approx(6.757, abs=5e-4) and common.df_resid == 9


def test_budworm_per_sector_equals_separate_fits(budworm: pd.DataFrame) -> None:
    result = fit_sector_trends(sector_cells(budworm, (0, 5)))
    z = stats.norm.ppf(0.975)
    for trend in result.sectors:
        part = budworm[budworm["sector"] == trend.sector]
        n = part["forced"] + part["voluntary"]
        alone = sm_glm(part["forced"], n, np.column_stack([np.ones(len(part)), part["year"]]))
        assert trend.status == "fitted" and trend.reason is None
        assert trend.log_or == pytest.approx(alone.params[1], rel=1e-8)
        assert trend.se == pytest.approx(alone.bse[1], rel=1e-7)
        np.testing.assert_allclose(trend.conf_int["wald"],
                                   np.exp(alone.params[1] + np.array([-z, z]) * alone.bse[1]), rtol=1e-7)
        assert trend.departures == 120 and trend.forced == int(part["forced"].sum())
        lo, hi = trend.conf_int["profile"]
        assert lo < trend.odds_ratio < hi


def invented_roster(seed: int = 2) -> pd.DataFrame:
    """Invented sectors: two healthy ones with different trends plus four that cannot be fitted."""
    rng = np.random.default_rng(seed)
    rows = []

    def add(sector: str, years, n_per_year, intercept, slope):
        for year in years:
            for _ in range(n_per_year):
                p = 1 / (1 + math.exp(-(intercept + slope * (year - 2010))))
                rows.append({"firm_id": f"{sector[:2]}{rng.integers(40)}", "year": year, "sector": sector,
                             "category": "forced" if rng.random() < p else "voluntary"})

    add("Harbourworks", range(2004, 2017), 30, -1.0, 0.10)
    add("Quillmere", range(2004, 2017), 30, -0.5, -0.05)
    add("Tiny Co-ops", range(2004, 2017, 4), 3, 0.0, 0.0)          # too few departures
    add("Calm Mills", range(2004, 2017), 3, -99.0, 0.0)             # no forced departures
    add("Two Year Guild", [2008, 2009], 20, 0.0, 0.0)               # only two years
    rows += [{"firm_id": "SP1", "year": y, "sector": "Split Yards", "category": c}
             for y, c in [(2004, "voluntary"), (2005, "voluntary"), (2006, "voluntary")] * 4
             + [(2012, "forced"), (2013, "forced"), (2014, "forced")] * 4]  # separated by year
    return pd.DataFrame(rows)


def test_sparse_sectors_are_listed_with_reasons() -> None:
    result = fit_sector_trends(build_cells(invented_roster(), by_sector=True), min_departures=20)
    by_name = {t.sector: t for t in result.sectors}
    assert [t.sector for t in result.sectors] == sorted(by_name)
    assert by_name["Harbourworks"].status == by_name["Quillmere"].status == "fitted"
    assert by_name["Tiny Co-ops"].reason is not None and "fewer than 20" in by_name["Tiny Co-ops"].reason
    assert by_name["Calm Mills"].reason == "no forced departures"
    assert by_name["Two Year Guild"].reason is not None and "2 year(s)" in by_name["Two Year Guild"].reason
    assert by_name["Split Yards"].reason == "the forced share is perfectly separated by year"
    for name in ("Tiny Co-ops", "Calm Mills", "Two Year Guild", "Split Yards"):
        t = by_name[name]
        assert t.status == "skipped" and t.odds_ratio is None and t.conf_int == {"wald": None, "profile": None}
        assert any(m.startswith(f"{name}: not fitted") for m in result.messages)
    # the test and the common trend use only the two fitted sectors
    assert result.heterogeneity is not None and result.heterogeneity.sectors == ("Harbourworks", "Quillmere")
    assert result.common is not None
    assert list(result.common.coefficients["name"]) == ["sector[Harbourworks]", "sector[Quillmere]", "year"]


def test_common_trend_equals_statsmodels_on_fitted_sectors() -> None:
    records = invented_roster()
    result = fit_sector_trends(build_cells(records, by_sector=True))
    kept = records[records["sector"].isin(["Harbourworks", "Quillmere"])]
    g = kept.groupby(["sector", "year"])["category"].agg(
        forced=lambda s: int((s == "forced").sum()), total="count").reset_index()
    centre = (2004 + 2016) / 2
    X = np.column_stack([g["sector"] == "Harbourworks", g["sector"] == "Quillmere", g["year"] - centre])
    ref = sm_glm(g["forced"], g["total"], X.astype(float))
    assert result.common is not None
    np.testing.assert_allclose(result.common.coefficients["estimate"], ref.params, rtol=1e-8)
    assert result.common.departures == len(kept)


def test_to_dict_is_json_and_has_the_keys() -> None:
    result = fit_sector_trends(build_cells(invented_roster(), by_sector=True))
    payload = json.loads(json.dumps(sector_trends_to_dict(result), allow_nan=False))
    assert {"sectors", "heterogeneity", "common"} <= set(payload)
    assert set(payload["heterogeneity"]) >= {"statistic", "df", "p"}
    first = payload["sectors"][0]
    assert set(first) >= {"sector", "odds_ratio", "conf_int", "departures", "forced", "status", "reason"}
    assert set(first["conf_int"]) == {"wald", "profile"}


def test_one_fitted_sector_means_no_heterogeneity_test() -> None:
    records = invented_roster()
    records = records[records["sector"].isin(["Harbourworks", "Calm Mills"])]
    result = fit_sector_trends(build_cells(records, by_sector=True))
    assert result.heterogeneity is None
    assert any("Fewer than two sectors" in m for m in result.messages)
    assert result.common is not None and result.common.odds_ratio is not None


def test_needs_sector_cells() -> None:
    with pytest.raises(ValueError, match="by_sector=True"):
        fit_sector_trends(build_cells(invented_roster()))
