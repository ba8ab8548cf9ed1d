"""Sampler 4 (app/stats/poisson_draws.py): its thresholds against scipy, its stream against a plain
re-implementation of the module docstring, and its multiplicities against the multinomial they must follow."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from scipy import sparse, stats

from app.stats import poisson_draws
from app.stats.cells import Cells
from app.stats.draws import BLOCK_SIZE, CellSampler, block_rng, draw_cells
from app.stats.poisson_draws import GROUP, UNSETTLED, PoissonTable, poisson_thresholds, settle, shortfall
from tests.test_stats_samplers import identity_cells
from tests.test_stats_scale import firm_cells

TWO_48 = 1 << 48


def words_by_definition(raw: np.ndarray, size: int) -> np.ndarray:
    """16-bit words of 64-bit outputs, least significant first, by shifts and masks (no byte views)."""
    parts = [(raw >> np.uint64(16 * i)) & np.uint64(0xFFFF) for i in range(4)]
    return np.column_stack(parts).ravel()[:size]


def below_slots_by_definition(bits: np.random.SFC64, bounds: list[int]) -> list[int]:
    """Division with rejection slot by slot: the slots' words are the low, then high half of successive outputs;
    a rejected slot, in slot order, takes the low half of one further output at a time."""
    raw = [int(x) for x in bits.random_raw((len(bounds) + 1) // 2)]
    words = [half for x in raw for half in (x & 0xFFFFFFFF, x >> 32)][:len(bounds)]
    out = list(words)
    for i, bound in enumerate(bounds):
        q = 2**32 // bound
        while out[i] >= bound * q:
            out[i] = int(bits.random_raw()) & 0xFFFFFFFF
    return [w // (2**32 // b) for w, b in zip(out, bounds, strict=True)]


def settle_by_definition(bits: np.random.SFC64, counts: np.ndarray) -> np.ndarray:
    """Step c. of the docstring in plain loops: slots resample by resample; removal balls numbered firm by firm;
    repeated balls of a resample redrawn, in slot order, until every removal ball of a resample is distinct."""
    n, rows = counts.shape
    counts = counts.astype(np.int64).copy()
    totals = [int(counts[:, j].sum()) for j in range(rows)]
    slots = [(j, n if totals[j] < n else totals[j]) for j in range(rows) for _ in range(abs(n - totals[j]))]
    drawn = below_slots_by_definition(bits, [b for _, b in slots])
    while True:
        seen: set[tuple[int, int]] = set()
        again = []
        for i, (j, _) in enumerate(slots):
            if totals[j] > n:
                if (j, drawn[i]) in seen:
                    again.append(i)
                seen.add((j, drawn[i]))
        if not again:
            break
        for i, value in zip(again, below_slots_by_definition(bits, [slots[i][1] for i in again]), strict=True):
            drawn[i] = value
    out = counts.copy()
    for (j, _), value in zip(slots, drawn, strict=True):
        if totals[j] < n:
            out[value, j] += 1
        else:
            firm = int(np.searchsorted(np.cumsum(counts[:, j]), value, side="right"))
            out[firm, j] -= 1
    return out


def multiplicities_by_definition(seed: int, block: int, n: int, rows: int = BLOCK_SIZE) -> np.ndarray:
    """A block's firm multiplicities (rows x firms) from the module docstring: groups of 25, 16-bit words
    firm-major, unsettled words refined with 48 more bits, then the top-up."""
    bits = np.random.SFC64(np.random.SeedSequence(seed, spawn_key=(block,)))
    thresholds = poisson_thresholds(n - shortfall(n), n)
    out = []
    for lo in range(0, rows, GROUP):
        r = min(GROUP, rows - lo)
        words = words_by_definition(bits.random_raw(-(-r * n // 4)), r * n)
        low = np.searchsorted(thresholds, words << np.uint64(48), side="right")
        high = np.searchsorted(thresholds, (words << np.uint64(48)) + np.uint64(TWO_48 - 1), side="right")
        counts = low.copy()
        for i in np.flatnonzero(low != high):
            u = (int(words[i]) << 48) | (int(bits.random_raw()) >> 16)
            counts[i] = np.searchsorted(thresholds, np.uint64(u), side="right")
        out.append(settle_by_definition(bits, counts.reshape(n, r)).T)
    return np.vstack(out)


def test_thresholds_are_the_poisson_distribution_function_times_2_to_the_64() -> None:
    # oracle: scipy.stats.poisson.cdf (float64, so agreement to ~1e-16 absolute); the thresholds are exact
    # floors of 60-digit sums, so they also increase and end where the upper tail drops below 2**-64
    for n in (1, 37, 3_000, 25_000, 250_000):
        a = shortfall(n)
        assert a == min(n, int(np.ceil(3 * np.sqrt(n))))
        t = poisson_thresholds(n - a, n)
        lam = (n - a) / n
        if lam == 0:
            assert t.size == 0
            continue
        k = np.arange(t.size)
        np.testing.assert_allclose(t.astype(float) / 2**64, stats.poisson.cdf(k, lam), rtol=0, atol=4e-16)
        assert (np.diff(t.astype(object)) > 0).all()
        assert stats.poisson.sf(t.size - 1, lam) < 2**-63


def test_bucket_table_marks_exactly_the_words_whose_range_holds_a_threshold() -> None:
    table = PoissonTable.for_firms(25_000)
    holding = {int(t) >> 48 for t in table.thresholds if int(t) % TWO_48}
    assert set(np.flatnonzero(table.buckets == UNSETTLED).tolist()) == holding
    settled = np.flatnonzero(table.buckets != UNSETTLED)
    starts = settled.astype(np.uint64) << np.uint64(48)
    np.testing.assert_array_equal(table.buckets[settled], np.searchsorted(table.thresholds, starts, side="right"))


def test_poisson_stage_is_poisson_also_through_the_refinement() -> None:
    # oracle: scipy.stats.poisson pmf, chi-square; the second table sends every word through the 48-bit
    # refinement (a wrong shift or mask there changes the distribution)
    n = 40_000
    table = PoissonTable.for_firms(n)
    lam = (n - shortfall(n)) / n
    forced = PoissonTable(n, table.thresholds, np.full(1 << 16, UNSETTLED, dtype=np.uint8))
    for tab, rows in ((table, 25), (forced, 2)):
        m = poisson_draws.poisson_counts(np.random.SFC64(4), tab, rows).astype(np.int64).ravel()
        pmf = stats.poisson.pmf(np.arange(5), lam)
        expected = m.size * np.append(pmf, 1 - pmf.sum())
        observed = np.bincount(np.minimum(m, 5), minlength=6)
        assert stats.chisquare(observed, expected).pvalue > 1e-3


def test_sampler_4_is_its_definition_whatever_the_pass_size(monkeypatch: pytest.MonkeyPatch) -> None:
    # oracle: the module docstring written out in plain loops above; pass sizes never change the draws
    from app.stats import draws

    cells = firm_cells(12_000, 3_000, seed=8)
    expected = multiplicities_by_definition(6, 1, 3_000) @ cells.firm_matrix.toarray()
    for pass_rows in (25, 1, 250):
        monkeypatch.setattr(draws, "PASS_ROWS", pass_rows)
        np.testing.assert_array_equal(draw_cells(cells, unit="firm", seed=6, block=1, sampler=4), expected)
    assert not np.array_equal(draw_cells(cells, unit="firm", seed=6, block=1, sampler=3), expected)
    # a request of fewer rows than a group is one group of that many
    few = CellSampler(identity_cells(600), "firm", sampler=4).draw(block_rng(2, 0), 7)
    np.testing.assert_array_equal(few, multiplicities_by_definition(2, 0, 600, rows=7))


def test_settle_removes_distinct_balls_and_adds_uniform_firms_by_definition() -> None:
    # oracle: settle_by_definition (plain loops); columns summing to more than the firms (the rare removal path,
    # with many repeated balls at 12 firms) and to fewer, side by side
    rng = np.random.default_rng(3)
    n, rows = 12, 400
    totals = rng.integers(0, 3 * n, size=rows)
    counts = np.stack([rng.multinomial(t, np.full(n, 1 / n)) for t in totals], axis=1).astype(np.float32)
    got = counts.copy()
    settle(np.random.SFC64(9), got)
    np.testing.assert_array_equal(got, settle_by_definition(np.random.SFC64(9), counts))
    assert (got.sum(axis=0) == n).all() and (got >= 0).all()
    assert ((got <= counts) | (totals[None, :] < n)).all()  # a removal never adds


def test_settle_turns_any_multinomial_total_into_multinomial_of_the_firms() -> None:
    # oracle: Multinomial(n, 1/n) from scipy.stats (each firm Binomial(n, 1/n), pairs covarying by -1/n),
    # whether the Poisson stage fell short (T < n) or over (T > n): T balls in uniform firms, settled
    rng = np.random.default_rng(5)
    n, rows = 10, 40_000
    for total in (4, 10, 25):
        counts = rng.multinomial(total, np.full(n, 1 / n), size=rows).T.astype(np.float32).copy()
        settle(np.random.SFC64(total), counts)
        m = counts.T.astype(np.int64)
        assert (m.sum(axis=1) == n).all()
        pmf = stats.binom.pmf(np.arange(4), n, 1 / n)
        observed = np.bincount(np.minimum(m.ravel(), 4), minlength=5)
        assert stats.chisquare(observed, m.size * np.append(pmf, 1 - pmf.sum())).pvalue > 1e-3
        cov = np.cov(m, rowvar=False)[~np.eye(n, dtype=bool)]
        assert abs(cov.mean() + 1 / n) < 0.01


def test_sampler_4_multiplicities_are_multinomial() -> None:
    # oracle: scipy.stats -- every firm's multiplicity Binomial(F, 1/F), exactly F per resample, every firm
    # equally likely; at the target size (25,000 firms) and where the Poisson mean is 0.75 (F = 150)
    for n, blocks in ((25_000, 1), (150, 40)):
        sampler = CellSampler(identity_cells(n), "firm", sampler=4)
        m = np.vstack([sampler.draw(block_rng(11, b), BLOCK_SIZE) for b in range(blocks)]).astype(np.int64)
        assert (m.sum(axis=1) == n).all() and (m >= 0).all()
        pmf = stats.binom.pmf(np.arange(4), n, 1 / n)
        observed = np.bincount(np.minimum(m.ravel(), 4), minlength=5)
        assert stats.chisquare(observed, m.size * np.append(pmf, 1 - pmf.sum())).pvalue > 1e-3
        # each firm's total over the rows is Binomial(rows * F, 1/F): a firm favoured by its position shows here
        rows = m.shape[0]
        edges = np.round(rows + np.sqrt(rows) * np.array([-1.5, -0.5, 0.5, 1.5])).astype(int)
        cdf = stats.binom.cdf(edges - 1, rows * n, 1 / n)
        shares = np.diff(np.concatenate([[0.0], cdf, [1.0]]))
        per_firm = np.bincount(np.searchsorted(edges, m.sum(axis=0), side="right"), minlength=edges.size + 1)
        assert stats.chisquare(per_firm, n * shares).pvalue > 1e-3
    other = np.random.default_rng(7).multinomial(n, np.full(n, 1 / n), size=m.shape[0])
    table = np.vstack([observed, np.bincount(np.minimum(other.ravel(), 4), minlength=5)])
    assert stats.chi2_contingency(table).pvalue > 1e-3
    cov = np.cov(m, rowvar=False)[~np.eye(n, dtype=bool)]
    assert abs(cov.mean() + 1 / n) < 0.002


def test_sampler_4_draws_departures_and_strata_as_sampler_1() -> None:
    cells = firm_cells(20_000, 5_000, seed=2)
    np.testing.assert_array_equal(draw_cells(cells, unit="departure", seed=3, block=0, sampler=4),
                                  draw_cells(cells, unit="departure", seed=3, block=0, sampler=1))
    strata = np.arange(5_000) % 4
    np.testing.assert_array_equal(CellSampler(cells, "firm", strata, sampler=4).draw(block_rng(3, 0), 20),
                                  CellSampler(cells, "firm", strata, sampler=1).draw(block_rng(3, 0), 20))


def test_one_firm_and_a_few_firms() -> None:
    # one firm: every resample is that firm once; 8 firms: the Poisson mean is 0 (a = 9 > 8), all top-up;
    # 30 firms: a mean of 13/30
    one = Cells(groups=identity_cells(2).groups.iloc[:1].assign(voluntary=0), firm_ids=np.array(["a"]),
                firm_matrix=sparse.csr_matrix(np.array([[1, 0]])), window=(2000, 2000), by_sector=False)
    np.testing.assert_array_equal(CellSampler(one, "firm", sampler=4).draw(block_rng(1, 0), 30), np.tile([1, 0], (30, 1)))
    assert PoissonTable.for_firms(8).thresholds.size == 0
    for n in (8, 30):
        m = CellSampler(identity_cells(n), "firm", sampler=4).draw(block_rng(1, 0), BLOCK_SIZE)
        assert (m.sum(axis=1) == n).all()
        np.testing.assert_array_equal(m, multiplicities_by_definition(1, 0, n))


# sha256 prefixes of the drawn counts of blocks 0 and 2 (seed 13) at 40,000 firms, recorded when sampler 4 was
# introduced: stored runs must keep their numbers
RECORDED = ["ed4efb41d846bee4", "f36a1b579225cbb4"]


def test_recorded_draws_of_sampler_4() -> None:
    cells = firm_cells(160_000, 40_000, seed=11)
    drawn = [draw_cells(cells, unit="firm", seed=13, block=b, sampler=4) for b in (0, 2)]
    assert [hashlib.sha256(d.astype(np.int64).tobytes()).hexdigest()[:16] for d in drawn] == RECORDED
    np.testing.assert_array_equal(drawn[1], multiplicities_by_definition(13, 2, 40_000) @ cells.firm_matrix.toarray())
