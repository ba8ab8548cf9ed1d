"""Sampler 4: a resample's firm multiplicities as Poisson counts topped up to exactly ``F`` draws.

Why
---
A firm bootstrap resample is ``F`` firms drawn uniformly with replacement; only each firm's multiplicity
matters, and the multiplicities are Multinomial(F, 1/F). Drawing ``F`` firm numbers and counting them
(samplers 1-3) scatters ``F`` increments at random over a count vector per resample, which was the floor of
the firm bootstrap (benchmarks/README.md). Sampler 4 gets the same distribution with little scattering:

1. Every firm gets an independent Poisson(lam) count ``m_f``, ``lam = (F - a) / F`` with
   ``a = ceil(3 sqrt(F))`` (``lam = 0`` when that is negative), read off a 16-bit word through a table: a
   whole-array lookup, written straight into the firm-major block the product reads.
2. The total ``T = sum(m)`` is Poisson(lam F), and given ``T`` the counts are Multinomial(T, 1/F): ``T``
   balls, each in a uniformly chosen firm. ``F - T`` more balls go to uniformly drawn firms, giving ``F``
   balls each uniform over the firms: Multinomial(F, 1/F) (the "Poissonization" argument, common practice;
   e.g. Devroye, *Non-Uniform Random Variate Generation*, 1986, ch. XI, cited from memory). Only about
   ``a`` balls are scattered per resample. When ``T > F`` (probability about 0.13%: ``T`` falls three standard
   deviations short of ``F`` on average), ``T - F`` distinct balls chosen uniformly among the ``T``
   are taken out instead, which leaves ``F`` uniform balls as well.

Exactness: each Poisson(lam) probability is realised to within 2**-64 (64-bit thresholds of the
distribution function computed in 60-digit decimal arithmetic, :func:`poisson_thresholds`), and counts past
the last threshold (probability below 2**-64) are not drawn; the balls of step 2 are exact (division with
rejection).

Stream (what a run's numbers depend on; pass sizes, workers and chunking never change them)
---------------------------------------------------------------------------------------------
A block's generator is ``numpy.random.SFC64(SeedSequence(seed, spawn_key=(block,)))``. A block of
``BLOCK_SIZE`` resamples is drawn as groups of ``GROUP`` resamples, in order (a request of fewer rows is one
group of that many, ``r``); each group takes, in order:

a. ``ceil(r * F / 4)`` outputs of ``random_raw``, cut into 16-bit words, least significant first; word
   ``f * r + j`` is firm ``f`` of the group's resample ``j`` (firm-major): ``m`` is the number of thresholds
   at or below ``word * 2**48`` when no threshold lies in ``word * 2**48 .. word * 2**48 + 2**48 - 1``;
b. for each word whose range does hold a threshold, in the order of a., one more output ``x``: ``m`` is the
   number of thresholds at or below ``word * 2**48 + (x >> 16)``;
c. the top-up of step 2 (:func:`settle`): for resample 0, 1, ... in turn, ``|F - T_j|`` slots, each one
   32-bit word by division with rejection (:func:`below_each`) drawing a firm below ``F`` (``T_j < F``) or a
   ball below ``T_j`` (``T_j > F``); then, while a resample's balls repeat one drawn earlier in it, those
   slots, in order, draw again. Balls are numbered firm by firm in firm order.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass
from decimal import Decimal, localcontext

import numpy as np

#: resamples drawn together from the stream (a divisor of draws.BLOCK_SIZE); changing it changes every run's numbers
GROUP = 25
#: bucket value of a 16-bit word whose range holds a threshold
UNSETTLED = 255


def shortfall(n_firms: int) -> int:
    """``a = ceil(3 sqrt(F))``, capped at ``F``: the Poisson counts' expected shortfall below ``F`` balls."""
    return min(n_firms, math.isqrt(9 * n_firms - 1) + 1) if n_firms else 0


def poisson_thresholds(numerator: int, denominator: int) -> np.ndarray:
    """``floor(P(X <= k) * 2**64)`` for X ~ Poisson(numerator / denominator), k = 0, 1, ..., while below
    ``2**64`` and increasing (empty for a mean of 0).

    A 64-bit uniform ``u`` gives the count ``k`` = number of thresholds at or below ``u``; each count's
    probability is its threshold gap over ``2**64``, within ``2**-64`` of the Poisson probability. The sums are
    taken with 60 significant digits (Python's decimal module) so the floor is exact.
    """
    out: list[int] = []
    with localcontext() as ctx:
        ctx.prec = 60
        lam = Decimal(numerator) / Decimal(denominator)
        term, cdf, k = (-lam).exp(), Decimal(0), 0  # P(X = 0) = e**-lam
        while True:
            cdf += term
            t = int(cdf * (1 << 64))
            if t >= 1 << 64 or (out and t == out[-1]):
                break
            out.append(t)
            k += 1
            term = term * lam / k
    return np.array(out, dtype=np.uint64)


@dataclass(frozen=True)
class PoissonTable:
    """The thresholds and 16-bit bucket table of sampler 4 for a roster of ``n_firms`` firms."""

    n_firms: int
    thresholds: np.ndarray
    buckets: np.ndarray

    @classmethod
    def for_firms(cls, n_firms: int) -> PoissonTable:
        thresholds = poisson_thresholds(n_firms - shortfall(n_firms), max(n_firms, 1))
        starts = np.arange(1 << 16, dtype=np.uint64) << np.uint64(48)
        low = np.searchsorted(thresholds, starts, side="right")
        high = np.searchsorted(thresholds, starts + np.uint64((1 << 48) - 1), side="right")
        return cls(n_firms, thresholds, np.where(low == high, low, UNSETTLED).astype(np.uint8))


def little_endian_words(raw: np.ndarray, size: int) -> np.ndarray:
    """The first ``size`` 16-bit words of the 64-bit outputs ``raw``, least significant first, as uint16."""
    if sys.byteorder != "little":
        raw = raw.byteswap()  # so the bytes in memory run least significant first, as viewed below
    return raw.view("<u2")[:size]


def poisson_counts(bits: np.random.BitGenerator, table: PoissonTable, rows: int, chunk: int = 1 << 16
                   ) -> np.ndarray:
    """Steps a. and b. of the module docstring: Poisson counts, firm-major (``n_firms x rows``), as float32.

    The words are looked up ``chunk`` at a time so the index array stays in a core's cache (2-3x less time
    than one whole-array lookup at 25,000 firms); ``chunk`` never changes the numbers.
    """
    size = rows * table.n_firms
    words = little_endian_words(bits.random_raw(-(-size // 4)), size)
    out = np.empty(size, dtype=np.float32)
    index = np.empty(min(chunk, size), dtype=np.intp)
    looked = np.empty(index.size, dtype=np.uint8)
    for lo in range(0, size, chunk):
        k = min(chunk, size - lo)
        np.copyto(index[:k], words[lo:lo + k], casting="unsafe")  # uint16 -> intp: always exact
        np.take(table.buckets, index[:k], out=looked[:k])
        out[lo:lo + k] = looked[:k]
    unsettled = np.flatnonzero(out == UNSETTLED)
    if unsettled.size:
        tail = bits.random_raw(unsettled.size) >> np.uint64(16)
        uniform = (words[unsettled].astype(np.uint64) << np.uint64(48)) | tail
        out[unsettled] = np.searchsorted(table.thresholds, uniform, side="right")
    return out.reshape(table.n_firms, rows)


def below_each(bits: np.random.BitGenerator, bounds: np.ndarray) -> np.ndarray:
    """One integer drawn exactly uniformly from ``0 .. bounds[i] - 1`` per slot (``1 <= bounds < 2**32``).

    Division with rejection, as :func:`app.stats.draws.uniform_below` but with a bound per slot: the slots'
    32-bit words are the low, then the high half of successive ``random_raw`` outputs; slot ``i`` gives
    ``w // q_i`` with ``q_i = 2**32 // bounds[i]`` when ``w < bounds[i] * q_i``, otherwise it takes, in slot
    order, the low half of one further output at a time until one is.
    """
    size = bounds.size
    if size == 0:
        return np.zeros(0, dtype=np.int64)
    raw = bits.random_raw((size + 1) // 2)
    if sys.byteorder != "little":
        raw = raw.byteswap()  # so the uint32 view below reads each output's low half first
    words = raw.view("<u4")[:size].astype(np.uint64)
    same = bounds.min() == bounds.max()  # the usual case (every slot adds a firm): one divisor, numpy's fast division
    q = np.uint64((1 << 32) // int(bounds[0])) if same else np.uint64(1 << 32) // bounds.astype(np.uint64)
    limit = q * np.uint64(int(bounds[0])) if same else q * bounds.astype(np.uint64)
    caps = np.broadcast_to(limit, words.shape)
    for i in np.flatnonzero(words >= caps):  # rare: probability below bound / 2**32 per slot
        cap = int(caps[i])
        word = int(bits.random_raw()) & 0xFFFFFFFF
        while word >= cap:
            word = int(bits.random_raw()) & 0xFFFFFFFF
        words[i] = word
    return (words // q).astype(np.int64)


def _repeats(rows: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Positions whose (row, value) pair occurred at an earlier position."""
    order = np.lexsort((np.arange(values.size), values, rows))
    same = (rows[order][1:] == rows[order][:-1]) & (values[order][1:] == values[order][:-1])
    later = np.zeros(values.size, dtype=bool)
    later[order[1:][same]] = True
    return np.flatnonzero(later)


def column_totals(counts: np.ndarray) -> np.ndarray:
    """Column sums of a firm-major float32 block of whole numbers, exactly, as int64.

    Summed 40 rows at a time as one wide row (numpy's reduction down a 25-column block is ~10x slower); in
    float32 while every partial sum stays below 2**24 (counts are below ``2**5``), otherwise in float64."""
    n_firms, rows = counts.shape
    wide = 40
    head = n_firms - n_firms % wide
    exact = np.float32 if n_firms * 32 < 2**24 else np.float64
    folded = counts[:head].reshape(-1, wide * rows).sum(axis=0, dtype=exact).reshape(wide, rows).sum(axis=0, dtype=exact)
    return (folded + counts[head:].sum(axis=0, dtype=exact)).astype(np.int64)


def settle(bits: np.random.BitGenerator, counts: np.ndarray) -> None:
    """Step c. of the module docstring, in place: each column of ``counts`` (firm-major float32 whole numbers,
    one column per resample) made to sum to the number of firms, by adding uniform firms or, where it sums to
    more, removing distinct uniform balls."""
    n_firms, rows = counts.shape
    totals = column_totals(counts)
    gap = n_firms - totals
    column = np.repeat(np.arange(rows), np.abs(gap))
    adding = gap[column] > 0
    bounds = np.where(adding, n_firms, totals[column])
    drawn = below_each(bits, bounds)
    # removals take distinct balls: a ball drawn again within its resample is redrawn (the first T - F distinct
    # balls of an independent uniform sequence are a uniformly chosen set of T - F balls)
    taking = np.flatnonzero(~adding)
    while taking.size:
        again = taking[_repeats(column[taking], drawn[taking])]
        if not again.size:
            break
        drawn[again] = below_each(bits, bounds[again])
    np.add.at(counts.reshape(-1), drawn[adding] * rows + column[adding], np.float32(1))  # 1-d, same dtype: fast path
    ends = np.cumsum(np.abs(gap))  # the slots run resample by resample
    for j in np.flatnonzero(gap < 0):  # about one resample in 700
        balls = drawn[ends[j] + gap[j]:ends[j]]
        firms = np.searchsorted(np.cumsum(counts[:, j], dtype=np.int64), balls, side="right")
        np.subtract.at(counts[:, j], firms, np.float32(1))


def draw_group(bits: np.random.BitGenerator, table: PoissonTable, rows: int) -> np.ndarray:
    """One group's firm multiplicities (``rows <= GROUP`` resamples; float32, firm-major ``n_firms x rows``),
    each column Multinomial(F, 1/F), drawn from ``bits`` as the module docstring defines."""
    counts = poisson_counts(bits, table, rows)
    settle(bits, counts)
    return counts
