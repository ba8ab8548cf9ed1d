"""Bootstrapping any reported statistic, stratified firm draws, normal and studentized intervals.

Oracles: statsmodels' GLM(Binomial) fitted one resample at a time (the obvious loop), pandas counting of
resampled rosters drawn the obvious way, scipy's normal quantile for the normal interval (Davison & Hinkley
1997, eq. 5.5), and the bootstrap-t interval computed by hand from statsmodels' estimates and standard errors
(Efron & Tibshirani 1993, ch. 12.5; Davison & Hinkley 1997, eq. 5.7). scipy.stats.bootstrap has no
studentized method, so it is no oracle for that one.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from app.stats.bootstrap import BLOCK_SIZE, bootstrap_statistic, draw_cells, intervals_from_replicates
from app.stats.cells import Cells, build_cells
from app.stats.design import window_centre
from app.stats.draws import CellSampler, block_rng
from app.stats.periods import compare_periods
from app.stats.sectors import fit_sector_trends
from app.stats.statistics import Statistic, firm_strata, make_statistic
from app.stats.trend import fit_trend, natural_spline_basis
from tests.test_stats_irls import clustered_roster

B = 300  # resamples per side in the distribution checks


def _glm(forced: np.ndarray, totals: np.ndarray, X: np.ndarray) -> sm.GLM:
    keep = totals > 0
    endog = np.column_stack([forced[keep], totals[keep] - forced[keep]])
    return sm.GLM(endog, X[keep], family=sm.families.Binomial()).fit(tol=1e-12)


def _year_counts(roster: pd.DataFrame, by_sector: bool = False) -> pd.DataFrame:
    keys = ["sector", "year"] if by_sector else ["year"]
    frame = roster.assign(forced=(roster["category"] == "forced").astype(int))
    out = frame.groupby(keys, sort=True)["forced"].agg(["sum", "count"]).reset_index()
    return out.rename(columns={"sum": "forced", "count": "total"})


# the obvious statsmodels computation of each statistic on a roster (the loop's statistic)

def _slope(roster: pd.DataFrame, centre: float, per: float = 1.0) -> float:
    g = _year_counts(roster)
    X = np.column_stack([np.ones(len(g)), g["year"] - centre])
    return per * float(_glm(g["forced"].to_numpy(float), g["total"].to_numpy(float), X).params[1])


def _sector_slope(roster: pd.DataFrame, centre: float, sector: str) -> float:
    return _slope(roster.loc[roster["sector"] == sector], centre)


def _heterogeneity(roster: pd.DataFrame, centre: float) -> float:
    g = _year_counts(roster, by_sector=True)
    dummies = pd.get_dummies(g["sector"]).to_numpy(float)
    t = (g["year"] - centre).to_numpy(float)[:, None]
    f, n = g["forced"].to_numpy(float), g["total"].to_numpy(float)
    small = _glm(f, n, np.column_stack([dummies, t]))
    big = _glm(f, n, np.column_stack([dummies, dummies * t]))
    return max(float(small.deviance - big.deviance), 0.0)


def _bend(roster: pd.DataFrame, centre: float, knots: tuple[float, ...]) -> float:
    g = _year_counts(roster)
    years = g["year"].to_numpy(float)
    f, n = g["forced"].to_numpy(float), g["total"].to_numpy(float)
    straight = _glm(f, n, np.column_stack([np.ones_like(years), years - centre]))
    spline = _glm(f, n, np.column_stack([np.ones_like(years), natural_spline_basis(years, 3, knots=knots)[0]]))
    return max(float(straight.deviance - spline.deviance), 0.0)


def _difference(roster: pd.DataFrame, periods: tuple[tuple[int, int], tuple[int, int]]) -> float:
    shares = [roster.loc[roster["year"].between(*p), "category"].eq("forced").mean() for p in periods]
    return float(shares[1] - shares[0])


def _firm_resample(roster: pd.DataFrame, rng: np.random.Generator, strata: bool = False) -> pd.DataFrame:
    """The obvious firm bootstrap: draw firm ids with replacement (within sector if asked), stack their rows."""
    by_firm = roster.groupby("firm_id", sort=True).indices
    firms = pd.Series(sorted(by_firm))
    if strata:
        sector = roster.groupby("firm_id", sort=True)["sector"].first()
        picked = np.concatenate([rng.choice(ids.to_numpy(), size=len(ids)) for _, ids in
                                 firms.groupby(sector.reindex(firms).to_numpy())])
    else:
        picked = rng.choice(firms.to_numpy(), size=len(firms))
    return roster.iloc[np.concatenate([by_firm[f] for f in picked])]


def _same_distribution(ours: np.ndarray, loop: list[float]) -> None:
    """Mean and sd agree within Monte Carlo error (4 standard errors of each, for two independent samples)."""
    a, b = ours[np.isfinite(ours)], np.asarray(loop)
    assert a.size > 0.95 * ours.size and b.size == len(loop) > 0
    sa, sb = a.std(ddof=1), b.std(ddof=1)
    assert abs(a.mean() - b.mean()) < 4 * np.sqrt(sa**2 / a.size + sb**2 / b.size)
    # the sd of a sample sd is about sd * sqrt((kurtosis - 1) / (4 n)); kurtosis from the pooled values
    kurt = stats.kurtosis(np.concatenate([a - a.mean(), b - b.mean()]), fisher=False)
    assert abs(sa - sb) < 4 * np.sqrt((kurt - 1) / 4 * (sa**2 / a.size + sb**2 / b.size))


ROSTER = clustered_roster(5, firms=150, years=9, sectors=3)


def _cases() -> dict[str, tuple[Statistic, Cells, Callable[[pd.DataFrame], float]]]:
    year_cells = build_cells(ROSTER)
    sector_cells = build_cells(ROSTER, by_sector=True)
    centre = window_centre(year_cells.window)
    knots = natural_spline_basis(year_cells.groups["year"].to_numpy(float), 3)[1]
    periods = ((2010, 2013), (2014, 2018))
    return {
        "decade_odds_ratio": (make_statistic("decade_odds_ratio", year_cells, centre=centre), year_cells,
                              lambda r: _slope(r, centre, 10.0)),
        "sector_slope": (make_statistic("sector_slope", sector_cells, centre=centre, sector="S1"), sector_cells,
                         lambda r: _sector_slope(r, centre, "S1")),
        "heterogeneity": (make_statistic("heterogeneity", sector_cells, centre=centre, sectors=("S0", "S1", "S2")),
                          sector_cells, lambda r: _heterogeneity(r, centre)),
        "spline_bend": (make_statistic("spline_bend", year_cells, centre=centre, spline_df=3), year_cells,
                        lambda r: _bend(r, centre, knots)),
        "period_difference": (make_statistic("period_difference", year_cells, centre=centre, periods=periods),
                              year_cells, lambda r: _difference(r, periods)),
    }


CASES = _cases()


@pytest.mark.parametrize("name", list(CASES))
def test_each_statistic_on_the_original_data_equals_the_pages_number(name: str) -> None:
    # oracle: statsmodels on the roster (the loop's statistic), and the modules behind the pages
    statistic, cells, oracle = CASES[name]
    estimate, _ = statistic.original(cells)
    assert estimate == pytest.approx(oracle(ROSTER), rel=1e-8, abs=1e-10)
    if name == "heterogeneity":
        het = fit_sector_trends(cells, min_departures=1).heterogeneity
        assert het is not None and estimate == pytest.approx(het.statistic, rel=1e-8)
    if name == "spline_bend":
        bend = fit_trend(cells, "spline", spline_df=3).curvature
        assert bend is not None and estimate == pytest.approx(bend.statistic, rel=1e-8)
    if name == "period_difference":
        counts = _year_counts(ROSTER)
        assert estimate == pytest.approx(compare_periods(counts, (2010, 2013), (2014, 2018)).difference, rel=1e-12)


@pytest.mark.parametrize("name", list(CASES))
def test_each_resample_equals_statsmodels_on_the_same_drawn_counts(name: str) -> None:
    # oracle: the obvious loop, statsmodels on each resample's counts (the same draws, block 0, 25 resamples)
    statistic, cells, _ = CASES[name]
    drawn = draw_cells(cells, unit="firm", seed=11, block=0)[:25]
    ours = statistic.evaluate(drawn).values
    g = cells.groups
    n = cells.n_groups
    for row, value in zip(drawn, ours, strict=True):
        # a roster with these counts: one row per departure (firm ids do not matter to these statistics)
        forced, voluntary = row[:n].astype(int), row[n:].astype(int)
        frame = pd.DataFrame({"year": np.repeat(np.r_[g["year"], g["year"]], np.r_[forced, voluntary]),
                              "sector": np.repeat(np.r_[g["sector"], g["sector"]], np.r_[forced, voluntary]),
                              "category": np.repeat(["forced"] * n + ["voluntary"] * n, np.r_[forced, voluntary])})
        if not cells.by_sector:
            frame["sector"] = ROSTER["sector"].iloc[0]
        assert value == pytest.approx(CASES[name][2](frame), rel=1e-7, abs=1e-9)


@pytest.mark.slow
@pytest.mark.parametrize("name", list(CASES))
def test_each_statistic_has_the_distribution_of_the_obvious_loop(name: str) -> None:
    # oracle: an independent obvious firm bootstrap (pandas resampling of firm ids, statsmodels per resample);
    # the two use different random streams, so mean and sd must agree within Monte Carlo error
    statistic, cells, oracle = CASES[name]
    ours = bootstrap_statistic(cells, statistic, unit="firm", resamples=B, seed=3).replicates
    rng = np.random.default_rng(99)
    loop = [oracle(_firm_resample(ROSTER, rng)) for _ in range(B)]
    _same_distribution(ours, loop)


@pytest.mark.slow
def test_stratified_draws_keep_each_sectors_firm_count_and_match_the_obvious_loop() -> None:
    # oracle: pandas resampling of firm ids within each sector, statsmodels per resample
    year_cells, sector_cells = build_cells(ROSTER), build_cells(ROSTER, by_sector=True)
    strata, names = firm_strata(sector_cells)
    assert names == ("S0", "S1", "S2")
    truth = ROSTER.groupby("firm_id")["sector"].first().reindex(year_cells.firm_ids)
    assert [names[s] for s in strata] == truth.tolist()
    sampler = CellSampler(year_cells, "firm", strata)
    rng = block_rng(4, 0)
    for _ in range(20):
        drawn = sampler._firms(rng)
        assert np.bincount(strata[drawn], minlength=3).tolist() == np.bincount(strata, minlength=3).tolist()
    centre = window_centre(year_cells.window)
    statistic = make_statistic("slope", year_cells, centre=centre)
    ours = bootstrap_statistic(year_cells, statistic, unit="firm", resamples=B, seed=3, strata=strata)
    assert ours.stratified
    loop_rng = np.random.default_rng(7)
    _same_distribution(ours.replicates, [_slope(_firm_resample(ROSTER, loop_rng, strata=True), centre)
                                         for _ in range(B)])
    plain = bootstrap_statistic(year_cells, statistic, unit="firm", resamples=B, seed=3)
    assert not np.array_equal(plain.replicates, ours.replicates)
    with pytest.raises(ValueError, match="whole firms within each sector"):
        CellSampler(year_cells, "departure", strata)


def test_normal_interval_is_the_bias_corrected_formula() -> None:
    # oracle: Davison & Hinkley 1997 eq. 5.5 (R's boot.ci type "norm"): 2 t - mean(t*) -/+ z sd(t*)
    rng = np.random.default_rng(1)
    reps = rng.gamma(4.0, 0.5, size=2000)
    reps[[5, 17]] = np.nan  # failed resamples are left out
    kept = reps[np.isfinite(reps)]
    iv = intervals_from_replicates(1.7, reps, rng.normal(size=50), alpha=0.1)
    z = stats.norm.ppf(0.95)
    centre = 2 * 1.7 - kept.mean()
    assert iv.bounds["normal"] == pytest.approx((centre - z * kept.std(ddof=1), centre + z * kept.std(ddof=1)),
                                                rel=1e-12)
    # Monte Carlo error: the SD of the bound over 200 re-resamples of the replicates, computed by a plain loop
    again = np.random.default_rng(0)
    lows = []
    for _ in range(200):
        redrawn = np.sort(kept)[again.integers(0, kept.size, size=kept.size)]
        lows.append(2 * 1.7 - redrawn.mean() - z * redrawn.std(ddof=1))
    assert iv.mc_error["normal"][0] == pytest.approx(np.std(lows, ddof=1), rel=1e-9)


@pytest.mark.parametrize("name", ["slope", "period_difference"])
def test_studentized_interval_equals_the_loop_over_statsmodels(name: str) -> None:
    # oracle: statsmodels' estimate and standard error on each resample's counts (the same draws), then
    # the bootstrap-t interval by hand: (t - se q(1 - a/2), t - se q(a/2)), q quantiles of (t* - t) / se*
    cells = build_cells(ROSTER)
    centre = window_centre(cells.window)
    periods = ((2010, 2013), (2014, 2018))
    statistic = make_statistic(name, cells, centre=centre, periods=periods)
    result = bootstrap_statistic(cells, statistic, unit="departure", resamples=BLOCK_SIZE, seed=8)
    drawn = draw_cells(cells, unit="departure", seed=8, block=0)
    n = cells.n_groups
    years = cells.groups["year"].to_numpy()
    X = np.column_stack([np.ones(n), years - centre])

    def estimate_and_se(forced: np.ndarray, totals: np.ndarray) -> tuple[float, float]:
        if name == "slope":
            fit = _glm(forced, totals, X)
            return float(fit.params[1]), float(fit.bse[1])
        f = [forced[(years >= a) & (years <= b)].sum() for a, b in periods]
        t = [totals[(years >= a) & (years <= b)].sum() for a, b in periods]
        p = [fi / ti for fi, ti in zip(f, t, strict=True)]
        return p[1] - p[0], float(np.sqrt(sum(pi * (1 - pi) / ti for pi, ti in zip(p, t, strict=True))))

    theta, se = estimate_and_se(cells.forced.astype(float), cells.totals.astype(float))
    pairs = [estimate_and_se(row[:n], row[:n] + row[n:]) for row in drawn]
    t_star = np.array([(v - theta) / s for v, s in pairs])
    q_lo, q_hi = np.quantile(t_star, [0.025, 0.975])
    assert result.estimate_se == pytest.approx(se, rel=1e-6)
    np.testing.assert_allclose(result.standard_errors, [s for _, s in pairs], rtol=1e-6)
    assert result.log_intervals["studentized"] == pytest.approx((theta - se * q_hi, theta - se * q_lo), rel=1e-6)
    assert all(np.isfinite(result.mc_error["studentized"]))


def test_statistics_without_a_standard_error_give_no_studentized_interval() -> None:
    statistic, cells, _ = CASES["spline_bend"]
    result = bootstrap_statistic(cells, statistic, unit="firm", resamples=300, seed=2)
    assert result.standard_errors is None and np.isnan(result.intervals["studentized"]).all()
    assert result.scale == "identity" and result.odds_ratio == result.estimate
    assert np.isfinite(result.intervals["percentile"]).all()
    # there is no bend here (the statistic is near 0) and every replicate exceeds it: the BCa bias
    # correction is then infinite and the interval is reported as missing, not made up
    if (result.replicates > result.estimate).all():
        assert np.isnan(result.intervals["bca"]).all()


def test_the_same_seed_gives_the_same_draws_whatever_the_statistic() -> None:
    # decade odds ratio, period difference and the bend test all see the very same resampled year counts:
    # the decade replicates are exactly ten times the slope's
    cells = build_cells(ROSTER)
    centre = window_centre(cells.window)
    slope = bootstrap_statistic(cells, make_statistic("slope", cells, centre=centre), unit="firm", resamples=300,
                                seed=5)
    decade = bootstrap_statistic(cells, make_statistic("decade_odds_ratio", cells, centre=centre), unit="firm",
                                 resamples=300, seed=5)
    np.testing.assert_array_equal(decade.replicates, 10.0 * slope.replicates)
    assert decade.intervals["percentile"] == pytest.approx(tuple(np.exp(10 * np.log(slope.intervals["percentile"]))),
                                                           rel=1e-12)


@pytest.mark.parametrize(("kwargs", "words"), [
    ({"name": "nonsense"}, "statistic must be one of"),
    ({"name": "sector_slope", "sector": "S9", "by_sector": True}, "sector must be one of S0, S1, S2"),
    ({"name": "heterogeneity", "sectors": ("S0",), "by_sector": True}, "at least two of the sectors"),
    ({"name": "spline_bend", "spline_df": 9}, "spline_df must be one of"),
    ({"name": "period_difference"}, "needs two periods"),
    ({"name": "period_difference", "periods": ((2014, 2016), (2012, 2013))}, "must end before the second"),
    ({"name": "sector_slope", "sector": "S1"}, "computed on sector-year cells"),
])
def test_bad_statistic_options_say_what_is_wrong(kwargs: dict, words: str) -> None:
    cells = build_cells(ROSTER, by_sector=kwargs.pop("by_sector", False))
    with pytest.raises(ValueError, match=words):
        make_statistic(kwargs.pop("name"), cells, centre=2014.0, **kwargs)


def test_a_period_with_no_departure_in_a_resample_is_a_named_failure() -> None:
    roster = ROSTER.copy()
    roster = pd.concat([roster, roster.iloc[[0]].assign(year=2030, firm_id="LONE")], ignore_index=True)
    cells = build_cells(roster)
    statistic = make_statistic("period_difference", cells, centre=2020.0, periods=((2010, 2018), (2030, 2030)))
    result = bootstrap_statistic(cells, statistic, unit="firm", resamples=500, seed=1)
    assert set(result.failed_by_reason) == {"empty_period"} and 0 < result.failed < 500
    assert np.isnan(result.replicates[result.failures == "empty_period"]).all()
