"""Drawing resampled cell counts from grouped counts, in independently seeded blocks.

Units
-----
* ``departure``: departures are drawn with replacement. Counting the drawn departures per
  (group, category) cell is exactly one multinomial draw of N over the cells with probabilities
  count / N, so no departure is ever materialised.
* ``firm``: firms are drawn with replacement and all their departures come along, which keeps the
  correlation between departures of one firm. A resample is a vector of firm multiplicities
  (F uniform draws counted per firm) pushed through the firms x cells count matrix. With strata (one
  per firm), each stratum gives as many drawn firms as it holds.

Reproducibility
---------------
Resamples come in blocks of ``BLOCK_SIZE``; block k draws from
``numpy.random.default_rng(SeedSequence(seed, spawn_key=(k,)))`` and is always drawn whole, so
resample i is the same counts however a run is chunked, threaded or extended
(:mod:`app.stats.sampling` runs the blocks). How draws are counted and multiplied (pass sizes, the
product) never changes them.

Samplers (how a block's firm draws are taken from its generator; a run records which, ``SAMPLERS``)
---------------------------------------------------------------------------------------------------
* ``1``: resample by resample, ``rng.integers(0, n_firms, size=n_firms)`` each.
* ``2``: the firms are cut into ranges of ``SPAN`` in firm order. A block first draws how many
  of each resample's ``n_firms`` draws fall in each range, ``rng.multinomial(n_firms, range sizes / n_firms,
  size=rows)``, then range by range, resample by resample, that many uniform firms within the range. Given
  the range totals the draws within a range are uniform, so a resample's multiplicities are
  Multinomial(n_firms, 1 / n_firms) as in sampler 1; only the numbers differ. Counting one range at a time
  keeps the count vector and the multiplicity block of a pass the size they have at ``SPAN`` firms, so time
  grows with the number of firms (benchmarks/README.md). With at most ``SPAN`` firms (one range), with
  strata, and for the departure unit, sampler 2 draws exactly what sampler 1 draws.
* ``3``: the ranges and order of sampler 2, but the firm draws come from an SFC64 generator
  seeded by the block's own ``SeedSequence(seed, spawn_key=(block,))``: the range totals by
  ``Generator(SFC64).multinomial`` (skipped with one range), then each uniform firm within a range of ``S`` firms
  from one 32-bit word ``w`` of ``SFC64.random_raw`` (the low half of each 64-bit output, then the high half) as
  ``w // (2**32 // S)``, redrawn while ``w >= S * (2**32 // S)`` (:func:`uniform_below`), so every firm is drawn
  with probability exactly ``1 / S``. Departures and strata draw as sampler 1.
* ``4`` (new runs): the multiplicities of each resample as Poisson(1) counts per firm, settled to exactly
  ``n_firms`` draws by adding or removing ~sqrt(n_firms) uniform balls, from an SFC64 generator on the
  block's seed sequence, in groups of 25 resamples (:mod:`app.stats.poisson_draws` defines the stream).
  Multinomial(n_firms, 1 / n_firms) as the others, without scattering n_firms draws per resample. Departures
  and strata draw as sampler 1.
"""

from __future__ import annotations

import sys
from typing import TYPE_CHECKING

import numpy as np

from app.stats.cells import Cells
from app.stats.poisson_draws import GROUP, PoissonTable, draw_group
from app.types import UNITS, Unit, check_choice

if TYPE_CHECKING:
    from scipy import sparse

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
#: samplers a run can name, and the one new runs use (module docstring); changing SPAN changes sampler 2's
#: numbers for rosters of more than SPAN firms
SAMPLERS = (1, 2, 3, 4)
SAMPLER = 4
#: firms per range of samplers 2 and 3: a range's int64 counts and draws (256 KiB each) stay in a 1 MiB L2 cache,
#: and a 25,000-firm roster is one range (its draws are sampler 1's)
SPAN = 2**15


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

    def __init__(self, cells: Cells, unit: Unit, strata: np.ndarray | None = None, sampler: int = SAMPLER) -> None:
        from scipy import sparse  # here, not at import: run parameters name samplers without loading scipy

        self.sampler = check_sampler(sampler)
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
        if sampler == 4 and unit == "firm" and strata is None:
            self.poisson_table = PoissonTable.for_firms(self.n_firms)
        # sampler 2 over more than SPAN firms: the firm ranges, their share of the draws, their columns of firm_t
        self.ranges: list[tuple[int, int]] = []
        if (sampler == 2 and self.n_firms > SPAN or sampler == 3) and unit == "firm" and strata is None:
            assert self.firm_t is not None
            self.ranges = [(lo, min(lo + SPAN, self.n_firms)) for lo in range(0, self.n_firms, SPAN)]
            self.range_share = np.array([hi - lo for lo, hi in self.ranges]) / self.n_firms
            self.range_t = [self.firm_t] if len(self.ranges) == 1 else [
                sparse.csc_matrix(self.firm_t[:, lo:hi]) for lo, hi in self.ranges]

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
        if self.sampler == 4 and self.slot_size is None:
            return self._draw_sampler_4(rng, rows)
        if self.sampler == 3 and self.ranges:
            return self._draw_sampler_3(rng, rows)
        if self.ranges:
            return self._draw_by_range(rng, rows)
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

    def _draw_by_range(self, rng: np.random.Generator, rows: int) -> np.ndarray:
        """Sampler 2 over several firm ranges: draws per range total, then range by range, resample by resample
        (module docstring). Each range's passes go through that range's columns of the product, summed."""
        taken = rng.multinomial(self.n_firms, self.range_share, size=rows)
        out = np.zeros((rows, self.counts.size))
        per_pass = min(rows, PASS_ROWS)
        for k, (first, stop) in enumerate(self.ranges):
            size = stop - first
            block = np.empty((size, per_pass), dtype=self.dtype)
            for lo in range(0, rows, per_pass):
                r = min(per_pass, rows - lo)
                for j in range(r):
                    block[:, j] = np.bincount(rng.integers(0, size, size=taken[lo + j, k]), minlength=size)
                mult = block if r == per_pass else np.ascontiguousarray(block[:, :r])
                out[lo:lo + r] += (self.range_t[k] @ mult).T
        return out

    def _draw_sampler_3(self, rng: np.random.Generator, rows: int) -> np.ndarray:
        """Sampler 3 (module docstring): sampler 2's ranges and order, firms drawn by :func:`uniform_below` from an
        SFC64 generator on ``rng``'s seed sequence. Each resample's counts go into a row of a reused float32 buffer
        (a contiguous write) and the pass is transposed into the firm-major block once: writing each count vector
        into a column of the block strides through memory and cost as much as drawing the firms."""
        seeds = rng.bit_generator.seed_seq  # the block's SeedSequence(seed, spawn_key=(block,)) (block_rng)
        assert isinstance(seeds, np.random.SeedSequence)
        bits = np.random.SFC64(seeds)
        if len(self.ranges) > 1:
            taken = np.random.Generator(bits).multinomial(self.n_firms, self.range_share, size=rows)
        else:
            taken = np.full((rows, 1), self.n_firms)
        out = np.zeros((rows, self.counts.size))
        per_pass = min(rows, PASS_ROWS)
        widest = max(hi - lo for lo, hi in self.ranges)
        work = np.empty(int(taken.max()), dtype=np.int64)
        counted = np.empty((per_pass, widest), dtype=self.dtype)
        for k, (first, stop) in enumerate(self.ranges):
            size = stop - first
            block = np.empty((size, per_pass), dtype=self.dtype)
            for lo in range(0, rows, per_pass):
                r = min(per_pass, rows - lo)
                for j in range(r):
                    counted[j, :size] = np.bincount(uniform_below(bits, size, int(taken[lo + j, k]), work),
                                                    minlength=size)
                mult = block if r == per_pass else np.empty((size, r), dtype=self.dtype)
                np.copyto(mult, counted[:r, :size].T)
                out[lo:lo + r] += (self.range_t[k] @ mult).T
        return out


    def _draw_sampler_4(self, rng: np.random.Generator, rows: int) -> np.ndarray:
        """Sampler 4 (:mod:`app.stats.poisson_draws`): group by group of resamples, the multiplicities drawn
        straight into the firm-major block of the product."""
        seeds = rng.bit_generator.seed_seq  # the block's SeedSequence(seed, spawn_key=(block,)) (block_rng)
        assert isinstance(seeds, np.random.SeedSequence) and self.firm_t is not None
        bits = np.random.SFC64(seeds)
        out = np.empty((rows, self.counts.size))
        for lo in range(0, rows, GROUP):
            block = draw_group(bits, self.poisson_table, min(GROUP, rows - lo))
            out[lo:lo + block.shape[1]] = (self.firm_t @ block.astype(self.dtype, copy=False)).T
        return out


def uniform_below(bits: np.random.BitGenerator, bound: int, size: int, work: np.ndarray) -> np.ndarray:
    """``size`` independent integers drawn exactly uniformly from ``0 .. bound - 1`` (``1 <= bound < 2**32``), as int64.

    Division with rejection (common practice; e.g. Knuth, TAOCP vol. 2, 3.4.1): with ``q = 2**32 // bound``, a
    32-bit word ``w`` below ``bound * q`` gives ``w // q``, each value from exactly ``q`` words, and a word at
    or above ``bound * q`` (probability below ``bound / 2**32``) is redrawn. Words are the successive 32-bit
    halves of ``bits.random_raw((size + 1) // 2)``, low half first (an odd size leaves the last high half
    unused); each rejected position, in order, then takes the low half of one further ``random_raw()`` output
    at a time until one is accepted. numpy's ``Generator.integers(0, bound, dtype=np.uint32)`` is exact too
    (Lemire's rule) but works one value at a time and measured 2-3x the time of these whole-array operations
    (benchmarks/README.md, sampler 3), so the rule is written out here.

    Parameters
    ----------
    bits : numpy.random.BitGenerator
    bound : int
    size : int
    work : numpy.ndarray of int64
        Scratch space of at least ``size`` values, reused between calls (fresh arrays cost page faults).

    Returns
    -------
    numpy.ndarray of int64, shape (size,)
        A view of ``work``, valid until the next call with it.
    """
    out = work[:size]
    if size == 0 or bound == 1:
        out[...] = 0
        return out
    words = bits.random_raw((size + 1) // 2).view(np.uint32)
    if sys.byteorder != "little":  # the halves in the order defined above: low, then high
        words = words.reshape(-1, 2)[:, ::-1].ravel()
    words = words[:size]
    q = (1 << 32) // bound
    limit = bound * q
    if limit < 1 << 32 and int(words.max()) >= limit:
        for i in np.flatnonzero(words >= limit):
            word = int(bits.random_raw()) & 0xFFFFFFFF
            while word >= limit:
                word = int(bits.random_raw()) & 0xFFFFFFFF
            words[i] = word
    np.floor_divide(words, np.uint32(q), out=words)  # in place: the words are this call's own array
    out[...] = words
    return out


def check_sampler(value: object) -> int:
    """``value`` as one of ``SAMPLERS``, or a ValueError naming them."""
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value not in SAMPLERS:
        raise ValueError(f"sampler must be one of {', '.join(map(str, SAMPLERS))}; got {value!r}.")
    return int(value)


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


def draw_cells(cells: Cells, *, unit: Unit, seed: int, block: int, sampler: int = SAMPLER) -> np.ndarray:
    """The resampled cell counts of one block (resamples ``block * BLOCK_SIZE`` onwards), by ``sampler``.

    Returns
    -------
    numpy.ndarray, shape (BLOCK_SIZE, 2 * n_groups)
        Forced counts per group, then voluntary counts per group, one row per resample: the
        exact counts :func:`app.stats.sampling.draw_replicates` fits.
    """
    check_choice(unit, UNITS, "unit")
    seed = check_count(seed, "seed", 0)
    block = check_count(block, "block", 0)
    return CellSampler(cells, unit, sampler=sampler).draw(block_rng(seed, block), BLOCK_SIZE)
