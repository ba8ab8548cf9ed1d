"""The bootstrap statistics of the other measures (app.stats.measures, app.stats.poisson_batch) against the
obvious loop: statsmodels refitted on each resample.

Oracles: statsmodels ``GLM(y, X, family=Poisson(), offset=log(firm-years))`` (the rate trend, as
``app.stats.rate_trend`` documents it) and the record-level ``GLM(..., family=Binomial())`` of the adjusted model
(``statsmodels_fit`` of tests/test_stats_adjusted.py); resamples are rebuilt here from the drawn firms with
pandas (each drawn firm's rows repeated), not through the engine's firm matrix. Hand counts for the cells.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from test_stats_adjusted import invented_records, statsmodels_fit

from app.stats.adjusted import bootstrap_cells, collapse, fit_adjusted
from app.stats.bootstrap import bootstrap_statistic
from app.stats.draws import BLOCK_SIZE, block_rng
from app.stats.measures import adjusted_statistic, rate_cells, rate_ratio_statistic
from app.stats.poisson_batch import fit_poisson_batch
from app.stats.sampling import draw_statistic

WINDOW = (2000, 2014)
CENTRE = 2007.0


def invented_universe(seed: int = 3, firms: int = 120) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Firms entering and leaving the index, each with its own forced-departure rate (so firms cluster), and
    some firms that never lose a chief executive. Returns (firm-years, forced departures per firm-year)."""
    rng = np.random.default_rng(seed)
    rows, deps = [], []
    for f in range(firms):
        first = int(rng.integers(1998, 2010))
        last = int(min(2016, first + rng.integers(3, 15)))
        frailty = rng.gamma(1.5, 1 / 1.5) if f % 5 else 0.0  # every fifth firm: no departure ever
        for y in range(first, last + 1):
            rows.append((f"U{f:03d}", y))
            k = rng.poisson(0.12 * frailty * np.exp(0.03 * (y - 2007)))
            if k:
                deps.append((f"U{f:03d}", y, int(k)))
    deps.append(("OUTSIDER", 2005, 3))  # a firm outside the universe: left out, as the Rates section does
    return (pd.DataFrame(rows, columns=["firm_id", "year"]),
            pd.DataFrame(deps, columns=["firm_id", "year", "departures"]))


def sm_rate(events: np.ndarray, exposure: np.ndarray, years: np.ndarray) -> tuple[float, float]:
    """statsmodels' Poisson GLM with offset log(firm-years) over the exposed years: (slope, bse)."""
    keep = exposure > 0
    X = sm.add_constant(years[keep] - CENTRE)
    res = sm.GLM(events[keep], X, family=sm.families.Poisson(), offset=np.log(exposure[keep])).fit(tol=1e-12)
    return float(res.params[1]), float(res.bse[1])


class LoopResampler:
    """Resamples built the obvious way: each firm's firm-years and inside departures per year, counted once with
    pandas from the frames (not through the engine's firm matrix), then summed over the drawn firms."""

    def __init__(self, fy: pd.DataFrame, dep: pd.DataFrame, firm_ids: np.ndarray, years: np.ndarray) -> None:
        inside = dep.merge(fy, on=["firm_id", "year"])
        exp = pd.crosstab(fy["firm_id"], fy["year"]).reindex(index=firm_ids, columns=years, fill_value=0)
        ev = (inside.pivot_table(index="firm_id", columns="year", values="departures", aggfunc="sum")
              .reindex(index=firm_ids, columns=years).fillna(0))
        self.exposure, self.events = exp.to_numpy(dtype=float), ev.to_numpy(dtype=float)

    def __call__(self, draw: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return self.events[draw].sum(axis=0), self.exposure[draw].sum(axis=0)


def test_batched_poisson_fits_equal_statsmodels_row_by_row() -> None:
    rng = np.random.default_rng(4)
    t = np.arange(12) - 5.5
    X = np.column_stack([np.ones(12), t])
    exposure = rng.integers(50, 400, size=(40, 12)).astype(float)
    exposure[5, [0, 7]] = 0.0  # years a resample drew no firm in: no weight
    events = rng.poisson(exposure * 0.04 * np.exp(0.02 * t)).astype(float)
    events[5, [0, 7]] = 0.0
    events[9] = 0.0
    fit = fit_poisson_batch(X, events, exposure)
    assert fit.failure[9] == "no_forced" and np.isnan(fit.beta[9]).all()
    for i in (0, 5, 17, 39):
        keep = exposure[i] > 0
        res = sm.GLM(events[i, keep], X[keep], family=sm.families.Poisson(), offset=np.log(exposure[i, keep])).fit(
            tol=1e-12)  # oracle: statsmodels
        assert fit.failure[i] == ""
        np.testing.assert_allclose(fit.beta[i], res.params, rtol=0, atol=1e-8)
        np.testing.assert_allclose(fit.se[i], res.bse, rtol=1e-6)
    lone = np.zeros((1, 12))
    lone[0, -1] = 4.0  # every event in the last year: the slope runs to infinity
    assert fit_poisson_batch(X, lone, exposure[:1]).failure[0] == "separation"
    one_year = np.where(np.arange(12) == 3, 100.0, 0.0)[None, :]  # firm-years in one year only
    assert fit_poisson_batch(X, one_year / 20, one_year).failure[0] == "rank_deficient"


def test_rate_cells_count_firm_years_and_inside_departures_by_hand() -> None:
    fy = pd.DataFrame({"firm_id": ["A", "A", "A", "B", "B", "C", "D"], "year": [2000, 2001, 2002, 2001, 2002, 2000,
                                                                                1990]})
    dep = pd.DataFrame({"firm_id": ["A", "B", "B", "C", "Z"], "year": [2001, 2001, 2003, 2000, 2001],
                        "departures": [2, 1, 5, 1, 4]})
    cells = rate_cells(fy, dep, (2000, 2002))
    # by hand: years 2000-2002; firm-years 2, 2, 2; forced 1 (C), 3 (A 2 + B 1), 0 (B's 2003 and Z are outside)
    assert cells.groups["year"].tolist() == [2000, 2001, 2002]
    assert cells.groups["voluntary"].tolist() == [2, 2, 2] and cells.groups["forced"].tolist() == [1, 3, 0]
    assert cells.firm_ids.tolist() == ["A", "B", "C"]  # D has no firm-year in the window
    assert cells.firm_matrix.toarray().tolist() == [[0, 2, 0, 1, 1, 1], [0, 1, 0, 0, 1, 1], [1, 0, 0, 1, 0, 0]]
    with pytest.raises(ValueError, match="no firm-years in 2010"):
        rate_cells(fy, dep, (2010, 2012))


def test_rate_ratio_resamples_equal_statsmodels_on_the_same_drawn_firms() -> None:
    fy, dep = invented_universe()
    cells = rate_cells(fy, dep, WINDOW)
    years = cells.groups["year"].to_numpy()
    statistic = rate_ratio_statistic(cells, CENTRE)
    estimate, se = statistic.original(cells)
    b, bse = sm_rate(cells.forced.astype(float), cells.voluntary.astype(float), years.astype(float))
    assert estimate == pytest.approx(b, abs=1e-8) and se == pytest.approx(bse, rel=1e-6)  # oracle: statsmodels
    reps = draw_statistic(cells, statistic.evaluate, unit="firm", resamples=60, seed=17, workers=1, sampler=1)
    rng = block_rng(17, 0)  # sampler 1's documented stream: rng.integers(0, n_firms, n_firms) per resample
    resample = LoopResampler(fy.loc[fy["year"].between(*WINDOW)], dep, cells.firm_ids, years)
    for i in range(60):
        draw = rng.integers(0, len(cells.firm_ids), size=len(cells.firm_ids))
        ev, exp = resample(draw)
        b_i, se_i = sm_rate(ev, exp, years.astype(float))
        assert reps.failure[i] == ""
        assert reps.estimates[i] == pytest.approx(b_i, abs=1e-8)
        assert reps.standard_errors is not None and reps.standard_errors[i] == pytest.approx(se_i, rel=1e-6)


def test_rate_ratio_bootstrap_distribution_matches_an_independent_loop() -> None:
    """Same distribution, different seeds: the engine's mean and sd against a loop of statsmodels fits on
    firms drawn by a separate generator, within Monte Carlo error (4 standard errors of the difference)."""
    fy, dep = invented_universe(seed=9, firms=150)
    cells = rate_cells(fy, dep, WINDOW)
    years = cells.groups["year"].to_numpy()
    n = 400
    engine = bootstrap_statistic(cells, rate_ratio_statistic(cells, CENTRE), unit="firm", resamples=n, seed=5,
                                 workers=1)
    rng = np.random.default_rng(12345)
    resample = LoopResampler(fy.loc[fy["year"].between(*WINDOW)], dep, cells.firm_ids, years)
    loop = np.array([sm_rate(*resample(rng.integers(0, len(cells.firm_ids), len(cells.firm_ids))),
                             years.astype(float))[0] for _ in range(n)])
    a, b = engine.replicates, loop
    assert engine.failed == 0
    sd = np.std(b, ddof=1)
    assert abs(a.mean() - b.mean()) < 4 * np.sqrt(2 / n) * sd
    assert abs(np.std(a, ddof=1) / sd - 1) < 4 * np.sqrt(1 / n)  # sd's relative MC error ~ 1/sqrt(2n), two runs
    lo, hi = engine.intervals["bca"]
    assert lo < engine.odds_ratio < hi


def test_adjusted_odds_ratio_resamples_equal_statsmodels_on_the_same_drawn_firms() -> None:
    records = invented_records(seed=21, n=2500, firms=70)
    adjust = ("age", "tenure", "sector")
    data = collapse(records, adjust)
    cells, _ = bootstrap_cells(data, (2000, 2015))
    statistic = adjusted_statistic(cells, adjust)
    params, _, _ = statsmodels_fit(records, adjust)
    assert statistic.original(cells)[0] == pytest.approx(float(params["year"]), abs=1e-8)  # oracle: statsmodels
    assert statistic.original(cells)[0] == pytest.approx(fit_adjusted(data, (2000, 2015)).coef, abs=1e-10)
    reps = draw_statistic(cells, statistic.evaluate, unit="firm", resamples=BLOCK_SIZE, seed=3, workers=1,
                         sampler=1)
    rng = block_rng(3, 0)  # sampler 1's documented stream: rng.integers(0, n_firms, n_firms) per resample
    kept = records.dropna(subset=list(adjust)).reset_index(drop=True)
    positions = kept.groupby("firm_id").indices
    for i in range(8):
        draw = rng.integers(0, len(data.firm_ids), size=len(data.firm_ids))
        rows = kept.iloc[np.concatenate([positions[data.firm_ids[k]] for k in draw])].reset_index(drop=True)
        params_i, _, _ = statsmodels_fit(rows, adjust)
        assert reps.failure[i] == ""
        assert reps.estimates[i] == pytest.approx(float(params_i["year"]), abs=1e-7)
    with pytest.raises(ValueError, match="adjusted model's cells"):
        adjusted_statistic(rate_cells(*invented_universe(), WINDOW), adjust)
