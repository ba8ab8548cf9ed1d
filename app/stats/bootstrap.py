"""Bootstrap intervals for any statistic the pages report: the run workflow.

The statistic is one of :mod:`app.stats.statistics` (the year slope b1 of the trend, a log odds ratio per
year, by default; also the odds ratio per decade, a sector's own slope, the likelihood-ratio statistics of
equal trends and of the spline bend, and the period difference in shares), or any coefficient of a design.
This module ties the pieces together: :mod:`app.stats.sampling` draws the resamples (departure or firm unit,
firms optionally within sectors, seeded blocks) and evaluates the statistic on them in batches,
:mod:`app.stats.jackknife` gives the leave-one-unit-out cases for the BCa acceleration, and
:mod:`app.stats.intervals` turns replicates into percentile, basic, BCa, normal and studentized intervals
with their Monte Carlo error. The names callers use are re-exported here.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from app.stats.cells import Cells
from app.stats.design import Design
from app.stats.draws import BLOCK_SIZE, SAMPLER, SAMPLERS, draw_cells
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
    MAX_RESAMPLES,
    BootstrapCancelled,
    Progress,
    Replicates,
    StopCheck,
    coefficient_index,
    draw_replicates,
    draw_statistic,
    original_fit,
)
from app.stats.statistics import Statistic, coefficient_statistic
from app.types import UNITS, Unit, check_choice

__all__ = [
    "BLOCK_SIZE", "FAILURE_FLAG_SHARE", "SAMPLER", "SAMPLERS", "INTERVAL_METHODS", "MAX_RESAMPLES", "MC_RESAMPLES",
    "BootstrapCancelled", "BootstrapIntervals", "BootstrapResult", "IntervalMethod", "Progress",
    "Replicates", "StopCheck", "bootstrap_statistic", "bootstrap_to_dict", "bootstrap_trend", "draw_cells",
    "draw_replicates", "draw_statistic", "extend_bootstrap", "intervals_from_replicates", "jackknife_estimates",
    "jackknife_statistic", "summarise_replicates", "summarise_statistic",
]

#: share of failed resamples above which a result is flagged
FAILURE_FLAG_SHARE = 0.01
#: leave-one-firm-out cases fitted at once (each a row of 2 x groups floats): bounds the memory
#: of the firm jackknife at a quarter of a million firms
JACKKNIFE_CHUNK = 8192


@dataclass(frozen=True)
class BootstrapResult:
    """A finished bootstrap of one statistic.

    ``estimate``, ``replicates``, ``standard_errors`` and ``log_intervals`` are on the statistic's own
    scale (for ``scale == "log"`` the log odds-ratio scale); ``odds_ratio`` (the reported value),
    ``intervals`` and ``mc_error`` on the reported scale: exponentiated for a log-scale statistic, the
    same numbers otherwise. Log-scale intervals are computed on the log scale and exponentiated: percentile and BCa are unchanged by that (they respect
    transformations); the basic interval reflects around the estimate on the log scale, where the
    bootstrap distribution is nearer symmetric, so on the odds-ratio scale it is
    ``(OR**2 / exp(q_hi), OR**2 / exp(q_lo))``. ``failures`` holds each resample's failure reason
    (``""`` when it succeeded; its replicate is then finite). Monte Carlo errors on the odds-ratio scale are
    ``bound x (log-scale MC error)`` (delta method). ``sampler`` is the firm-draw scheme the replicates came
    from (``app.stats.draws.SAMPLERS``); an extension keeps it.
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
    statistic: str = "slope"
    label: str = "odds ratio per year"
    scale: str = "log"
    estimate_se: float = float("nan")
    standard_errors: np.ndarray | None = None
    stratified: bool = False
    sampler: int = SAMPLER



def jackknife_statistic(cells: Cells, statistic: Statistic, *, unit: Unit) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-unit-out values of ``statistic`` over distinct cases and their multiplicities.

    Each case's counts are the original cell counts minus the unit's own (a departure's one cell, or a
    firm's row of the firm matrix); fits start from the full-data estimate (``warm=True``). Firms are
    processed in chunks of ``JACKKNIFE_CHUNK`` cases so that memory stays bounded. NaN values mark cases
    whose statistic failed (the acceleration is then NaN).
    """
    check_choice(unit, UNITS, "unit")
    if unit == "departure":
        cases = departure_cases(np.concatenate([cells.forced, cells.voluntary]))
        return statistic.evaluate(cases.cells.astype(float), True).values, cases.weights
    parts = [(statistic.evaluate(chunk.cells.astype(float), True).values, chunk.weights)
             for chunk in cluster_case_chunks(cells.firm_matrix, JACKKNIFE_CHUNK)]
    return np.concatenate([v for v, _ in parts]), np.concatenate([w for _, w in parts])


def jackknife_estimates(cells: Cells, design: Design, *, unit: Unit, coefficient: int | None = None
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-unit-out estimates of one coefficient of ``design`` (the year slope by default).

    :func:`jackknife_statistic` of that coefficient; a ValueError when the model cannot be fitted to the
    original counts.
    """
    check_choice(unit, UNITS, "unit")
    coef = coefficient_index(design, coefficient)
    original_fit(cells, design)
    return jackknife_statistic(cells, coefficient_statistic(cells, design.matrix, coef), unit=unit)


def _assemble(statistic: Statistic, unit: Unit, seed: int, alpha: float, estimate: tuple[float, float],
              reps: Replicates, jk: tuple[np.ndarray, np.ndarray], stratified: bool, sampler: int = SAMPLER
              ) -> BootstrapResult:
    theta, failure = reps.estimates, reps.failure
    reasons, counts = np.unique(failure[failure != ""], return_counts=True)
    by_reason = {str(r): int(c) for r, c in zip(reasons, counts, strict=True)}
    failed = int(sum(by_reason.values()))
    iv = intervals_from_replicates(estimate[0], theta, jk[0], alpha, jackknife_weights=jk[1], mc_seed=seed,
                                   standard_errors=reps.standard_errors, estimate_se=estimate[1])
    logged = statistic.scale == "log"
    shown = {m: (float(np.exp(lo)), float(np.exp(hi))) if logged else (lo, hi) for m, (lo, hi) in iv.bounds.items()}
    mc: dict[str, tuple[float, float]] = {
        m: (shown[m][0] * iv.mc_error[m][0], shown[m][1] * iv.mc_error[m][1]) if logged else iv.mc_error[m]
        for m in INTERVAL_METHODS}
    return BootstrapResult(
        unit=unit, resamples=int(theta.size), seed=seed, alpha=alpha, coefficient=statistic.label,
        estimate=estimate[0], odds_ratio=float(np.exp(estimate[0])) if logged else estimate[0], replicates=theta,
        failures=failure, failed=failed, failed_by_reason=by_reason, failure_flag=failed > FAILURE_FLAG_SHARE * theta.size,
        intervals=shown, log_intervals=iv.bounds, mc_error=mc, acceleration=iv.acceleration,
        bias=iv.bias, standard_error=iv.standard_error, jackknife_values=jk[0],
        jackknife_weights=jk[1], seconds=reps.seconds, statistic=statistic.name, label=statistic.label,
        scale=statistic.scale, estimate_se=estimate[1], standard_errors=reps.standard_errors, stratified=stratified,
        sampler=sampler,
    )


def bootstrap_statistic(
    cells: Cells,
    statistic: Statistic,
    *,
    unit: Unit,
    resamples: int,
    seed: int,
    alpha: float = 0.05,
    strata: np.ndarray | None = None,
    chunk_size: int | None = None,
    workers: int | None = None,
    progress: Progress | None = None,
    should_stop: StopCheck | None = None,
    sampler: int = SAMPLER,
) -> BootstrapResult:
    """Bootstrap ``statistic`` over ``cells``: draw, evaluate, jackknife, intervals.

    Parameters are those of :func:`app.stats.sampling.draw_statistic`, plus ``alpha`` (two-sided error
    rate of the intervals). The statistic is computed on the original counts first, so counts it cannot
    handle stop the run before anything is drawn. The BCa acceleration uses the jackknife over the same
    unit: leave out one departure, or one whole firm.

    Raises
    ------
    ValueError
        On a bad argument (the message names the allowed values), or when the statistic cannot be computed
        on the original counts.
    BootstrapCancelled
        When ``should_stop`` asked for it.
    """
    check_choice(unit, UNITS, "unit")
    alpha = check_alpha(alpha)
    estimate = statistic.original(cells)
    reps = draw_statistic(cells, statistic.evaluate, unit=unit, resamples=resamples, seed=seed, strata=strata,
                          chunk_size=chunk_size, workers=workers, progress=progress, should_stop=should_stop,
                          sampler=sampler)
    jk = jackknife_statistic(cells, statistic, unit=unit)
    return _assemble(statistic, unit, int(seed), alpha, estimate, reps, jk, strata is not None, sampler)


def summarise_statistic(cells: Cells, statistic: Statistic, replicates: Replicates, *, unit: Unit, seed: int,
                        alpha: float = 0.05, stratified: bool = False, sampler: int = SAMPLER) -> BootstrapResult:
    """Intervals and failure counts from stored replicates (e.g. a run drawn in chunks by a job).

    The estimate, its standard error and the jackknife are recomputed from ``cells``; ``replicates`` are the
    concatenated draws for resamples 0 .. B-1 (``standard_errors`` None leaves the studentized interval NaN),
    drawn by ``sampler``.
    """
    check_choice(unit, UNITS, "unit")
    alpha = check_alpha(alpha)
    theta = np.asarray(replicates.estimates, dtype=float)
    why = np.asarray(replicates.failure).astype(str)
    se = replicates.standard_errors
    if theta.shape != why.shape or (se is not None and np.shape(se) != theta.shape):
        raise ValueError("estimates, failures and standard errors must have one entry per resample.")
    reps = Replicates(0, theta, why, float(replicates.seconds), None if se is None else np.asarray(se, dtype=float))
    estimate = statistic.original(cells)
    jk = jackknife_statistic(cells, statistic, unit=unit)
    return _assemble(statistic, unit, int(seed), alpha, estimate, reps, jk, stratified, sampler)


def _design_statistic(cells: Cells, design: Design, coefficient: int | None) -> Statistic:
    coef = coefficient_index(design, coefficient)
    original_fit(cells, design)
    return coefficient_statistic(cells, design.matrix, coef, label=design.names[coef])


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
    sampler: int = SAMPLER,
) -> BootstrapResult:
    """Bootstrap the odds ratio of one coefficient of ``design`` (the year slope by default).

    :func:`bootstrap_statistic` of that coefficient; ``result.coefficient`` is the column's name.
    """
    check_choice(unit, UNITS, "unit")
    alpha = check_alpha(alpha)
    statistic = _design_statistic(cells, design, coefficient)
    return bootstrap_statistic(cells, statistic, unit=unit, resamples=resamples, seed=seed, alpha=alpha,
                               chunk_size=chunk_size, workers=workers, progress=progress, should_stop=should_stop,
                               sampler=sampler)


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
    """Add ``resamples`` more resamples to an earlier :func:`bootstrap_trend` result, reusing its replicates.

    The combined result equals a single run with ``result.resamples + resamples`` resamples, drawn by the
    sampler the earlier result was drawn by. A ValueError
    when ``cells`` and ``design`` do not reproduce the earlier estimate.
    """
    coef = design.names.index(result.coefficient) if result.coefficient in design.names else -1
    if coef < 0 or float(original_fit(cells, design)[coef]) != result.estimate:
        raise ValueError("These cells and design do not reproduce the earlier estimate; cannot extend.")
    statistic = _design_statistic(cells, design, coef)
    more = draw_statistic(cells, statistic.evaluate, unit=result.unit, resamples=resamples, seed=result.seed,
                          start=result.resamples, chunk_size=chunk_size, workers=workers, progress=progress,
                          should_stop=should_stop, sampler=result.sampler)
    ses = (None if result.standard_errors is None or more.standard_errors is None
           else np.concatenate([result.standard_errors, more.standard_errors]))
    reps = Replicates(0, np.concatenate([result.replicates, more.estimates]),
                      np.concatenate([result.failures, more.failure]), result.seconds + more.seconds, ses)
    return _assemble(statistic, result.unit, result.seed, result.alpha, (result.estimate, result.estimate_se), reps,
                     (result.jackknife_values, result.jackknife_weights), result.stratified, result.sampler)


def bootstrap_to_dict(result: BootstrapResult) -> dict[str, Any]:
    """JSON-ready summary with the command line's keys (NaN becomes None).

    ``odds_ratio``/``log_odds_ratio`` are the reported value and the estimate for every statistic (for
    one on the identity scale the two are the same number); ``statistic``, ``label`` and ``scale`` say what
    they are. ``estimate_se`` is the standard error on the original data the studentized interval uses;
    ``sampler`` the firm-draw scheme (``app.stats.draws.SAMPLERS``).
    """
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
        "statistic": result.statistic,
        "label": result.label,
        "scale": result.scale,
        "estimate_se": num(result.estimate_se),
        "stratified": result.stratified,
        "sampler": result.sampler,
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
    standard_errors: np.ndarray | None = None,
) -> BootstrapResult:
    """:func:`summarise_statistic` of one coefficient of ``design`` (the year slope by default)."""
    statistic = _design_statistic(cells, design, coefficient)
    return summarise_statistic(cells, statistic, Replicates(0, np.asarray(estimates, dtype=float),
                                                            np.asarray(failures).astype(str), float(seconds),
                                                            standard_errors),
                               unit=unit, seed=seed, alpha=alpha)
