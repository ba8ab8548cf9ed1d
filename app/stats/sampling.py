"""Drawing bootstrap resamples of grouped counts and fitting them in batches.

Units
-----
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
whether it came from one run or from extending a shorter one. How draws are counted and multiplied
(pass sizes, the product) never changes them.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from app.stats.cells import Cells
from app.stats.design import Design
from app.stats.irls import fit_batch
from app.types import UNITS, Unit, check_choice

#: resamples per independently seeded block; changing it changes every stored run's numbers
BLOCK_SIZE = 250
#: resamples whose firm multiplicities go through one sparse product (a divisor of BLOCK_SIZE):
#: at 25,000 firms the product costs about a third per resample at 25 columns of what it costs
#: at 4 (benchmarks/README.md). Pass sizes never change the draws.
PASS_ROWS = 25
#: ... unless the multiplicity block would exceed this many values (4 bytes each: 8 MiB, which
#: stays in the shared cache; at 250,000 firms 8 columns beat 25), but never fewer than
#: MIN_PASS_ROWS resamples per pass
PASS_VALUES = 2**21
MIN_PASS_ROWS = 4
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



def check_count(value: object, what: str, low: int, high: int | None = None) -> int:
    """``value`` as an int in ``[low, high]``, or a ValueError naming ``what`` and the range.

    Parameters
    ----------
    value : object
        Must be a whole number (bools and floats are refused).
    what : str
        Name used in the message.
    low, high : int
        Inclusive bounds (``high`` None: no upper bound).

    Returns
    -------
    int
    """
    whole = isinstance(value, int | np.integer) and not isinstance(value, bool)
    number = int(value) if whole else low - 1  # type: ignore[call-overload]
    if number < low or (high is not None and number > high):
        span = f"from {low} to {high}" if high is not None else f"of at least {low}"
        raise ValueError(f"{what} must be a whole number {span}; got {value!r}.")
    return number


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


class CellSampler:
    """Draws resampled cell counts (forced cells, then voluntary cells) for one unit.

    Firm draws are ``rng.integers(0, n_firms, size=(rows, n_firms))``, taken one resample at a
    time (successive calls continue one stream, so this is the same sequence); each resample's
    draws are counted per firm by ``bincount`` into a column of a reused firm-major multiplicity
    block of ``PASS_ROWS`` resamples, and the block goes through one sparse product whose loop
    runs over firms (the firm x cell CSR matrix seen as cell x firm CSC), reading the block once,
    in order. Looping over cells instead (cell x firm CSR) re-reads the block once per cell and
    made 250,000 firms 15x slower than 25,000; a dense float32 GEMM measured 7-20x slower than
    the sparse product from 500 to 100,000 firms (benchmarks/README.md).
    """

    def __init__(self, cells: Cells, unit: Unit, strata: np.ndarray | None = None) -> None:
        self.counts = np.concatenate([cells.forced, cells.voluntary]).astype(np.int64)
        self.unit = unit
        self.total = int(self.counts.sum())
        self.pvals = self.counts / self.total if self.total else self.counts.astype(float)
        matrix = sparse.csr_matrix(cells.firm_matrix, dtype=np.float64)
        self.n_firms = matrix.shape[0]
        self.firm_t: sparse.csc_matrix | None = None
        self.dtype: type[np.floating] = np.float64
        if unit == "firm":
            if self.n_firms == 0 or not np.array_equal(np.asarray(matrix.sum(axis=0)).ravel(), self.counts):
                raise ValueError("cells.firm_matrix must add up, over firms, to the group counts.")
            # float32 sums of whole numbers are exact below 2**24, and no resample can count more
            # than n_firms times the largest entry in a cell; half the bytes to move per product
            self.dtype = np.float32 if self.n_firms * float(matrix.max()) < 2**24 else np.float64
            self.firm_t = sparse.csc_matrix(matrix.astype(self.dtype).T)
        # stratified firm draws: slot j of a resample draws uniformly among the firms of its stratum
        self.slot_low: np.ndarray | None = None
        self.slot_size: np.ndarray | None = None
        self.slot_firms: np.ndarray | None = None
        if strata is not None:
            if unit != "firm":
                raise ValueError("Stratified resampling draws whole firms within each sector; use unit firm.")
            strata = np.asarray(strata, dtype=np.int64)
            if strata.shape != (self.n_firms,):
                raise ValueError("strata must give one stratum per firm of the cells.")
            order = np.argsort(strata, kind="stable")  # firms grouped by stratum, in firm order within one
            ordered = strata[order]
            starts = np.searchsorted(ordered, ordered, side="left")
            ends = np.searchsorted(ordered, ordered, side="right")
            self.slot_firms, self.slot_low, self.slot_size = order, starts, ends - starts

    def pass_rows(self, rows: int) -> int:
        """Resamples drawn per pass for a request of ``rows``."""
        return max(1, min(rows, PASS_ROWS, max(MIN_PASS_ROWS, PASS_VALUES // max(self.n_firms, 1))))

    def _firms(self, rng: np.random.Generator) -> np.ndarray:
        """One resample's drawn firms: ``n_firms`` uniform draws, or within strata the same number per stratum
        as it holds (one ``integers`` call with a per-slot upper bound)."""
        if self.slot_size is None:
            return rng.integers(0, self.n_firms, size=self.n_firms)
        assert self.slot_firms is not None and self.slot_low is not None
        return self.slot_firms[self.slot_low + rng.integers(0, self.slot_size)]

    def draw(self, rng: np.random.Generator, rows: int) -> np.ndarray:
        """``rows`` resamples of the cell counts, shape (rows, n_cells), from ``rng``."""
        if self.unit == "departure":
            return rng.multinomial(self.total, self.pvals, size=rows).astype(np.float64)
        out = np.empty((rows, self.counts.size))
        per_pass = self.pass_rows(rows)
        n_firms = self.n_firms
        assert self.firm_t is not None
        block = np.empty((n_firms, per_pass), dtype=self.dtype)
        for lo in range(0, rows, per_pass):
            r = min(per_pass, rows - lo)
            for j in range(r):
                block[:, j] = np.bincount(self._firms(rng), minlength=n_firms)
            mult = block if r == per_pass else np.ascontiguousarray(block[:, :r])
            out[lo:lo + r] = (self.firm_t @ mult).T
        return out


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


def block_rng(seed: int, block: int) -> np.random.Generator:
    """The generator of seeded block ``block`` (resamples ``block * BLOCK_SIZE`` onwards).

    Parameters
    ----------
    seed, block : int

    Returns
    -------
    numpy.random.Generator
        ``default_rng(SeedSequence(seed, spawn_key=(block,)))``.
    """
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(block,)))


#: a statistic of resampled cells: rows (n, 2 * n_groups) -> (values, failure reasons, standard errors or None)
Evaluate = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray | None]]


def _block(k: int, seed: int, sampler: CellSampler, evaluate: Evaluate
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    return evaluate(sampler.draw(block_rng(seed, k), BLOCK_SIZE))


def draw_cells(cells: Cells, *, unit: Unit, seed: int, block: int) -> np.ndarray:
    """The resampled cell counts of one block (resamples ``block * BLOCK_SIZE`` onwards).

    Returns
    -------
    numpy.ndarray, shape (BLOCK_SIZE, 2 * n_groups)
        Forced counts per group, then voluntary counts per group, one row per resample: the
        exact counts :func:`draw_replicates` fits.
    """
    check_choice(unit, UNITS, "unit")
    seed = check_count(seed, "seed", 0)
    block = check_count(block, "block", 0)
    return CellSampler(cells, unit).draw(block_rng(seed, block), BLOCK_SIZE)


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
                          chunk_size=chunk_size, workers=workers, progress=progress, should_stop=should_stop)


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
    sampler = CellSampler(cells, unit, strata)
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
                results = [_block(k, seed, sampler, evaluate) for k in batch]
            else:
                results = list(pool.map(lambda k: _block(k, seed, sampler, evaluate), batch))
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

