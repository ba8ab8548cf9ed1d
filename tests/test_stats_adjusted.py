"""The adjusted trend against statsmodels on the record-level data.

Reference: statsmodels ``GLM(endog, exog, family=Binomial()).fit(cov_type='cluster', cov_kwds={'groups':
firm})`` fitted on one row per departure (its default correction, G/(G-1) * (N-1)/(N-K)), and the chi-square
test of the mix against scipy.stats.chi2_contingency on the same table. The records are invented here.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from app.stats.adjusted import (
    AGE_BANDS,
    TENURE_BANDS,
    AdjustedError,
    band,
    collapse,
    fit_adjusted,
    mix_by_year,
    mix_shift,
    parse_adjust,
)


def invented_records(seed: int = 7, n: int = 3000, firms: int = 180) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    firm = rng.integers(0, firms, n)
    firm_effect = rng.normal(0, 0.6, firms)[firm]  # departures of one firm are correlated: clustering matters
    year = rng.integers(2000, 2016, n)
    age = np.round(rng.normal(58, 7, n), 1)
    tenure = np.round(rng.gamma(2.0, 3.5, n), 1)
    sector = np.array(["Energy", "Retail", "Tech"], dtype=object)[rng.integers(0, 3, n)]
    eta = -1.0 + 0.04 * (year - 2000) - 0.05 * (age - 58) - 0.08 * tenure + firm_effect
    forced = rng.random(n) < 1 / (1 + np.exp(-eta))
    frame = pd.DataFrame({"firm_id": [f"F{f:03d}" for f in firm], "year": year, "age": age, "tenure": tenure,
                          "sector": sector, "category": np.where(forced, "forced", "voluntary")})
    frame.loc[rng.random(n) < 0.04, "age"] = np.nan
    frame.loc[rng.random(n) < 0.03, "tenure"] = np.nan
    frame.loc[rng.random(n) < 0.02, "sector"] = None
    return frame


def statsmodels_fit(records: pd.DataFrame, adjust: tuple[str, ...]) -> tuple[pd.Series, pd.Series, int]:
    """The record-level logit with the same reference levels, clustered by firm (statsmodels)."""
    rows = records.dropna(subset=list(adjust)).copy()
    parts = [pd.Series(1.0, index=rows.index, name="const"), (rows["year"] - rows["year"].min()).rename("year")]
    if "age" in adjust:
        rows["age_band"] = band(rows["age"].to_numpy(), (50, 60, 65), AGE_BANDS)
        parts.append(pd.get_dummies(pd.Categorical(rows["age_band"], categories=AGE_BANDS), prefix="age",
                                    drop_first=True, dtype=float).set_index(rows.index))
    if "tenure" in adjust:
        rows["tenure_band"] = band(rows["tenure"].to_numpy(), (3, 7, 11), TENURE_BANDS)
        parts.append(pd.get_dummies(pd.Categorical(rows["tenure_band"], categories=TENURE_BANDS), prefix="ten",
                                    drop_first=True, dtype=float).set_index(rows.index))
    if "sector" in adjust:
        parts.append(pd.get_dummies(rows["sector"], prefix="sec", drop_first=True, dtype=float))
    x = pd.concat(parts, axis=1)
    y = (rows["category"] == "forced").to_numpy(dtype=float)
    groups = pd.factorize(rows["firm_id"])[0]
    result = sm.GLM(y, x, family=sm.families.Binomial()).fit(cov_type="cluster", cov_kwds={"groups": groups})
    return result.params, result.bse, len(rows)


@pytest.mark.parametrize("adjust", [(), ("age",), ("tenure",), ("sector",), ("age", "tenure", "sector")])
def test_adjusted_fit_equals_statsmodels_record_level(adjust: tuple[str, ...]) -> None:
    records = invented_records()
    params, bse, n = statsmodels_fit(records, adjust)
    fit = fit_adjusted(collapse(records, adjust), (2000, 2015))
    assert fit.departures == n
    assert fit.dropped == {a: int(v) for a, v in _first_missing(records, adjust).items()}
    np.testing.assert_allclose(fit.params.to_numpy(), params.to_numpy(), rtol=0, atol=1e-8)
    se = np.sqrt(np.diag(fit.cluster_cov))
    np.testing.assert_allclose(se, bse.to_numpy(), rtol=0, atol=1e-6)
    assert fit.cluster_se == pytest.approx(float(bse["year"]), abs=1e-6)
    lo, hi = fit.cluster_interval  # exp(b -/+ z se), statsmodels' normal interval on the log scale
    assert np.log(lo) == pytest.approx(params["year"] - stats.norm.ppf(0.975) * bse["year"], abs=1e-6)
    assert np.log(hi) == pytest.approx(params["year"] + stats.norm.ppf(0.975) * bse["year"], abs=1e-6)


def _first_missing(records: pd.DataFrame, adjust: tuple[str, ...]) -> dict[str, int]:
    keep = pd.Series(True, index=records.index)
    out = {}
    for a in adjust:
        miss = records[a].isna() & keep
        out[a] = int(miss.sum())
        keep &= ~miss
    return out


def test_collapsed_cells_with_weights_give_the_same_fit_as_records() -> None:
    """Counting records into weighted rows first (what the cell store holds) changes nothing."""
    records = invented_records(seed=11)
    counted = (records.assign(age=np.floor(records["age"]), tenure=np.floor(records["tenure"]))
               .groupby(["firm_id", "year", "sector", "age", "tenure", "category"], dropna=False)
               .size().rename("departures").reset_index())
    by_records = fit_adjusted(collapse(records, ("age", "tenure", "sector")), (2000, 2015))
    by_cells = fit_adjusted(collapse(counted, ("age", "tenure", "sector")), (2000, 2015))
    np.testing.assert_allclose(by_cells.params.to_numpy(), by_records.params.to_numpy(), atol=1e-10)
    np.testing.assert_allclose(by_cells.cluster_cov, by_records.cluster_cov, atol=1e-12)
    assert by_cells.dropped == by_records.dropped


def test_bands_are_left_closed_in_completed_years() -> None:
    ages = np.array([49.9, 50.0, 59.99, 60.0, 64.5, 65.0, np.nan])
    assert list(band(ages, (50, 60, 65), AGE_BANDS)) == ["<50", "50-59", "50-59", "60-64", "60-64", "65+", None]
    tenures = np.array([2.9, 3.0, 6.9, 7.0, 10.5, 11.0])
    assert list(band(tenures, (3, 7, 11), TENURE_BANDS)) == ["<3", "3-6", "3-6", "7-10", "7-10", ">10"]


def test_parse_adjust_names_what_is_allowed() -> None:
    assert parse_adjust("sector, age") == ("age", "sector")
    assert parse_adjust("") == ()
    with pytest.raises(AdjustedError, match="adjustments are age, tenure, sector"):
        parse_adjust("age,income")


def test_one_year_is_refused() -> None:
    records = invented_records().assign(year=2001)
    with pytest.raises(AdjustedError, match="two years"):
        fit_adjusted(collapse(records, ("age",)), (2001, 2001))


def test_mix_shift_is_scipys_chi_square_and_says_whether_the_mix_moved() -> None:
    rng = np.random.default_rng(3)
    years = np.repeat(np.arange(2000, 2010), 200)
    older = years >= 2005  # the second half departs older
    ages = np.where(older, rng.normal(63, 5, len(years)), rng.normal(55, 5, len(years)))
    table = mix_by_year(pd.DataFrame({"year": years, "age": ages}), "age")
    assert int(table.to_numpy().sum()) == len(years)
    shift = mix_shift(table, "age")
    a = table.loc[2000:2004].sum().to_numpy()
    b = table.loc[2005:2009].sum().to_numpy()
    expected = stats.chi2_contingency(np.vstack([a, b]), correction=False)[1]
    assert shift.p_value == pytest.approx(expected, rel=1e-12)
    assert shift.moved and "moved between 2000–2004 and 2005–2009" in shift.sentence
    flat = mix_shift(mix_by_year(pd.DataFrame({"year": years, "age": rng.normal(58, 6, len(years))}), "age"), "age")
    assert flat.p_value is not None and flat.p_value > 0.001
    assert ("did not clearly move" in flat.sentence) == (not flat.moved)


def test_firm_bootstrap_of_the_adjusted_model_refits_what_statsmodels_fits() -> None:
    """Each firm resample is the model refitted to the resampled firms' departures: check resample 0 against
    statsmodels on the records of the drawn firms (with their multiplicity), and that the engine's cells add up."""
    from app.stats.adjusted import bootstrap_adjusted, bootstrap_cells
    from app.stats.sampling import BLOCK_SIZE, SAMPLER
    from tests.test_stats_poisson_draws import multiplicities_by_definition

    records = invented_records(seed=5, n=1500, firms=90)
    adjust = ("age", "tenure")
    data = collapse(records, adjust)
    cells, dsg = bootstrap_cells(data, (2000, 2015))
    assert np.array_equal(np.asarray(cells.firm_matrix.sum(axis=0)).ravel(),
                          np.concatenate([cells.forced, cells.voluntary]))
    result = bootstrap_adjusted(data, (2000, 2015), resamples=BLOCK_SIZE, seed=11, workers=1)
    assert result.coefficient == "year"
    assert result.estimate == pytest.approx(fit_adjusted(data, (2000, 2015)).coef, abs=1e-8)
    # resample 0: new runs draw firms by sampler 4 (app/stats/poisson_draws.py), written out in its own test module
    assert SAMPLER == 4
    multiplicity = multiplicities_by_definition(11, 0, len(data.firm_ids))[0]
    kept = records.dropna(subset=list(adjust))
    weights = kept["firm_id"].map(dict(zip(data.firm_ids, multiplicity, strict=True))).to_numpy(dtype=float)
    rows = kept.loc[weights > 0]
    params, _, _ = statsmodels_fit(rows.loc[rows.index.repeat(weights[weights > 0].astype(int))]
                                   .reset_index(drop=True), adjust)
    assert result.replicates[0] == pytest.approx(float(params["year"]), abs=1e-7)
    lo, hi = result.intervals["bca"]
    assert lo < result.odds_ratio < hi


def test_one_step_jackknife_gives_the_exact_jackknifes_acceleration() -> None:
    """The BCa acceleration from one Newton step per left-out firm against refitting every leave-one-firm-out
    case (the engine's exact jackknife, itself checked against statsmodels in test_stats_bootstrap.py)."""
    from app.stats.adjusted import bootstrap_adjusted, one_step_jackknife
    from app.stats.intervals import jackknife_acceleration

    records = invented_records(seed=8, n=4000, firms=300)
    data = collapse(records, ("age", "tenure", "sector"))
    fit = fit_adjusted(data, (2000, 2015))
    exact = bootstrap_adjusted(data, (2000, 2015), resamples=500, seed=2, workers=1, exact_jackknife=True)
    fast = bootstrap_adjusted(data, (2000, 2015), resamples=500, seed=2, workers=1)
    np.testing.assert_array_equal(fast.replicates, exact.replicates)  # the same resamples
    approx = one_step_jackknife(data, fit)
    assert np.max(np.abs(approx - exact.jackknife_values)) < 0.05 * fit.cluster_se
    a_exact = jackknife_acceleration([exact.jackknife_values], None)
    a_fast = jackknife_acceleration([approx], None)
    assert a_fast == pytest.approx(a_exact, rel=0.05)
    assert fast.intervals["bca"] == pytest.approx(exact.intervals["bca"], rel=2e-3)
