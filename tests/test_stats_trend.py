"""The trend engine against published worked examples and statsmodels (sources beside each value)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import sparse, special, stats

from app.stats.cells import Cells, build_cells
from app.stats.profile import fit_grouped_binomial, profile_interval
from app.stats.trend import QUASI_DISPERSION, TrendError, fit_trend, natural_spline_basis
from app.stats.trend_report import fit_to_dict, trend_sentence

DATA = Path(__file__).parent / "data"
CHI2_95 = stats.chi2.ppf(0.95, 1)


def cells_from_counts(years, forced, voluntary, window=None, sectors=None) -> Cells:
    """Cells straight from per-group counts (the firm matrix is not used by these fits)."""
    groups = pd.DataFrame({
        "year": np.asarray(years, dtype=np.int64),
        "sector": sectors if sectors is not None else [""] * len(years),
        "forced": np.asarray(forced, dtype=np.int64),
        "voluntary": np.asarray(voluntary, dtype=np.int64),
    }).sort_values(["sector", "year"]).reset_index(drop=True)
    window = window or (int(groups["year"].min()), int(groups["year"].max()))
    return Cells(groups=groups, firm_ids=np.array([], dtype=object),
                 firm_matrix=sparse.csr_matrix((0, 2 * len(groups)), dtype=np.int64),
                 window=window, by_sector=sectors is not None)


def sm_glm(forced, totals, X, offset=None):
    import statsmodels.api as sm

    endog = np.column_stack([forced, np.asarray(totals) - np.asarray(forced)])
    return sm.GLM(endog, X, family=sm.families.Binomial(), offset=offset).fit(tol=1e-12)


# --------------------------------------------------------------------------- beetle mortality
@pytest.fixture
def beetle():
    d = pd.read_csv(DATA / "beetle_mortality.csv")
    X = np.column_stack([np.ones(len(d)), d["log10_dose"]])
    return d["killed"].to_numpy(), d["exposed"].to_numpy(), X


def test_beetle_coefficients_and_deviance(beetle) -> None:
    killed, exposed, X = beetle
    fit = fit_grouped_binomial(killed, exposed, X)
    # Dobson & Barnett 3rd ed. §7.3 (memory, per tests/data/README.md): b0 -60.72 (5.18), b1 34.27 (2.91), D 11.23 on 6 df
    np.testing.assert_allclose(fit.params, [-60.72, 34.27], atol=0.005)
    np.testing.assert_allclose(fit.bse, [5.18, 2.91], atol=0.005)
    assert fit.deviance == pytest.approx(11.23, abs=0.005)
    assert fit.df_resid == 6
    # statsmodels to more digits (computed, per tests/data/README.md)
    np.testing.assert_allclose(fit.params, [-60.717455, 34.270326], atol=5e-7)
    np.testing.assert_allclose(fit.bse, [5.180711, 2.912140], atol=5e-7)
    assert fit.deviance == pytest.approx(11.232231, abs=5e-7)
    # Pearson X^2 10.026818 (computed, per tests/data/README.md)
    assert fit.pearson_chi2 == pytest.approx(10.026818, abs=5e-7)
    assert fit.converged and not fit.separated and fit.messages == ()


def test_beetle_log_likelihood_conventions(beetle) -> None:
    killed, exposed, X = beetle
    fit = fit_grouped_binomial(killed, exposed, X)
    # statsmodels' llf -18.7151 includes log C(n, y) (per tests/data/README.md) ...
    assert fit.llf == pytest.approx(-18.7151, abs=5e-5)
    # ... and without it is Dobson & Barnett's -186.235 (§7.3, memory, per tests/data/README.md)
    log_binom = np.sum(special.gammaln(exposed + 1) - special.gammaln(killed + 1)
                       - special.gammaln(exposed - killed + 1))
    assert fit.llf - log_binom == pytest.approx(-186.235, abs=5e-4)


def test_beetle_profile_and_wald_intervals(beetle) -> None:
    killed, exposed, X = beetle
    prof = profile_interval(killed, exposed, X, 1)
    # profile 95% CI of b1 (28.853907, 40.300527) (computed, per tests/data/README.md)
    assert prof.low == pytest.approx(28.853907, abs=1e-6)
    assert prof.high == pytest.approx(40.300527, abs=1e-6)
    assert prof.message is None
    # Wald (28.562636, 39.978015) is statsmodels' conf_int (computed, per tests/data/README.md)
    fit = fit_grouped_binomial(killed, exposed, X)
    z = stats.norm.ppf(0.975)
    wald = (fit.params[1] - z * fit.bse[1], fit.params[1] + z * fit.bse[1])
    np.testing.assert_allclose(wald, [28.562636, 39.978015], atol=1e-6)
    np.testing.assert_allclose(wald, sm_glm(killed, exposed, X).conf_int()[1], rtol=1e-9)


def test_profile_ends_solve_the_deviance_equation(beetle) -> None:
    # Independent oracle: statsmodels refit with b1 fixed in the offset; D(b) - D_min must equal chi2_{1,.95}.
    killed, exposed, X = beetle
    prof = profile_interval(killed, exposed, X, 1)
    d_min = sm_glm(killed, exposed, X).deviance
    for end in (prof.low, prof.high):
        refit = sm_glm(killed, exposed, X[:, :1], offset=end * X[:, 1])
        assert refit.deviance - d_min == pytest.approx(CHI2_95, abs=1e-6)


# --------------------------------------------------------------------------- budworm
@pytest.fixture
def budworm():
    d = pd.read_csv(DATA / "budworm.csv")
    X = np.column_stack([np.ones(len(d)), (d["sex"] == "M").astype(float), d["log2_dose"]])
    return d["dead"].to_numpy(), d["exposed"].to_numpy(), X


def test_budworm_additive_model(budworm) -> None:
    dead, exposed, X = budworm
    fit = fit_grouped_binomial(dead, exposed, X)
    # Venables & Ripley MASS 4th ed. §7.2 (memory, per tests/data/README.md): log2_dose 1.0642 (0.1311), D 6.757 on 9 df
    assert fit.params[2] == pytest.approx(1.0642, abs=5e-5)
    assert fit.bse[2] == pytest.approx(0.1311, abs=5e-5)
    assert fit.deviance == pytest.approx(6.757, abs=5e-4)
    assert fit.df_resid == 9
    # OR per doubling exp(1.064214) = 2.898560, Wald (2.241862, 3.747621) (per tests/data/README.md)
    z = stats.norm.ppf(0.975)
    assert math.exp(fit.params[2]) == pytest.approx(2.898560, abs=5e-7)
    np.testing.assert_allclose(np.exp(fit.params[2] + np.array([-z, z]) * fit.bse[2]),
                               [2.241862, 3.747621], atol=5e-7)


def test_budworm_profile_interval(budworm) -> None:
    dead, exposed, X = budworm
    prof = profile_interval(dead, exposed, X, 2)
    # R confint (MASS profile) (0.8228708, 1.3390581) (published, per tests/data/README.md); R interpolates, atol 1e-4
    assert prof.low == pytest.approx(0.8228708, abs=1e-4)
    assert prof.high == pytest.approx(1.3390581, abs=1e-4)
    # exact deviance roots (0.8228545, 1.3390388) (per tests/data/README.md), atol 1e-6
    assert prof.low == pytest.approx(0.8228545, abs=1e-6)
    assert prof.high == pytest.approx(1.3390388, abs=1e-6)


def test_profile_of_a_coefficient_with_two_nuisance_parameters(budworm) -> None:
    # Oracle: statsmodels refits (two remaining coefficients) at the ends reproduce D_min + chi2 cut-off.
    dead, exposed, X = budworm
    prof = profile_interval(dead, exposed, X, 1, alpha=0.1)
    d_min = sm_glm(dead, exposed, X).deviance
    for end in (prof.low, prof.high):
        refit = sm_glm(dead, exposed, X[:, [0, 2]], offset=end * X[:, 1])
        assert refit.deviance - d_min == pytest.approx(stats.chi2.ppf(0.9, 1), abs=1e-6)


# --------------------------------------------------------------------------- star98 (ships in statsmodels)
def test_star98_general_glm_and_dispersion() -> None:
    import statsmodels.api as sm

    data = sm.datasets.star98.load()  # Gill (2001), bundled with statsmodels; loaded, never copied
    X = sm.add_constant(data.exog.to_numpy(dtype=float), prepend=False)
    above = data.endog["NABOVE"].to_numpy()
    totals = above + data.endog["NBELOW"].to_numpy()
    fit = fit_grouped_binomial(above, totals, X)
    # statsmodels' own R/Stata reference results (per tests/data/README.md)
    assert fit.params[0] == pytest.approx(-0.0168150366, abs=1e-9)  # LOWINC
    assert fit.bse[0] == pytest.approx(4.339467e-4, abs=1e-9)
    assert fit.deviance == pytest.approx(4078.76541772, abs=1e-6)
    assert fit.df_resid == 282
    # the R/Stata figure stops at R's convergence tolerance; statsmodels' own test_glm.py allows rtol 1e-6
    assert fit.pearson_chi2 == pytest.approx(4051.921614, rel=1e-6)
    # X^2/df = 14.3685 (per tests/data/README.md); equals statsmodels' proportions + var_weights fit with scale="X2"
    assert fit.dispersion == pytest.approx(14.3685, abs=5e-5)
    vw = sm.GLM(above / totals, X, family=sm.families.Binomial(), var_weights=totals).fit(scale="X2")
    assert fit.dispersion == pytest.approx(vw.scale, rel=1e-9)


# --------------------------------------------------------------------------- seed germination plates
def test_seed_germination_dispersion_and_quasi_ses() -> None:
    import statsmodels.api as sm

    d = pd.read_csv(DATA / "seed_germination_plates.csv")
    o73 = (d["seed"] == "O73").astype(float)
    cucumber = (d["extract"] == "cucumber").astype(float)
    X = np.column_stack([np.ones(len(d)), o73, cucumber, o73 * cucumber])
    y, n = d["germinated"].to_numpy(), d["seeds"].to_numpy()
    fit = fit_grouped_binomial(y, n, X)
    # Crowder (1978) / Collett (memory, per tests/data/README.md): -0.558 (0.126), 0.146 (0.223), 1.318 (0.177),
    # -0.778 (0.306); deviance 33.28 on 17 df
    np.testing.assert_allclose(fit.params, [-0.558, 0.146, 1.318, -0.778], atol=5e-4)
    np.testing.assert_allclose(fit.bse, [0.126, 0.223, 0.177, 0.306], atol=5e-4)
    assert fit.deviance == pytest.approx(33.28, abs=5e-3)
    assert fit.df_resid == 17
    # Pearson X^2 31.651145, X^2/df 1.861832 (computed; R's quasibinomial dispersion, per tests/data/README.md)
    assert fit.pearson_chi2 == pytest.approx(31.651145, abs=5e-6)
    assert fit.dispersion == pytest.approx(1.861832, abs=5e-7)
    # quasi refit: SEs widened by sqrt(1.861832), the same as statsmodels' var_weights fit with scale="X2"
    quasi_se = fit.bse * math.sqrt(fit.dispersion)
    np.testing.assert_allclose(quasi_se, fit.bse * math.sqrt(1.861832), rtol=1e-6)
    vw = sm.GLM(y / n, X, family=sm.families.Binomial(), var_weights=n).fit(scale="X2")
    np.testing.assert_allclose(quasi_se, vw.bse, rtol=1e-8)
    # additive model deviance 39.6859 (per tests/data/README.md)
    assert fit_grouped_binomial(y, n, X[:, :3]).deviance == pytest.approx(39.6859, abs=5e-5)


# --------------------------------------------------------------------------- Arbuthnot via fit_trend
@pytest.fixture
def arbuthnot():
    d = pd.read_csv(DATA / "arbuthnot_christenings.csv")
    # males play the part of "forced", females of "voluntary"
    return fit_trend(cells_from_counts(d["year"], d["males"], d["females"])), d


def test_arbuthnot_trend(arbuthnot) -> None:
    fit, d = arbuthnot
    assert fit.centre == 1669.5 and fit.window == (1629, 1710)
    coef = fit.coefficients.set_index("name")
    # Arbuthnot via HistData, logit(male share) = a + b (year - 1629) (computed, per tests/data/README.md):
    # b = -2.52953798e-4 (SE 8.72807621e-5); the slope does not depend on centring
    assert coef.loc["year", "estimate"] == pytest.approx(-2.52953798e-4, rel=1e-7)
    assert coef.loc["year", "se"] == pytest.approx(8.72807621e-5, rel=1e-7)
    assert fit.log_or == coef.loc["year", "estimate"]
    # a = 0.0767516744 (SE 0.00451201688) at 1629: convert the centred intercept b0 + b (1629 - centre)
    shift = np.array([1.0, 1629 - fit.centre])
    a = shift @ coef["estimate"].to_numpy()
    se_a = math.sqrt(shift @ fit.covariance.to_numpy() @ shift)
    assert a == pytest.approx(0.0767516744, rel=1e-7)
    assert se_a == pytest.approx(0.00451201688, rel=1e-7)
    # OR per year 0.99974708, Wald (0.99957607, 0.99991812), D 161.337492, X^2 161.300926 on 80 df
    assert fit.odds_ratio == pytest.approx(0.99974708, abs=5e-9)
    np.testing.assert_allclose(fit.conf_int["wald"], [0.99957607, 0.99991812], atol=5e-9)
    assert fit.deviance == pytest.approx(161.337492, abs=5e-7)
    assert fit.pearson_chi2 == pytest.approx(161.300926, abs=5e-7)
    assert fit.df_resid == 80
    assert fit.dispersion == pytest.approx(2.0163, abs=5e-5)
    assert fit.decade_odds_ratio == pytest.approx(fit.odds_ratio**10, rel=1e-12)
    assert fit.departures == int(d["males"].sum() + d["females"].sum())
    assert fit.forced == int(d["males"].sum())
    assert fit.n_years == 82 and fit.n_groups == 82


def test_arbuthnot_observed_and_fitted(arbuthnot) -> None:
    fit, _ = arbuthnot
    first = fit.observed.iloc[0]
    # 1629: 5218 of 9901, Wilson (0.517175, 0.536839), CP (0.517126, 0.536893) (per tests/data/README.md)
    assert (first["year"], first["forced"], first["total"]) == (1629, 5218, 9901)
    assert first["wilson_low"] == pytest.approx(0.517175, abs=5e-7)
    assert first["cp_high"] == pytest.approx(0.536893, abs=5e-7)
    # the band is widened (quasi), so compare it with statsmodels' prediction with scale = dispersion
    import statsmodels.api as sm

    d = fit.observed
    X = np.column_stack([np.ones(len(d)), d["year"] - fit.centre])
    res = sm.GLM(np.column_stack([d["forced"], d["voluntary"]]), X, family=sm.families.Binomial()).fit(
        scale=fit.dispersion)
    frame = res.get_prediction(X).summary_frame()
    np.testing.assert_allclose(fit.fitted["fit"], frame["mean"], rtol=1e-9)
    np.testing.assert_allclose(fit.fitted["low"], frame["mean_ci_lower"], rtol=1e-8)
    np.testing.assert_allclose(fit.fitted["high"], frame["mean_ci_upper"], rtol=1e-8)


def test_arbuthnot_quasi_block(arbuthnot) -> None:
    import statsmodels.api as sm

    fit, _ = arbuthnot
    # dispersion 2.0163 > 1.5 on 80 df, so the quasi rule fires
    assert fit.dispersion > QUASI_DISPERSION and fit.quasi is not None
    d = fit.observed
    X = np.column_stack([np.ones(len(d)), d["year"] - fit.centre])
    n = d["total"].to_numpy()
    vw = sm.GLM(d["forced"] / n, X, family=sm.families.Binomial(), var_weights=n).fit(scale="X2")
    # quasi Wald = statsmodels' quasi (scale X2 on proportions) interval
    np.testing.assert_allclose(fit.quasi.conf_int["wald"], np.exp(np.asarray(vw.conf_int())[1]), rtol=1e-9)
    assert fit.quasi.se == pytest.approx(fit.se * math.sqrt(fit.dispersion), rel=1e-12)
    # quasi profile: the deviance difference divided by the dispersion reaches chi2_{1,.95} at each end
    d_min = sm_glm(d["forced"], n, X).deviance
    for end in np.log(fit.quasi.conf_int["profile"]):
        refit = sm_glm(d["forced"], n, X[:, :1], offset=end * X[:, 1])
        assert (refit.deviance - d_min) / fit.dispersion == pytest.approx(CHI2_95, abs=1e-6)
    assert any("quasi-binomial" in m for m in fit.messages)
    assert "fell by about 0.025% a year" in trend_sentence(fit)
    assert "allowing for overdispersion" in trend_sentence(fit)


# --------------------------------------------------------------------------- generated rosters
def make_roster(seed: int, years=range(2000, 2015), n_firms=60, slope=0.08, sectors=("Alpha", "Beta")):
    """Invented departures: logit P(forced) = -1 + slope (year - 2007) + a sector shift."""
    rng = np.random.default_rng(seed)
    rows = []
    for year in years:
        for _ in range(rng.integers(15, 30)):
            sector_i = int(rng.integers(len(sectors)))
            eta = -1.0 + slope * (year - 2007) + 0.5 * sector_i
            forced = rng.random() < 1 / (1 + math.exp(-eta))
            rows.append({"firm_id": f"F{rng.integers(n_firms):03d}", "year": year, "sector": sectors[sector_i],
                         "category": "forced" if forced else rng.choice(["voluntary", "excluded"], p=[.9, .1])})
    return pd.DataFrame(rows)


def test_grouped_fit_equals_record_level_fit() -> None:
    import statsmodels.api as sm

    records = make_roster(7)
    cells = build_cells(records)
    fit = fit_trend(cells)
    counted = records[records["category"] != "excluded"]
    y = (counted["category"] == "forced").to_numpy(dtype=float)
    X = np.column_stack([np.ones(len(counted)), counted["year"] - fit.centre])
    record = sm.Logit(y, X).fit(disp=0, method="newton", tol=1e-12, maxiter=100)
    # statsmodels Logit on one 0/1 row per departure: identical MLE and information
    np.testing.assert_allclose(fit.coefficients["estimate"], record.params, atol=1e-8)
    np.testing.assert_allclose(fit.coefficients["se"], record.bse, rtol=1e-7)


def test_sector_model_equals_record_level_fit() -> None:
    import statsmodels.api as sm

    records = make_roster(11)
    fit = fit_trend(build_cells(records, by_sector=True), "sector")
    counted = records[records["category"] != "excluded"]
    y = (counted["category"] == "forced").to_numpy(dtype=float)
    X = np.column_stack([(counted["sector"] == "Alpha"), (counted["sector"] == "Beta"),
                         counted["year"] - fit.centre]).astype(float)
    record = sm.GLM(y, X, family=sm.families.Binomial()).fit(tol=1e-12)
    assert list(fit.coefficients["name"]) == ["sector[Alpha]", "sector[Beta]", "year"]
    np.testing.assert_allclose(fit.coefficients["estimate"], record.params, atol=1e-8)
    # fitted curve at the departure-weighted sector mix
    mix = counted["sector"].value_counts(normalize=True).sort_index().to_numpy()
    t = fit.fitted["year"].to_numpy() - fit.centre
    eta = mix @ record.params[:2] + record.params[2] * t
    np.testing.assert_allclose(fit.fitted["fit"], special.expit(eta), rtol=1e-7)


def test_linear_fit_on_sector_cells_sums_sectors_to_years() -> None:
    records = make_roster(3)
    by_year = fit_trend(build_cells(records))
    by_sector_cells = fit_trend(build_cells(records, by_sector=True))
    assert by_sector_cells.n_groups == by_year.n_groups == 15
    assert by_sector_cells.deviance == pytest.approx(by_year.deviance, rel=1e-10)


def test_sentence_rose_and_dict_is_json() -> None:
    fit = fit_trend(build_cells(make_roster(5, slope=0.15)))
    low, high = fit.conf_int["profile"]
    assert low > 1
    sentence = trend_sentence(fit)
    expected = f"rose by about {(fit.odds_ratio - 1) * 100:.1f}% a year (95% profile interval"
    assert sentence.startswith("Across 2000\u20132014, the odds that a departure was forced " + expected)
    assert f"{(low - 1) * 100:.1f}% to {(high - 1) * 100:.1f}%)." in sentence
    payload = json.loads(json.dumps(fit_to_dict(fit), allow_nan=False))
    for key in ("odds_ratio", "conf_int", "window", "departures", "forced", "dispersion"):
        assert key in payload
    assert payload["conf_int"]["profile"] == pytest.approx([low, high])
    assert payload["window"] == [2000, 2014]


def test_sentence_fell_and_no_clear_change() -> None:
    fell = fit_trend(build_cells(make_roster(5, slope=-0.2)))
    assert fell.conf_int["profile"][1] < 1
    assert "fell by about" in trend_sentence(fell)
    flat = fit_trend(cells_from_counts([2001, 2002, 2003, 2004], [10, 11, 10, 10], [20, 20, 21, 20]))
    low, high = flat.conf_int["profile"]
    assert low < 1 < high
    assert "no clear change" in trend_sentence(flat)


# --------------------------------------------------------------------------- spline / curvature
def test_natural_spline_basis_is_linear_beyond_the_boundary_knots() -> None:
    # ESL eq. 5.4-5.5: a natural cubic spline is linear outside the boundary knots.
    x = np.arange(2000, 2021, dtype=float)
    _, knots = natural_spline_basis(x, 3)
    outside = np.linspace(knots[-1], knots[-1] + 5, 6)
    basis, again = natural_spline_basis(outside, 3, knots=knots)
    assert again == knots
    np.testing.assert_allclose(np.diff(basis, n=2, axis=0), 0.0, atol=1e-10)
    inside = natural_spline_basis(np.linspace(knots[0], knots[-1], 7), 3, knots=knots)[0]
    assert np.abs(np.diff(inside[:, 1:], n=2, axis=0)).max() > 1e-3  # curved between the knots


def test_spline_spans_the_same_space_as_patsy_cr() -> None:
    patsy = pytest.importorskip("patsy")
    d = pd.read_csv(DATA / "arbuthnot_christenings.csv")
    basis, knots = natural_spline_basis(d["year"].to_numpy(), 3)
    mine = fit_grouped_binomial(d["males"], d["males"] + d["females"],
                                np.column_stack([np.ones(len(d)), basis]))
    # patsy's natural cubic regression spline with the same knots (its columns include the constant)
    cr = np.asarray(patsy.dmatrix(f"cr(x, knots={knots[1:-1]}, lower_bound={knots[0]}, "
                                  f"upper_bound={knots[-1]}) - 1", {"x": d["year"].to_numpy(dtype=float)}))
    theirs = sm_glm(d["males"], d["males"] + d["females"], cr)
    assert mine.deviance == pytest.approx(theirs.deviance, rel=1e-9)


def test_curvature_lr_test() -> None:
    d = pd.read_csv(DATA / "arbuthnot_christenings.csv")
    fit = fit_trend(cells_from_counts(d["year"], d["males"], d["females"]), "spline", spline_df=4)
    straight = fit_trend(cells_from_counts(d["year"], d["males"], d["females"]))
    c = fit.curvature
    assert c is not None and c.df == 3 and c.spline_df == 4
    # headline stays the straight trend
    assert fit.odds_ratio == straight.odds_ratio
    # LR statistic = deviance difference of the nested statsmodels fits; p from scipy chi2
    basis, _ = natural_spline_basis(d["year"].to_numpy(), 4)
    n = d["males"] + d["females"]
    spline = sm_glm(d["males"], n, np.column_stack([np.ones(len(d)), basis]))
    assert c.statistic == pytest.approx(straight.deviance - spline.deviance, rel=1e-8)
    assert c.p == pytest.approx(stats.chi2.sf(c.statistic, 3), rel=1e-10)
    np.testing.assert_allclose(fit.fitted["fit"], spline.mu, rtol=1e-7)


def test_spline_with_too_few_years_says_so() -> None:
    fit = fit_trend(cells_from_counts([1, 2, 3, 4], [3, 4, 5, 7], [9, 9, 8, 8]), "spline", spline_df=3)
    assert fit.curvature is None
    assert any("Too few years for a spline" in m for m in fit.messages)


# --------------------------------------------------------------------------- edge cases
def test_years_with_zero_forced_or_zero_voluntary_are_fine() -> None:
    fit = fit_trend(cells_from_counts([2001, 2002, 2003, 2004, 2005], [0, 2, 3, 5, 6], [6, 5, 4, 3, 0]))
    assert not fit.separated and fit.odds_ratio is not None and math.isfinite(fit.conf_int["profile"][1])
    res = sm_glm([0, 2, 3, 5, 6], [6, 7, 7, 8, 6], np.column_stack([np.ones(5), np.arange(5) - 2.0]))
    assert fit.log_or == pytest.approx(res.params[1], rel=1e-8)


def test_no_forced_departures_raises() -> None:
    with pytest.raises(TrendError, match="no forced departures in 2001\u20132004"):
        fit_trend(cells_from_counts([2001, 2002, 2004], [0, 0, 0], [3, 4, 5], window=(2001, 2004)))


def test_all_forced_raises() -> None:
    with pytest.raises(TrendError, match="Every counted departure"):
        fit_trend(cells_from_counts([2001, 2002, 2004], [3, 1, 2], [0, 0, 0]))


def test_fewer_than_three_years_raises() -> None:
    with pytest.raises(TrendError, match="at least 3 different years"):
        fit_trend(cells_from_counts([2001, 2002], [3, 1], [5, 6]))
    assert issubclass(TrendError, ValueError)


@pytest.mark.parametrize("forced", [[0, 0, 0, 5, 5, 5], [0, 0, 3, 5, 5, 5]], ids=["complete", "quasi"])
def test_separation_is_reported_not_a_number(forced) -> None:
    # warnings are errors in pytest: a leaked PerfectSeparationWarning or overflow would fail here
    fit = fit_trend(cells_from_counts(range(2001, 2007), forced, [5 - f for f in forced]))
    assert fit.separated
    assert fit.odds_ratio is None and fit.decade_odds_ratio is None
    assert fit.conf_int == {"wald": None, "profile": None}
    assert math.isnan(fit.log_or)
    assert any("separat" in m for m in fit.messages)
    assert "cannot be estimated" in trend_sentence(fit)
    payload = json.loads(json.dumps(fit_to_dict(fit), allow_nan=False))
    assert payload["odds_ratio"] is None


def test_profile_open_end_is_infinite_with_message() -> None:
    X = np.column_stack([np.ones(6), np.arange(6) - 2.5])
    prof = profile_interval([0, 0, 3, 5, 5, 5], [5] * 6, X, 1)
    assert prof.high == math.inf and math.isfinite(prof.low) and prof.low > 0
    assert "upper" in (prof.message or "")


def test_bad_choices_name_the_allowed_values() -> None:
    cells = cells_from_counts([1, 2, 3], [1, 2, 3], [3, 2, 1])
    with pytest.raises(ValueError, match="linear, sector, spline"):
        fit_trend(cells, "quadratic")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="2, 3, 4"):
        fit_trend(cells, "spline", spline_df=7)
    with pytest.raises(ValueError, match="by_sector=True"):
        fit_trend(cells, "sector")


def test_trend_modules_do_not_import_heavy_libraries_at_import_time() -> None:
    import subprocess
    import sys

    code = ("import sys, app.stats.trend, app.stats.sectors, app.stats.profile, app.stats.proportions; "
            "print('statsmodels' in sys.modules, 'scipy.stats' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=Path(__file__).parent.parent)
    assert out.stdout.strip() == "False False"


def test_sector_model_leaves_out_one_sided_sectors() -> None:
    # A sector with no forced departures has an intercept at -infinity and no information on the slope:
    # the slope must equal the statsmodels fit without it, not be suppressed as "separated".
    years = [2001, 2002, 2003, 2004] * 2 + [2001, 2003]
    sectors = ["Amber"] * 4 + ["Birch"] * 4 + ["Cobalt"] * 2
    forced = [2, 3, 5, 6, 1, 1, 3, 4, 0, 0]
    voluntary = [8, 7, 6, 4, 9, 8, 8, 6, 4, 5]
    fit = fit_trend(cells_from_counts(years, forced, voluntary, sectors=sectors), "sector")
    assert not fit.separated and fit.odds_ratio is not None
    assert any("Sector Cobalt has only voluntary departures" in m for m in fit.messages)
    X = np.column_stack([[1.0] * 4 + [0.0] * 4, [0.0] * 4 + [1.0] * 4, np.array(years[:8]) - 2002.5])
    ref = sm_glm(forced[:8], np.add(forced[:8], voluntary[:8]), X)
    assert fit.log_or == pytest.approx(ref.params[2], rel=1e-8)
