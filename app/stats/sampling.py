"""Bootstrap runs over grouped counts: seeded blocks drawn, fitted in batches, chunked and threaded.

The counts of each resample come from :mod:`app.stats.draws`. Each resample is refitted with the
batched IRLS of :mod:`app.stats.irls` (or evaluated by any statistic, :func:`draw_statistic`); a
resample whose fit fails (no forced or no voluntary departure, separation, non-convergence) keeps its
place as NaN with its reason counted; nothing is redrawn.

Reproducibility
---------------
Block k of ``BLOCK_SIZE`` resamples is always drawn and evaluated whole from its own seeded generator
(:func:`app.stats.draws.block_rng`). Resample i is therefore the same number whatever the chunk size,
the worker count, or whether it came from one run or from extending a shorter one, given the firm-draw
sampler the run records (:mod:`app.stats.draws`: new runs use ``SAMPLER``, an extension its run's own).
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from app.stats.cells import Cells
from app.stats.design import Design
from app.stats.draws import BLOCK_SIZE, SAMPLER, CellSampler, block_rng, check_count
from app.stats.irls import fit_batch
from app.types import UNITS, Unit, check_choice

MAX_RESAMPLES = 10_000_000

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
    standard_errors : numpy.ndarray of float, optional
        Each resample's standard error of the statistic, where the statistic has one (studentized
        intervals).
    """

    start: int
    estimates: np.ndarray
    failure: np.ndarray
    seconds: float
    standard_errors: np.ndarray | None = None


def coefficient_index(design: Design, coefficient: int | None) -> int:
    """Column of ``design`` to keep (its year slope by default), checked against its width.

    Parameters
    ----------
    design : Design
    coefficient : int or None

    Returns
    -------
    int
    """
    index = design.slope if coefficient is None else coefficient
    return check_count(index, "coefficient", 0, design.matrix.shape[1] - 1)


def fit_cells(X: np.ndarray, cells: np.ndarray, coef: int, start: np.ndarray | None = None
              ) -> tuple[np.ndarray, np.ndarray]:
    """Fit every row of ``cells`` (forced cells, then voluntary cells); keep column ``coef``.

    Parameters
    ----------
    X : numpy.ndarray, shape (n_groups, n_params)
        Design matrix.
    cells : numpy.ndarray, shape (n_fits, 2 * n_groups)
        Forced counts per group, then voluntary counts per group.
    coef : int
        Column whose estimates are returned.
    start : numpy.ndarray, optional
        Warm start for :func:`app.stats.irls.fit_batch`.

    Returns
    -------
    (estimates, failures) : numpy.ndarray, numpy.ndarray
        NaN where a fit failed, and the failure reasons (``""`` for success).
    """
    n_groups = X.shape[0]
    forced = cells[:, :n_groups]
    fit = fit_batch(X, forced, forced + cells[:, n_groups:], start=start)
    return fit.beta[:, coef], fit.failure


def original_fit(cells: Cells, design: Design) -> np.ndarray:
    """Coefficients of the model on the original counts; a clear ValueError when it fails.

    Called before any resample is drawn, so that a run on counts the model cannot fit stops at
    once instead of after drawing and fitting every resample.

    Parameters
    ----------
    cells : Cells
    design : Design
        Design matrix over ``cells.groups``.

    Returns
    -------
    numpy.ndarray, shape (n_params,)

    Raises
    ------
    ValueError
        When the design does not match the cells, or the fit fails (the reason is named).
    """
    X = np.asarray(design.matrix, dtype=float)
    if X.shape[0] != cells.n_groups:
        raise ValueError("design has a different number of rows than cells has groups.")
    counts = np.concatenate([cells.forced, cells.voluntary])[None, :].astype(float)
    n_groups = X.shape[0]
    fit = fit_batch(X, counts[:, :n_groups], counts[:, :n_groups] + counts[:, n_groups:])
    if fit.failure[0]:
        raise ValueError(f"The model cannot be fitted to these counts ({fit.failure[0]}), so there is "
                         "nothing to bootstrap.")
    return fit.beta[0]


#: a statistic of resampled cells: rows (n, 2 * n_groups) -> (values, failure reasons, standard errors or None)
Evaluate = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray | None]]


def _block(k: int, seed: int, sampler: CellSampler, evaluate: Evaluate
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    return evaluate(sampler.draw(block_rng(seed, k), BLOCK_SIZE))


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
    sampler: int = SAMPLER,
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
    sampler : int
        How firm draws are taken (``app.stats.draws.SAMPLERS``); new runs use the current one, an
        extension the one its run started with.

    Returns
    -------
    Replicates

    Raises
    ------
    ValueError
        On a bad argument, or when the model cannot be fitted to the original counts (checked
        before anything is drawn).
    BootstrapCancelled
        When ``should_stop`` asked for it.
    """
    check_choice(unit, UNITS, "unit")
    check_count(resamples, "resamples", 1, MAX_RESAMPLES)
    check_count(seed, "seed", 0)
    check_count(start, "start", 0)
    coef = coefficient_index(design, coefficient)
    X = np.asarray(design.matrix, dtype=float)
    original_fit(cells, design)  # fails fast, before anything is drawn

    def evaluate(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray, None]:
        theta, why = fit_cells(X, rows, coef)
        return theta, why, None

    return draw_statistic(cells, evaluate, unit=unit, resamples=resamples, seed=seed, start=start,
                          chunk_size=chunk_size, workers=workers, progress=progress, should_stop=should_stop,
                          sampler=sampler)


def draw_statistic(
    cells: Cells,
    evaluate: Evaluate,
    *,
    unit: Unit,
    resamples: int,
    seed: int,
    start: int = 0,
    strata: np.ndarray | None = None,
    chunk_size: int | None = None,
    workers: int | None = None,
    progress: Progress | None = None,
    should_stop: StopCheck | None = None,
    sampler: int = SAMPLER,
) -> Replicates:
    """Draw resamples ``start .. start + resamples - 1`` of ``cells`` and evaluate a statistic on each.

    The draws depend only on the cells, the unit, the strata, the seed and the resample index, never on the
    statistic: every statistic over the same cells sees the same resamples. Parameters are those of
    :func:`draw_replicates`, with ``evaluate`` (e.g. ``app.stats.statistics.Statistic.evaluate`` unpacked)
    in place of the design, and ``strata`` (one stratum index per firm) to resample firms within strata:
    each resample then holds as many firms of each stratum as the data do.

    Returns
    -------
    Replicates
    """
    check_choice(unit, UNITS, "unit")
    n = check_count(resamples, "resamples", 1, MAX_RESAMPLES)
    seed = check_count(seed, "seed", 0)
    start = check_count(start, "start", 0)
    n_workers = check_count(workers, "workers", 1) if workers is not None else min(8, os.cpu_count() or 1)
    per_round = -(-check_count(chunk_size or 2000, "chunk_size", 1) // BLOCK_SIZE)

    began = time.perf_counter()
    drawer = CellSampler(cells, unit, strata, sampler)
    first, last = start // BLOCK_SIZE, (start + n - 1) // BLOCK_SIZE
    blocks = list(range(first, last + 1))
    estimates: list[np.ndarray] = []
    failures: list[np.ndarray] = []
    errors: list[np.ndarray | None] = []
    pool = ThreadPoolExecutor(max_workers=n_workers) if n_workers > 1 else None
    try:
        for r in range(0, len(blocks), per_round):
            if should_stop is not None and should_stop():
                done = min(n, max(0, r * BLOCK_SIZE - (start - first * BLOCK_SIZE)))
                raise BootstrapCancelled(done, n)
            batch = blocks[r:r + per_round]
            if pool is None:
                results = [_block(k, seed, drawer, evaluate) for k in batch]
            else:
                results = list(pool.map(lambda k: _block(k, seed, drawer, evaluate), batch))
            for theta, why, se in results:
                estimates.append(theta)
                failures.append(why)
                errors.append(se)
            if progress is not None:
                done = min(n, (r + len(batch)) * BLOCK_SIZE - (start - first * BLOCK_SIZE))
                progress(done, n)
    finally:
        if pool is not None:
            pool.shutdown()
    offset = start - first * BLOCK_SIZE
    theta_all = np.concatenate(estimates)[offset:offset + n]
    why_all = np.concatenate(failures)[offset:offset + n]
    se_all = None
    if errors and all(e is not None for e in errors):
        se_all = np.concatenate([e for e in errors if e is not None])[offset:offset + n]
    return Replicates(start=start, estimates=theta_all, failure=why_all,
                      seconds=time.perf_counter() - began, standard_errors=se_all)
