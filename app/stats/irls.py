"""Batched iteratively reweighted least squares for many grouped binomial logit fits at once.

Every bootstrap resample of a trend fit shares the same design matrix (one row per group) and
differs only in its counts, so a whole stack of fits can run as a handful of matrix products per
iteration instead of one statsmodels fit per resample.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
from scipy.special import expit, xlog1py

from app.stats.irls_steps import (
    ArrowDesign,
    ArrowStep,
    GeneralStep,
    arrow_design,
    solve_arrow_stack,
    solve_spd_stack,
)
from app.types import check_choice

__all__ = [
    "FAILURE_REASONS", "SOLVERS", "ArrowDesign", "BatchFit", "arrow_design", "binomial_deviance",
    "converged_relative", "fit_batch", "solve_arrow_stack", "solve_spd_stack",
]

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
    prepared = _prepare(X, solver)
    kept = forced.sum(axis=1)
    code = np.zeros(n_fits, dtype=np.int8)  # 0: fitted, k: FAILURE_REASONS[k - 1]
    code[kept == totals.sum(axis=1)] = _CODE["no_voluntary"]
    code[kept == 0] = _CODE["no_forced"]
    unsupported = ((totals @ prepared.support) == 0).any(axis=1)  # a column with no departures under it
    code[(code == 0) & unsupported] = _CODE["rank_deficient"]     # is unidentified

    beta = np.full((n_fits, X.shape[1]), np.nan)
    deviance = np.full(n_fits, np.nan)
    iterations = np.zeros(n_fits, dtype=np.int64)
    active = np.flatnonzero(code == 0)
    if active.size:
        _iterate(X, forced, totals, active, tol, max_iter, beta, deviance, iterations, code, prepared.step,
                 None if start is None else start[active])
    failed = code != 0
    beta[failed] = np.nan
    return BatchFit(beta=beta, converged=~failed, failure=_LABELS[code], deviance=deviance,
                    iterations=iterations)


_CODE = {reason: k + 1 for k, reason in enumerate(FAILURE_REASONS)}
_LABELS = np.array(["", *FAILURE_REASONS], dtype="<U14")


@dataclass(frozen=True)
class _Prepared:
    """What a design needs for every batch of fits: its step solver, and which columns each group
    supports (``X != 0``) for the identifiability test."""

    step: ArrowStep | GeneralStep
    support: np.ndarray


def _prepare(X: np.ndarray, solver: Solver) -> _Prepared:
    """The step solver for ``X`` (an arrow design's closed form unless ``solver="general"``) and its
    support, kept for reuse: a bootstrap fits block after block of resamples on one design."""
    key = (solver, X.shape, X.tobytes())
    prepared = _PREPARED.get(key)
    if prepared is None:
        arrow = arrow_design(X) if solver == "auto" else None
        prepared = _Prepared(GeneralStep(X) if arrow is None else ArrowStep(arrow), (X != 0).astype(float))
        if len(_PREPARED) >= 64:
            _PREPARED.clear()
        _PREPARED[key] = prepared
    return prepared


_PREPARED: dict[tuple[str, tuple[int, ...], bytes], _Prepared] = {}


class _Work:
    """Work arrays for a stack of fits, shape (n_fits, n_groups), written in place every iteration.

    ``resid`` carries ``f - n mu`` from one iteration's deviance to the next one's working response.
    """

    def __init__(self, shape: tuple[int, ...], resid: np.ndarray | None = None) -> None:
        self.weights, self.z, self.fitted, self.ratio, self.other = (np.empty(shape) for _ in range(5))
        self.resid = np.empty(shape) if resid is None else resid

    def deviance(self, forced: np.ndarray, voluntary: np.ndarray, totals: np.ndarray, mu: np.ndarray) -> np.ndarray:
        """:func:`binomial_deviance` for totals that are all positive (see ``_iterate``), the same
        operations in the same order; leaves ``totals * mu`` in ``fitted`` and ``forced - totals * mu`` in
        ``resid``."""
        fitted = np.multiply(totals, mu, out=self.fitted)
        np.subtract(forced, fitted, out=self.resid)
        terms = xlog1py(forced, np.divide(self.resid, fitted, out=self.ratio), out=self.ratio)
        fitted = np.subtract(totals, fitted, out=self.other)
        np.subtract(voluntary, fitted, out=self.z)
        terms += xlog1py(voluntary, np.divide(self.z, fitted, out=self.z), out=self.z)
        return 2.0 * terms.sum(axis=-1)


def _start_floor(resid: np.ndarray, totals: np.ndarray, scratch: np.ndarray) -> np.ndarray:
    """A number below the deviance at the start, computed as :class:`_Work` computes it, for each row.

    Pinsker's inequality bounds each group's deviance ``2 n KL(y, mu)`` below by ``4 n (y - mu)**2 =
    4 resid**2 / n`` (``resid = f - n mu``). The computed deviance differs from the exact one by rounding
    alone: at the start ``f / (n mu)`` and ``v / (n (1 - mu))`` lie in ``[0, 4/3]``, so every term is at most
    ``0.38 n`` in size and the error is far below ``1e-12 * sum(n)``; the margin taken here is a million times
    that. Groups must all hold departures.
    """
    squares = np.multiply(resid, resid, out=scratch)
    squares /= totals
    return 4.0 * squares.sum(axis=1) * (1.0 - 1e-6) - 1e-6 * totals.sum(axis=1)


def _iterate(
    X: np.ndarray, forced: np.ndarray, totals: np.ndarray, active: np.ndarray, tol: float,
    max_iter: int, beta: np.ndarray, deviance: np.ndarray, iterations: np.ndarray, code: np.ndarray,
    step: ArrowStep | GeneralStep,
    start: np.ndarray | None = None,
) -> None:
    """Run IRLS on the rows in ``active``, writing results and failure codes into the output arrays in place.

    The arithmetic is the plain loop's (weights ``n mu (1 - mu)``, working response, solve, ``mu``,
    deviance, tests) operation for operation, so the estimates are the same bit for bit. What is saved
    is numpy calls, which at a few thousand numbers per array cost more than the arithmetic: arrays are
    written into work arrays (``out=``); the deviance's residuals ``f - n mu`` become the next working
    response and the separation test's ``mu (1 - mu)`` the next weights; the row-by-row failure tests
    run only when one test over the whole stack says some row may have failed; results are written
    when rows finish, and the stack is cut down only when some rows finish and others go on. The
    deviance at statsmodels' start, which only the stopping test of step 1 reads, is computed only for
    rows where a bound without logarithms (:func:`_start_floor`) leaves that test undecided.
    """
    f, n = forced[active], totals[active]
    occupied = n > 0
    full = bool(occupied.all())  # the usual case: no group of any fit is empty
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        y = np.where(occupied, f / n, 0.0)
        v = n - f
        # a group without departures gets total 1 in the deviance's denominators, where its zero counts
        # make every term 0 (``xlog1py(0, x) = 0``)
        n_safe = n if full else np.where(occupied, n, 1.0)
        mu = (y + 0.5) / 2.0
        eta = np.log(mu / (1.0 - mu))
        if start is not None:
            warm = np.isfinite(start).all(axis=1)
            eta[warm] = start[warm] @ X.T
            mu[warm] = expit(eta[warm])
        work = _Work(f.shape)
        floor = None
        if start is None and full:
            # from statsmodels' start the deviance is nearly always far above the first step's, so the rule
            # cannot stop at step 1; it is computed (below) only for rows where a cheap bound allows that
            np.subtract(f, np.multiply(n, mu, out=work.fitted), out=work.resid)
            floor = _start_floor(work.resid, n, work.ratio)
            dev = np.full(f.shape[0], np.inf)  # |new - inf| passes no stopping rule
        else:
            dev = work.deviance(f, v, n_safe, mu)
        var = mu * (1.0 - mu)
        rows = active
        for it in range(1, max_iter + 1):
            weights = np.multiply(n, var, out=work.weights)
            # X'W z with z = eta + (y - mu) / var, written without the division
            z = np.multiply(weights, eta, out=work.z)
            z += work.resid if full else f - n * mu
            new_beta = step.solve(weights, z @ X)
            eta = step.linear(new_beta, eta)
            mu = expit(eta, out=mu)
            new_dev = work.deviance(f, v, n_safe, mu)
            var = np.multiply(mu, np.subtract(1.0, mu, out=var), out=var)
            if floor is not None:
                near = new_dev + 2.0 * tol * (np.abs(new_dev) + 0.1) > floor
                if near.any():  # the start's deviance, as the plain loop computes it, where it can matter
                    dev[near] = _Work(f[near].shape).deviance(f[near], v[near], n[near], (y[near] + 0.5) / 2.0)
                floor = None
            bad = edge = None
            if full and math.isfinite(new_beta.sum() + new_dev.sum()) and var.min() >= SEPARATION_VARIANCE:
                # every row finite and clear of 0 and 1 (a non-finite number makes a sum non-finite, NaN
                # makes the minimum NaN): the row-by-row tests below would find no failure
                finished = converged_relative(dev, new_dev, tol)
            else:
                finite = np.isfinite(new_beta).all(axis=1)
                # fitted shares at 0 or 1 mean the coefficients are running off to infinity: stop there
                # rather than let p(1 - p) underflow into a division by zero
                edge = finite & (occupied & (var < SEPARATION_VARIANCE)).any(axis=1)
                bad = ~finite | (~edge & ~np.isfinite(new_dev))
                finished = bad | edge | converged_relative(dev, new_dev, tol)
            last = it == max_iter
            if not (last or finished.any()):
                dev = new_dev
                continue
            every = last or bool(finished.all())
            pick = slice(None) if every else finished
            beta[rows[pick]] = new_beta[pick]
            deviance[rows[pick]] = new_dev[pick]
            iterations[rows[pick]] = it
            if bad is not None and edge is not None:
                code[rows[bad]] = _CODE["non_finite"]
                code[rows[edge]] = _CODE["separation"]
            keep = ~finished
            if every:
                rows = rows[keep]
                break
            rows, f, n, v, eta, mu, var, occupied = (a[keep] for a in (rows, f, n, v, eta, mu, var, occupied))
            n_safe = n if full else n_safe[keep]
            dev = new_dev[keep]
            work = _Work(f.shape, work.resid[keep])
    # statsmodels would report these with huge coefficients and a warning at best; here they are
    # named so that no such estimate passes as a bootstrap replicate
    code[rows] = _CODE["not_converged"]
