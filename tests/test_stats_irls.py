"""Batched IRLS against statsmodels' GLM on the same counts, and its failure reasons."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from app.stats.bootstrap import BLOCK_SIZE, draw_cells, draw_replicates
from app.stats.cells import build_cells
from app.stats.design import design_matrix, window_centre
from app.stats.irls import arrow_design, fit_batch, solve_arrow_stack, solve_spd_stack


def clustered_roster(seed: int, firms: int = 120, years: int = 8, sectors: int = 3) -> pd.DataFrame:
    """Invented roster: firms with a random effect on the logit and several departures each."""
    rng = np.random.default_rng(seed)
    per_firm = rng.integers(1, 5, size=firms)
    firm = np.repeat(np.arange(firms), per_firm)
    year = 2010 + rng.integers(0, years, size=firm.size)
    logit = -0.7 + 0.08 * (year - 2014) + rng.normal(0, 0.8, size=firms)[firm]
    forced = rng.random(firm.size) < 1 / (1 + np.exp(-logit))
    return pd.DataFrame({
        "firm_id": [f"F{f:04d}" for f in firm], "year": year,
        "category": np.where(forced, "forced", "voluntary"),
        "sector": np.array([f"S{s}" for s in range(sectors)])[firm % sectors],
    })


def statsmodels_slope(X: np.ndarray, forced: np.ndarray, totals: np.ndarray) -> np.ndarray:
    """The oracle: statsmodels GLM Binomial on groups that have departures."""
    keep = totals > 0
    endog = np.column_stack([forced[keep], totals[keep] - forced[keep]])
    return sm.GLM(endog, X[keep], family=sm.families.Binomial()).fit(tol=1e-10).params


@pytest.mark.parametrize("model", ["linear", "sector"])
@pytest.mark.parametrize("unit", ["departure", "firm"])
def test_batched_estimates_equal_statsmodels_on_resampled_counts(model: str, unit: str) -> None:
    # oracle: statsmodels GLM(Binomial) fitted one resample at a time on the same counts
    cells = build_cells(clustered_roster(1), by_sector=(model == "sector"))
    design = design_matrix(cells.groups, model, window_centre(cells.window))  # type: ignore[arg-type]
    counts = draw_cells(cells, unit=unit, seed=7, block=0)  # type: ignore[arg-type]
    g = cells.n_groups
    forced, totals = counts[:, :g], counts[:, :g] + counts[:, g:]
    fit = fit_batch(design.matrix, forced, totals)
    reps = draw_replicates(cells, design, unit=unit, resamples=BLOCK_SIZE, seed=7)  # type: ignore[arg-type]
    np.testing.assert_array_equal(reps.estimates, fit.beta[:, design.slope])
    checked = 0
    for i in np.flatnonzero(fit.converged)[:60]:
        np.testing.assert_allclose(fit.beta[i], statsmodels_slope(design.matrix, forced[i], totals[i]),
                                   rtol=1e-8, atol=1e-8)
        checked += 1
    assert checked == 60


def test_original_fit_and_deviance_equal_statsmodels() -> None:
    # oracle: statsmodels GLM(Binomial) deviance on the same grouped counts
    cells = build_cells(clustered_roster(2))
    design = design_matrix(cells.groups, "linear", window_centre(cells.window))
    fit = fit_batch(design.matrix, cells.forced, cells.totals)
    endog = np.column_stack([cells.forced, cells.voluntary])
    ref = sm.GLM(endog, design.matrix, family=sm.families.Binomial()).fit(tol=1e-10)
    np.testing.assert_allclose(fit.beta[0], ref.params, rtol=1e-8, atol=1e-10)
    assert fit.deviance[0] == pytest.approx(ref.deviance, rel=1e-9)


def test_beetle_mortality_published_estimates() -> None:
    # Dobson & Barnett 3rd ed. §7.3 (memory, per tests/data/README.md): b0 -60.72, b1 34.27, deviance 11.23
    beetle = pd.DataFrame({
        "dose": [1.6907, 1.7242, 1.7552, 1.7842, 1.8113, 1.8369, 1.8610, 1.8839],
        "n": [59, 60, 62, 56, 63, 59, 62, 60], "killed": [6, 13, 18, 28, 52, 53, 61, 60],
    })
    X = np.column_stack([np.ones(8), beetle["dose"]])
    fit = fit_batch(X, beetle["killed"].to_numpy(), beetle["n"].to_numpy())
    np.testing.assert_allclose(fit.beta[0], [-60.717455, 34.270326], atol=1e-5)
    assert fit.deviance[0] == pytest.approx(11.232231, abs=1e-5)


def test_failures_are_named_not_dropped() -> None:
    # hand-built cases: each has an obvious reason
    t = np.arange(6) - 2.5
    X = np.column_stack([np.ones(6), t])
    n = np.full(6, 5.0)
    cases = np.array([
        [0, 0, 0, 0, 0, 0],        # no forced at all
        [5, 5, 5, 5, 5, 5],        # no voluntary at all
        [5, 5, 5, 0, 0, 0],        # complete separation by year
        [5, 5, 3, 0, 0, 0],        # quasi-complete separation
        [3, 1, 2, 2, 4, 1],        # an ordinary fit
    ], dtype=float)
    fit = fit_batch(X, cases, np.tile(n, (5, 1)))
    assert fit.failure.tolist() == ["no_forced", "no_voluntary", "separation", "separation", ""]
    assert np.isnan(fit.beta[:4]).all() and np.isfinite(fit.beta[4]).all()
    assert fit.failure_counts() == {"no_forced": 1, "no_voluntary": 1, "separation": 2}


def test_rank_deficient_when_a_sector_has_no_departures() -> None:
    # a sector intercept with no departures under it is not identified
    X = np.array([[1, 0, -1], [1, 0, 1], [0, 1, -1], [0, 1, 1]], dtype=float)
    fit = fit_batch(X, np.array([2, 3, 0, 0.0]), np.array([5, 6, 0, 0.0]))
    assert fit.failure.tolist() == ["rank_deficient"]


def test_not_converged_when_iterations_run_out() -> None:
    X = np.column_stack([np.ones(4), np.arange(4.0)])
    fit = fit_batch(X, np.array([1, 2, 4, 7.0]), np.array([10, 10, 10, 10.0]), max_iter=1)
    assert fit.failure.tolist() == ["not_converged"]


def test_bad_counts_raise() -> None:
    X = np.column_stack([np.ones(3), np.arange(3.0)])
    with pytest.raises(ValueError, match="forced <= totals"):
        fit_batch(X, np.array([3, 1, 1.0]), np.array([2, 2, 2.0]))
    with pytest.raises(ValueError, match="matching shape"):
        fit_batch(X, np.array([1, 1.0]), np.array([2, 2.0]))


def test_spd_solver_matches_numpy() -> None:
    # oracle: numpy.linalg.solve
    rng = np.random.default_rng(0)
    a = rng.normal(size=(20, 6, 6))
    spd = a @ np.swapaxes(a, 1, 2) + 6 * np.eye(6)
    b = rng.normal(size=(20, 6))
    np.testing.assert_allclose(solve_spd_stack(spd, b), np.linalg.solve(spd, b[:, :, None])[:, :, 0],
                               rtol=1e-10)
    assert np.isnan(solve_spd_stack(np.zeros((1, 2, 2)), np.ones((1, 2)))).all()


# ---------------------------------------------------------------- arrow (sector) fast path

def test_arrow_design_is_detected_only_for_indicators_plus_one_column() -> None:
    cells = build_cells(clustered_roster(1), by_sector=True)
    sector = design_matrix(cells.groups, "sector", window_centre(cells.window))
    arrow = arrow_design(sector.matrix)
    assert arrow is not None
    # hand-derived: groups are sorted by (sector, year), so block k is sector k's rows
    expected = cells.groups["sector"].map({s: k for k, s in enumerate(sorted(set(cells.groups["sector"])))})
    np.testing.assert_array_equal(arrow.block, expected.to_numpy())
    np.testing.assert_array_equal(arrow.covariate, sector.matrix[:, -1])
    linear = design_matrix(cells.groups, "linear", window_centre(cells.window))
    assert arrow_design(linear.matrix) is not None  # one block: the constant
    t = sector.matrix[:, -1]
    global_const = np.column_stack([np.ones_like(t), sector.matrix[:, 1:]])  # const + dummies: not one-hot
    assert arrow_design(global_const) is None
    assert arrow_design(np.column_stack([2 * sector.matrix[:, :-1], t])) is None  # not 0/1
    assert arrow_design(np.column_stack([sector.matrix[:, :-1], t, t**2])) is None  # two dense columns


def test_arrow_solver_matches_numpy_on_arrow_matrices() -> None:
    # oracle: numpy.linalg.solve on the dense X' W X of a random arrow design
    rng = np.random.default_rng(4)
    block = np.repeat(np.arange(5), 7)
    t = rng.normal(size=block.size)
    X = np.column_stack([np.eye(5)[block], t])
    arrow = arrow_design(X)
    assert arrow is not None
    weights = rng.uniform(0.1, 3.0, size=(40, block.size))
    xtwx = np.einsum("kg,gi,gj->kij", weights, X, X)
    rhs = rng.normal(size=(40, 6))
    np.testing.assert_allclose(solve_arrow_stack(arrow, weights, rhs),
                               np.linalg.solve(xtwx, rhs[:, :, None])[:, :, 0], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(solve_arrow_stack(arrow, weights, rhs), solve_spd_stack(xtwx, rhs),
                               rtol=1e-12, atol=1e-14)
    weights[0, block == 2] = 0.0  # a block without weight: singular, like the general solver says
    assert np.isnan(solve_arrow_stack(arrow, weights, rhs)[0]).all()
    assert np.isfinite(solve_arrow_stack(arrow, weights, rhs)[1:]).all()
    assert np.isnan(solve_spd_stack(xtwx[:1] * 0, rhs[:1])).all()


@pytest.mark.parametrize("model", ["linear", "sector"])
@pytest.mark.parametrize("unit", ["departure", "firm"])
def test_arrow_path_equals_general_path_and_statsmodels(model: str, unit: str) -> None:
    # oracles: the general elimination path on the same counts, and statsmodels GLM(Binomial) per fit
    cells = build_cells(clustered_roster(1, firms=400, sectors=4), by_sector=(model == "sector"))
    design = design_matrix(cells.groups, model, window_centre(cells.window))  # type: ignore[arg-type]
    counts = draw_cells(cells, unit=unit, seed=7, block=0)  # type: ignore[arg-type]
    g = cells.n_groups
    forced, totals = counts[:, :g], counts[:, :g] + counts[:, g:]
    fast = fit_batch(design.matrix, forced, totals)
    general = fit_batch(design.matrix, forced, totals, solver="general")
    np.testing.assert_array_equal(fast.failure, general.failure)
    np.testing.assert_allclose(fast.beta, general.beta, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(fast.deviance, general.deviance, rtol=1e-10)
    for i in np.flatnonzero(fast.converged)[:40]:
        np.testing.assert_allclose(fast.beta[i], statsmodels_slope(design.matrix, forced[i], totals[i]),
                                   rtol=1e-10, atol=1e-10)


def test_arrow_path_names_the_same_failures_as_the_general_path() -> None:
    # hand-built sector counts: a sector with no departures; a sector whose departures are all
    # forced (its intercept runs to infinity); an ordinary fit
    X = np.array([[1, 0, -1], [1, 0, 1], [0, 1, -1], [0, 1, 1]], dtype=float)
    forced = np.array([[2, 3, 0, 0], [5, 6, 3, 2], [2, 3, 1, 4]], dtype=float)
    totals = np.array([[5, 6, 0, 0], [5, 6, 6, 6], [5, 6, 6, 7]], dtype=float)
    fast = fit_batch(X, forced, totals)
    general = fit_batch(X, forced, totals, solver="general")
    assert fast.failure.tolist() == general.failure.tolist() == ["rank_deficient", "separation", ""]
    np.testing.assert_allclose(fast.beta[2], general.beta[2], rtol=1e-10)
    with pytest.raises(ValueError, match="solver must be one of auto, general"):
        fit_batch(X, forced, totals, solver="lapack")  # type: ignore[arg-type]
