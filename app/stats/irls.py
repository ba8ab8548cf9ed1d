"""Batched iteratively reweighted least squares for many grouped binomial logit fits at once.

Every bootstrap resample of a trend fit shares the same design matrix (one row per group) and
differs only in its counts, so a whole stack of fits can run as a handful of matrix products per
iteration instead of one statsmodels fit per resample.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
from scipy.special import expit, xlog1py

from app.types import check_choice

FailureReason = Literal[
    "no_forced", "no_voluntary", "rank_deficient", "separation", "non_finite", "not_converged",
]
FAILURE_REASONS: tuple[FailureReason, ...] = get_args(FailureReason)
Solver = Literal["auto", "general"]
SOLVERS: tuple[Solver, ...] = get_args(Solver)

#: a fitted p(1 - p) below this at a group with departures means the fit ran off to p = 0 or 1:
#: real forced shares never get within 1e-9 of certainty, separated fits always do.
SEPARATION_VARIANCE = 1e-9


@dataclass(frozen=True)
class BatchFit:
    """Estimates of a stack of grouped binomial logit fits sharing one design matrix.

    Attributes
    ----------
    beta : numpy.ndarray, shape (n_fits, n_params)
        Coefficients; rows that failed hold NaN.
    converged : numpy.ndarray of bool, shape (n_fits,)
        True where the fit converged to a finite, non-separated estimate.
    failure : numpy.ndarray of str, shape (n_fits,)
        ``""`` for a good fit, otherwise one of ``FAILURE_REASONS``.
    deviance : numpy.ndarray, shape (n_fits,)
        Residual deviance at the last iteration (NaN where no iteration ran).
    iterations : numpy.ndarray of int, shape (n_fits,)
        IRLS iterations used.
    """

    beta: np.ndarray
    converged: np.ndarray
    failure: np.ndarray
    deviance: np.ndarray
    iterations: np.ndarray

    def failure_counts(self) -> dict[str, int]:
        """Number of failed fits by reason (reasons that did not occur are left out)."""
        reasons, counts = np.unique(self.failure[self.failure != ""], return_counts=True)
        return {str(r): int(c) for r, c in zip(reasons, counts, strict=True)}


def binomial_deviance(forced: np.ndarray, totals: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """Residual deviance of grouped binomial counts, one value per row (0 log 0 taken as 0).

    Each term ``f log(f / (n mu))`` is evaluated as ``f log1p((f - n mu) / (n mu))``: near the fit
    the ratio is close to 1, where ``log`` of the rounded ratio carries an absolute error of about
    one ulp per term (``f`` ulps after the multiplication, 1e-10 and more at a million departures),
    while ``log1p`` of the small difference keeps the relative precision of the term itself. This
    is what lets the relative convergence test below work at any sample size.

    Parameters
    ----------
    forced, totals : numpy.ndarray, shape (..., n_groups)
        Forced and all counted departures per group.
    mu : numpy.ndarray, shape (..., n_groups)
        Fitted forced shares.

    Returns
    -------
    numpy.ndarray, shape (...,)
        Deviance per row; groups with no departures add nothing.
    """
    forced = np.asarray(forced, dtype=float)
    totals = np.asarray(totals, dtype=float)
    voluntary = totals - forced
    occupied = totals > 0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        fitted_f = totals * mu
        fitted_v = totals * (1.0 - mu)
        dev = (xlog1py(forced, np.where(occupied, (forced - fitted_f) / fitted_f, 0.0))
               + xlog1py(voluntary, np.where(occupied, (voluntary - fitted_v) / fitted_v, 0.0)))
    return 2.0 * np.where(occupied, dev, 0.0).sum(axis=-1)


def converged_relative(old: np.ndarray, new: np.ndarray, tol: float) -> np.ndarray:
    """R's ``glm.fit`` stopping rule: ``|new - old| / (|new| + 0.1) < tol`` (elementwise).

    The deviance of a large roster is the small difference of two large log-likelihoods, so an
    absolute threshold either stops too early on small data or never on large data, where the
    rounding noise of the log-likelihood alone exceeds it.

    Parameters
    ----------
    old, new : numpy.ndarray
        Deviances of consecutive iterations.
    tol : float
        Relative tolerance (1e-10 here; R's default is 1e-8).

    Returns
    -------
    numpy.ndarray of bool
    """
    return np.abs(new - old) < tol * (np.abs(new) + 0.1)


def fit_batch(
    X: np.ndarray,
    forced: np.ndarray,
    totals: np.ndarray,
    *,
    tol: float = 1e-10,
    max_iter: int = 50,
    solver: Solver = "auto",
    start: np.ndarray | None = None,
) -> BatchFit:
    """Fit ``logit P(forced) = X beta`` to many sets of grouped counts at once.

    The algorithm is statsmodels' IRLS (start at ``mu = (y + 0.5) / 2``), stopping on R's relative
    criterion ``|dev change| / (|dev| + 0.1) < tol`` (:func:`converged_relative`), applied to every row of ``forced`` at once, so each estimate
    equals ``sm.GLM(np.column_stack([f, n - f]), X, family=Binomial()).fit()`` on the same counts.
    Groups with no departures carry zero weight (statsmodels needs them dropped).

    Parameters
    ----------
    X : numpy.ndarray, shape (n_groups, n_params)
        Design matrix shared by all fits.
    forced, totals : numpy.ndarray, shape (n_fits, n_groups) or (n_groups,)
        Forced departures and forced + voluntary departures per group.
    tol : float
        Relative change in deviance that ends the iterations (R's ``glm.control`` rule).
    max_iter : int
        Iterations before a fit counts as ``not_converged``.
    solver : {"auto", "general"}
        ``auto`` solves each step through the Schur complement when X is an arrow design (block
        indicators plus one covariate, see :func:`arrow_design`) and by general elimination
        otherwise; ``general`` always eliminates (the reference the fast path is tested against).
    start : numpy.ndarray, shape (n_params,) or (n_fits, n_params), optional
        Coefficients to start from (e.g. the full-data estimate for leave-one-out fits, which
        then converge in two or three steps); statsmodels' start ``mu = (y + 0.5) / 2`` where
        omitted or not finite. The stopping rule is the same, so a warm start changes an
        estimate only within the convergence tolerance.

    Returns
    -------
    BatchFit
        Failed fits are never dropped: they keep their row, hold NaN and carry a reason:
        ``no_forced`` / ``no_voluntary`` (the resample has no departure of one kind, so the
        intercept runs to infinity), ``rank_deficient`` (a column of X has no departures under it,
        e.g. a sector absent from the resample), ``separation`` (fitted shares run to 0 or 1),
        ``non_finite`` (the arithmetic overflowed) or ``not_converged``.
    """
    check_choice(solver, SOLVERS, "solver")
    X = np.asarray(X, dtype=float)
    forced = np.atleast_2d(np.asarray(forced, dtype=float))
    totals = np.atleast_2d(np.asarray(totals, dtype=float))
    if X.ndim != 2 or forced.shape != totals.shape or forced.shape[1] != X.shape[0]:
        raise ValueError("X must be (groups, params) and forced, totals (fits, groups) of matching shape.")
    if np.any(forced < 0) or np.any(forced > totals):
        raise ValueError("Counts must satisfy 0 <= forced <= totals.")
    n_fits, n_groups = forced.shape
    if start is not None:
        start = np.broadcast_to(np.asarray(start, dtype=float), (n_fits, X.shape[1]))
    n_params = X.shape[1]
    failure = np.full(n_fits, "", dtype="<U14")
    failure[(forced.sum(axis=1) == totals.sum(axis=1))] = "no_voluntary"
    failure[forced.sum(axis=1) == 0] = "no_forced"
    unsupported = (totals @ (X != 0)) == 0  # a column with no departures under it is unidentified
    failure[(failure == "") & unsupported.any(axis=1)] = "rank_deficient"

    beta = np.full((n_fits, n_params), np.nan)
    deviance = np.full(n_fits, np.nan)
    iterations = np.zeros(n_fits, dtype=np.int64)
    active = np.flatnonzero(failure == "")
    converged = np.zeros(n_fits, dtype=bool)
    if active.size:
        arrow = arrow_design(X) if solver == "auto" else None
        _iterate(X, forced, totals, active, tol, max_iter, beta, deviance, iterations, converged, failure,
                 arrow, None if start is None else start[active])
    beta[failure != ""] = np.nan
    return BatchFit(beta=beta, converged=failure == "", failure=failure, deviance=deviance,
                    iterations=iterations)


@dataclass(frozen=True)
class ArrowDesign:
    """A design of block indicators plus one last covariate column, e.g. one intercept per sector
    and a common year slope (the linear trend is the one-block case).

    Its ``X' W X`` is an arrow matrix: diagonal over the indicator columns plus a dense last row
    and column, so every IRLS step is solved through the Schur complement of that diagonal in
    O(n_params) instead of a general p x p elimination.

    Attributes
    ----------
    block : numpy.ndarray of int, shape (n_groups,)
        Indicator column that is 1 in each row.
    covariate : numpy.ndarray, shape (n_groups,)
        The last column of the design.
    indicators : numpy.ndarray, shape (n_groups, n_params - 1)
        The indicator columns, contiguous.
    """

    block: np.ndarray
    covariate: np.ndarray
    indicators: np.ndarray


def arrow_design(X: np.ndarray) -> ArrowDesign | None:
    """Detect an arrow design: columns ``0 .. p-2`` are 0/1 with exactly one 1 per row.

    Returns None for any other design (which then takes the general solver).
    """
    X = np.asarray(X, dtype=float)
    if X.ndim != 2 or X.shape[1] < 2 or X.shape[0] == 0:
        return None
    indicators = X[:, :-1]
    # (== comparisons, not np.isin: this runs once per batch of fits, and isin's set machinery cost ~5% of a
    # 10,000-resample departure bootstrap)
    if not (((indicators == 0.0) | (indicators == 1.0)).all() and (indicators.sum(axis=1) == 1.0).all()):
        return None
    return ArrowDesign(block=np.argmax(indicators, axis=1), covariate=np.ascontiguousarray(X[:, -1]),
                       indicators=np.ascontiguousarray(indicators))


def solve_arrow_stack(arrow: ArrowDesign, weights: np.ndarray, xtwz: np.ndarray) -> np.ndarray:
    """Solve ``(X' W_k X) beta_k = xtwz_k`` for every row ``k`` of ``weights`` on an arrow design.

    This is the elimination :func:`solve_spd_stack` performs on the same matrices (indicator
    pivots first; their columns do not interact), written out: the last pivot is the Schur
    complement ``c - sum_s b_s**2 / d_s`` with ``d_s`` the weight of block ``s``, ``b_s`` its
    weighted covariate sum and ``c`` the weighted sum of squared covariates. Systems that are not
    numerically positive definite (same pivot test as :func:`solve_spd_stack`) give a NaN row.
    """
    t = arrow.covariate
    d = weights @ arrow.indicators
    b = (weights * t) @ arrow.indicators
    c = weights @ (t * t)
    u, v = xtwz[:, :-1], xtwz[:, -1]
    scale = np.maximum(d.max(axis=1), np.abs(c))
    singular = ~(scale > 0) | ~(d > 1e-13 * scale[:, None]).all(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = b / d
        schur = c - (ratio * b).sum(axis=1)
        singular |= ~(schur > 1e-13 * scale)
        last = (v - (ratio * u).sum(axis=1)) / schur
        out = np.empty_like(xtwz)
        out[:, :-1] = u / d - ratio * last[:, None]
    out[:, -1] = last
    out[singular] = np.nan
    return out


def _iterate(
    X: np.ndarray, forced: np.ndarray, totals: np.ndarray, active: np.ndarray, tol: float,
    max_iter: int, beta: np.ndarray, deviance: np.ndarray, iterations: np.ndarray,
    converged: np.ndarray, failure: np.ndarray, arrow: ArrowDesign | None,
    start: np.ndarray | None = None,
) -> None:
    """Run IRLS on the rows in ``active``, writing results into the output arrays in place."""
    n_params = X.shape[1]
    # X_i X_j per group, so that X' W X for every fit is one matrix product
    outer = None if arrow is not None else (X[:, :, None] * X[:, None, :]).reshape(X.shape[0], n_params**2)
    f, n = forced[active], totals[active]
    with np.errstate(divide="ignore", invalid="ignore"):
        y = np.where(n > 0, f / n, 0.0)
    # the deviance is evaluated every iteration, so its group masks are folded in once here:
    # a group without departures gets total 1 in the denominators, where its zero counts make
    # every term 0 (``xlog1py(0, x) = 0``)
    v = n - f
    n_safe = np.where(n > 0, n, 1.0)
    mu = (y + 0.5) / 2.0
    eta = np.log(mu / (1.0 - mu))
    if start is not None:
        warm = np.isfinite(start).all(axis=1)
        eta[warm] = start[warm] @ X.T
        mu[warm] = expit(eta[warm])
    dev = _deviance(f, v, n_safe, mu)
    rows = active
    for it in range(1, max_iter + 1):
        var = mu * (1.0 - mu)
        weights = n * var
        # X'W z with z = eta + (y - mu) / var, written without the division
        xtwz = (weights * eta + (f - n * mu)) @ X
        if arrow is None:
            assert outer is not None
            new_beta = solve_spd_stack((weights @ outer).reshape(-1, n_params, n_params), xtwz)
            eta = new_beta @ X.T
        else:
            new_beta = solve_arrow_stack(arrow, weights, xtwz)
            eta = new_beta[:, arrow.block] + new_beta[:, -1:] * arrow.covariate
        mu = expit(eta)
        new_dev = _deviance(f, v, n_safe, mu)
        finite = np.isfinite(new_beta).all(axis=1)
        # fitted shares at 0 or 1 mean the coefficients are running off to infinity: stop there
        # rather than let p(1 - p) underflow into a division by zero
        edge = finite & ((n > 0) & (mu * (1.0 - mu) < SEPARATION_VARIANCE)).any(axis=1)
        bad = ~finite | (~edge & ~np.isfinite(new_dev))
        done = ~bad & ~edge & converged_relative(dev, new_dev, tol)
        beta[rows] = new_beta
        deviance[rows] = new_dev
        iterations[rows] = it
        failure[rows[bad]] = "non_finite"
        failure[rows[edge]] = "separation"
        finished = bad | edge | done
        converged[rows[done]] = True
        if finished.all():
            rows = rows[:0]
            break
        keep = ~finished
        rows, f, n, y, eta, mu = rows[keep], f[keep], n[keep], y[keep], eta[keep], mu[keep]
        v, n_safe = v[keep], n_safe[keep]
        dev = new_dev[keep]
    # statsmodels would report these with huge coefficients and a warning at best; here they are
    # named so that no such estimate passes as a bootstrap replicate
    failure[rows] = "not_converged"


def _deviance(forced: np.ndarray, voluntary: np.ndarray, totals: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """:func:`binomial_deviance` for totals that are all positive (see ``_iterate``)."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        fitted = totals * mu
        dev = xlog1py(forced, (forced - fitted) / fitted)
        fitted = totals - fitted
        dev += xlog1py(voluntary, (voluntary - fitted) / fitted)
    return 2.0 * dev.sum(axis=-1)


def solve_spd_stack(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve each symmetric positive definite system ``a[k] x = b[k]``.

    Gaussian elimination without pivoting (safe for positive definite matrices), vectorised over
    the stack: a few numpy calls per column instead of one LAPACK call per system, and each
    system's arithmetic does not depend on the others. A system that is not numerically
    positive definite gives a NaN row.
    """
    m = np.concatenate([a, b[:, :, None]], axis=2)
    p = a.shape[1]
    scale = np.abs(np.diagonal(a, axis1=1, axis2=2)).max(axis=1)
    singular = ~(scale > 0)
    for k in range(p):
        pivot = m[:, k, k]
        singular |= ~(pivot > 1e-13 * scale)
        pivot = np.where(singular, 1.0, pivot)
        m[:, k, k:] /= pivot[:, None]
        if k + 1 < p:
            m[:, k + 1:, k:] -= m[:, k + 1:, k, None] * m[:, k, None, k:]
    x = np.empty_like(b)
    for k in range(p - 1, -1, -1):
        x[:, k] = m[:, k, p] - (m[:, k, k + 1:p] * x[:, k + 1:]).sum(axis=1)
    x[singular] = np.nan
    return x
