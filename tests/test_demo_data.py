"""Tests for the demo roster generator: reproducibility, the injected mess, and the documented truth."""

from __future__ import annotations

import math
import re
import sys
from pathlib import Path
from types import ModuleType

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_data"


@pytest.fixture(scope="module")
def gen() -> ModuleType:
    sys.path.insert(0, str(DEMO))
    try:
        import generate
    finally:
        sys.path.pop(0)
    return generate


@pytest.fixture(scope="module")
def roster() -> pd.DataFrame:
    return pd.read_csv(DEMO / "roster.csv", dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def clean(roster: pd.DataFrame, gen: ModuleType) -> pd.DataFrame:
    """The rows an importer would keep, with the generator's own category per code."""
    ok = roster.loc[roster["FY"].str.fullmatch(r"\d{4}") & (roster["Issuer Code"] != "")
                    & (roster["Exit Reason"] != "") & (roster["Exit Date"] != "31/02/2011")]
    ok = ok.drop_duplicates().copy()
    ok["year"] = ok["FY"].astype(int)
    ok["category"] = ok["Exit Reason"].map(gen.TRUTH["code_categories"])
    return ok


def model_frame(clean: pd.DataFrame, truth: dict) -> pd.DataFrame:
    lo, hi = truth["full_coverage"]
    d = clean.loc[clean["category"].isin(["forced", "voluntary"]) & clean["year"].between(lo, hi)]
    grouped = d.groupby(["Industry", "year"])["category"].agg(
        forced=lambda s: int((s == "forced").sum()), total="size").reset_index()
    grouped["t"] = grouped["year"] - truth["centre_year"]
    return grouped


def fit(frame: pd.DataFrame, exog: pd.DataFrame) -> sm.GLM:
    endog = np.column_stack([frame["forced"], frame["total"] - frame["forced"]])
    return sm.GLM(endog, exog, family=sm.families.Binomial()).fit()


def test_same_seed_writes_identical_bytes(gen: ModuleType, tmp_path: Path) -> None:
    a, b, c = tmp_path / "a.csv", tmp_path / "b.csv", tmp_path / "c.csv"
    assert gen.main(["--out", str(a), "--seed", "7"]) == 0
    assert gen.main(["--out", str(b), "--seed", "7"]) == 0
    gen.main(["--out", str(c), "--seed", "8"])
    assert a.read_bytes() == b.read_bytes()
    assert a.read_bytes() != c.read_bytes()


def test_committed_roster_is_the_default_seed(gen: ModuleType, tmp_path: Path) -> None:
    out = tmp_path / "roster.csv"
    gen.write_roster(out)
    assert out.read_bytes() == (DEMO / "roster.csv").read_bytes()


def test_columns_and_size(roster: pd.DataFrame, gen: ModuleType) -> None:
    assert tuple(roster.columns) == gen.COLUMNS == (
        "Issuer Code", "Issuer Name", "Industry", "FY", "Exit Date", "Exit Reason", "Executive",
        "Age at Exit", "Years in Role", "Interim?", "Comment")
    firms = roster.loc[roster["Issuer Code"] != "", "Issuer Code"].nunique()
    assert 560 <= firms <= gen.TRUTH["firms"]
    departures = roster["Exit Reason"].isin(["Still in post", "Data error"]).__invert__().sum()
    assert 1800 <= departures <= 2400
    assert set(roster["Industry"]) == set(gen.TRUTH["sector_firms"])
    assert set(roster["Interim?"]) == {"Y", "N"}
    assert (roster["Comment"] == "").mean() > 0.8


def test_names_are_unique_per_issuer(roster: pd.DataFrame) -> None:
    named = roster.loc[roster["Issuer Code"] != ""]
    assert named.groupby("Issuer Code")["Issuer Name"].nunique().max() == 1
    assert named.groupby("Issuer Name")["Issuer Code"].nunique().max() == 1


def test_injected_mess(roster: pd.DataFrame, gen: ModuleType) -> None:
    truth = gen.TRUTH
    assert roster.duplicated().sum() == truth["duplicate_rows"]
    assert (roster["Exit Date"] == truth["unparseable"]["impossible_date"]).sum() == 1
    assert (roster["FY"] == truth["unparseable"]["bad_year"]).sum() == 1
    assert (roster["Issuer Code"] == "").sum() == truth["unparseable"]["missing_issuer_code"]
    assert (roster["Exit Reason"] == "").sum() == truth["unparseable"]["missing_reason"]
    assert (roster["Exit Reason"] == "Data error").sum() == truth["data_error_rows"]
    still = roster.loc[roster["Exit Reason"] == "Still in post"]
    assert len(still) > 50
    assert (still["Exit Date"] == "").all() and (still["FY"] == str(truth["years"][1])).all()
    assert ((roster["Exit Date"] == "") == (roster["Exit Reason"] == "Still in post")).all()


def test_fy_is_the_calendar_year_of_the_exit_date(clean: pd.DataFrame, gen: ModuleType) -> None:
    dated = clean.loc[clean["Exit Date"] != ""]
    assert dated["Exit Date"].str.fullmatch(r"\d{2}/\d{2}/\d{4}").all()
    parsed = pd.to_datetime(dated["Exit Date"], format="%d/%m/%Y")
    assert (parsed.dt.year == dated["year"]).all()
    assert clean["year"].between(*gen.TRUTH["years"]).all()


def test_thin_years_fall_below_half_the_median(clean: pd.DataFrame, gen: ModuleType) -> None:
    counts = clean.loc[clean["category"] != "excluded"].groupby("year").size()
    lo, hi = gen.TRUTH["full_coverage"]
    cutoff = counts.median() / 2
    assert (counts.loc[lo:hi] >= cutoff).all()
    assert (counts.drop(range(lo, hi + 1)) < cutoff).all()


def test_marginal_slope_against_zeger_liang_albert(gen: ModuleType) -> None:
    # Zeger, Liang & Albert (1988), Biometrics 44, 1049-1060 (memory): a logistic random intercept with
    # sd sigma attenuates the population-averaged slope to about b / sqrt(1 + c^2 sigma^2),
    # c = 16 sqrt(3) / (15 pi). An approximation, so a 1% tolerance.
    truth = gen.TRUTH
    c = 16 * math.sqrt(3) / (15 * math.pi)
    approx = truth["b1"] / math.sqrt(1 + c ** 2 * truth["firm_sd"] ** 2)
    assert truth["marginal_b1_common_sectors"] == pytest.approx(approx, rel=0.01)
    assert truth["marginal_b1_common_sectors"] < truth["b1"]
    assert truth["marginal_odds_ratio_per_year"] == pytest.approx(math.exp(truth["marginal_b1"]))


def test_marginal_slope_against_a_large_simulated_population(gen: ModuleType) -> None:
    # statsmodels GLM on a population 300 times the demo's size drawn from TRUTH's parameters.
    truth = gen.TRUTH
    rng = np.random.default_rng(1)
    lo, hi = truth["full_coverage"]
    years = np.arange(lo, hi + 1)
    t = years - truth["centre_year"]
    forced = np.zeros(len(years))
    total = np.zeros(len(years))
    base = math.log(truth["departure_base_rate"] / (1 - truth["departure_base_rate"]))
    for sector, n in truth["sector_firms"].items():
        firms = 300 * n
        u = rng.normal(0, truth["departure_rate_firm_sd"], firms)[:, None]
        v = rng.normal(0, truth["firm_sd"], firms)[:, None]
        departs = rng.random((firms, len(years))) < 1 / (1 + np.exp(-(base + u)))
        eta = truth["b0"] + truth["sector_intercepts"][sector] + truth["sector_slopes"][sector] * t + v
        is_forced = rng.random((firms, len(years))) < 1 / (1 + np.exp(-eta))
        forced += (departs & is_forced).sum(axis=0)
        total += departs.sum(axis=0)
    result = sm.GLM(np.column_stack([forced, total - forced]), sm.add_constant(t.astype(float)),
                    family=sm.families.Binomial()).fit()
    assert abs(result.params[1] - truth["marginal_b1"]) < 4 * result.bse[1]


def test_straight_glm_on_the_demo_covers_the_marginal_truth(clean: pd.DataFrame, gen: ModuleType) -> None:
    truth = gen.TRUTH
    yearly = model_frame(clean, truth).groupby("t", as_index=False)[["forced", "total"]].sum()
    result = fit(yearly, sm.add_constant(yearly["t"].astype(float)))
    low, high = np.exp(result.conf_int()[1])
    assert low < truth["marginal_odds_ratio_per_year"] < high


def test_sector_trends_differ_detectably(clean: pd.DataFrame, gen: ModuleType) -> None:
    # statsmodels: sector + year against sector x year, likelihood-ratio test of equal trends.
    truth = gen.TRUTH
    frame = model_frame(clean, truth)
    dummies = pd.get_dummies(frame["Industry"], dtype=float)
    common = fit(frame, pd.concat([dummies, frame["t"].astype(float)], axis=1))
    separate = fit(frame, pd.concat([dummies, dummies.mul(frame["t"], axis=0).add_suffix(":t")], axis=1))
    lr = common.deviance - separate.deviance
    assert stats.chi2.sf(lr, dummies.shape[1] - 1) < 0.01
    steep, falling = truth["steep_sector"] + ":t", truth["falling_sector"] + ":t"
    z_steep = (separate.params[steep] - common.params["t"]) / separate.bse[steep]
    z_falling = (separate.params[falling] - common.params["t"]) / separate.bse[falling]
    assert z_steep > 3
    assert z_falling < -2.5


def test_truth_documents_every_code(gen: ModuleType) -> None:
    truth = gen.TRUTH
    assert set(truth["code_categories"].values()) == {"forced", "voluntary", "excluded"}
    assert 12 <= len(truth["code_categories"]) <= 15
    assert set(truth["ambiguous_codes"]) <= set(truth["code_categories"])
    assert truth["odds_ratio_per_year"] == pytest.approx(math.exp(truth["b1"]))


def test_readme_states_the_truth(gen: ModuleType) -> None:
    text = (DEMO / "README.md").read_text(encoding="utf-8")
    truth = gen.TRUTH
    for value in (truth["odds_ratio_per_year"], truth["marginal_odds_ratio_per_year"],
                  truth["marginal_odds_ratio_per_year_common_sectors"]):
        assert f"{value:.4f}" in text
    assert "1998-2022" in text and str(truth["default_seed"]) in text
    for code in truth["code_categories"]:
        assert code in text
    assert re.search(r"invented", text, re.IGNORECASE)
