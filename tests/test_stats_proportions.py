"""Per-year share intervals against published values (Newcombe 1998; Arbuthnot 1629 per tests/data/README.md)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from app.stats.proportions import share_intervals

# Newcombe, R. G. (1998), Statistics in Medicine 17, 857-872, Table I (memory, per tests/data/README.md):
# (x, n, Wilson low, Wilson high, Clopper-Pearson low, Clopper-Pearson high), printed to 4 dp.
NEWCOMBE = [
    (81, 263, 0.2553, 0.3662, 0.2527, 0.3676),
    (15, 148, 0.0624, 0.1605, 0.0578, 0.1617),
    (0, 20, 0.0, 0.1611, 0.0, 0.1684),
    (1, 29, 0.0061, 0.1718, 0.0009, 0.1776),
]


@pytest.mark.parametrize(("x", "n", "wl", "wh", "cl", "ch"), NEWCOMBE)
def test_newcombe_1998_cases(x: int, n: int, wl: float, wh: float, cl: float, ch: float) -> None:
    row = share_intervals([x], [n]).iloc[0]
    assert row["share"] == pytest.approx(x / n)
    # printed to 4 dp, so agreement within half a unit in the last place
    assert row["wilson_low"] == pytest.approx(wl, abs=5e-5)
    assert row["wilson_high"] == pytest.approx(wh, abs=5e-5)
    assert row["cp_low"] == pytest.approx(cl, abs=5e-5)
    assert row["cp_high"] == pytest.approx(ch, abs=5e-5)


def test_arbuthnot_1629() -> None:
    # Arbuthnot (1710) via HistData; 1629: 5218 males of 9901 christenings. Wilson (0.517175, 0.536839),
    # Clopper-Pearson (0.517126, 0.536893) (computed, per tests/data/README.md), printed to 6 dp.
    row = share_intervals(np.array([5218]), np.array([9901])).iloc[0]
    assert row["wilson_low"] == pytest.approx(0.517175, abs=5e-7)
    assert row["wilson_high"] == pytest.approx(0.536839, abs=5e-7)
    assert row["cp_low"] == pytest.approx(0.517126, abs=5e-7)
    assert row["cp_high"] == pytest.approx(0.536893, abs=5e-7)


def test_clopper_pearson_matches_beta_quantiles() -> None:
    # Clopper & Pearson (1934) definition: beta(x, n-x+1) and beta(x+1, n-x) quantiles (scipy).
    x, n = np.array([3, 7, 12]), np.array([10, 40, 12])
    out = share_intervals(x, n, alpha=0.1)
    low = np.where(x > 0, stats.beta.ppf(0.05, x, n - x + 1), 0.0)
    high = np.where(x < n, stats.beta.ppf(0.95, x + 1, np.maximum(n - x, 1)), 1.0)
    np.testing.assert_allclose(out["cp_low"], low, rtol=1e-12)
    np.testing.assert_allclose(out["cp_high"], high, rtol=1e-12)


def test_wilson_matches_score_formula() -> None:
    # Wilson (1927) score interval, written out by hand.
    x, n = np.array([0, 4, 9, 20]), np.array([20, 30, 9, 100])
    z = stats.norm.ppf(0.975)
    p = x / n
    centre = (p + z**2 / (2 * n)) / (1 + z**2 / n)
    half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / (1 + z**2 / n)
    out = share_intervals(x, n)
    np.testing.assert_allclose(out["wilson_low"], centre - half, atol=1e-12)
    np.testing.assert_allclose(out["wilson_high"], centre + half, atol=1e-12)


def test_edge_rules() -> None:
    # tests/data/README.md edge rules: x = 0 gives CP lower exactly 0, x = n gives CP upper exactly 1;
    # Wilson bounds stay inside [0, 1]; a 0/n year's Wilson interval is not zero-width.
    out = share_intervals([0, 5, 0, 1], [5, 5, 1, 1])
    assert out.loc[0, "cp_low"] == 0.0
    assert out.loc[1, "cp_high"] == 1.0
    assert out.loc[3, "cp_high"] == 1.0
    assert ((out["wilson_low"] >= 0) & (out["wilson_high"] <= 1)).all()
    assert out.loc[0, "wilson_high"] > out.loc[0, "wilson_low"]
    assert out.loc[2, "wilson_high"] > 0.5


def test_zero_total_gives_nan_not_crash() -> None:
    out = share_intervals(pd.Series([0, 3]), pd.Series([0, 6]))
    assert out.loc[0].isna().all()
    assert out.loc[1, "share"] == 0.5
    assert list(out.columns) == ["share", "wilson_low", "wilson_high", "cp_low", "cp_high"]


def test_bad_input_raises() -> None:
    with pytest.raises(ValueError, match="forced <= total"):
        share_intervals([5], [3])
    with pytest.raises(ValueError, match="alpha"):
        share_intervals([1], [3], alpha=1.5)
    with pytest.raises(ValueError, match="same length"):
        share_intervals([1, 2], [3])
