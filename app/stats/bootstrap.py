"""Bootstrap intervals for the odds ratio per year of a grouped logit trend: the run workflow.

The statistic is one coefficient (by default the year slope b1, a log odds ratio per year) of the
binomial logit GLM fitted to the forced / voluntary counts of each group. This module ties the
pieces together: :mod:`app.stats.sampling` draws and fits the resamples (departure or firm unit,
seeded blocks), :mod:`app.stats.jackknife` gives the leave-one-unit-out cases for the BCa
acceleration, and :mod:`app.stats.intervals` turns replicates into percentile, basic and BCa
intervals with their Monte Carlo error. The names callers use are re-exported here.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from app.stats.cells import Cells
from app.stats.design import Design
from app.stats.intervals import (
    INTERVAL_METHODS,
    MC_RESAMPLES,
    BootstrapIntervals,
    IntervalMethod,
    check_alpha,
    intervals_from_replicates,
)
from app.stats.jackknife import cluster_case_chunks, departure_cases
from app.stats.sampling import (
    BLOCK_SIZE,
    MAX_RESAMPLES,
    BootstrapCancelled,
    Progress,
    Replicates,
    StopCheck,
    coefficient_index,
    draw_cells,
    draw_replicates,
    fit_cells,
    original_fit,
)
from app.types import UNITS, Unit, check_choice

__all__ = [
    "BLOCK_SIZE", "FAILURE_FLAG_SHARE", "INTERVAL_METHODS", "MAX_RESAMPLES", "MC_RESAMPLES",
    "BootstrapCancelled", "BootstrapIntervals", "BootstrapResult", "IntervalMethod", "Progress",
    "Replicates", "StopCheck", "bootstrap_to_dict", "bootstrap_trend", "draw_cells", "draw_replicates",
    "extend_bootstrap", "intervals_from_replicates", "jackknife_estimates", "summarise_replicates",
]

#: share of failed resamples above which a result is flagged
FAILURE_FLAG_SHARE = 0.01
#: leave-one-firm-out cases fitted at once (each a row of 2 x groups floats): bounds the memory
#: of the firm jackknife at a quarter of a million firms
JACKKNIFE_CHUNK = 8192


@dataclass(frozen=True)
class BootstrapResult:
    """A finished bootstrap of one coefficient of a grouped logit model.

    ``estimate`` and ``replicates`` are on the log odds-ratio scale; ``odds_ratio``,
    ``intervals`` and ``mc_error`` on the odds-ratio scale. All intervals are computed on the log
    scale and exponentiated: percentile and BCa are unchanged by that (they respect
    transformations); the basic interval reflects around the estimate on the log scale, where the
    bootstrap distribution is nearer symmetric, so on the odds-ratio scale it is
    ``(OR**2 / exp(q_hi), OR**2 / exp(q_lo))``. ``failures`` holds each resample's failure reason
    (``""`` when it succeeded; its replicate is then finite). Monte Carlo errors on the odds-ratio scale are
    ``bound x (log-scale MC error)`` (delta method).
    """

    unit: Unit
    resamples: int
    seed: int
    alpha: float
    coefficient: str
    estimate: float
    odds_ratio: float
    replicates: np.ndarray
    failures: np.ndarray
    failed: int
    failed_by_reason: dict[str, int]
    failure_flag: bool
    intervals: dict[str, tuple[float, float]]
    log_intervals: dict[str, tuple[float, float]]
    mc_error: dict[str, tuple[float, float]]
    acceleration: float
    bias: float
    standard_error: float
    jackknife_values: np.ndarray
    jackknife_weights: np.ndarray
    seconds: float



def jackknife_estimates(cells: Cells, design: Design, *, unit: Unit, coefficient: int | None = None
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-unit-out estimates over distinct cases and their multiplicities.

    Each case's counts are the original cell counts minus the unit's own (a departure's one cell,
    or a firm's row of the firm matrix), and its fit starts from the full-data estimate, which a
    leave-one-out fit is close to: two or three IRLS steps instead of five or six from the
    default start, the same estimate to the convergence tolerance. Firms are processed in chunks
    of ``JACKKNIFE_CHUNK`` cases so that memory stays bounded.

    Parameters
    ----------
    cells : Cells
        Group counts and the firm matrix.
    design : Design
        Design matrix over ``cells.groups``.
    unit : {"departure", "firm"}
        What one case leaves out.
    coefficient : int, optional
        Column whose estimate is kept; ``design.slope`` by default.

    Returns
    -------
    (values, weights) : numpy.ndarray, numpy.ndarray
        NaN values mark leave-one-out fits that failed (the acceleration is then NaN).

    Raises
    ------
    ValueError
        When the model cannot be fitted to the original counts.
    """
    check_choice(unit, UNITS, "unit")
    coef = coefficient_index(design, coefficient)
    X = np.asarray(design.matrix, dtype=float)
    start = original_fit(cells, design)
    if unit == "departure":
        cases = departure_cases(np.concatenate([cells.forced, cells.voluntary]))
        values, _ = fit_cells(X, cases.cells.astype(float), coef, start=start)
        return values, cases.weights
    parts = [(fit_cells(X, chunk.cells.astype(float), coef, start=start)[0], chunk.weights)
             for chunk in cluster_case_chunks(cells.firm_matrix, JACKKNIFE_CHUNK)]
    return np.concatenate([v for v, _ in parts]), np.concatenate([w for _, w in parts])


def _original_estimate(cells: Cells, design: Design, coef: int) -> float:
    return float(original_fit(cells, design)[coef])


def _assemble(design: Design, unit: Unit, seed: int, alpha: float, coef: int,
              estimate: float, theta: np.ndarray, failure: np.ndarray, jk: tuple[np.ndarray, np.ndarray],
              seconds: float) -> BootstrapResult:
    reasons, counts = np.unique(failure[failure != ""], return_counts=True)
    by_reason = {str(r): int(c) for r, c in zip(reasons, counts, strict=True)}
    failed = int(sum(by_reason.values()))
    iv = intervals_from_replicates(estimate, theta, jk[0], alpha, jackknife_weights=jk[1], mc_seed=seed)
    ors = {m: (float(np.exp(lo)), float(np.exp(hi))) for m, (lo, hi) in iv.bounds.items()}
    mc: dict[str, tuple[float, float]] = {m: (ors[m][0] * iv.mc_error[m][0], ors[m][1] * iv.mc_error[m][1]) for m in INTERVAL_METHODS}
    return BootstrapResult(
        unit=unit, resamples=int(theta.size), seed=seed, alpha=alpha, coefficient=design.names[coef],
        estimate=estimate, odds_ratio=float(np.exp(estimate)), replicates=theta, failures=failure, failed=failed,
        failed_by_reason=by_reason, failure_flag=failed > FAILURE_FLAG_SHARE * theta.size,
        intervals=ors, log_intervals=iv.bounds, mc_error=mc, acceleration=iv.acceleration,
        bias=iv.bias, standard_error=iv.standard_error, jackknife_values=jk[0],
        jackknife_weights=jk[1], seconds=seconds,
    )


def bootstrap_trend(
    cells: Cells,
    design: Design,
    *,
    unit: Unit,
    resamples: int,
    seed: int,
    alpha: float = 0.05,
    coefficient: int | None = None,
    chunk_size: int | None = None,
    workers: int | None = None,
    progress: Progress | None = None,
    should_stop: StopCheck | None = None,
) -> BootstrapResult:
    """Bootstrap the odds ratio of one coefficient (the year slope by default).

    Parameters are those of :func:`draw_replicates`, plus ``alpha`` (two-sided error rate of
    the intervals). The BCa acceleration uses the jackknife over the same unit: leave out one
    departure, or one whole firm.

    Returns
    -------
    BootstrapResult

    Raises
    ------
    ValueError
        On a bad unit, resample count, seed or alpha (the message names the allowed values), or
        when the model cannot be fitted to the original counts.
    BootstrapCancelled
        When ``should_stop`` asked for it.
    """
    check_choice(unit, UNITS, "unit")
    alpha = check_alpha(alpha)
    coef = coefficient_index(design, coefficient)
    estimate = _original_estimate(cells, design, coef)
    reps = draw_replicates(cells, design, unit=unit, resamples=resamples, seed=seed, coefficient=coef,
                           chunk_size=chunk_size, workers=workers, progress=progress,
                           should_stop=should_stop)
    jk = jackknife_estimates(cells, design, unit=unit, coefficient=coef)
    return _assemble(design, unit, int(seed), alpha, coef, estimate, reps.estimates, reps.failure,
                     jk, reps.seconds)


def extend_bootstrap(
    result: BootstrapResult,
    cells: Cells,
    design: Design,
    *,
    resamples: int,
    chunk_size: int | None = None,
    workers: int | None = None,
    progress: Progress | None = None,
    should_stop: StopCheck | None = None,
) -> BootstrapResult:
    """Add ``resamples`` more resamples to an earlier result, reusing its replicates.

    The combined result equals a single run with ``result.resamples + resamples`` resamples.

    Parameters
    ----------
    result : BootstrapResult
        The earlier run.
    cells, design : Cells, Design
        The ones the earlier run used (checked via the estimate).
    resamples : int
        Resamples to add.
    chunk_size, workers, progress, should_stop
        As for :func:`draw_replicates`.

    Returns
    -------
    BootstrapResult

    Raises
    ------
    ValueError
        When ``cells`` and ``design`` do not reproduce the earlier estimate.
    """
    coef = design.names.index(result.coefficient) if result.coefficient in design.names else -1
    if coef < 0 or _original_estimate(cells, design, coef) != result.estimate:
        raise ValueError("These cells and design do not reproduce the earlier estimate; cannot extend.")
    more = draw_replicates(cells, design, unit=result.unit, resamples=resamples, seed=result.seed,
                           start=result.resamples, coefficient=coef, chunk_size=chunk_size,
                           workers=workers, progress=progress, should_stop=should_stop)
    return _assemble(design, result.unit, result.seed, result.alpha, coef, result.estimate,
                     np.concatenate([result.replicates, more.estimates]),
                     np.concatenate([result.failures, more.failure]),
                     (result.jackknife_values, result.jackknife_weights), result.seconds + more.seconds)


def bootstrap_to_dict(result: BootstrapResult) -> dict[str, Any]:
    """JSON-ready summary with the command line's keys (NaN becomes None)."""
    def num(x: float) -> float | None:
        return float(x) if np.isfinite(x) else None

    def pair(p: tuple[float, float]) -> list[float | None]:
        return [num(p[0]), num(p[1])]

    return {
        "odds_ratio": num(result.odds_ratio),
        "conf_int": {m: pair(result.intervals[m]) for m in INTERVAL_METHODS},
        "resamples": result.resamples,
        "failed": result.failed,
        "unit": result.unit,
        "seed": result.seed,
        "seconds": round(result.seconds, 6),
        "failed_by_reason": dict(result.failed_by_reason),
        "failure_flag": result.failure_flag,
        "mc_error": {m: pair(result.mc_error[m]) for m in INTERVAL_METHODS},
        "log_odds_ratio": num(result.estimate),
        "coefficient": result.coefficient,
        "alpha": result.alpha,
        "acceleration": num(result.acceleration),
        "bias": num(result.bias),
        "standard_error": num(result.standard_error),
    }


def summarise_replicates(
    cells: Cells,
    design: Design,
    estimates: np.ndarray,
    failures: np.ndarray,
    *,
    unit: Unit,
    seed: int,
    alpha: float = 0.05,
    coefficient: int | None = None,
    seconds: float = 0.0,
) -> BootstrapResult:
    """Intervals and failure counts from stored replicates (e.g. a run drawn in chunks by a job).

    Parameters
    ----------
    cells, design : Cells, Design
        The data and model the replicates were drawn from; the estimate and jackknife are
        recomputed from them.
    estimates, failures : numpy.ndarray
        The concatenated outputs of :func:`draw_replicates` for resamples 0 .. B-1.
    unit : {"departure", "firm"}
    seed : int
        The run's seed (also seeds the Monte Carlo error).
    alpha : float
        Two-sided error rate of the intervals.
    coefficient : int, optional
        Column of the design; ``design.slope`` by default.
    seconds : float
        Time spent drawing, reported with the result.

    Returns
    -------
    BootstrapResult
    """
    check_choice(unit, UNITS, "unit")
    alpha = check_alpha(alpha)
    coef = coefficient_index(design, coefficient)
    theta = np.asarray(estimates, dtype=float)
    why = np.asarray(failures).astype(str)
    if theta.shape != why.shape:
        raise ValueError("estimates and failures must have one entry per resample.")
    estimate = _original_estimate(cells, design, coef)
    jk = jackknife_estimates(cells, design, unit=unit, coefficient=coef)
    return _assemble(design, unit, int(seed), alpha, coef, estimate, theta, why, jk, float(seconds))
