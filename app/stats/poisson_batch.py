"""Batched IRLS for many Poisson log-linear fits with a log-exposure offset that share one design matrix.

A firm bootstrap of a turnover rate's trend refits ``events_t ~ Poisson(E_t exp(x_t' beta))`` once per
resample, where only the counts and the firm-years differ between resamples. statsmodels fits one model per
call (about a millisecond each, thousands per run); here every resample's Newton step is a handful of matrix
products over the whole stack, the same algorithm as :mod:`app.stats.irls` for the binomial trend. Written by
hand for that reason: no library fits a stack of GLMs with per-row offsets at once.

Rows whose exposure is zero (a resample drew no firm in the index that year) carry no weight, as if the year
were absent; a fit needs events and at least as many exposed rows as parameters.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import xlogy

from app.stats.irls import converged_relative, solve_spd_stack

#: fitted events per firm-year below this in an exposed year means the fit ran off to a rate of zero
#: (all events at one end of the years): real turnover rates are a few per hundred firm-years
VANISHING_RATE = 1e-9


@dataclass(frozen=True)
class PoissonBatch:
    """Estimates of a stack of Poisson fits: ``beta`` (NaN where failed), ``se`` (information-matrix standard
    errors, statsmodels' ``bse``), ``deviance``, ``failure`` (``""`` or the reason) and ``iterations``."""

    beta: np.ndarray
    se: np.ndarray
    deviance: np.ndarray
    failure: np.ndarray
    iterations: np.ndarray


def poisson_deviance(events: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """``2 sum(y log(y / mu) - (y - mu))`` per row (0 log 0 = 0); rows of zero exposure have y = mu = 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = xlogy(events, events) - xlogy(events, mu) - (events - mu)
    return 2.0 * terms.sum(axis=-1)


def fit_poisson_batch(X: np.ndarray, events: np.ndarray, exposure: np.ndarray, *, tol: float = 1e-12,
                      max_iter: int = 60) -> PoissonBatch:
    """Fit ``log E[events] = log(exposure) + X beta`` to every row of ``events``/``exposure`` at once.

    The algorithm is statsmodels' IRLS for the canonical log link (start ``mu = (y + mean(y)) / 2``, then
    Newton steps ``beta = (X' W X)^-1 X' W z`` with ``W = mu``, ``z = eta - offset + (y - mu) / mu``), stopped
    on R's relative deviance rule (:func:`app.stats.irls.converged_relative`), so each estimate equals
    ``sm.GLM(y, X, family=Poisson(), offset=log(E)).fit()`` on the exposed rows to the tolerance.

    Parameters
    ----------
    X : numpy.ndarray, shape (n_rows, n_params)
    events, exposure : numpy.ndarray, shape (n_fits, n_rows)
        Counts and firm-years (non-negative; events must be 0 where exposure is 0).
    tol, max_iter : float, int

    Returns
    -------
    PoissonBatch
        Failure reasons: ``no_forced`` (no event), ``rank_deficient`` (fewer exposed rows than parameters),
        ``separation`` (a fitted rate vanishes in an exposed year: the slope runs to
        infinity), ``non_finite`` and ``not_converged``.
    """
    X = np.asarray(X, dtype=float)
    y = np.atleast_2d(np.asarray(events, dtype=float))
    E = np.atleast_2d(np.asarray(exposure, dtype=float))
    if X.ndim != 2 or y.shape != E.shape or y.shape[1] != X.shape[0]:
        raise ValueError("X must be (rows, params) and events, exposure (fits, rows) of matching shape.")
    if np.any(E < 0) or np.any(y < 0) or np.any((E == 0) & (y > 0)):
        raise ValueError("Exposure and events must be non-negative, with no events where exposure is 0.")
    n_fits, p = y.shape[0], X.shape[1]
    exposed = E > 0
    offset = np.log(np.where(exposed, E, 1.0))
    failure = np.full(n_fits, "", dtype="<U14")
    failure[exposed.sum(axis=1) < p] = "rank_deficient"
    failure[y.sum(axis=1) == 0] = "no_forced"
    beta = np.full((n_fits, p), np.nan)
    se = np.full((n_fits, p), np.nan)
    deviance = np.full(n_fits, np.nan)
    iterations = np.zeros(n_fits, dtype=np.int64)
    rows = np.flatnonzero(failure == "")
    outer = (X[:, :, None] * X[:, None, :]).reshape(X.shape[0], p * p)

    def step(mu: np.ndarray, eta_free: np.ndarray, yy: np.ndarray, mask: np.ndarray) -> np.ndarray:
        w = np.where(mask, mu, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(mask, eta_free + (yy - mu) / mu, 0.0)
        info = (w @ outer).reshape(-1, p, p)
        return solve_spd_stack(info, (w * z) @ X)

    if rows.size:
        yy, mask, off = y[rows], exposed[rows], offset[rows]
        with np.errstate(over="ignore", invalid="ignore"):
            mu = np.where(mask, (yy + (yy * mask).sum(axis=1, keepdims=True) / mask.sum(axis=1, keepdims=True)) / 2.0,
                          0.0)
            b = step(mu, np.log(np.where(mask, mu, 1.0)) - off, yy, mask)
        dev_old = np.full(rows.size, np.inf)
        done = np.zeros(rows.size, dtype=bool)
        iters = np.ones(rows.size, dtype=np.int64)
        for _ in range(max_iter):
            todo = np.flatnonzero(~done)
            if not todo.size:
                break
            with np.errstate(over="ignore", invalid="ignore"):
                eta = b[todo] @ X.T + off[todo]
                mu_t = np.where(mask[todo], np.exp(eta), 0.0)
                dev = poisson_deviance(yy[todo], mu_t)
            finished = converged_relative(dev_old[todo], dev, tol) | ~np.isfinite(dev)
            dev_old[todo] = dev
            done[todo[finished]] = True
            going = todo[~finished]
            if going.size:
                with np.errstate(over="ignore", invalid="ignore"):
                    b[going] = step(mu_t[~finished], eta[~finished] - off[going], yy[going], mask[going])
                iters[going] += 1
        with np.errstate(over="ignore", invalid="ignore"):
            mu = np.where(mask, np.exp(b @ X.T + off), 0.0)
            info = (mu @ outer).reshape(-1, p, p)
            inverse = np.stack([solve_spd_stack(info, np.broadcast_to(np.eye(p)[k], (rows.size, p)))[:, k]
                                for k in range(p)], axis=1)
        why = np.full(rows.size, "", dtype="<U14")
        why[~done] = "not_converged"
        vanished = (mask & (mu < VANISHING_RATE * np.where(mask, E[rows], 1.0))).any(axis=1)
        why[done & vanished] = "separation"
        why[done & ~np.isfinite(dev_old)] = "non_finite"
        # enough exposed rows were checked above, so a step that became singular had fitted rates running to 0
        why[done & ~np.isfinite(b).all(axis=1)] = "separation"
        failure[rows] = why
        beta[rows], deviance[rows], iterations[rows] = b, dev_old, iters
        with np.errstate(invalid="ignore"):
            se[rows] = np.sqrt(inverse)
    bad = failure != ""
    beta[bad], se[bad], deviance[bad] = np.nan, np.nan, np.nan
    return PoissonBatch(beta, se, deviance, failure, iterations)
