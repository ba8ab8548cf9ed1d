"""Firm-draw samplers: each one's definition, recorded draws, the distribution of its multiplicities, and
runs that keep the sampler they started with."""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest
from scipy import sparse, stats

from app.stats import draws
from app.stats.bootstrap import SAMPLER, bootstrap_to_dict, bootstrap_trend, draw_cells, extend_bootstrap
from app.stats.cells import Cells
from app.stats.draws import BLOCK_SIZE, CellSampler, block_rng
from tests.test_stats_bootstrap import small_cells
from tests.test_stats_scale import firm_cells


def digest(drawn: np.ndarray) -> str:
    return hashlib.sha256(drawn.astype(np.int64).tobytes()).hexdigest()[:16]


def sampler_2_by_definition(cells: Cells, seed: int, block: int, span: int) -> np.ndarray:
    """Sampler 2 written from its definition (app/stats/draws.py docstring), one drawn firm at a time:
    range totals per resample, then range by range, resample by resample, uniform firms within the range."""
    n = cells.firm_matrix.shape[0]
    starts = np.arange(0, n, span)
    sizes = np.minimum(span, n - starts)
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(block,)))
    taken = rng.multinomial(n, sizes / n, size=BLOCK_SIZE)
    multiplicity = np.zeros((BLOCK_SIZE, n), dtype=np.int64)
    for k, (first, size) in enumerate(zip(starts, sizes, strict=True)):
        for i in range(BLOCK_SIZE):
            np.add.at(multiplicity[i], first + rng.integers(0, size, size=taken[i, k]), 1)
    return np.asarray(sparse.csr_matrix(multiplicity) @ cells.firm_matrix.toarray())


def below_by_definition(bits: np.random.SFC64, bound: int, count: int) -> np.ndarray:
    """``count`` firms below ``bound`` from sampler 3's definition, in uint64 arithmetic: the 32-bit words are the
    low, then the high half of each 64-bit output (masked and shifted, no byte views); a word at or above
    ``bound * q`` (``q = 2**32 // bound``) is replaced, in order, by the low half of the next output until one
    is below; the firm is ``word // q``."""
    raw = bits.random_raw((count + 1) // 2)
    words = np.column_stack([raw & np.uint64(0xFFFFFFFF), raw >> np.uint64(32)]).ravel()[:count]
    q = 2**32 // bound
    for i in np.flatnonzero(words >= np.uint64(bound * q)):  # in order of position
        while int(words[i]) >= bound * q:
            words[i] = int(bits.random_raw()) & 0xFFFFFFFF
    return (words // np.uint64(q)).astype(np.int64)


def sampler_3_by_definition(cells: Cells, seed: int, block: int, span: int) -> np.ndarray:
    """Sampler 3 from its definition (app/stats/draws.py docstring): an SFC64 generator on the block's seed
    sequence, range totals by its multinomial (several ranges only), then range by range, resample by resample,
    firms by division with rejection (:func:`below_by_definition`), counted with np.add.at."""
    n = cells.firm_matrix.shape[0]
    starts = np.arange(0, n, span)
    sizes = np.minimum(span, n - starts)
    bits = np.random.SFC64(np.random.SeedSequence(seed, spawn_key=(block,)))
    if starts.size > 1:
        taken = np.random.Generator(bits).multinomial(n, sizes / n, size=BLOCK_SIZE)
    else:
        taken = np.full((BLOCK_SIZE, 1), n)
    multiplicity = np.zeros((BLOCK_SIZE, n), dtype=np.int64)
    for k, (first, size) in enumerate(zip(starts, sizes, strict=True)):
        for i in range(BLOCK_SIZE):
            np.add.at(multiplicity[i], first + below_by_definition(bits, int(size), int(taken[i, k])), 1)
    return np.asarray(sparse.csr_matrix(multiplicity) @ cells.firm_matrix.toarray())


@pytest.mark.parametrize("span", [700, 2**15])
def test_sampler_3_is_its_definition_whatever_the_pass_size(monkeypatch: pytest.MonkeyPatch, span: int) -> None:
    # oracle: the definition in uint64 arithmetic, counted with np.add.at (no bincount, no byte views)
    monkeypatch.setattr(draws, "SPAN", span)  # 3,000 firms: five ranges (four of 700, one of 200), or one range
    cells = firm_cells(12_000, 3_000, seed=8)
    expected = sampler_3_by_definition(cells, seed=6, block=1, span=span)
    for pass_rows in (25, 1, 7, 250):
        monkeypatch.setattr(draws, "PASS_ROWS", pass_rows)
        np.testing.assert_array_equal(draw_cells(cells, unit="firm", seed=6, block=1, sampler=3), expected)
    assert not np.array_equal(draw_cells(cells, unit="firm", seed=6, block=1, sampler=2), expected)


def test_uniform_below_rejects_exactly_where_defined_and_is_uniform() -> None:
    # oracle: the definition (below_by_definition), and scipy's chi-square test against equal shares. At
    # bound 3 * 2**30 a quarter of the words is rejected (q = 1), so the redraw path runs thousands of times;
    # a modulo reduction instead would give the first third of the range twice the share of the others
    bound, count = 3 * 2**30, 30_001
    got = draws.uniform_below(np.random.SFC64(5), bound, count, np.empty(count, dtype=np.int64))
    np.testing.assert_array_equal(got, below_by_definition(np.random.SFC64(5), bound, count))
    observed = np.bincount(got // 2**30, minlength=3)
    assert stats.chisquare(observed).pvalue > 1e-3
    modulo = (np.random.SFC64(5).random_raw(count) & np.uint64(0xFFFFFFFF)) % np.uint64(bound)  # biased, beside
    assert stats.chisquare(np.bincount((modulo // 2**30).astype(np.int64), minlength=3)).pvalue < 1e-6
    # small bounds, an odd count (the last high half unused), one value and no value
    for b, c in ((7, 10_001), (1, 5), (25_000, 0)):
        got = draws.uniform_below(np.random.SFC64(9), b, c, np.empty(max(c, 1), dtype=np.int64))
        np.testing.assert_array_equal(got, below_by_definition(np.random.SFC64(9), b, c))
    assert stats.chisquare(np.bincount(draws.uniform_below(np.random.SFC64(3), 7, 70_000,
                                                           np.empty(70_000, dtype=np.int64)))).pvalue > 1e-3


def test_sampler_3_multiplicities_at_25000_firms_are_binomial() -> None:
    # oracle: scipy.stats -- each firm's multiplicity in a resample of F firms is Binomial(F, 1/F), and every
    # resample holds exactly F firms (a multinomial's total); one range, the size of the speed target
    n = 25_000
    sampler = CellSampler(identity_cells(n), "firm", sampler=3)
    m = np.vstack([sampler.draw(block_rng(11, b), 20) for b in range(2)]).astype(np.int64)
    assert (m.sum(axis=1) == n).all()
    pmf = stats.binom.pmf(np.arange(5), n, 1 / n)
    expected = m.size * np.append(pmf, 1 - pmf.sum())
    observed = np.bincount(np.minimum(m.ravel(), 5), minlength=6)
    assert stats.chisquare(observed, expected).pvalue > 1e-3
    # every firm equally likely: each firm's total over the 40 resamples is Binomial(40 F, 1/F) (mean 40)
    edges = np.array([30, 35, 40, 45, 50])
    cdf = stats.binom.cdf(edges - 1, m.shape[0] * n, 1 / n)
    shares = np.diff(np.concatenate([[0.0], cdf, [1.0]]))
    observed = np.bincount(np.searchsorted(edges, m.sum(axis=0), side="right"), minlength=edges.size + 1)
    assert stats.chisquare(observed, n * shares).pvalue > 1e-3


def test_sampler_2_is_its_definition_whatever_the_pass_size(monkeypatch: pytest.MonkeyPatch) -> None:
    # oracle: the definition, drawn firm by firm with np.add.at (no bincount, no per-range product)
    monkeypatch.setattr(draws, "SPAN", 700)  # 3,000 firms: four ranges of 700 and one of 200
    cells = firm_cells(12_000, 3_000, seed=8)
    expected = sampler_2_by_definition(cells, seed=6, block=1, span=700)
    for pass_rows in (25, 1, 7, 250):
        monkeypatch.setattr(draws, "PASS_ROWS", pass_rows)
        np.testing.assert_array_equal(draw_cells(cells, unit="firm", seed=6, block=1, sampler=2), expected)
    # sampler 1 on the same cells is the plain integers(0, F, (250, F)) stream: other numbers
    assert not np.array_equal(draw_cells(cells, unit="firm", seed=6, block=1, sampler=1), expected)


def test_samplers_draw_the_same_up_to_one_range_and_for_departures_and_strata() -> None:
    # oracle: sampler 1 itself (its numbers are pinned in tests/test_stats_bootstrap.py)
    one_range = firm_cells(70_000, draws.SPAN, seed=2)
    np.testing.assert_array_equal(draw_cells(one_range, unit="firm", seed=3, block=0, sampler=2),
                                  draw_cells(one_range, unit="firm", seed=3, block=0, sampler=1))
    np.testing.assert_array_equal(draw_cells(one_range, unit="departure", seed=3, block=0, sampler=2),
                                  draw_cells(one_range, unit="departure", seed=3, block=0, sampler=1))
    wide = firm_cells(50_000, draws.SPAN + 1, seed=2)
    strata = np.arange(draws.SPAN + 1) % 3
    s1 = CellSampler(wide, "firm", strata, sampler=1).draw(block_rng(3, 0), 20)
    for later in (2, 3):
        np.testing.assert_array_equal(CellSampler(wide, "firm", strata, sampler=later).draw(block_rng(3, 0), 20), s1)
    # sampler 3 draws departures as sampler 1 does (its own scheme is for firms only)
    np.testing.assert_array_equal(draw_cells(one_range, unit="departure", seed=3, block=0, sampler=3),
                                  draw_cells(one_range, unit="departure", seed=3, block=0, sampler=1))


# sha256 prefixes of the drawn counts of blocks 0 and 2 (seed 13) at 40,000 firms (two ranges of sampler
# 2), recorded when sampler 2 was introduced (sampler 3's when it was); each scheme's stored runs must keep
# their numbers
RECORDED = {1: ["e2f2b3add9acf5a1", "11c67b74f5435bfb"], 2: ["46cd6f5209510327", "ebecbc0a4867e503"],
            3: ["b16d9727029c0c28", "b2900588da681243"]}


@pytest.mark.parametrize("sampler", [1, 2, 3])
def test_recorded_draws_of_every_sampler_over_two_ranges(sampler: int) -> None:
    # oracle: the recorded hashes, and each scheme's definition computed independently of CellSampler
    cells = firm_cells(160_000, 40_000, seed=11)
    drawn = {b: draw_cells(cells, unit="firm", seed=13, block=b, sampler=sampler) for b in (0, 2)}
    assert [digest(drawn[b]) for b in (0, 2)] == RECORDED[sampler]
    if sampler == 1:
        idx = np.random.default_rng(np.random.SeedSequence(13, spawn_key=(2,))).integers(0, 40_000, size=(250, 40_000))
        counts = np.stack([np.bincount(row, minlength=40_000) for row in idx])
        expected = (sparse.csr_matrix(counts) @ cells.firm_matrix).toarray()
    elif sampler == 2:
        expected = sampler_2_by_definition(cells, seed=13, block=2, span=draws.SPAN)
    else:
        expected = sampler_3_by_definition(cells, seed=13, block=2, span=draws.SPAN)
    np.testing.assert_array_equal(drawn[2], expected)


def identity_cells(n_firms: int) -> Cells:
    """One departure per firm, each in its own cell: drawn cell counts are the firm multiplicities."""
    g = n_firms // 2
    groups = pd.DataFrame({"year": 2000 + np.arange(g), "sector": "", "forced": 1, "voluntary": 1})
    return Cells(groups=groups, firm_ids=np.arange(n_firms).astype(str),
                 firm_matrix=sparse.identity(n_firms, dtype=np.int64, format="csr"),
                 window=(2000, 2000 + g - 1), by_sector=False)


@pytest.mark.parametrize("which", [2, 3])
def test_multiplicities_over_ranges_are_multinomial_with_equal_shares(monkeypatch: pytest.MonkeyPatch,
                                                                      which: int) -> None:
    # oracle: Multinomial(n, 1/n) -- each firm Binomial(n, 1/n), firms of different ranges covarying by -1/n,
    # range totals Binomial(n, range size / n) -- from scipy.stats, and numpy's own multinomial drawn beside
    n, blocks = 20, 60
    monkeypatch.setattr(draws, "SPAN", 7)  # ranges of 7, 7 and 6 firms
    sampler = CellSampler(identity_cells(n), "firm", sampler=which)
    assert len(sampler.ranges) == 3
    m = np.vstack([sampler.draw(block_rng(2026, b), BLOCK_SIZE) for b in range(blocks)]).astype(np.int64)
    rows = m.shape[0]
    assert (m.sum(axis=1) == n).all() and (m >= 0).all()
    # marginal of every firm pooled: counts of 0, 1, 2, 3, 4+ against Binomial(n, 1/n)
    pmf = stats.binom.pmf(np.arange(4), n, 1 / n)
    expected = rows * n * np.append(pmf, 1 - pmf.sum())
    observed = np.bincount(np.minimum(m.ravel(), 4), minlength=5)
    assert stats.chisquare(observed, expected).pvalue > 1e-3
    # each range's total against Binomial(n, size / n): a wrong split between ranges fails here
    for first, stop in sampler.ranges:
        total = m[:, first:stop].sum(axis=1)
        p = (stop - first) / n
        assert abs(total.mean() - n * p) < 4 * np.sqrt(n * p * (1 - p) / rows)
        assert total.var() == pytest.approx(n * p * (1 - p), rel=0.08)
    # covariance of two firms in different ranges and of two in the same range: -1/n
    cov = np.cov(m, rowvar=False)
    off = cov[~np.eye(n, dtype=bool)]
    assert abs(off.mean() + 1 / n) < 0.01
    assert abs(cov[0, 19] + 1 / n) < 0.05 and abs(cov[0, 1] + 1 / n) < 0.05
    # the same table from numpy's multinomial with equal shares, drawn beside: a two-sample chi-square
    other = np.random.default_rng(7).multinomial(n, np.full(n, 1 / n), size=rows)
    table = np.vstack([observed, np.bincount(np.minimum(other.ravel(), 4), minlength=5)])
    assert stats.chi2_contingency(table).pvalue > 1e-3


def test_a_bad_sampler_is_named() -> None:
    cells, _ = small_cells()
    for bad in (0, 5, True, "2", 2.0):
        with pytest.raises(ValueError, match="sampler must be one of 1, 2, 3, 4"):
            CellSampler(cells, "firm", sampler=bad)  # type: ignore[arg-type]


def test_new_results_name_their_sampler_and_an_extension_keeps_it(monkeypatch: pytest.MonkeyPatch) -> None:
    # oracle: a single run of the full length with the same sampler
    monkeypatch.setattr(draws, "SPAN", 40)  # several ranges on the small roster, so the samplers differ
    cells, design = small_cells()
    assert cells.firm_matrix.shape[0] > 2 * 40
    new = bootstrap_trend(cells, design, unit="firm", resamples=300, seed=5)
    assert new.sampler == SAMPLER == 4 and bootstrap_to_dict(new)["sampler"] == 4
    old = bootstrap_trend(cells, design, unit="firm", resamples=300, seed=5, sampler=1)
    assert not np.array_equal(old.replicates, new.replicates)
    extended = extend_bootstrap(old, cells, design, resamples=250)
    single = bootstrap_trend(cells, design, unit="firm", resamples=550, seed=5, sampler=1)
    assert extended.sampler == 1
    np.testing.assert_array_equal(extended.replicates, single.replicates)
    assert extended.intervals == single.intervals
