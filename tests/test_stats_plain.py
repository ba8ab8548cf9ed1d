"""The plain-Python trend engine (app.stats.plain_dist, plain_logit, trend_line) against outside references.

References: statsmodels' GLM (Binomial family) for the fits, scipy.stats for the normal, chi-squared and beta
quantiles and tails, statsmodels' ``proportion_confint`` for the Wilson and Clopper-Pearson bounds, scipy's
``optimize.brentq`` for the root search, and an independent profile search (statsmodels GLM refits with the
slope in the offset, roots by scipy's brentq) for the profile ends. The ordinary path's ``fit_trend`` builds
its straight and spline trends from this engine, so tests/test_stats_trend.py (R and published values)
checks it too.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import optimize, stats
from statsmodels.stats.proportion import proportion_confint

from app.stats import trend as trend_module
from app.stats import trend_line
from app.stats.plain_dist import beta_ppf, chi2_sf, clopper_pearson, normal_quantile, normal_sf, wilson
from app.stats.plain_logit import brent_root, fit_logit, profile_ends
from app.stats.spline import natural_spline_basis

RNG_SEED = 20261202


def _counts(seed: int, years: int = 25, size: int = 400, slope: float = 0.04) -> tuple[list[int], list[int], list[int]]:
    """Invented yearly counts from a logistic trend (seeded)."""
    rng = np.random.default_rng(seed)
    year = list(range(1998, 1998 + years))
    totals = rng.integers(size // 4, size, years)
    share = 1.0 / (1.0 + np.exp(-(-1.0 + slope * (np.arange(years) - years / 2))))
    forced = rng.binomial(totals, share)
    return year, [int(f) for f in forced], [int(n - f) for n, f in zip(totals, forced, strict=True)]


def _statsmodels(forced: list[int], totals: list[int], X: list[list[float]]) -> object:
    endog = np.column_stack([forced, np.subtract(totals, forced)])
    return sm.GLM(endog, np.asarray(X), family=sm.families.Binomial()).fit(tol=1e-13, atol=1e-14, rtol=1e-13)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_fit_equals_statsmodels(seed: int) -> None:
    """Coefficients, SEs, deviance, Pearson X^2 and log-likelihood (statsmodels' convention, with the
    binomial coefficient) of the straight and a 4-df spline trend: statsmodels GLM to 1e-10."""
    years, forced, voluntary = _counts(RNG_SEED + seed)
    totals = [f + v for f, v in zip(forced, voluntary, strict=True)]
    basis, _ = natural_spline_basis(np.asarray(years, dtype=float), 4)
    designs = [[[1.0, y - 2010.0] for y in years], [[1.0, *row] for row in basis.tolist()]]
    for X in designs:
        mine = fit_logit([float(f) for f in forced], [float(n) for n in totals], X)
        assert mine is not None
        ref = _statsmodels(forced, totals, X)
        np.testing.assert_allclose(mine.params, ref.params, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(mine.bse, ref.bse, rtol=1e-9)
        for ours, theirs in ((mine.deviance, ref.deviance), (mine.pearson_chi2, ref.pearson_chi2), (mine.llf, ref.llf)):
            assert ours == pytest.approx(theirs, rel=1e-10)
        assert mine.df_resid == int(ref.df_resid)


def test_separation_and_singular_designs_are_declined() -> None:
    """All forced in the late years (separation) and a duplicated column: None, left to the statsmodels path."""
    assert fit_logit([0.0, 0.0, 5.0, 6.0], [5.0, 6.0, 5.0, 6.0], [[1.0, t] for t in (-1.5, -0.5, 0.5, 1.5)]) is None
    assert fit_logit([1.0, 2.0, 3.0], [5.0, 5.0, 5.0], [[1.0, 1.0], [1.0, 1.0], [1.0, 1.0]]) is None


def _independent_profile(forced: list[int], totals: list[int], t: list[float], b_hat: float, se: float,
                         deviance: float, cut: float, dispersion: float) -> tuple[float, float]:
    """The profile ends by another route: statsmodels GLM refits of the intercept with b t in the offset, roots
    by scipy's brentq over brackets of 1 and 10 Wald SEs (common practice)."""
    endog = np.column_stack([forced, np.subtract(totals, forced)])
    ones = np.ones((len(t), 1))

    def excess(b: float) -> float:
        fit = sm.GLM(endog, ones, family=sm.families.Binomial(), offset=b * np.asarray(t)).fit(tol=1e-13)
        return (fit.deviance - deviance) / dispersion - cut

    return (optimize.brentq(excess, b_hat - 10 * se, b_hat - 0.1 * se, xtol=1e-12),
            optimize.brentq(excess, b_hat + 0.1 * se, b_hat + 10 * se, xtol=1e-12))


@pytest.mark.parametrize("dispersion", [1.0, 2.5])
def test_profile_ends_against_an_independent_search(dispersion: float) -> None:
    years, forced, voluntary = _counts(RNG_SEED)
    totals = [f + v for f, v in zip(forced, voluntary, strict=True)]
    t = [y - 2010.0 for y in years]
    X = [[1.0, v] for v in t]
    fit = fit_logit([float(f) for f in forced], [float(n) for n in totals], X)
    assert fit is not None
    cut = float(stats.chi2.ppf(0.95, 1))
    low, high, note = profile_ends([float(f) for f in forced], [float(n) for n in totals], X, 1, fit, cut, dispersion)
    assert note is None
    ref = _independent_profile(forced, totals, t, fit.params[1], fit.bse[1], fit.deviance, cut, dispersion)
    assert low == pytest.approx(ref[0], rel=1e-8)
    assert high == pytest.approx(ref[1], rel=1e-8)


def test_brent_root_equals_scipy_brentq() -> None:
    for f, a, b in ((lambda x: x**3 - 2.0 * x - 5.0, 2.0, 3.0), (math.cos, 0.0, 3.0),
                    (lambda x: math.exp(x) - 10.0, -5.0, 10.0), (lambda x: math.atan(x - 0.3), -40.0, 1.0)):
        assert brent_root(f, a, b) == pytest.approx(optimize.brentq(f, a, b, xtol=1e-10, rtol=4 * 2.0**-52),
                                                   abs=2e-10)
    with pytest.raises(ValueError, match="opposite signs"):
        brent_root(lambda x: x * x + 1.0, -1.0, 1.0)


def test_distributions_equal_scipy() -> None:
    for p in (1e-12, 0.001, 0.025, 0.5, 0.975, 0.999999):
        assert normal_quantile(p) == pytest.approx(stats.norm.ppf(p), rel=1e-14)
    for z in (0.0, 0.5, 1.96, 5.0, 20.0, 37.0):
        assert normal_sf(z) == pytest.approx(stats.norm.sf(z), rel=1e-13)
    for df in range(1, 8):
        for x in (0.0, 1e-6, 0.3, 1.0, 3.84, 12.0, 80.0, 600.0):
            assert chi2_sf(x, df) == pytest.approx(stats.chi2.sf(x, df), rel=1e-12)
    # chi-squared with 1 df at 0.95 is the square of the normal quantile at 0.975 (common practice)
    assert normal_quantile(0.975) ** 2 == pytest.approx(stats.chi2.ppf(0.95, 1), rel=1e-14)
    for q, a, b in ((0.025, 1.0, 1.0), (0.025, 3.0, 40.0), (0.975, 200.0, 3.0), (0.5, 0.5, 0.5),
                    (0.025, 2.0, 250_000.0), (1e-9, 5.0, 5.0)):
        assert beta_ppf(q, a, b) == pytest.approx(stats.beta.ppf(q, a, b), rel=1e-11)
        assert beta_ppf(q, a, b, upper=True) == pytest.approx(stats.beta.isf(q, a, b), rel=1e-11)


@pytest.mark.parametrize("total", [1, 2, 7, 10, 99, 3_300, 33_000, 250_000])
def test_share_intervals_equal_statsmodels(total: int) -> None:
    """Wilson and Clopper-Pearson bounds: statsmodels ``proportion_confint`` (methods wilson, beta) to 1e-10."""
    for forced in sorted({0, 1, 2, total // 3, total // 2, total - 1, total} & set(range(total + 1))):
        for alpha in (0.05, 0.1):
            wl, wh = proportion_confint(forced, total, alpha=alpha, method="wilson")
            cl, ch = proportion_confint(forced, total, alpha=alpha, method="beta")
            cl, ch = (0.0 if forced == 0 else cl), (1.0 if forced == total else ch)
            for ours, theirs in zip((*wilson(forced, total, alpha), *clopper_pearson(forced, total, alpha)),
                                    (max(wl, 0.0), min(wh, 1.0), cl, ch), strict=True):
                # a Wilson end at 0 or 1 is exact in theory; statsmodels leaves rounding noise there (2.8e-17)
                    assert ours == pytest.approx(theirs, rel=1e-10, abs=1e-15), (forced, total, alpha)


@pytest.mark.parametrize("df", [2, 3, 4, 5, 6])
def test_spline_basis_equals_the_numpy_basis(df: int) -> None:
    years = [1990.0, 1991.0, 1993.0, 1994.0, 1995.0, 1998.0, 2001.0, 2002.0, 2003.0, 2010.0]
    rows, knots = trend_line.spline_basis(years, df)
    ref, ref_knots = natural_spline_basis(np.asarray(years), df)
    np.testing.assert_allclose(knots, ref_knots, rtol=1e-14)
    np.testing.assert_allclose(rows, ref, rtol=1e-12, atol=1e-14)


def test_constants_agree_with_the_trend_module() -> None:
    assert trend_line.QUASI_DISPERSION == trend_module.QUASI_DISPERSION
    assert trend_line.QUASI_MIN_DF == trend_module.QUASI_MIN_DF
    assert trend_line.SPLINE_DFS == trend_module.SPLINE_DFS
    assert trend_line.THIN_YEAR == trend_module.THIN_YEAR


def _dataset(kind: str) -> tuple[list[int], list[int], list[int]]:
    """Invented yearly counts: a plain trend, overdispersed years (quasi-binomial intervals given anyway),
    thin years (the imprecise-share note), and four years (too few for a 3-df spline)."""
    if kind == "overdispersed":
        rng = np.random.default_rng(RNG_SEED + 11)
        years = list(range(1995, 2020))
        totals = rng.integers(300, 900, len(years))
        share = np.clip(0.25 + 0.004 * np.arange(len(years)) + rng.normal(0.0, 0.06, len(years)), 0.05, 0.95)
        forced = rng.binomial(totals, share)
        return years, [int(f) for f in forced], [int(n - f) for n, f in zip(totals, forced, strict=True)]
    if kind == "thin":
        years, forced, voluntary = _counts(RNG_SEED + 3, years=12, size=60)
        return years, [1, 0, 2, *forced[3:]], [3, 4, 5, *voluntary[3:]]
    if kind == "four years":
        return [2001, 2002, 2003, 2004], [20, 25, 31, 30], [80, 70, 72, 61]
    return _counts(RNG_SEED + 7, size=900, slope=0.03)


@pytest.mark.parametrize(("kind", "model", "quasi"), [
    ("trend", "linear", False), ("trend", "linear", True), ("trend", "spline", False),
    ("overdispersed", "linear", False), ("overdispersed", "spline", False), ("thin", "linear", False),
    ("four years", "spline", False)])
def test_fit_trend_takes_the_plain_engine_and_equals_the_statsmodels_path(kind: str, model: str, quasi: bool,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """``fit_trend`` for the straight and spline trend now comes from ``fit_line``; the statsmodels path it
    replaced (still taken where ``fit_line`` declines) gives every number to 1e-10 and every string exactly."""
    import pandas as pd
    from scipy import sparse

    from app.stats.cells import Cells
    from app.stats.trend_report import fit_to_dict

    years, forced, voluntary = _dataset(kind)
    groups = pd.DataFrame({"year": years, "sector": "", "forced": np.asarray(forced, dtype=np.int64),
                           "voluntary": np.asarray(voluntary, dtype=np.int64)})
    cells = Cells(groups=groups, firm_ids=np.array([], dtype=object),
                  firm_matrix=sparse.csr_matrix((0, 2 * len(groups)), dtype=np.int64),
                  window=(years[0], years[-1]), by_sector=False)
    used: list[object] = []
    real = trend_module.fit_line
    monkeypatch.setattr(trend_module, "fit_line", lambda *a, **k: used.append(real(*a, **k)) or used[-1])
    plain = trend_module.fit_trend(cells, model, quasi=quasi)  # type: ignore[arg-type]
    assert used and used[0] is not None  # the plain engine answered
    monkeypatch.setattr(trend_module, "fit_line", lambda *a, **k: None)
    reference = trend_module.fit_trend(cells, model, quasi=quasi)  # type: ignore[arg-type]
    if kind == "overdispersed":
        assert plain.quasi is not None and plain.dispersion > trend_module.QUASI_DISPERSION
    if kind == "thin":
        assert any("fewer than 10" in m for m in plain.messages)
    if kind == "four years":
        assert plain.curvature is None and any("Too few years" in m for m in plain.messages)

    def same(a: object, b: object, where: str) -> None:
        if isinstance(a, dict) and isinstance(b, dict):
            assert list(a) == list(b), where
            for key in a:
                same(a[key], b[key], f"{where}.{key}")
        elif isinstance(a, list) and isinstance(b, list):
            assert len(a) == len(b), where
            for i, (x, y) in enumerate(zip(a, b, strict=True)):
                same(x, y, f"{where}[{i}]")
        elif isinstance(a, float) and isinstance(b, float):
            # rel 1e-10; an interval end that is 0 or 1 in theory is rounding noise on either side
            assert a == pytest.approx(b, rel=1e-10, abs=1e-15), where
        else:
            assert a == b and type(a) is type(b), where

    same(fit_to_dict(plain), fit_to_dict(reference), "fit")


def test_separated_counts_take_the_statsmodels_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every late year all forced: ``fit_line`` declines and ``fit_trend`` reports separation as before."""
    import pandas as pd
    from scipy import sparse

    from app.stats.cells import Cells

    groups = pd.DataFrame({"year": [2001, 2002, 2003, 2004], "sector": "",
                           "forced": np.array([0, 0, 9, 8], dtype=np.int64),
                           "voluntary": np.array([7, 9, 0, 0], dtype=np.int64)})
    cells = Cells(groups=groups, firm_ids=np.array([], dtype=object),
                  firm_matrix=sparse.csr_matrix((0, 8), dtype=np.int64), window=(2001, 2004), by_sector=False)
    assert trend_line.fit_line([2001, 2002, 2003, 2004], [0, 0, 9, 8], [7, 9, 0, 0], (2001, 2004)) is None
    fit = trend_module.fit_trend(cells)
    assert fit.separated and fit.odds_ratio is None
