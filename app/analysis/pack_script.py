"""Recompute a Helmshift run from its replication pack with numpy, pandas, scipy and statsmodels only.

Usage, in the unzipped pack:   python reproduce.py [PACK_FOLDER] [--json]

It reads cells.csv (and firm_cells.csv, universe.csv), params.json, results.json, and for a bootstrap run
replicates.csv and jackknife.csv; it refits the model (the binomial trend in the forced share; for a rate,
the Poisson trend with log firm-years as offset; for the adjusted trend, the logit on year and the
adjustments with firm-clustered standard errors), recomputes the Wald and profile-likelihood
intervals (and the quasi ones and the bend test where the run reported them), and recomputes the
bootstrapped statistic (odds ratio per year or decade, a sector's slope, the equal-trends or bend
likelihood-ratio statistic, or the period difference in shares) with its standard error, and the
percentile, basic, BCa, normal and studentized intervals and their Monte Carlo errors from the stored
replicates (with their standard errors) and jackknife values. Each number is printed beside the one in results.json. The exit status is 1 when any differs by
more than 1e-9 (relative to its size, at least 1e-9 absolute).

Nothing here imports Helmshift: this file is the whole method.
"""

from __future__ import annotations

import json
import math
import sys
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy import optimize, special, stats

TOLERANCE = 1e-9
#: Helmshift gives quasi-binomial intervals unasked when X^2/df exceeds 1.5 with at least 5 residual df
QUASI_DISPERSION, QUASI_MIN_DF = 1.5, 5
#: the profile search steps out this many Wald standard errors to bracket each end
BRACKET_STEPS = (0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0, 32.0, 64.0)


def bracketed_ends(excess, b: float, se: float) -> tuple[float, float]:
    """Both ends of a profile interval: where ``excess`` (deviance rise over the cut) crosses zero on each side
    of the estimate ``b``, bracketed outwards in steps of ``se`` (an open end is infinite)."""
    ends = []
    for sign in (-1.0, 1.0):
        inner, end = b, sign * math.inf
        for k in BRACKET_STEPS:
            outer = b + sign * k * se
            if excess(outer) > 0:
                end = optimize.brentq(excess, min(inner, outer), max(inner, outer), xtol=1e-13)
                break
            inner = outer
        ends.append(end)
    return ends[0], ends[1]


def read_csv(folder: Path, name: str) -> pd.DataFrame:
    """A pack CSV, every cell as text (empty = missing); ``floats``/ints convert the columns wanted."""
    return pd.read_csv(folder / name, dtype=str, keep_default_na=False)


def floats(column: pd.Series) -> np.ndarray:
    """Python's own float parsing, which reads back exactly the digits written; empty is NaN."""
    return np.array([float(v) if v else math.nan for v in column], dtype=float)


def counts(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.astype({c: "int64" for c in ("year", "forced", "voluntary") if c in frame})


# ---------------------------------------------------------------- the model


def glm(forced: np.ndarray, totals: np.ndarray, X: np.ndarray, offset: np.ndarray | None = None) -> Any:
    """Binomial logit GLM on grouped counts (forced out of totals), fitted to a tight tolerance.

    statsmodels reports standard errors from the weights of its last iteration's starting point; a second
    fit started at the converged estimate gives them at the estimate itself, as Helmshift (and R's glm at
    convergence) report them.
    """
    endog = np.column_stack([forced, totals - forced])
    model = sm.GLM(endog, X, family=sm.families.Binomial(), offset=offset)
    with warnings.catch_warnings():
        # far out on a profile the fitted shares come close to 0 or 1 and statsmodels says so; the
        # deviance it returns is still the one wanted
        warnings.simplefilter("ignore")
        first = model.fit(tol=1e-12, maxiter=200)
        return model.fit(start_params=first.params, tol=1e-12, maxiter=200)


def design(groups: pd.DataFrame, model: str, centre: float) -> tuple[np.ndarray, int]:
    """Design matrix and the column of the year slope: const + (year - centre), or one intercept per sector."""
    t = groups["year"].to_numpy(dtype=float) - centre
    if model != "sector":
        return np.column_stack([np.ones_like(t), t]), 1
    sectors = sorted(groups["sector"].unique())
    dummies = (groups["sector"].to_numpy()[:, None] == np.array(sectors)[None, :]).astype(float)
    return np.column_stack([dummies, t]), len(sectors)


def model_groups(cells: pd.DataFrame, model: str, kind: str) -> pd.DataFrame:
    """The groups a model is fitted to: years summed over sectors, or sector-years.

    A fitted sector model leaves out sectors whose departures are all forced or all voluntary (their
    intercept is infinite and they say nothing about the slope); the bootstrap keeps every group.
    """
    if model != "sector":
        return cells.groupby("year", sort=True)[["forced", "voluntary"]].sum().reset_index()
    groups = cells.sort_values(["sector", "year"]).reset_index(drop=True)
    if kind == "fit":
        sums = groups.groupby("sector")[["forced", "voluntary"]].sum()
        one_sided = sums.index[(sums["forced"] == 0) | (sums["voluntary"] == 0)]
        if 0 < len(one_sided) < len(sums):
            groups = groups.loc[~groups["sector"].isin(one_sided)].reset_index(drop=True)
    return groups


def profile(forced: np.ndarray, totals: np.ndarray, X: np.ndarray, j: int, alpha: float,
            dispersion: float = 1.0) -> tuple[float, float]:
    """Profile-likelihood interval of coefficient j: where (D(b) - D_min) / dispersion = chi2(1) quantile."""
    full = glm(forced, totals, X)
    b, se = float(full.params[j]), float(full.bse[j])
    cut = float(stats.chi2.ppf(1.0 - alpha, 1))
    others, column = np.delete(X, j, axis=1), X[:, j]

    def excess(value: float) -> float:
        return float((glm(forced, totals, others, offset=value * column).deviance - full.deviance)
                     / dispersion - cut)

    return bracketed_ends(excess, b, se)


def natural_spline(x: np.ndarray, df: int) -> np.ndarray:
    """Natural cubic spline basis (Hastie, Tibshirani & Friedman, eq. 5.4-5.5), knots at quantiles of
    the distinct years, x rescaled to [0, 1]; without the constant column."""
    knots = np.quantile(np.unique(x), np.linspace(0.0, 1.0, df + 1))
    lo, span = knots[0], knots[-1] - knots[0]
    u, k = (x - lo) / span, (knots - lo) / span

    def d(j: int) -> np.ndarray:
        return (np.clip(u - k[j], 0, None) ** 3 - np.clip(u - k[-1], 0, None) ** 3) / (k[-1] - k[j])

    return np.column_stack([u] + [d(j) - d(len(k) - 2) for j in range(len(k) - 2)])


def refit(folder: Path, params: dict[str, Any], results: dict[str, Any]) -> list[tuple[str, float, Any]]:
    """The trend fit's numbers: (name, recomputed, reported)."""
    if params.get("measure") == "rate":
        return rate_refit(folder, params, results)
    if params.get("measure") == "adjusted":
        return adjusted_refit(folder, params, results)
    cells = counts(read_csv(folder, "cells.csv"))
    model, kind = params["model"], params["kind"]
    if model == "by_sector":
        common = results.get("common")
        found = refit(folder, {**params, "model": "sector"}, common) if common else []
        return found + sector_checks(cells, params, results)
    alpha = float(params["alpha"])
    groups = model_groups(cells, model, kind)
    X, j = design(groups, model, float(params["centre"]))
    forced = groups["forced"].to_numpy(dtype=float)
    totals = forced + groups["voluntary"].to_numpy(dtype=float)
    fit = glm(forced, totals, X)
    b, se = float(fit.params[j]), float(fit.bse[j])
    if kind == "bootstrap":
        return statistic_checks(cells, params, results)
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    low, high = profile(forced, totals, X, j, alpha)
    out: list[tuple[str, float, Any]] = [
        ("log odds ratio per year", b, results["log_or"]), ("its standard error", se, results["se"]),
        ("odds ratio per year", math.exp(b), results["odds_ratio"]),
        ("odds ratio per decade", math.exp(10 * b), results["decade_odds_ratio"]),
        ("deviance", float(fit.deviance), results["deviance"]),
        ("Pearson X2", float(fit.pearson_chi2), results["pearson_chi2"]),
    ]
    for per, key in ((1.0, "conf_int"), (10.0, "decade_conf_int")):
        span = "year" if per == 1.0 else "decade"
        out += [(f"Wald low, per {span}", math.exp(per * (b - z * se)), results[key]["wald"][0]),
                (f"Wald high, per {span}", math.exp(per * (b + z * se)), results[key]["wald"][1]),
                (f"profile low, per {span}", math.exp(per * low), results[key]["profile"][0]),
                (f"profile high, per {span}", math.exp(per * high), results[key]["profile"][1])]
    df_resid = len(groups) - X.shape[1]
    dispersion = float(fit.pearson_chi2) / df_resid if df_resid > 0 else math.nan
    out.append(("dispersion X2/df", dispersion, results["dispersion"]))
    shown = params.get("quasi") or (dispersion > QUASI_DISPERSION and df_resid >= QUASI_MIN_DF)
    if shown and dispersion > 0 and results.get("quasi"):
        q_se = se * math.sqrt(dispersion)
        q_low, q_high = profile(forced, totals, X, j, alpha, dispersion)
        reported = results["quasi"]["conf_int"]
        out += [("quasi-binomial Wald low", math.exp(b - z * q_se), reported["wald"][0]),
                ("quasi-binomial Wald high", math.exp(b + z * q_se), reported["wald"][1]),
                ("quasi-binomial profile low", math.exp(q_low), reported["profile"][0]),
                ("quasi-binomial profile high", math.exp(q_high), reported["profile"][1])]
    if model == "spline" and results.get("curvature"):
        years = groups["year"].to_numpy(dtype=float)
        df = int(params["spline_df"])
        spline = glm(forced, totals, np.column_stack([np.ones_like(years), natural_spline(years, df)]))
        statistic = max(float(fit.deviance) - float(spline.deviance), 0.0)
        out += [("bend test LR statistic", statistic, results["curvature"]["statistic"]),
                ("bend test p-value", float(stats.chi2.sf(statistic, df - 1)), results["curvature"]["p"])]
    return out


def sector_checks(cells: pd.DataFrame, params: dict[str, Any], results: dict[str, Any]
                  ) -> list[tuple[str, float, Any]]:
    """Each fitted sector's own straight trend, and the likelihood-ratio test of equal trends."""
    alpha, centre = float(params["alpha"]), float(params["centre"])
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    out: list[tuple[str, float, Any]] = []
    for sector in results["sectors"]:
        if sector["log_or"] is None:
            continue
        groups = cells.loc[cells["sector"] == sector["sector"]].sort_values("year")
        X, j = design(groups, "linear", centre)
        forced = groups["forced"].to_numpy(dtype=float)
        totals = forced + groups["voluntary"].to_numpy(dtype=float)
        fit = glm(forced, totals, X)
        b, se = float(fit.params[j]), float(fit.bse[j])
        low, high = profile(forced, totals, X, j, alpha)
        name = sector["sector"]
        out += [(f"{name}: log odds ratio per year", b, sector["log_or"]),
                (f"{name}: Wald low", math.exp(b - z * se), sector["conf_int"]["wald"][0]),
                (f"{name}: Wald high", math.exp(b + z * se), sector["conf_int"]["wald"][1]),
                (f"{name}: profile low", math.exp(low), sector["conf_int"]["profile"][0]),
                (f"{name}: profile high", math.exp(high), sector["conf_int"]["profile"][1])]
    test = results.get("heterogeneity")
    if test:
        groups = cells.loc[cells["sector"].isin(test["sectors"])].sort_values(["sector", "year"])
        X, j = design(groups, "sector", centre)
        forced = groups["forced"].to_numpy(dtype=float)
        totals = forced + groups["voluntary"].to_numpy(dtype=float)
        additive = glm(forced, totals, X)
        interaction = glm(forced, totals, np.column_stack([X[:, :j], X[:, :j] * X[:, [j]]]))
        statistic = float(additive.deviance - interaction.deviance)
        out += [("equal-trends LR statistic", statistic, test["statistic"]),
                ("equal-trends p-value", float(stats.chi2.sf(statistic, j - 1)), test["p"])]
    return out


# ---------------------------------------------------------------- rates per firm-year (Poisson, offset)


def poisson(events: np.ndarray, exposure: np.ndarray, X: np.ndarray, extra: np.ndarray | None = None,
            at_estimate: bool = False) -> Any:
    """Poisson GLM of events with offset log(firm-years) (+ ``extra``) over the years with firm-years, as
    Helmshift fits the rate trend (statsmodels, tol 1e-12); ``at_estimate``: refitted from the estimate so
    the standard errors are those at the estimate (as the bootstrap's batched fits report them)."""
    keep = exposure > 0
    offset = np.log(exposure[keep]) + (0.0 if extra is None else extra[keep])
    model = sm.GLM(events[keep], X[keep], family=sm.families.Poisson(), offset=offset)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = model.fit(tol=1e-12, maxiter=200)
        return model.fit(start_params=fit.params, tol=1e-12, maxiter=200) if at_estimate else fit


def poisson_profile(events: np.ndarray, exposure: np.ndarray, t: np.ndarray, b: float, se: float, alpha: float,
                    dispersion: float = 1.0) -> tuple[float, float]:
    """Profile-likelihood interval of the slope: the intercept refitted for each slope held fixed (an offset)."""
    ones = np.ones((t.size, 1))
    best = float(poisson(events, exposure, np.column_stack([ones, t])).deviance)
    cut = float(stats.chi2.ppf(1.0 - alpha, 1))

    def excess(value: float) -> float:
        return (float(poisson(events, exposure, ones, extra=value * t).deviance) - best) / dispersion - cut

    return bracketed_ends(excess, b, se)


def rate_refit(folder: Path, params: dict[str, Any], results: dict[str, Any]) -> list[tuple[str, float, Any]]:
    """The rate ratio per year of the forced (and, for a fit, the voluntary) rate: Poisson GLM with log firm-years
    as offset; Wald, profile and (where reported) quasi-Poisson intervals; or the bootstrapped statistic."""
    cells = read_csv(folder, "cells.csv").astype("int64")
    t = cells["year"].to_numpy(dtype=float) - float(params["centre"])
    exposure = cells["firm_years"].to_numpy(dtype=float)
    X = np.column_stack([np.ones_like(t), t])
    if params["kind"] == "bootstrap":
        fit = poisson(cells["forced"].to_numpy(dtype=float), exposure, X, at_estimate=True)
        label = results.get("label", "rate ratio per year")
        b = float(fit.params[1])
        return [(f"{label}: estimate (log scale)", b, results["log_odds_ratio"]),
                (f"{label}: estimate", math.exp(b), results["odds_ratio"]),
                (f"{label}: standard error", float(fit.bse[1]), results["estimate_se"])]
    out: list[tuple[str, float, Any]] = []
    for measure in ("forced", "voluntary"):
        reported = results[measure]
        events = cells[measure].to_numpy(dtype=float)
        alpha = float(reported["alpha"])
        z = float(stats.norm.ppf(1.0 - alpha / 2.0))
        fit = poisson(events, exposure, X)
        b, se = float(fit.params[1]), float(fit.bse[1])
        low, high = poisson_profile(events, exposure, t, b, se, alpha)
        df_resid = int(round(float(fit.df_resid)))
        dispersion = float(fit.pearson_chi2) / df_resid if df_resid > 0 else math.nan
        out += [(f"{measure} rate: log rate ratio per year", b, reported["log_rr"]),
                (f"{measure} rate: its standard error", se, reported["se"]),
                (f"{measure} rate: rate ratio per year", math.exp(b), reported["rate_ratio"]),
                (f"{measure} rate: Wald low", math.exp(b - z * se), reported["conf_int"]["wald"][0]),
                (f"{measure} rate: Wald high", math.exp(b + z * se), reported["conf_int"]["wald"][1]),
                (f"{measure} rate: profile low", math.exp(low), reported["conf_int"]["profile"][0]),
                (f"{measure} rate: profile high", math.exp(high), reported["conf_int"]["profile"][1]),
                (f"{measure} rate: deviance", float(fit.deviance), reported["deviance"]),
                (f"{measure} rate: dispersion X2/df", dispersion, reported["dispersion"])]
        quasi = reported.get("quasi")
        if quasi:
            q_se = se * math.sqrt(dispersion)
            q_low, q_high = poisson_profile(events, exposure, t, b, q_se, alpha, dispersion)
            out += [(f"{measure} rate: quasi-Poisson Wald low", math.exp(b - z * q_se), quasi["conf_int"]["wald"][0]),
                    (f"{measure} rate: quasi-Poisson Wald high", math.exp(b + z * q_se), quasi["conf_int"]["wald"][1]),
                    (f"{measure} rate: quasi-Poisson profile low", math.exp(q_low), quasi["conf_int"]["profile"][0]),
                    (f"{measure} rate: quasi-Poisson profile high", math.exp(q_high),
                     quasi["conf_int"]["profile"][1])]
    return out


def rate_jackknife(folder: Path, params: dict[str, Any]) -> list[tuple[str, float, Any]]:
    """Leave each universe firm out (its firm-years and its forced departures), refit, compare."""
    cells = read_csv(folder, "cells.csv").astype("int64")
    years = cells["year"].to_numpy()
    position = {int(y): i for i, y in enumerate(years)}
    t = years.astype(float) - float(params["centre"])
    X = np.column_stack([np.ones_like(t), t])
    universe = read_csv(folder, "universe.csv").astype({"year": "int64"})
    universe = universe.loc[universe["year"].isin(years)]
    own: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for firm, year in universe.itertuples(index=False):
        pair = own.setdefault(str(firm), (np.zeros(years.size), np.zeros(years.size)))
        pair[1][position[int(year)]] += 1
    for firm, year, forced in read_csv(folder, "firm_cells.csv").itertuples(index=False):
        own[str(firm)][0][position[int(year)]] += int(forced)
    events, exposure = cells["forced"].to_numpy(dtype=float), cells["firm_years"].to_numpy(dtype=float)
    jackknife = read_csv(folder, "jackknife.csv")
    memo: dict[bytes, float] = {}
    worst = 0.0
    for unit, reported in zip(jackknife["unit_id"], floats(jackknife["log_odds_ratio"]), strict=True):
        f, e = events - own[str(unit)][0], exposure - own[str(unit)][1]
        k = f.tobytes() + e.tobytes()
        if k not in memo:
            memo[k] = float(poisson(f, e, X, at_estimate=True).params[1])
        worst = max(worst, abs(memo[k] - reported)) if math.isfinite(reported) else math.inf
    return [("jackknife: largest difference over all units", worst, 0.0)]


# ---------------------------------------------------------------- the adjusted trend (departure-level logit)


def adjusted_design(cells: pd.DataFrame, params: dict[str, Any]) -> np.ndarray:
    """Intercept, year (from the first year), treatment dummies of each adjustment (its first level present,
    in band order or sector name order, is the base)."""
    columns = [np.ones(len(cells)), (cells["year"] - cells["year"].min()).to_numpy(dtype=float)]
    order = {"age": ("age_band", params["age_bands"]), "tenure": ("tenure_band", params["tenure_bands"]),
             "sector": ("sector", None)}
    for name in params["adjust"]:
        column, levels = order[name]
        present = [lv for lv in (levels or sorted(cells[column].unique())) if (cells[column] == lv).any()]
        columns += [(cells[column] == lv).to_numpy(dtype=float) for lv in present[1:]]
    return np.column_stack(columns)


def adjusted_refit(folder: Path, params: dict[str, Any], results: dict[str, Any]) -> list[tuple[str, float, Any]]:
    """The adjusted fit (statsmodels' binomial GLM on the cells, with its default settings, as Helmshift fits it)
    and its firm-clustered covariance from the firm x cell counts (sum over a firm's cells of x (f - n mu),
    corrected by G/(G-1) (N-1)/(N-K), statsmodels' default); or the bootstrapped statistic."""
    cells = counts(read_csv(folder, "cells.csv"))
    X = adjusted_design(cells, params)
    forced, voluntary = cells["forced"].to_numpy(dtype=float), cells["voluntary"].to_numpy(dtype=float)
    if params["kind"] == "bootstrap":
        fit, _ = _fit(forced, forced + voluntary, X)
        label = results.get("label", "adjusted odds ratio per year")
        b = float(fit.params[1])
        return [(f"{label}: estimate (log scale)", b, results["log_odds_ratio"]),
                (f"{label}: estimate", math.exp(b), results["odds_ratio"]),
                (f"{label}: standard error", float(fit.bse[1]), results["estimate_se"])]
    beta = np.asarray(sm.GLM(np.column_stack([forced, voluntary]), X, family=sm.families.Binomial()).fit().params)
    n = forced + voluntary
    mu = 1.0 / (1.0 + np.exp(-(X @ beta)))
    bread = np.linalg.inv(X.T @ (X * (n * mu * (1 - mu))[:, None]))
    firms = counts(read_csv(folder, "firm_cells.csv"))
    index = {k: i for i, k in enumerate(cells[["year", "age_band", "tenure_band", "sector"]].itertuples(index=False))}
    cell = np.array([index[k] for k in firms[["year", "age_band", "tenure_band", "sector"]].itertuples(index=False)])
    residual = (firms["forced"].to_numpy(dtype=float) - (firms["forced"] + firms["voluntary"]).to_numpy(dtype=float)
                * mu[cell])[:, None] * X[cell]
    scores = pd.DataFrame(residual).groupby(firms["firm_id"].to_numpy()).sum().to_numpy()
    groups, nobs, k = scores.shape[0], float(n.sum()), X.shape[1]
    cov = groups / (groups - 1) * (nobs - 1) / (nobs - k) * bread @ (scores.T @ scores) @ bread
    se = np.sqrt(np.diag(cov))
    z = float(stats.norm.ppf(0.975))
    out: list[tuple[str, float, Any]] = [
        ("adjusted log odds ratio per year", float(beta[1]), results["coef"]),
        ("adjusted odds ratio per year", math.exp(beta[1]), results["odds_ratio"]),
        ("firm-clustered standard error", float(se[1]), results["cluster_se"]),
        ("firm-clustered low", math.exp(beta[1] - z * se[1]), results["conf_int"]["cluster"][0]),
        ("firm-clustered high", math.exp(beta[1] + z * se[1]), results["conf_int"]["cluster"][1]),
        ("departures", nobs, results["departures"]), ("firms", float(groups), results["firms"])]
    for j, row in enumerate(results["coefficients"]):
        out += [(f"{row['term']}: log odds", float(beta[j]), row["log_odds"]),
                (f"{row['term']}: clustered SE", float(se[j]), row["cluster_se"])]
    return out


def logit_newton(forced: np.ndarray, totals: np.ndarray, X: np.ndarray, start: np.ndarray) -> float:
    """The year coefficient of the grouped logit by Newton's method from ``start`` (the full fit, which a data
    set missing one firm is close to), to machine precision: the same maximum likelihood estimate statsmodels
    finds, without its per-fit overhead (hundreds of leave-one-firm-out refits); statsmodels where a column lost
    all its departures (then fitted without it)."""
    beta = start.copy()
    for _ in range(100):
        mu = special.expit(X @ beta)
        hessian = X.T @ (X * (totals * mu * (1 - mu))[:, None])
        try:
            step = np.linalg.solve(hessian, X.T @ (forced - totals * mu))
        except np.linalg.LinAlgError:
            fit, j = _fit(forced, totals, X, 1)
            return float(fit.params[j])
        beta += step
        if np.max(np.abs(step)) < 1e-14 * max(1.0, float(np.max(np.abs(beta)))):
            break
    return float(beta[1])


def adjusted_jackknife(folder: Path, params: dict[str, Any]) -> list[tuple[str, float, Any]]:
    """Leave each firm (or departure) out of the adjusted cells, refit, compare with jackknife.csv."""
    cells = counts(read_csv(folder, "cells.csv"))
    X = adjusted_design(cells, params)
    forced, voluntary = cells["forced"].to_numpy(dtype=float), cells["voluntary"].to_numpy(dtype=float)
    keys = ["year", "age_band", "tenure_band", "sector"]
    position: dict[tuple[Any, ...], int] = {tuple(k): i for i, k in enumerate(cells[keys].itertuples(index=False))}
    jackknife = read_csv(folder, "jackknife.csv")
    if params["unit"] == "firm":
        left: dict[str, tuple[np.ndarray, np.ndarray]] = {}
        for row in counts(read_csv(folder, "firm_cells.csv")).itertuples(index=False):
            f, v = left.setdefault(str(row.firm_id), (forced.copy(), voluntary.copy()))
            c = position[(row.year, row.age_band, row.tenure_band, row.sector)]
            f[c] -= row.forced
            v[c] -= row.voluntary
        cases = [left[str(u)] for u in jackknife["unit_id"]]
    else:
        cases = []
        for row in jackknife.astype({"year": "int64"}).itertuples(index=False):
            f, v = forced.copy(), voluntary.copy()
            (f if row.category == "forced" else v)[position[(row.year, row.age_band, row.tenure_band, row.sector)]] -= 1
            cases.append((f, v))
    full = np.asarray(glm(forced, forced + voluntary, X).params)
    memo: dict[bytes, float] = {}
    worst = 0.0
    for (f, v), reported in zip(cases, floats(jackknife["log_odds_ratio"]), strict=True):
        k = f.tobytes() + v.tobytes()
        if k not in memo:
            memo[k] = logit_newton(f, f + v, X, full)
        worst = max(worst, abs(memo[k] - reported)) if math.isfinite(reported) else math.inf
    return [("jackknife: largest difference over all units", worst, 0.0)]


# ---------------------------------------------------------------- the bootstrapped statistic


def statistic_groups(cells: pd.DataFrame, params: dict[str, Any]) -> pd.DataFrame:
    """The groups the statistic is computed on: sector-years (sorted) for sector statistics, else years."""
    if sector_level(params):
        return model_groups(cells, "sector", "bootstrap")
    return model_groups(cells, "linear", "bootstrap").assign(sector="")


def sector_level(params: dict[str, Any]) -> bool:
    return params["model"] == "sector" or params.get("statistic") in ("sector_slope", "heterogeneity")


def _fit(forced: np.ndarray, totals: np.ndarray, X: np.ndarray, j: int | None = None) -> tuple[Any, int | None]:
    """The GLM on groups with departures and columns with departures under them (where j lands after that)."""
    rows = totals > 0
    kept = [c for c in range(X.shape[1]) if np.abs(X[rows, c]).sum() > 0]
    fit = glm(forced[rows], totals[rows], X[rows][:, kept])
    return fit, None if j is None else kept.index(j)


def statistic_value(forced: np.ndarray, voluntary: np.ndarray, groups: pd.DataFrame, params: dict[str, Any]
                    ) -> tuple[float, float]:
    """(value, its standard error or NaN) of the run's statistic on these counts over ``groups``."""
    name, centre = params.get("statistic", "slope"), float(params["centre"])
    totals = forced + voluntary
    years = groups["year"].to_numpy(dtype=float)
    sector = groups["sector"].to_numpy()
    if name in ("slope", "decade_odds_ratio", "sector_slope"):
        per = 10.0 if name == "decade_odds_ratio" else 1.0
        if name == "sector_slope":
            inside = sector == params["sector"]
            forced, totals, years = forced[inside], totals[inside], years[inside]
            X, j = np.column_stack([np.ones_like(years), years - centre]), 1
        else:
            X, j = design(groups, params["model"], centre)
        fit, k = _fit(forced, totals, X, j)
        return per * float(fit.params[k]), per * float(fit.bse[k])
    if name == "period_difference":
        (a, b), (c, d) = params["periods"]
        f = [forced[(years >= lo) & (years <= hi)].sum() for lo, hi in ((a, b), (c, d))]
        t = [totals[(years >= lo) & (years <= hi)].sum() for lo, hi in ((a, b), (c, d))]
        p = [f[0] / t[0], f[1] / t[1]]
        return p[1] - p[0], math.sqrt(p[0] * (1 - p[0]) / t[0] + p[1] * (1 - p[1]) / t[1])
    if name == "heterogeneity":
        inside = np.isin(sector, params["sectors"])
        part = groups.loc[inside]
        small, j = design(part, "sector", centre)
        big = np.column_stack([small[:, :j], small[:, :j] * small[:, [j]]])
        forced, totals = forced[inside], totals[inside]
    else:  # spline_bend: knots from the years of the original groups
        small = np.column_stack([np.ones_like(years), years - centre])
        big = np.column_stack([np.ones_like(years), natural_spline(years, int(params["spline_df"]))])
    return max(float(_fit(forced, totals, small)[0].deviance - _fit(forced, totals, big)[0].deviance), 0.0), math.nan


def statistic_checks(cells: pd.DataFrame, params: dict[str, Any], results: dict[str, Any]
                     ) -> list[tuple[str, float, Any]]:
    groups = statistic_groups(cells, params)
    value, se = statistic_value(groups["forced"].to_numpy(dtype=float), groups["voluntary"].to_numpy(dtype=float),
                                groups, params)
    label = results.get("label", "odds ratio per year")
    logged = results.get("scale", "log") == "log"
    out: list[tuple[str, float, Any]] = [
        (f"{label}: estimate{' (log scale)' if logged else ''}", value, results["log_odds_ratio"])]
    if logged:
        out.append((f"{label}: estimate", math.exp(value), results["odds_ratio"]))
    if "estimate_se" in results:
        out.append((f"{label}: standard error", se, results["estimate_se"]))
    return out


# ---------------------------------------------------------------- intervals from the replicates


def quantiles(ordered: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Linear-interpolation quantiles of sorted rows (numpy's default, Hyndman & Fan type 7)."""
    n = ordered.shape[-1]
    h = np.clip(q, 0.0, 1.0) * (n - 1)
    lo = np.floor(h).astype(np.int64)
    hi = np.minimum(lo + 1, n - 1)
    below, above = np.take_along_axis(ordered, lo, axis=-1), np.take_along_axis(ordered, hi, axis=-1)
    return below + (h - lo) * (above - below)


def acceleration(values: np.ndarray) -> float:
    """BCa acceleration from leave-one-out values (Efron & Tibshirani 1993, eq. 14.15)."""
    if not np.all(np.isfinite(values)):
        return math.nan
    w = np.ones_like(values)
    n = float(w.sum())
    u = (n - 1.0) * (np.dot(w, values) / n - values)
    num, den = float(np.dot(w, u**3)) / n**3, float(np.dot(w, u**2)) / n**2
    return num / (6.0 * den**1.5) if den else math.nan


def bounds(ordered: np.ndarray, estimate: float, alpha: float, accel: float) -> dict[str, np.ndarray]:
    """Percentile, basic and BCa bounds (log scale) for each row of sorted replicates."""
    rows, b = ordered.shape
    levels = np.tile([alpha / 2, 1 - alpha / 2], (rows, 1))
    pct = quantiles(ordered, levels)
    # bias correction: share of replicates below the estimate, ties counting half
    below = (ordered < estimate).sum(axis=1) + (ordered <= estimate).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        z0 = special.ndtri(below / (2.0 * b))
        shifted = z0[:, None] + special.ndtri(levels)
        adjusted = special.ndtr(z0[:, None] + shifted / (1 - accel * shifted))
    bca = quantiles(ordered, np.nan_to_num(adjusted, nan=0.0))
    bca[~np.isfinite(adjusted).all(axis=1)] = np.nan
    # normal (Davison & Hinkley 1997, eq. 5.5): estimate - bias -/+ z sd
    centre = 2 * estimate - ordered.mean(axis=1)
    half = special.ndtri(1 - alpha / 2) * np.std(ordered, axis=1, ddof=1)
    return {"percentile": pct, "basic": 2 * estimate - pct[:, ::-1], "bca": bca,
            "normal": np.column_stack([centre - half, centre + half]), "z0": z0[:, None]}


def studentized(t_sorted: np.ndarray | None, estimate: float, se: float, alpha: float, rows: int) -> np.ndarray:
    """Bootstrap-t bounds (Efron & Tibshirani 1993, ch. 12.5): estimate - se * quantiles of t*, swapped."""
    if t_sorted is None or not math.isfinite(se):
        return np.full((rows, 2), np.nan)
    q = quantiles(t_sorted, np.tile([alpha / 2, 1 - alpha / 2], (t_sorted.shape[0], 1)))
    return estimate - se * q[:, ::-1]


def bootstrap_numbers(folder: Path, params: dict[str, Any], results: dict[str, Any]
                      ) -> list[tuple[str, float, Any]]:
    logged = results.get("scale", "log") == "log"
    column = "log_odds_ratio" if logged else "estimate"
    table = read_csv(folder, "replicates.csv")
    theta = floats(table[column])
    kept = np.isfinite(theta)
    order = np.argsort(theta[kept], kind="stable")  # sorted replicates, each with its standard error
    finite = theta[kept][order]
    jackknife = floats(read_csv(folder, "jackknife.csv")[column])
    estimate, alpha = float(results["log_odds_ratio"]), float(results["alpha"])
    se0 = math.nan if results.get("estimate_se") is None else float(results["estimate_se"])
    t_values = None
    if "standard_error" in table:
        with np.errstate(divide="ignore", invalid="ignore"):
            t_values = (finite - estimate) / floats(table["standard_error"])[kept][order]
        t_values = t_values if np.isfinite(t_values).all() else None
    accel = acceleration(jackknife)
    found = bounds(finite[None, :], estimate, alpha, accel)
    found["studentized"] = studentized(None if t_values is None else np.sort(t_values)[None, :], estimate, se0,
                                       alpha, 1)
    out: list[tuple[str, float, Any]] = [
        ("resamples", float(theta.size), results["resamples"]),
        ("failed resamples", float(theta.size - finite.size), results["failed"]),
        ("acceleration a", accel, results["acceleration"]), ("bias correction z0", float(found["z0"][0, 0]),
                                                             results["bias"]),
        ("bootstrap standard error (log scale)", float(np.std(finite, ddof=1)), results["standard_error"]),
    ]
    # Monte Carlo error: SD of each bound over re-resamples of the replicates, drawn as Helmshift draws them
    rng = np.random.default_rng(int(params["seed"]))
    total, per_pass = int(params["mc_resamples"]), max(1, int(params["mc_pass_elements"]) // finite.size)
    methods = [m for m in ("percentile", "basic", "bca", "normal", "studentized") if m in results["conf_int"]]
    again: dict[str, list[np.ndarray]] = {m: [] for m in ("percentile", "basic", "bca", "normal", "studentized")}
    for lo in range(0, total, per_pass):
        rows = min(per_pass, total - lo)
        picked = rng.integers(0, finite.size, size=(rows, finite.size))
        redrawn = np.sort(finite[picked], axis=1)
        for method, value in bounds(redrawn, estimate, alpha, accel).items():
            if method != "z0":
                again[method].append(value)
        t_again = None if t_values is None else np.sort(t_values[picked], axis=1)
        again["studentized"].append(studentized(t_again, estimate, se0, alpha, rows))
    for method in methods:
        stacked = np.concatenate(again[method])
        sd = np.std(stacked, axis=0, ddof=1) if np.isfinite(stacked).all() else np.full(2, np.nan)
        for end, name in enumerate(("low", "high")):
            # numpy's exp, as Helmshift's (math.exp may differ by 1 ulp)
            shown = float(np.exp(found[method][0, end])) if logged else float(found[method][0, end])
            out.append((f"{method} {name}", shown, results["conf_int"][method][end]))
            out.append((f"{method} {name}: Monte Carlo error", (shown if logged else 1.0) * float(sd[end]),
                        results["mc_error"][method][end]))
    return out


def jackknife_check(folder: Path, params: dict[str, Any]) -> list[tuple[str, float, Any]]:
    """Refit each leave-one-unit-out data set and compare with jackknife.csv (largest difference)."""
    cells = counts(read_csv(folder, "cells.csv"))
    groups = statistic_groups(cells, params)
    forced = groups["forced"].to_numpy(dtype=float)
    voluntary = groups["voluntary"].to_numpy(dtype=float)
    key = list(zip(groups["sector"], groups["year"], strict=True))
    position = {k: i for i, k in enumerate(key)}
    jackknife = read_csv(folder, "jackknife.csv")
    if params["unit"] == "firm":
        firms = counts(read_csv(folder, "firm_cells.csv"))
        if not sector_level(params):
            firms["sector"] = ""
        firms = firms.groupby(["firm_id", "sector", "year"], sort=False)[["forced", "voluntary"]].sum()
        left: dict[str, tuple[np.ndarray, np.ndarray]] = {}
        for firm, sector, year, n_forced, n_voluntary in firms.reset_index().itertuples(index=False):
            f, v = left.setdefault(str(firm), (forced.copy(), voluntary.copy()))
            f[position[(sector, year)]] -= n_forced
            v[position[(sector, year)]] -= n_voluntary
        cases = [left[str(u)] for u in jackknife["unit_id"]]
    else:
        cases = []
        for _, row in jackknife.iterrows():
            f, v = forced.copy(), voluntary.copy()
            sector = row["sector"] if sector_level(params) else ""
            (f if row["category"] == "forced" else v)[position[(sector, int(row["year"]))]] -= 1
            cases.append((f, v))
    memo: dict[bytes, float] = {}
    worst = 0.0
    column = "log_odds_ratio" if params.get("scale", "log") == "log" else "estimate"
    for (f, v), reported in zip(cases, floats(jackknife[column]), strict=True):
        k = f.tobytes() + v.tobytes()
        if k not in memo:
            # a group (or a whole sector) the left-out unit emptied says nothing: fitted without it
            memo[k] = statistic_value(f, v, groups, params)[0]
        worst = max(worst, abs(memo[k] - reported)) if math.isfinite(reported) else math.inf
    return [("jackknife: largest difference over all units", worst, 0.0)]


# ---------------------------------------------------------------- report


def compare(checks: list[tuple[str, float, Any]]) -> list[dict[str, Any]]:
    rows = []
    for name, mine, theirs in checks:
        reported = math.nan if theirs is None else float(theirs)
        difference = 0.0 if math.isnan(mine) and math.isnan(reported) else abs(mine - reported)
        ok = difference <= TOLERANCE * max(1.0, abs(reported)) if math.isfinite(difference) else mine == reported
        rows.append({"name": name, "recomputed": None if math.isnan(mine) else mine,
                     "reported": None if math.isnan(reported) else reported,
                     "difference": difference if math.isfinite(difference) else None, "ok": bool(ok)})
    return rows


def main(argv: list[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    as_json = "--json" in args
    folders = [a for a in args if a != "--json"]
    folder = Path(folders[0]) if folders else Path(__file__).resolve().parent
    params = json.loads((folder / "params.json").read_text(encoding="utf-8"))
    results = json.loads((folder / "results.json").read_text(encoding="utf-8"))
    checks = refit(folder, params, results)
    if params["kind"] == "bootstrap":
        jackknife = {"rate": rate_jackknife, "adjusted": adjusted_jackknife}.get(params.get("measure", ""),
                                                                                 jackknife_check)
        checks += bootstrap_numbers(folder, params, results) + jackknife(folder, params)
    rows = compare(checks)
    if as_json:
        print(json.dumps({"run": params["run"], "checks": rows, "ok": all(r["ok"] for r in rows)}))
    else:
        what = f"statistic {params['statistic']}" if params["kind"] == "bootstrap" else f"model {params['model']}"
        print(f"Run {params['run']} ({params['kind']}, {what}): recomputed vs results.json")
        for r in rows:
            mine = "n/a" if r["recomputed"] is None else f"{r['recomputed']:.12g}"
            theirs = "n/a" if r["reported"] is None else f"{r['reported']:.12g}"
            gap = "n/a" if r["difference"] is None else f"{r['difference']:.1e}"
            print(f"  {r['name']:<44} {mine:>20} {theirs:>20}  diff {gap}{'' if r['ok'] else '  DIFFERS'}")
        print("All numbers agree to 1e-9." if all(r["ok"] for r in rows) else "Some numbers differ (marked).")
    return 0 if rows and all(r["ok"] for r in rows) else 1


if __name__ == "__main__":
    raise SystemExit(main())
