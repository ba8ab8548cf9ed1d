"""The engine at the sizes desks hold: fits and resamples at one and ten million departures.

Rosters are built as counts (per year, per sector-year, per firm and cell), never as rows. The oracle
everywhere is statsmodels' GLM(Binomial) on the same counts, run with R's relative stopping rule
(``atol = 1e-11, rtol = 1e-10``), under which it converges at these sizes.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import sparse

from app.stats import draws
from app.stats.bootstrap import bootstrap_trend, draw_cells, draw_replicates, jackknife_estimates
from app.stats.cells import Cells
from app.stats.design import design_matrix, window_centre
from app.stats.irls import fit_batch
from app.stats.jackknife import cluster_case_chunks, cluster_cases
from app.stats.profile import fit_grouped_binomial, profile_interval
from app.stats.trend import fit_trend

YEARS = np.arange(1995, 2025)


def statsmodels_fit(X: np.ndarray, forced: np.ndarray, totals: np.ndarray):
    """The oracle: statsmodels on groups with departures, relative stopping rule."""
    keep = totals > 0
    endog = np.column_stack([forced[keep], totals[keep] - forced[keep]])
    return sm.GLM(endog, X[keep], family=sm.families.Binomial()).fit(tol=1e-10, atol=1e-11, rtol=1e-10)


def count_cells(departures: int, seed: int, sectors: int = 1) -> Cells:
    """Invented counts: departures spread over years (and sectors) with a mild upward trend."""
    rng = np.random.default_rng(seed)
    sector = np.repeat([f"S{s}" for s in range(sectors)], YEARS.size) if sectors > 1 else np.full(YEARS.size, "")
    year = np.tile(YEARS, sectors)
    totals = rng.multinomial(departures, np.full(year.size, 1 / year.size))
    share = 1 / (1 + np.exp(-(-1.0 + 0.02 * (year - 2009.5) + 0.1 * (np.arange(year.size) // YEARS.size))))
    forced = rng.binomial(totals, share)
    groups = pd.DataFrame({"year": year, "sector": sector, "forced": forced, "voluntary": totals - forced})
    return Cells(groups=groups, firm_ids=np.array(["F0"]),
                 firm_matrix=sparse.csr_matrix(np.concatenate([forced, totals - forced])[None, :]),
                 window=(int(YEARS[0]), int(YEARS[-1])), by_sector=sectors > 1)


def firm_cells(departures: int, firms: int, seed: int) -> Cells:
    """Invented firm x cell counts with a firm effect on the forced share, built without rows."""
    rng = np.random.default_rng(seed)
    per_firm = 1 + rng.poisson(departures / firms - 1, size=firms)
    firm = np.repeat(np.arange(firms), per_firm)
    year = rng.integers(0, YEARS.size, size=firm.size)
    logit = -1.0 + 0.02 * (year - 14.5) + rng.normal(0, 0.7, size=firms)[firm]
    forced = rng.random(firm.size) < 1 / (1 + np.exp(-logit))
    col = np.where(forced, year, year + YEARS.size)
    matrix = sparse.csr_matrix((np.ones(firm.size, dtype=np.int64), (firm, col)), shape=(firms, 2 * YEARS.size))
    matrix.sum_duplicates()
    totals = np.asarray(matrix.sum(axis=0)).ravel()
    groups = pd.DataFrame({"year": YEARS, "sector": "", "forced": totals[:YEARS.size],
                           "voluntary": totals[YEARS.size:]})
    return Cells(groups=groups, firm_ids=np.arange(firms).astype(str), firm_matrix=matrix,
                 window=(int(YEARS[0]), int(YEARS[-1])), by_sector=False)


@pytest.mark.parametrize("departures", [1_000_000, 10_000_000])
@pytest.mark.parametrize("model", ["linear", "sector"])
def test_fit_at_millions_of_departures_equals_statsmodels(departures: int, model: str) -> None:
    # oracle: statsmodels GLM(Binomial) on the same counts; an absolute stopping rule on the
    # log-likelihood (the earlier engine) ended these fits as not_converged after 50 iterations
    cells = count_cells(departures, seed=departures // 1000 + len(model), sectors=8 if model == "sector" else 1)
    design = design_matrix(cells.groups, model, window_centre(cells.window))  # type: ignore[arg-type]
    fit = fit_batch(design.matrix, cells.forced, cells.totals)
    ref = statsmodels_fit(design.matrix, cells.forced, cells.totals)
    assert ref.converged
    assert fit.failure.tolist() == [""] and int(fit.iterations[0]) <= 10
    np.testing.assert_allclose(fit.beta[0], ref.params, rtol=1e-8, atol=1e-12)
    assert fit.deviance[0] == pytest.approx(ref.deviance, rel=1e-8)


@pytest.mark.parametrize("departures", [1_000_000, 10_000_000])
def test_trend_fit_and_profile_interval_at_millions_of_departures(departures: int) -> None:
    # oracle: statsmodels, both for the fit and for the profile ends (refit with the slope fixed
    # at each end as an offset: the deviance must rise by the chi-squared(1) 95% point, 3.841459)
    cells = count_cells(departures, seed=7)
    fit = fit_trend(cells)
    assert fit.converged and not fit.separated and fit.messages == ()
    design = design_matrix(cells.groups, "linear", window_centre(cells.window))
    ref = statsmodels_fit(design.matrix, cells.forced, cells.totals)
    assert fit.log_or == pytest.approx(ref.params[1], rel=1e-8)
    prof = profile_interval(cells.forced, cells.totals, design.matrix, 1)
    assert prof.message is None
    for end in (prof.low, prof.high):
        grouped = fit_grouped_binomial(cells.forced, cells.totals, design.matrix[:, :1],
                                       offset=end * design.matrix[:, 1])
        assert grouped.converged
        assert grouped.deviance - ref.deviance == pytest.approx(3.841459, abs=1e-5)


def test_no_departure_resample_fails_at_ten_million() -> None:
    # oracle: statsmodels refits of drawn resamples; every resample of a roster this size is an
    # ordinary fit, so any failure would be numerical
    cells = count_cells(10_000_000, seed=11)
    design = design_matrix(cells.groups, "linear", window_centre(cells.window))
    reps = draw_replicates(cells, design, unit="departure", resamples=1000, seed=5)
    assert (reps.failure == "").all() and np.isfinite(reps.estimates).all()
    drawn = draw_cells(cells, unit="departure", seed=5, block=1)
    g = cells.n_groups
    for i in (0, 137, 249):
        ref = statsmodels_fit(design.matrix, drawn[i, :g], drawn[i, :g] + drawn[i, g:])
        assert reps.estimates[250 + i] == pytest.approx(ref.params[1], rel=1e-8)


def test_no_firm_resample_fails_at_a_million_departures() -> None:
    # oracle: statsmodels refits of drawn firm resamples (1M departures, 100,000 firms)
    cells = firm_cells(1_000_000, 100_000, seed=3)
    design = design_matrix(cells.groups, "linear", window_centre(cells.window))
    reps = draw_replicates(cells, design, unit="firm", resamples=500, seed=9)
    assert (reps.failure == "").all() and np.isfinite(reps.estimates).all()
    drawn = draw_cells(cells, unit="firm", seed=9, block=0)
    g = cells.n_groups
    for i in (0, 99, 249):
        ref = statsmodels_fit(design.matrix, drawn[i, :g], drawn[i, :g] + drawn[i, g:])
        assert reps.estimates[i] == pytest.approx(ref.params[1], rel=1e-8)


def test_firm_draws_are_the_counted_uniform_draws_whatever_the_pass_size(monkeypatch: pytest.MonkeyPatch) -> None:
    # oracle: the definition, computed independently of the sampler: block 1's generator gives
    # integers(0, F, size=(250, F)); resample i counts firm j drawn k times as k x firm j's row
    cells = firm_cells(30_000, 3_000, seed=4)
    rng = np.random.default_rng(np.random.SeedSequence(6, spawn_key=(1,)))
    idx = rng.integers(0, 3_000, size=(250, 3_000))
    dense = cells.firm_matrix.toarray()
    expected = np.stack([dense[row].sum(axis=0) for row in idx])
    for pass_rows, pass_values, min_rows in [(25, 2**23, 4), (1, 2**23, 1), (250, 2**23, 4), (7, 1, 3),
                                             (250, 1, 250)]:
        monkeypatch.setattr(draws, "PASS_ROWS", pass_rows)
        monkeypatch.setattr(draws, "PASS_VALUES", pass_values)
        monkeypatch.setattr(draws, "MIN_PASS_ROWS", min_rows)
        np.testing.assert_array_equal(draw_cells(cells, unit="firm", seed=6, block=1, sampler=1), expected)


def test_original_fit_is_checked_before_anything_is_drawn(monkeypatch: pytest.MonkeyPatch) -> None:
    cells = firm_cells(3_000, 300, seed=2)
    groups = cells.groups.assign(voluntary=cells.groups["forced"] + cells.groups["voluntary"], forced=0)
    matrix = cells.firm_matrix.tolil()
    g = cells.n_groups
    matrix[:, g:] = matrix[:, :g] + matrix[:, g:]
    matrix[:, :g] = 0
    no_forced = Cells(groups=groups, firm_ids=cells.firm_ids, firm_matrix=matrix.tocsr(), window=cells.window,
                      by_sector=False)
    design = design_matrix(groups, "linear", window_centre(cells.window))

    def refuse(*args: object, **kwargs: object) -> np.ndarray:
        raise AssertionError("a resample was drawn although the original fit fails")

    monkeypatch.setattr(draws.CellSampler, "draw", refuse)
    for call in (lambda: draw_replicates(no_forced, design, unit="firm", resamples=10_000, seed=1),
                 lambda: bootstrap_trend(no_forced, design, unit="departure", resamples=10_000, seed=1)):
        with pytest.raises(ValueError, match=r"cannot be fitted to these counts \(no_forced\)"):
            call()


def test_firm_jackknife_in_chunks_with_a_warm_start_equals_cold_refits() -> None:
    # oracle: fit_batch from statsmodels' default start on every distinct leave-one-firm-out case
    # (itself checked against statsmodels in test_stats_irls), and statsmodels on a few cases
    cells = firm_cells(20_000, 2_000, seed=8)
    design = design_matrix(cells.groups, "linear", window_centre(cells.window))
    values, weights = jackknife_estimates(cells, design, unit="firm")
    cases = cluster_cases(cells.firm_matrix)
    chunks = list(cluster_case_chunks(cells.firm_matrix, 333))
    np.testing.assert_array_equal(np.concatenate([c.cells for c in chunks]), cases.cells)
    np.testing.assert_array_equal(np.concatenate([c.weights for c in chunks]), cases.weights)
    assert len(chunks) == -(-len(cases.weights) // 333)
    np.testing.assert_array_equal(weights, cases.weights)
    g = cells.n_groups
    cold = fit_batch(design.matrix, cases.cells[:, :g], cases.cells[:, :g] + cases.cells[:, g:])
    np.testing.assert_allclose(values, cold.beta[:, 1], rtol=1e-9, atol=1e-13)
    for i in (0, len(values) // 2, len(values) - 1):
        ref = statsmodels_fit(design.matrix, cases.cells[i, :g], cases.cells[i, :g] + cases.cells[i, g:])
        assert values[i] == pytest.approx(ref.params[1], rel=1e-8)
