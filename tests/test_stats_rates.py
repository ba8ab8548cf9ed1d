"""app.stats.rates and app.stats.rate_trend: exact Poisson intervals, rate counting, the Poisson trend.

Oracles: Garwood's chi-squared formula evaluated with scipy.stats.chi2 and statsmodels'
``confint_poisson(method='exact-c')`` (tests/data/README.md, "Rates per firm-year", Garwood 1936); statsmodels
``GLM(..., family=Poisson(), offset=log(exposure))`` for the trend (tests/data/README.md, "Rates per firm-year": rates with an exposure
offset"); the profile interval against an independent root search over statsmodels refits.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import optimize, stats
from statsmodels.stats.rates import confint_poisson

from app.stats.rate_trend import (
    RateError,
    decomposition_sentence,
    fit_rate_trend,
    poisson_profile_interval,
    rate_trend_to_dict,
)
from app.stats.rates import count_rates, expand_spans, garwood_interval, universe_fingerprint


def _universe(sizes: dict[int, int]) -> pd.DataFrame:
    """Firms f0..f(n-1) in the index in each year (a growing universe keeps its earlier firms)."""
    return pd.DataFrame([(f"f{i}", y) for y, n in sizes.items() for i in range(n)], columns=["firm_id", "year"])


def _records(counts: dict[int, tuple[int, int]]) -> pd.DataFrame:
    """Forced / voluntary departures per year, spread over distinct firms f0, f1, ... of that year."""
    rows = []
    for y, (forced, voluntary) in counts.items():
        cats = ["forced"] * forced + ["voluntary"] * voluntary
        rows += [(f"f{i}", y, c) for i, c in enumerate(cats)]
    return pd.DataFrame(rows, columns=["firm_id", "year", "category"])


def test_garwood_equals_the_chi2_formula_and_statsmodels_exact_interval() -> None:
    counts = np.array([0, 1, 2, 7, 30, 250])
    low, high = garwood_interval(counts, 0.05)
    for x, lo, hi in zip(counts, low, high, strict=True):
        # Garwood 1936 (tests/data/README.md): chi2(alpha/2, 2x)/2 and chi2(1-alpha/2, 2x+2)/2, via scipy
        expected_lo = 0.0 if x == 0 else stats.chi2.ppf(0.025, 2 * x) / 2
        assert lo == pytest.approx(expected_lo, rel=1e-12, abs=0)
        assert hi == pytest.approx(stats.chi2.ppf(0.975, 2 * x + 2) / 2, rel=1e-12)
        # statsmodels' exact (Garwood) interval for a rate with exposure 1
        sm_lo, sm_hi = confint_poisson(int(x), 1.0, method="exact-c", alpha=0.05)
        assert lo == pytest.approx(sm_lo, rel=1e-9, abs=1e-12)
        assert hi == pytest.approx(sm_hi, rel=1e-9)
    # zero events: the lower end is exactly 0, the upper end -log(0.025) = 3.6889 (hand-derived)
    assert low[0] == 0.0 and high[0] == pytest.approx(-math.log(0.025), rel=1e-12)


def test_garwood_rejects_negative_or_fractional_counts() -> None:
    with pytest.raises(ValueError, match="non-negative whole"):
        garwood_interval(np.array([1.5]))
    with pytest.raises(ValueError, match="non-negative whole"):
        garwood_interval(np.array([-1]))


def test_count_rates_counts_only_universe_firm_years_and_uses_exposure() -> None:
    universe = _universe({2001: 10, 2002: 20, 2003: 40})
    records = _records({2001: (1, 2), 2002: (2, 0), 2003: (0, 4)})
    extra = pd.DataFrame([("zz", 2002, "forced"), ("f0", 2004, "forced"), ("f1", 2001, "excluded")],
                         columns=["firm_id", "year", "category"])
    table = count_rates(pd.concat([records, extra]), universe, (2001, 2004))
    years = table.years
    assert years["year"].tolist() == [2001, 2002, 2003]
    assert years["firm_years"].tolist() == [10, 20, 40]
    assert years["forced"].tolist() == [1, 2, 0] and years["voluntary"].tolist() == [2, 0, 4]
    # by hand: 1 forced in 10 firm-years = 10 per 100; 2 in 20 = 10; 0 in 40 = 0
    assert years["forced_rate_per_100"].tolist() == pytest.approx([10.0, 10.0, 0.0])
    assert table.outside == 2  # "zz" is not in the universe; 2004 has no firm-years (excluded never counts)
    assert table.no_universe_years == (2004,)
    # the per-year interval is Garwood's on the count divided by firm-years (statsmodels exact-c)
    lo, hi = confint_poisson(2, 20.0, method="exact-c")
    assert years.loc[1, "forced_low"] == pytest.approx(100 * lo, rel=1e-9)
    assert years.loc[1, "forced_high"] == pytest.approx(100 * hi, rel=1e-9)


def test_expand_spans_is_inclusive_and_counts_overlaps_once() -> None:
    spans = pd.DataFrame({"firm_id": ["a", "a", "b"], "first_year": [2000, 2001, 2005],
                          "last_year": [2002, 2003, 2005]})
    got = expand_spans(spans)
    assert list(got.itertuples(index=False, name=None)) == [
        ("a", 2000), ("a", 2001), ("a", 2002), ("a", 2003), ("b", 2005)]
    assert universe_fingerprint(got) == universe_fingerprint(got.iloc[::-1])
    assert universe_fingerprint(got) != universe_fingerprint(got.iloc[1:])


def _overdispersed_table() -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(20261201)
    sizes = {y: 150 + 12 * (y - 1995) for y in range(1995, 2015)}
    counts = {}
    for y, n in sizes.items():
        mean = n * 0.03 * 1.02 ** (y - 1995) * rng.gamma(4.0, 1 / 4.0)  # extra-Poisson variation
        counts[y] = (int(rng.poisson(mean)), int(rng.poisson(n * 0.1)))
    return _records(counts), _universe(sizes)


@pytest.mark.parametrize("measure", ["forced", "voluntary"])
def test_rate_trend_equals_statsmodels_poisson_glm_with_offset(measure: str) -> None:
    records, universe = _overdispersed_table()
    table = count_rates(records, universe, (1995, 2014))
    fit = fit_rate_trend(table, measure)  # type: ignore[arg-type]
    y = table.years[measure].to_numpy(float)
    e = table.years["firm_years"].to_numpy(float)
    t = table.years["year"].to_numpy(float) - 2004.5
    # statsmodels GLM Poisson with log(firm-years) offset (tests/data/README.md, "Rates per firm-year")
    ref = sm.GLM(y, sm.add_constant(t), family=sm.families.Poisson(), offset=np.log(e)).fit()
    assert fit.intercept == pytest.approx(ref.params[0], abs=1e-8)
    assert fit.log_rr == pytest.approx(ref.params[1], abs=1e-8)
    assert fit.se == pytest.approx(ref.bse[1], rel=1e-6)
    assert fit.deviance == pytest.approx(ref.deviance, rel=1e-8)
    assert fit.pearson_chi2 == pytest.approx(ref.pearson_chi2, rel=1e-8)
    assert fit.llf == pytest.approx(ref.llf, rel=1e-10)
    wald = np.exp(ref.conf_int(0.05)[1])
    assert fit.conf_int["wald"] == pytest.approx(tuple(wald), rel=1e-7)
    if fit.quasi is not None:
        # quasi-Poisson: statsmodels' scale='X2' on a one-column Poisson response gives X2/df
        q = sm.GLM(y, sm.add_constant(t), family=sm.families.Poisson(), offset=np.log(e)).fit(scale="X2")
        assert fit.quasi.se == pytest.approx(q.bse[1], rel=1e-6)
        assert fit.quasi.conf_int["wald"] == pytest.approx(tuple(np.exp(q.conf_int(0.05)[1])), rel=1e-6)


def _independent_profile_end(y: np.ndarray, e: np.ndarray, t: np.ndarray, b_hat: float, side: float,
                             dispersion: float = 1.0) -> float:
    """Root of (D(b) - D_min)/phi = chi2_1(0.95), with D(b) from a statsmodels refit (slope in the offset)
    and scipy's bisection: shares no code with the module's closed-form profile and Brent search."""
    ones = np.ones((len(y), 1))

    def dev(b: float) -> float:
        return float(sm.GLM(y, ones, family=sm.families.Poisson(), offset=np.log(e) + b * t).fit(tol=1e-13).deviance)

    d_min, cut = dev(b_hat), stats.chi2.ppf(0.95, 1)
    far = b_hat + side * 1.0
    return float(optimize.bisect(lambda b: (dev(b) - d_min) / dispersion - cut, *sorted((b_hat, far)), xtol=1e-12))


def test_profile_interval_equals_an_independent_root_search() -> None:
    records, universe = _overdispersed_table()
    table = count_rates(records, universe, (1995, 2014))
    fit = fit_rate_trend(table, "forced")
    y = table.years["forced"].to_numpy(float)
    e = table.years["firm_years"].to_numpy(float)
    t = table.years["year"].to_numpy(float) - fit.centre
    low = _independent_profile_end(y, e, t, fit.log_rr, -1.0)
    high = _independent_profile_end(y, e, t, fit.log_rr, 1.0)
    assert fit.conf_int["profile"][0] == pytest.approx(math.exp(low), abs=1e-6)
    assert fit.conf_int["profile"][1] == pytest.approx(math.exp(high), abs=1e-6)
    assert fit.quasi is not None, "the gamma-mixed counts are overdispersed by construction"
    q_low = _independent_profile_end(y, e, t, fit.log_rr, -1.0, fit.dispersion)
    q_high = _independent_profile_end(y, e, t, fit.log_rr, 1.0, fit.dispersion)
    assert fit.quasi.conf_int["profile"] == pytest.approx((math.exp(q_low), math.exp(q_high)), abs=1e-6)
    assert fit.quasi.conf_int["profile"][0] < fit.conf_int["profile"][0]


def test_profile_end_is_open_when_every_event_is_in_the_last_year() -> None:
    y = np.array([0.0, 0.0, 0.0, 5.0])
    e = np.array([10.0, 10.0, 10.0, 10.0])
    t = np.array([-1.5, -0.5, 0.5, 1.5])
    low, high, note = poisson_profile_interval(y, e, t, b_hat=20.0, se=1.0)
    assert high == math.inf and note is not None and "upper" in note
    assert math.isfinite(low)


def test_rate_trend_refuses_too_few_years_or_no_events() -> None:
    table = count_rates(_records({2001: (0, 1), 2002: (0, 1), 2003: (0, 2)}), _universe({2001: 5, 2002: 5, 2003: 5}),
                        (2001, 2003))
    with pytest.raises(RateError, match="no forced departures"):
        fit_rate_trend(table, "forced")
    short = count_rates(_records({2001: (1, 1)}), _universe({2001: 5, 2002: 5}), (2001, 2002))
    with pytest.raises(RateError, match="at least 3 fiscal years"):
        fit_rate_trend(short, "forced")


def _flat_forced_rising_voluntary() -> tuple[pd.DataFrame, pd.DataFrame]:
    """Forced 2 per 100 firm-years every year; voluntary 8 per 100 growing 5% a year; 200 -> 390 firms."""
    sizes = {y: 200 + 10 * (y - 2000) for y in range(2000, 2020)}
    counts = {y: (round(0.02 * n), round(0.08 * 1.05 ** (y - 2000) * n)) for y, n in sizes.items()}
    return _records(counts), _universe(sizes)


def test_decomposition_sentence_blames_rising_voluntary_exits() -> None:
    records, universe = _flat_forced_rising_voluntary()
    table = count_rates(records, universe, (2000, 2019))
    forced, voluntary = fit_rate_trend(table, "forced"), fit_rate_trend(table, "voluntary")
    assert forced.conf_int["profile"][0] < 1.0 < forced.conf_int["profile"][1]
    assert voluntary.rate_ratio == pytest.approx(1.05, abs=0.01)
    sentence = decomposition_sentence((0.9, 0.95), forced, voluntary)
    assert sentence.startswith("Across 2000\u20132019, the forced share fell because voluntary exits rose, ")
    assert f"{(voluntary.rate_ratio - 1) * 100:.1f}% a year, while the forced rate was flat" in sentence
    # the other readings of the same three intervals
    assert "showed no clear change" in decomposition_sentence((0.9, 1.1), forced, voluntary)
    assert "although neither rate" in decomposition_sentence((1.01, 1.2), forced, voluntary)
    assert decomposition_sentence(None, forced, voluntary).startswith("Across 2000\u20132019, the forced share showed")


def test_rate_trend_json_has_no_non_finite_numbers() -> None:
    records, universe = _flat_forced_rising_voluntary()
    fit = fit_rate_trend(count_rates(records, universe, (2000, 2019)), "voluntary")
    payload = rate_trend_to_dict(fit)
    assert payload["rate_ratio"] == pytest.approx(fit.rate_ratio)
    assert set(payload["conf_int"]) == {"wald", "profile"}  # type: ignore[arg-type]
    assert payload["firm_years"] == sum(200 + 10 * k for k in range(20))
