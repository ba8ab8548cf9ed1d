"""Bootstrap intervals for the odds ratio per year of a grouped logit trend.

Model and units
---------------
The statistic is one coefficient (by default the year slope b1, a log odds ratio per year) of the
binomial logit GLM fitted to the forced / voluntary counts of each group. Two resampling units:

* ``departure``: departures are drawn with replacement. Counting the drawn departures per
  (group, category) cell is exactly one multinomial draw of N over the cells with probabilities
  count / N, so no departure is ever materialised.
* ``firm``: firms are drawn with replacement and all their departures come along, which keeps the
  correlation between departures of one firm. A resample is a vector of firm multiplicities
  (F uniform draws counted per firm) pushed through the firms x cells count matrix.

Each resample is refitted with the batched IRLS of :mod:`app.stats.irls`; a resample whose fit
fails (no forced or no voluntary departure, separation, non-convergence) keeps its place as NaN
with its reason counted; nothing is redrawn.

Reproducibility
---------------
Resamples come in blocks of ``BLOCK_SIZE``; block k draws from
``numpy.random.default_rng(SeedSequence(seed, spawn_key=(k,)))`` and is always drawn and fitted
whole. Resample i is therefore the same number whatever the chunk size, the worker count, or
whether it came from one run or from extending a shorter one.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from scipy import sparse
from scipy.special import ndtr, ndtri

from app.stats.cells import Cells
from app.stats.design import Design
from app.stats.irls import fit_batch
from app.stats.jackknife import cluster_cases, departure_cases, jackknife_acceleration
from app.types import UNITS, Unit, check_choice

IntervalMethod = Literal["percentile", "basic", "bca"]
INTERVAL_METHODS: tuple[IntervalMethod, ...] = ("percentile", "basic", "bca")

#: resamples per independently seeded block; changing it changes every stored run's numbers
BLOCK_SIZE = 250
#: share of failed resamples above which a result is flagged
FAILURE_FLAG_SHARE = 0.01
#: replicate values re-drawn at once when estimating Monte Carlo error (8 bytes each)
PASS_ELEMENTS = 1_000_000
#: firm multiplicities counted per pass of the firm draw (8 bytes each): 2 MiB stay in one core's
#: L2 cache while bincount scatters into them; passes of 10**6 measured ~1.5x slower
#: (benchmarks/bench_bootstrap.py). Pass sizes never change the draws.
PASS_COUNTS = 2**18
#: re-resamples of the replicates used to estimate Monte Carlo error
MC_RESAMPLES = 200
MAX_RESAMPLES = 10_000_000
#: dense float GEMM beats the sparse product while the dense matrix has at most this many
#: entries per stored non-zero (measured in benchmarks/bench_bootstrap.py)
DENSE_PER_NONZERO = 8

Progress = Callable[[int, int], None]
StopCheck = Callable[[], bool]


class BootstrapCancelled(Exception):
    """Raised between chunks when ``should_stop()`` returns True."""

    def __init__(self, done: int, total: int) -> None:
        super().__init__(f"Bootstrap cancelled after {done} of {total} resamples.")
        self.done = done
        self.total = total


@dataclass(frozen=True)
class Replicates:
    """Bootstrap estimates for resample indices ``start .. start + len(estimates) - 1``.

    Attributes
    ----------
    start : int
    estimates : numpy.ndarray of float
        The coefficient per resample; NaN where the fit failed.
    failure : numpy.ndarray of str
        ``""`` or the failure reason (see ``app.stats.irls.FAILURE_REASONS``).
    seconds : float
        Wall-clock time spent drawing and fitting.
    """

    start: int
    estimates: np.ndarray
    failure: np.ndarray
    seconds: float


@dataclass(frozen=True)
class BootstrapIntervals:
    """Percentile, basic and BCa intervals on the scale of the replicates given.

    Attributes
    ----------
    alpha : float
        Two-sided error rate: each interval covers ``1 - alpha``.
    successful : int
        Finite replicates used (failed resamples are left out, so intervals are conditional on
        a successful fit).
    bounds : dict of str to (float, float)
        ``percentile``, ``basic``, ``bca``.
    mc_error : dict of str to (float, float)
        Monte Carlo standard error of each bound: the SD of that bound over ``MC_RESAMPLES``
        re-resamples (with replacement) of the replicates, acceleration held fixed.
    acceleration : float
        Jackknife acceleration ``a``.
    bias : float
        Bias correction ``z0 = ndtri(share of replicates below the estimate)``, ties counting
        half (as scipy.stats.bootstrap).
    standard_error : float
        SD of the replicates (ddof 1).
    """

    alpha: float
    successful: int
    bounds: dict[str, tuple[float, float]]
    mc_error: dict[str, tuple[float, float]]
    acceleration: float
    bias: float
    standard_error: float


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


# ---------------------------------------------------------------- input checks

def _check_count(value: object, what: str, low: int, high: int | None = None) -> int:
    whole = isinstance(value, int | np.integer) and not isinstance(value, bool)
    number = int(value) if whole else low - 1  # type: ignore[call-overload]
    if number < low or (high is not None and number > high):
        span = f"from {low} to {high}" if high is not None else f"of at least {low}"
        raise ValueError(f"{what} must be a whole number {span}; got {value!r}.")
    return number


def _check_alpha(alpha: float) -> float:
    if not 0.0 < float(alpha) < 1.0:
        raise ValueError(f"alpha must be between 0 and 1 (exclusive); got {alpha!r}.")
    return float(alpha)


def _coefficient_index(design: Design, coefficient: int | None) -> int:
    index = design.slope if coefficient is None else coefficient
    return _check_count(index, "coefficient", 0, design.matrix.shape[1] - 1)


# ---------------------------------------------------------------- drawing cells

class _CellSampler:
    """Draws resampled cell counts (forced cells, then voluntary cells) for one unit."""

    def __init__(self, cells: Cells, unit: Unit) -> None:
        self.counts = np.concatenate([cells.forced, cells.voluntary]).astype(np.int64)
        self.unit = unit
        self.total = int(self.counts.sum())
        self.pvals = self.counts / self.total
        matrix = sparse.csr_matrix(cells.firm_matrix, dtype=np.float64)
        self.n_firms = matrix.shape[0]
        self.dense: np.ndarray | None = None
        self.sparse_t: sparse.csr_matrix | None = None
        self.dtype: type[np.floating] = np.float64
        if unit == "firm":
            if self.n_firms == 0 or not np.array_equal(np.asarray(matrix.sum(axis=0)).ravel(), self.counts):
                raise ValueError("cells.firm_matrix must add up, over firms, to the group counts.")
            # float32 sums of whole numbers are exact below 2**24, and no resample can count more
            # than n_firms times the largest entry in a cell; half the bytes to move per product
            self.dtype = np.float32 if self.n_firms * float(matrix.max()) < 2**24 else np.float64
            if matrix.shape[0] * matrix.shape[1] <= DENSE_PER_NONZERO * max(matrix.nnz, 1):
                self.dense = matrix.toarray().astype(self.dtype)
            else:
                self.sparse_t = matrix.T.tocsr().astype(self.dtype)

    def draw(self, rng: np.random.Generator, rows: int) -> np.ndarray:
        if self.unit == "departure":
            return rng.multinomial(self.total, self.pvals, size=rows).astype(np.float64)
        out = np.empty((rows, self.counts.size))
        per_pass = max(1, min(rows, PASS_COUNTS // self.n_firms))
        offsets = np.arange(per_pass)[:, None]
        for lo in range(0, rows, per_pass):
            r = min(per_pass, rows - lo)
            # successive calls continue one stream, so pass sizes never change the draws
            idx = rng.integers(0, self.n_firms, size=(r, self.n_firms))
            if self.dense is not None:
                idx += offsets[:r] * self.n_firms
                mult = np.bincount(idx.ravel(), minlength=r * self.n_firms).reshape(r, self.n_firms)
                out[lo:lo + r] = mult.astype(self.dtype) @ self.dense
            else:
                assert self.sparse_t is not None
                # firm-major counts, so the sparse product reads each firm's r counts together
                idx *= r
                idx += offsets[:r]
                mult_t = np.bincount(idx.ravel(), minlength=r * self.n_firms).reshape(self.n_firms, r)
                out[lo:lo + r] = (self.sparse_t @ mult_t.astype(self.dtype)).T
        return out


def _fit_cells(X: np.ndarray, cells: np.ndarray, coef: int) -> tuple[np.ndarray, np.ndarray]:
    n_groups = X.shape[0]
    forced = cells[:, :n_groups]
    fit = fit_batch(X, forced, forced + cells[:, n_groups:])
    return fit.beta[:, coef], fit.failure


def _block_rng(seed: int, block: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(block,)))


def _block(k: int, seed: int, sampler: _CellSampler, X: np.ndarray, coef: int
           ) -> tuple[np.ndarray, np.ndarray]:
    return _fit_cells(X, sampler.draw(_block_rng(seed, k), BLOCK_SIZE), coef)


def draw_cells(cells: Cells, *, unit: Unit, seed: int, block: int) -> np.ndarray:
    """The resampled cell counts of one block (resamples ``block * BLOCK_SIZE`` onwards).

    Returns
    -------
    numpy.ndarray, shape (BLOCK_SIZE, 2 * n_groups)
        Forced counts per group, then voluntary counts per group, one row per resample: the
        exact counts :func:`draw_replicates` fits.
    """
    check_choice(unit, UNITS, "unit")
    seed = _check_count(seed, "seed", 0)
    block = _check_count(block, "block", 0)
    return _CellSampler(cells, unit).draw(_block_rng(seed, block), BLOCK_SIZE)


def draw_replicates(
    cells: Cells,
    design: Design,
    *,
    unit: Unit,
    resamples: int,
    seed: int,
    start: int = 0,
    coefficient: int | None = None,
    chunk_size: int | None = None,
    workers: int | None = None,
    progress: Progress | None = None,
    should_stop: StopCheck | None = None,
) -> Replicates:
    """Draw and fit bootstrap resamples ``start .. start + resamples - 1``.

    Parameters
    ----------
    cells : Cells
        Group counts and the firm matrix (``app.stats.cells.build_cells``).
    design : Design
        Design matrix over ``cells.groups`` (any design works; ``coefficient`` picks the column).
    unit : {"departure", "firm"}
        What is resampled with replacement.
    resamples : int
        Number of resamples to draw.
    seed : int
        Non-negative seed; with ``start`` it fixes every number.
    start : int
        Index of the first resample, to extend an earlier run without recomputing it.
    coefficient : int, optional
        Column of the design whose estimate is kept; ``design.slope`` by default.
    chunk_size : int, optional
        Resamples handled between progress reports and stop checks (rounded up to whole
        blocks; bounds memory). Never changes the numbers.
    workers : int, optional
        Threads (numpy releases the GIL in random generation, counting and BLAS). Never changes
        the numbers. Defaults to the number of CPUs, at most 8.
    progress : callable(done, total), optional
    should_stop : callable() -> bool, optional
        Checked between chunks; ``True`` raises :class:`BootstrapCancelled`.

    Returns
    -------
    Replicates
    """
    check_choice(unit, UNITS, "unit")
    n = _check_count(resamples, "resamples", 1, MAX_RESAMPLES)
    seed = _check_count(seed, "seed", 0)
    start = _check_count(start, "start", 0)
    coef = _coefficient_index(design, coefficient)
    X = np.asarray(design.matrix, dtype=float)
    if X.shape[0] != cells.n_groups:
        raise ValueError("design has a different number of rows than cells has groups.")
    n_workers = _check_count(workers, "workers", 1) if workers is not None else min(8, os.cpu_count() or 1)
    per_round = -(-_check_count(chunk_size or 2000, "chunk_size", 1) // BLOCK_SIZE)

    began = time.perf_counter()
    sampler = _CellSampler(cells, unit)
    first, last = start // BLOCK_SIZE, (start + n - 1) // BLOCK_SIZE
    blocks = list(range(first, last + 1))
    estimates: list[np.ndarray] = []
    failures: list[np.ndarray] = []
    pool = ThreadPoolExecutor(max_workers=n_workers) if n_workers > 1 else None
    try:
        for r in range(0, len(blocks), per_round):
            if should_stop is not None and should_stop():
                done = min(n, max(0, r * BLOCK_SIZE - (start - first * BLOCK_SIZE)))
                raise BootstrapCancelled(done, n)
            batch = blocks[r:r + per_round]
            if pool is None:
                results = [_block(k, seed, sampler, X, coef) for k in batch]
            else:
                results = list(pool.map(lambda k: _block(k, seed, sampler, X, coef), batch))
            for theta, why in results:
                estimates.append(theta)
                failures.append(why)
            if progress is not None:
                done = min(n, (r + len(batch)) * BLOCK_SIZE - (start - first * BLOCK_SIZE))
                progress(done, n)
    finally:
        if pool is not None:
            pool.shutdown()
    offset = start - first * BLOCK_SIZE
    theta_all = np.concatenate(estimates)[offset:offset + n]
    why_all = np.concatenate(failures)[offset:offset + n]
    return Replicates(start=start, estimates=theta_all, failure=why_all,
                      seconds=time.perf_counter() - began)


# ---------------------------------------------------------------- intervals

def _quantile_sorted(ordered: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Linear-interpolation quantiles (numpy's default, Hyndman & Fan type 7) of sorted rows."""
    n = ordered.shape[-1]
    h = np.clip(q, 0.0, 1.0) * (n - 1)
    lo = np.floor(h).astype(np.int64)
    hi = np.minimum(lo + 1, n - 1)
    below = np.take_along_axis(ordered, lo, axis=-1)
    above = np.take_along_axis(ordered, hi, axis=-1)
    return below + (h - lo) * (above - below)


def _bounds(ordered: np.ndarray, estimate: float, alpha: float, accel: float
            ) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Interval bounds for each row of sorted replicates: arrays of shape (rows, 2)."""
    rows, b = ordered.shape
    levels = np.tile([alpha / 2, 1 - alpha / 2], (rows, 1))
    pct = _quantile_sorted(ordered, levels)
    basic = 2 * estimate - pct[:, ::-1]
    below = (ordered < estimate).sum(axis=1) + (ordered <= estimate).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        z0 = ndtri(below / (2.0 * b))
        z = ndtri(levels)
        shifted = z0[:, None] + z
        adjusted = ndtr(z0[:, None] + shifted / (1 - accel * shifted))
    bca = _quantile_sorted(ordered, np.nan_to_num(adjusted, nan=0.0))
    bca[~np.isfinite(adjusted).all(axis=1)] = np.nan
    return {"percentile": pct, "basic": basic, "bca": bca}, z0


def intervals_from_replicates(
    estimate: float,
    replicates: np.ndarray,
    jackknife_values: np.ndarray,
    alpha: float = 0.05,
    *,
    jackknife_weights: np.ndarray | None = None,
    mc_seed: int = 0,
    mc_resamples: int = MC_RESAMPLES,
) -> BootstrapIntervals:
    """Percentile, basic and BCa intervals from stored bootstrap replicates.

    Parameters
    ----------
    estimate : float
        The statistic on the original data.
    replicates : numpy.ndarray
        Bootstrap values of the statistic; NaN marks failed resamples, which are left out.
    jackknife_values : numpy.ndarray
        Leave-one-unit-out values of the statistic (distinct cases), for the BCa acceleration.
    alpha : float
        Two-sided error rate (0.05 gives 95% intervals).
    jackknife_weights : numpy.ndarray, optional
        Multiplicity of each jackknife value.
    mc_seed : int
        Seed of the re-resampling that estimates Monte Carlo error.
    mc_resamples : int
        Re-resamples for the Monte Carlo error (at least 2; 0 skips it and gives NaN errors).

    Returns
    -------
    BootstrapIntervals
        Percentile: the ``alpha/2`` and ``1 - alpha/2`` quantiles (linear interpolation).
        Basic: ``2 estimate - `` those quantiles, swapped. BCa: Efron & Tibshirani (1993) §14.3
        with ``z0`` from the share below the estimate and ``a`` from the jackknife. These equal
        ``scipy.stats.bootstrap(..., n_resamples=0, bootstrap_result=...)`` on the same values.
    """
    alpha = _check_alpha(alpha)
    values = np.asarray(replicates, dtype=float)
    finite = np.sort(values[np.isfinite(values)])
    if finite.size < 2:
        raise ValueError("at least 2 successful resamples are needed for an interval.")
    weights = None if jackknife_weights is None else [np.asarray(jackknife_weights)]
    accel = jackknife_acceleration([np.asarray(jackknife_values, dtype=float)], weights)
    bounds, z0 = _bounds(finite[None, :], float(estimate), alpha, accel)

    rng = np.random.default_rng(mc_seed)
    per_pass = max(1, PASS_ELEMENTS // finite.size)
    redrawn: dict[str, list[np.ndarray]] = {m: [np.full((1, 2), np.nan)] for m in INTERVAL_METHODS}
    if mc_resamples:
        redrawn = {m: [] for m in INTERVAL_METHODS}
    if mc_resamples == 1 or mc_resamples < 0:
        raise ValueError(f"mc_resamples must be 0 or at least 2; got {mc_resamples!r}.")
    for lo in range(0, mc_resamples, per_pass):
        rows = min(per_pass, mc_resamples - lo)
        again = np.sort(finite[rng.integers(0, finite.size, size=(rows, finite.size))], axis=1)
        for method, value in _bounds(again, float(estimate), alpha, accel)[0].items():
            redrawn[method].append(value)
    mc_error: dict[str, tuple[float, float]] = {}
    for method in INTERVAL_METHODS:
        stacked = np.concatenate(redrawn[method])
        usable = stacked.shape[0] > 1 and np.isfinite(stacked).all()
        sd = np.std(stacked, axis=0, ddof=1) if usable else np.full(2, np.nan)
        mc_error[method] = (float(sd[0]), float(sd[1]))
    return BootstrapIntervals(
        alpha=alpha, successful=int(finite.size),
        bounds={m: (float(v[0, 0]), float(v[0, 1])) for m, v in bounds.items()},
        mc_error=mc_error, acceleration=accel, bias=float(z0[0]),
        standard_error=float(np.std(finite, ddof=1)),
    )


# ---------------------------------------------------------------- the whole workflow

def jackknife_estimates(cells: Cells, design: Design, *, unit: Unit, coefficient: int | None = None
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-unit-out estimates over distinct cases and their multiplicities.

    Returns
    -------
    (values, weights) : numpy.ndarray, numpy.ndarray
        NaN values mark leave-one-out fits that failed (the acceleration is then NaN).
    """
    check_choice(unit, UNITS, "unit")
    coef = _coefficient_index(design, coefficient)
    if unit == "departure":
        cases = departure_cases(np.concatenate([cells.forced, cells.voluntary]))
    else:
        cases = cluster_cases(cells.firm_matrix)
    values, _ = _fit_cells(np.asarray(design.matrix, dtype=float), cases.cells.astype(float), coef)
    return values, cases.weights


def _original_estimate(cells: Cells, design: Design, coef: int) -> float:
    value, why = _fit_cells(np.asarray(design.matrix, dtype=float),
                            np.concatenate([cells.forced, cells.voluntary])[None, :].astype(float), coef)
    if why[0]:
        raise ValueError(f"The model cannot be fitted to these counts ({why[0]}), so there is nothing "
                         "to bootstrap.")
    return float(value[0])


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
    alpha = _check_alpha(alpha)
    coef = _coefficient_index(design, coefficient)
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
    ``cells`` and ``design`` must be the ones the earlier run used (checked via the estimate).
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

    ``estimates`` and ``failures`` are the concatenated outputs of :func:`draw_replicates` for
    resamples 0 .. B-1; the estimate and jackknife are recomputed from ``cells`` and ``design``.
    """
    check_choice(unit, UNITS, "unit")
    alpha = _check_alpha(alpha)
    coef = _coefficient_index(design, coefficient)
    theta = np.asarray(estimates, dtype=float)
    why = np.asarray(failures).astype(str)
    if theta.shape != why.shape:
        raise ValueError("estimates and failures must have one entry per resample.")
    estimate = _original_estimate(cells, design, coef)
    jk = jackknife_estimates(cells, design, unit=unit, coefficient=coef)
    return _assemble(design, unit, int(seed), alpha, coef, estimate, theta, why, jk, float(seconds))
