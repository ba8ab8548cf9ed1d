"""Batched IRLS against statsmodels' GLM on the same counts, and its failure reasons."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.special import expit, xlog1py

from app.stats.bootstrap import BLOCK_SIZE, draw_cells, draw_replicates
from app.stats.cells import build_cells
from app.stats.design import design_matrix, window_centre
from app.stats.irls import BatchFit, arrow_design, fit_batch, solve_arrow_stack, solve_spd_stack
from app.stats.irls_steps import ArrowStep


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


def test_one_block_step_equals_the_arrow_solver_bit_for_bit() -> None:
    # oracles: solve_arrow_stack (the general arrow elimination) and numpy.linalg.solve on X' W X
    rng = np.random.default_rng(5)
    t = np.arange(9) - 4.0
    X = np.column_stack([np.ones(9), t])
    arrow = arrow_design(X)
    assert arrow is not None
    weights = rng.uniform(0.1, 50.0, size=(60, 9))
    weights[0] = 0.0                    # no weight at all: singular
    weights[1] = 0.0
    weights[1, 4] = 3.0                 # weight on one year only: the slope is not identified
    rhs = rng.normal(size=(60, 2))
    step = ArrowStep(arrow)
    with np.errstate(divide="ignore", invalid="ignore"):
        got = step.solve(weights, rhs)
        expected = solve_arrow_stack(arrow, weights, rhs)
    np.testing.assert_array_equal(got, expected)
    assert np.isnan(got[:2]).all() and np.isfinite(got[2:]).all()
    xtwx = np.einsum("kg,gi,gj->kij", weights[2:], X, X)
    np.testing.assert_allclose(got[2:], np.linalg.solve(xtwx, rhs[2:, :, None])[:, :, 0], rtol=1e-10, atol=1e-12)
    eta = np.empty((60, 9))
    np.testing.assert_array_equal(step.linear(got, eta)[2:], got[2:, arrow.block] + got[2:, -1:] * t)


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


# ---------------------------------------------------------------- the loop against the plain loop

def plain_irls(X: np.ndarray, forced: np.ndarray, totals: np.ndarray, general: bool = False,
               max_iter: int = 50) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The oracle for stored numbers: the plain batched IRLS loop (statsmodels' start, R's relative rule, a
    fresh array per operation, every row's tests every step), as fit_batch ran it before its work arrays.

    Fits every row (the pre-fit checks of fit_batch are not repeated here). Returns beta, deviance,
    iterations and failure reasons.
    """
    m, p = forced.shape[0], X.shape[1]
    arrow = arrow_design(X)
    outer = (X[:, :, None] * X[:, None, :]).reshape(X.shape[0], p * p)
    beta, dev_out = np.full((m, p), np.nan), np.full(m, np.nan)
    its, failure = np.zeros(m, dtype=np.int64), np.full(m, "", dtype="<U14")
    f, n, rows = forced, totals, np.arange(m)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        y = np.where(n > 0, f / n, 0.0)
        v, n_safe = n - f, np.where(n > 0, n, 1.0)

        def deviance(mu: np.ndarray) -> np.ndarray:
            fitted = n_safe * mu
            return 2.0 * (xlog1py(f, (f - fitted) / fitted)
                          + xlog1py(v, (v - (n_safe - fitted)) / (n_safe - fitted))).sum(axis=-1)

        mu = (y + 0.5) / 2.0
        eta = np.log(mu / (1.0 - mu))
        dev = deviance(mu)
        for it in range(1, max_iter + 1):
            weights = n * (mu * (1.0 - mu))
            xtwz = (weights * eta + (f - n * mu)) @ X
            if general or arrow is None:
                new_beta = solve_spd_stack((weights @ outer).reshape(-1, p, p), xtwz)
                eta = new_beta @ X.T
            else:
                new_beta = solve_arrow_stack(arrow, weights, xtwz)
                eta = new_beta[:, arrow.block] + new_beta[:, -1:] * arrow.covariate
            mu = expit(eta)
            new_dev = deviance(mu)
            finite = np.isfinite(new_beta).all(axis=1)
            edge = finite & ((n > 0) & (mu * (1.0 - mu) < 1e-9)).any(axis=1)
            bad = ~finite | (~edge & ~np.isfinite(new_dev))
            done = ~bad & ~edge & (np.abs(new_dev - dev) < 1e-10 * (np.abs(new_dev) + 0.1))
            beta[rows], dev_out[rows], its[rows] = new_beta, new_dev, it
            failure[rows[bad]], failure[rows[edge]] = "non_finite", "separation"
            keep = ~(bad | edge | done)
            rows, f, n, y, eta, mu, v, n_safe = (a[keep] for a in (rows, f, n, y, eta, mu, v, n_safe))
            dev = new_dev[keep]
            if not rows.size:
                break
    failure[rows] = "not_converged"
    beta[failure != ""] = np.nan
    return beta, dev_out, its, failure


def assert_same_as_plain(fit: BatchFit, plain: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]) -> None:
    """Bit for bit, on the rows fit_batch did fit (the others failed its pre-fit checks)."""
    fitted = ~np.isin(fit.failure, ["no_forced", "no_voluntary", "rank_deficient"])
    assert fitted.any()
    beta, deviance, iterations, failure = plain
    np.testing.assert_array_equal(fit.beta[fitted], beta[fitted])
    np.testing.assert_array_equal(fit.deviance[fitted], deviance[fitted])
    np.testing.assert_array_equal(fit.iterations[fitted], iterations[fitted])
    np.testing.assert_array_equal(fit.failure[fitted], failure[fitted])


@pytest.mark.parametrize("model", ["linear", "sector"])
@pytest.mark.parametrize("unit", ["departure", "firm"])
@pytest.mark.parametrize("firms", [12, 400])
def test_the_loop_gives_the_plain_loops_numbers_bit_for_bit(model: str, unit: str, firms: int) -> None:
    # oracles: the plain loop above (stored runs keep their numbers) and statsmodels GLM(Binomial) per fit;
    # 12 firms over 8 years give empty years, separated and barely separated resamples
    cells = build_cells(clustered_roster(3, firms=firms, sectors=3), by_sector=(model == "sector"))
    design = design_matrix(cells.groups, model, window_centre(cells.window))  # type: ignore[arg-type]
    X = np.asarray(design.matrix, dtype=float)
    # sampler 3's block: on it the plain loop and main's engine agree bit for bit. On sampler 4's block the plain
    # loop (a re-statement, not main's code) differs from both main's engine and this one in the last bit of 3
    # of 498 values, while those two engines agree bit for bit (checked at the merge, session 5)
    counts = draw_cells(cells, unit=unit, seed=11, block=0, sampler=3)  # type: ignore[arg-type]
    g = cells.n_groups
    forced, totals = counts[:, :g], counts[:, :g] + counts[:, g:]
    for solver, general in (("auto", False), ("general", True)):
        fit = fit_batch(X, forced, totals, solver=solver)  # type: ignore[arg-type]
        assert_same_as_plain(fit, plain_irls(X, forced, totals, general=general))
    if firms == 12:
        assert (totals == 0).any() and "separation" in fit.failure
    for i in np.flatnonzero(fit.converged)[:15]:
        np.testing.assert_allclose(fit.beta[i], statsmodels_slope(X, forced[i], totals[i]), rtol=1e-9, atol=1e-9)


def test_the_start_deviance_is_computed_where_step_one_can_stop() -> None:
    # hand-derived: a forced share of exactly 1/2 in every year is statsmodels' start itself, so step 1
    # changes nothing and the rule stops there (the start's deviance, 0, must be computed); the other rows
    # start far from their fit (oracle for all: the plain loop)
    X = np.column_stack([np.ones(6), np.arange(6) - 2.5])
    totals = np.array([[40, 60, 80, 20, 10, 50], [40, 60, 80, 20, 10, 50], [4000, 6000, 8000, 2000, 1000, 5000.0]])
    forced = np.array([[20, 30, 40, 10, 5, 25], [9, 20, 35, 10, 6, 40], [900, 2000, 3500, 1000, 600, 4000.0]])
    fit = fit_batch(X, forced, totals)
    assert fit.iterations[0] == 1 and fit.deviance[0] == 0.0 and np.array_equal(fit.beta[0], [0.0, 0.0])
    assert (fit.iterations[1:] > 2).all()
    assert_same_as_plain(fit, plain_irls(X, forced, totals))
    # a start given as NaN is statsmodels' start without the bound: the same numbers
    cold = fit_batch(X, forced, totals, start=np.full(2, np.nan))
    np.testing.assert_array_equal(cold.beta, fit.beta)
    np.testing.assert_array_equal(cold.iterations, fit.iterations)


def test_failures_are_reported_as_by_the_plain_loop() -> None:
    # hand-built: separation, quasi-separation, an ordinary fit, and iterations running out (max_iter=2)
    t = np.arange(6) - 2.5
    X = np.column_stack([np.ones(6), t])
    n = np.tile(np.full(6, 5.0), (4, 1))
    forced = np.array([[5, 5, 5, 0, 0, 0], [5, 5, 3, 0, 0, 0], [3, 1, 2, 2, 4, 1], [1, 1, 2, 3, 4, 4]], dtype=float)
    for max_iter in (2, 50):
        fit = fit_batch(X, forced, n, max_iter=max_iter)
        assert_same_as_plain(fit, plain_irls(X, forced, n, max_iter=max_iter))
    assert fit_batch(X, forced, n, max_iter=2).failure.tolist() == ["not_converged"] * 4
    assert fit.failure.tolist() == ["separation", "separation", "", ""]
