"""The trend model: logit P(forced | departure in year t) = b0 + b1 (t - centre), on grouped counts.

The headline is the odds ratio per year exp(b1), with Wald and profile-likelihood intervals. Options:
one intercept per sector with a common slope (``"sector"``), and a natural cubic spline in year
(``"spline"``) whose only role is to test for curvature against the straight trend; the straight
trend's odds ratio stays the headline. Its plain-language sentence and JSON form live in
:mod:`app.stats.trend_report`.

The straight and spline trends are computed by :mod:`app.stats.trend_line` (plain Python, the engine the
first ``helmshift fit`` prints without importing numpy); the statsmodels code below fits the sector model
and whatever ``trend_line`` declines (separation, no convergence). statsmodels and scipy.stats are imported
lazily (inside the functions): together they cost about two seconds to import.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Literal, get_args

import numpy as np
import pandas as pd

from app.stats.cells import Cells
from app.stats.design import design_matrix, window_centre
from app.stats.profile import GroupedFit, ProfileResult, fit_grouped_binomial, profile_interval
from app.stats.proportions import share_intervals
from app.stats.spline import SPLINE_DFS, natural_spline_basis
from app.stats.trend_line import LineTrend, fit_line, quasi_message
from app.types import check_choice

TrendKind = Literal["linear", "sector", "spline"]
TREND_KINDS: tuple[TrendKind, ...] = get_args(TrendKind)

#: Quasi-binomial rule: refit when Pearson X^2/df exceeds this AND there are at least QUASI_MIN_DF
#: residual df. 1.5 leaves room for chance (X^2/df has SD about sqrt(2/df), ~0.45 at df 10) while
#: catching the overdispersion that clustered departures (one firm, many years) typically produce;
#: with fewer than 5 df the dispersion estimate itself is too noisy to act on.
QUASI_DISPERSION = 1.5
QUASI_MIN_DF = 5
#: years with fewer counted departures than this get a note that their share is imprecise
THIN_YEAR = 10

__all__ = ["TREND_KINDS", "Curvature", "Interval", "QuasiTrend", "TrendError", "TrendFit", "TrendKind",
           "fit_trend", "natural_spline_basis"]


class TrendError(ValueError):
    """The data cannot support a trend fit (no forced departures, too few years, ...)."""


Interval = tuple[float, float]


@dataclass(frozen=True)
class QuasiTrend:
    """Quasi-binomial version of the slope's intervals, used when dispersion is well above 1.

    Wald intervals use the binomial SE times sqrt(dispersion); profile intervals divide the
    deviance difference by the dispersion before comparing it with chi2_{1, 1-alpha}. Normal
    quantiles are used for the Wald interval (as R's ``confint.default`` does).
    """

    dispersion: float
    se: float
    conf_int: dict[str, Interval]
    decade_conf_int: dict[str, Interval]
    message: str


@dataclass(frozen=True)
class Curvature:
    """Likelihood-ratio test of a natural cubic spline in year against the straight trend.

    ``statistic`` = deviance(straight) - deviance(spline) on ``df`` = spline_df - 1 degrees of
    freedom; ``p`` from the chi-squared distribution (binomial variation assumed).
    """

    spline_df: int
    knots: tuple[float, ...]
    deviance: float
    statistic: float
    df: int
    p: float


@dataclass(frozen=True)
class TrendFit:
    """Result of :func:`fit_trend`.

    Odds ratios and their intervals are on the odds-ratio scale; ``coefficients`` and ``log_or``
    on the logit scale. When ``separated`` is true the slope is infinite: ``log_or`` is NaN and
    ``odds_ratio``, ``decade_odds_ratio`` and every interval are None. A profile end the data
    cannot bound is 0 or inf (with a message). ``llf`` follows statsmodels' convention: it includes
    the log binomial coefficient log C(n, forced) (Dobson & Barnett print it without that term).
    ``fitted`` holds, per year, the fitted share with a delta-method band (on the logit scale, then
    transformed back), widened by sqrt(dispersion) when ``quasi`` is set. For ``"sector"`` it is
    evaluated at the departure-weighted average of the sector intercepts (one curve for the
    window, comparable with ``observed``); for ``"spline"`` it is the spline curve, while the
    coefficients and odds ratios are those of the straight trend. ``departures`` and ``forced``
    count what the model used (for ``"sector"``, sectors with only forced or only voluntary
    departures are left out, with a message).
    """

    model: TrendKind
    window: tuple[int, int]
    centre: float
    alpha: float
    n_groups: int
    n_years: int
    departures: int
    forced: int
    coefficients: pd.DataFrame
    covariance: pd.DataFrame
    log_or: float
    se: float
    odds_ratio: float | None
    conf_int: dict[str, Interval | None]
    decade_odds_ratio: float | None
    decade_conf_int: dict[str, Interval | None]
    deviance: float
    pearson_chi2: float
    df_resid: int
    dispersion: float
    llf: float
    converged: bool
    separated: bool
    quasi: QuasiTrend | None
    curvature: Curvature | None
    observed: pd.DataFrame
    fitted: pd.DataFrame
    messages: tuple[str, ...]
    #: the profile-likelihood intervals on the logit scale ("binomial", and "quasi" when given), so a stored
    #: fit can hand them to the next ``fit_trend`` of the same counts (``profiles``); not part of the JSON
    profiles: dict[str, ProfileResult] = field(default_factory=dict, repr=False, compare=False,
                                               metadata={"json_skip": True})


def _year_groups(groups: pd.DataFrame) -> pd.DataFrame:
    summed = groups.groupby("year", sort=True)[["forced", "voluntary"]].sum().reset_index()
    summed["sector"] = ""
    return summed[["year", "sector", "forced", "voluntary"]]


def _drop_one_sided_sectors(groups: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """Leave out sectors whose departures are all forced or all voluntary.

    Such a sector's intercept runs off to -/+ infinity and its likelihood contribution tends to 1
    whatever the slope, so dropping it leaves the slope's MLE and profile unchanged while keeping
    the separation check from condemning the whole fit.
    """
    sums = groups.groupby("sector", sort=True)[["forced", "voluntary"]].sum()
    one_sided = sums.index[(sums["forced"] == 0) | (sums["voluntary"] == 0)].tolist()
    if not one_sided or len(one_sided) == len(sums):
        return groups, []
    notes = [f"Sector {name} has only {'voluntary' if sums.loc[name, 'forced'] == 0 else 'forced'} "
             "departures in the window; it says nothing about the trend and is left out of the sector "
             "model." for name in one_sided]
    return groups.loc[~groups["sector"].isin(one_sided)].reset_index(drop=True), notes


def _check_data(groups: pd.DataFrame, window: tuple[int, int]) -> None:
    span = f"{window[0]}\u2013{window[1]}"
    if int(groups["forced"].sum()) == 0:
        raise TrendError(f"There are no forced departures in {span}, so there is no trend in the "
                         "forced share to estimate.")
    if int(groups["voluntary"].sum()) == 0:
        raise TrendError(f"Every counted departure in {span} is forced, so there is no trend in the "
                         "forced share to estimate.")
    years = groups["year"].nunique()
    if years < 3:
        raise TrendError(f"A trend needs departures in at least 3 different years; {span} has "
                         f"{years}.")


def _band(rows: np.ndarray, params: np.ndarray, cov: np.ndarray, z: float) -> pd.DataFrame:
    eta = rows @ params
    se = np.sqrt(np.einsum("ij,jk,ik->i", rows, cov, rows))

    def expit(v: np.ndarray) -> np.ndarray:
        return 0.5 * (1.0 + np.tanh(0.5 * v))

    return pd.DataFrame({"fit": expit(eta), "low": expit(eta - z * se), "high": expit(eta + z * se)})


def _or_interval(bounds: tuple[float, float], per: float = 1.0) -> Interval:
    return (math.exp(per * bounds[0]), math.exp(per * bounds[1]))


def _profile_note(result: ProfileResult) -> list[str]:
    return [result.message] if result.message else []


def _curvature(forced: np.ndarray, totals: np.ndarray, years: np.ndarray, df: int,
               straight: GroupedFit) -> tuple[Curvature | None, GroupedFit | None, np.ndarray | None,
                                               list[str]]:
    from scipy import stats  # lazy: scipy.stats costs ~0.6 s to import, kept off start-up

    if len(np.unique(years)) < df + 2:
        return None, None, None, [f"Too few years for a spline with {df} df; curvature was not tested."]
    basis, knots = natural_spline_basis(years, df)
    X = np.column_stack([np.ones(len(years)), basis])
    spline = fit_grouped_binomial(forced, totals, X)
    if spline.separated or not spline.converged:
        return None, None, None, ["The spline fit failed (" + " ".join(spline.messages) + "); curvature "
                                  "was not tested."]
    statistic = max(straight.deviance - spline.deviance, 0.0)
    test = Curvature(spline_df=df, knots=knots, deviance=spline.deviance, statistic=statistic,
                     df=df - 1, p=float(stats.chi2.sf(statistic, df - 1)))
    return test, spline, X, []


def fit_trend(cells: Cells, model: TrendKind = "linear", *, spline_df: int = 3,
              alpha: float = 0.05, quasi: bool = False,
              profiles: Mapping[str, ProfileResult] | None = None) -> TrendFit:
    """Fit the logistic trend in the forced share over the window of ``cells``.

    Parameters
    ----------
    cells : Cells
        Grouped counts. For ``"linear"`` and ``"spline"`` sector-years are summed to years first
        (same estimates, per-year deviance and dispersion); ``"sector"`` needs ``by_sector`` cells.
    model : {"linear", "sector", "spline"}
        ``linear``: logit p = b0 + b1 (year - centre), centre = window midpoint.
        ``sector``: one intercept per sector plus the common slope b1.
        ``spline``: the linear fit plus a natural cubic spline in year with ``spline_df`` df,
        compared with it by a likelihood-ratio test (``curvature``).
    spline_df : {2, 3, 4, 5, 6}
    alpha : float
        1 - confidence level of every interval.
    quasi : bool
        Give the quasi-binomial intervals whatever the dispersion (they are given anyway when the
        dispersion exceeds ``QUASI_DISPERSION`` with at least ``QUASI_MIN_DF`` residual df).
    profiles : mapping, optional
        ``TrendFit.profiles`` of an earlier fit of exactly these counts, window and options (a stored
        fit): used instead of searching for the profile-likelihood ends again, the slowest part of a fit.

    Returns
    -------
    TrendFit

    Raises
    ------
    TrendError
        No forced (or no voluntary) departures in the window, or fewer than 3 distinct years.
    """
    from scipy import stats  # lazy: scipy.stats costs ~0.6 s to import, kept off start-up

    check_choice(model, TREND_KINDS, "model")
    if spline_df not in SPLINE_DFS:
        raise ValueError(f"spline_df must be one of {', '.join(map(str, SPLINE_DFS))}; got {spline_df!r}.")
    if not 0.0 < alpha < 1.0:
        raise ValueError("alpha must lie strictly between 0 and 1.")
    if model == "sector" and not cells.by_sector:
        raise ValueError("The sector model needs cells built with by_sector=True.")
    groups = cells.groups if model == "sector" else _year_groups(cells.groups)
    if groups.empty:
        raise TrendError(f"There are no forced or voluntary departures in {cells.window[0]}-"
                         f"{cells.window[1]}.")
    _check_data(groups, cells.window)
    if model != "sector":  # the engine's own plain-Python fit; statsmodels below only where it declines
        line = _plain_line(groups, cells.window, model, spline_df, alpha, quasi, profiles)
        if line is not None:
            return _from_line(line, cells.window)
    messages: list[str] = []
    if model == "sector":
        groups, messages = _drop_one_sided_sectors(groups)
        _check_data(groups, cells.window)
    centre = window_centre(cells.window)
    design = design_matrix(groups, "sector" if model == "sector" else "linear", centre)
    forced = groups["forced"].to_numpy(dtype=float)
    totals = forced + groups["voluntary"].to_numpy(dtype=float)
    fit = fit_grouped_binomial(forced, totals, design.matrix)
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    messages += fit.messages
    j = design.slope
    b, se = float(fit.params[j]), float(fit.bse[j])
    usable = not fit.separated and math.isfinite(b) and math.isfinite(se)

    conf: dict[str, Interval | None] = {"wald": None, "profile": None}
    used: dict[str, ProfileResult] = {}
    decade: dict[str, Interval | None] = {"wald": None, "profile": None}
    refit: QuasiTrend | None = None
    dispersion = fit.dispersion
    if usable:
        wald = (b - z * se, b + z * se)
        known = dict(profiles or {})
        prof = known.get("binomial") or profile_interval(forced, totals, design.matrix, j, alpha)
        used = {"binomial": prof}
        messages += _profile_note(prof)
        conf = {"wald": _or_interval(wald), "profile": _or_interval((prof.low, prof.high))}
        decade = {"wald": _or_interval(wald, 10.0), "profile": _or_interval((prof.low, prof.high), 10.0)}
        over = dispersion > QUASI_DISPERSION and fit.df_resid >= QUASI_MIN_DF
        if quasi and not (math.isfinite(dispersion) and dispersion > 0):
            messages.append("The quasi-binomial intervals need a positive dispersion estimate, which needs "
                            "at least one residual degree of freedom and some residual variation; none is given.")
        elif over or quasi:
            used["quasi"] = known.get("quasi") or profile_interval(forced, totals, design.matrix, j, alpha,
                                                                   dispersion=dispersion)
            refit = _quasi(used["quasi"], b, se, dispersion, alpha, z, asked=not over)
            messages.append(refit.message)
    else:
        messages.append("The trend cannot be estimated: the forced share is perfectly separated over "
                        "the years (or the fit failed), so no odds ratio is reported.")

    observed = groups.groupby("year", sort=True)[["forced", "voluntary"]].sum().reset_index()
    observed["total"] = observed["forced"] + observed["voluntary"]
    shares = share_intervals(observed["forced"], observed["total"], alpha)
    observed = pd.concat([observed, shares], axis=1)
    thin = observed.loc[observed["total"] < THIN_YEAR, "year"].tolist()
    if thin:
        messages.append(f"{len(thin)} year(s) have fewer than {THIN_YEAR} counted departures "
                        f"({', '.join(map(str, thin))}); their shares are imprecise.")

    years = observed["year"].to_numpy(dtype=float)
    t = years - centre
    if model == "sector":
        # One curve for the window: sector intercepts averaged with the departures' sector mix.
        weights = groups.groupby("sector", sort=True)[["forced", "voluntary"]].sum().sum(axis=1)
        mix = (weights / weights.sum()).to_numpy(dtype=float)
        rows = np.column_stack([np.tile(mix, (len(t), 1)), t])
    else:
        rows = np.column_stack([np.ones_like(t), t])
    params, cov = fit.params, fit.cov
    curvature = None
    if model == "spline":
        curvature, spline, spline_x, notes = _curvature(forced, totals, groups["year"].to_numpy(dtype=float),
                                                  spline_df, fit)
        messages += notes
        if spline is not None and spline_x is not None:
            rows = spline_x  # groups are the observed years here, in the same order
            params, cov = spline.params, spline.cov
            if refit is not None and refit.dispersion > QUASI_DISPERSION:
                messages.append("The curvature test assumes binomial variation; with the overdispersion "
                                "found here its p-value is too small.")
    band_cov = cov * (dispersion if refit is not None else 1.0)
    band = _band(rows, params, band_cov, z)
    if not usable:
        band[["low", "high"]] = np.nan
    fitted = pd.concat([observed[["year"]], band], axis=1)

    coefficients = pd.DataFrame({"name": design.names, "estimate": fit.params, "se": fit.bse})
    coefficients["z"] = coefficients["estimate"] / coefficients["se"]
    coefficients["p"] = 2.0 * stats.norm.sf(np.abs(coefficients["z"]))
    return TrendFit(
        model=model, window=cells.window, centre=centre, alpha=alpha, n_groups=len(groups),
        n_years=int(observed.shape[0]), departures=int(totals.sum()), forced=int(forced.sum()),
        coefficients=coefficients,
        covariance=pd.DataFrame(fit.cov, index=list(design.names), columns=list(design.names)),
        log_or=b if usable else math.nan, se=se if usable else math.nan,
        odds_ratio=math.exp(b) if usable else None, conf_int=conf,
        decade_odds_ratio=math.exp(10.0 * b) if usable else None, decade_conf_int=decade,
        deviance=fit.deviance, pearson_chi2=fit.pearson_chi2, df_resid=fit.df_resid,
        dispersion=dispersion, llf=fit.llf, converged=fit.converged, separated=fit.separated,
        quasi=refit, curvature=curvature, observed=observed, fitted=fitted,
        messages=tuple(dict.fromkeys(messages)), profiles=used,
    )


def _quasi(prof: ProfileResult, b: float, se: float, dispersion: float, alpha: float, z: float, *,
           asked: bool = False) -> QuasiTrend:
    """The quasi-binomial intervals from the profile with the deviance divided by the dispersion."""
    se_q = se * math.sqrt(dispersion)
    wald = (b - z * se_q, b + z * se_q)
    bounds = (prof.low, prof.high)
    message = quasi_message(dispersion, asked)
    return QuasiTrend(dispersion=dispersion, se=se_q,
                      conf_int={"wald": _or_interval(wald), "profile": _or_interval(bounds)},
                      decade_conf_int={"wald": _or_interval(wald, 10.0),
                                       "profile": _or_interval(bounds, 10.0)},
                      message=message)


def _plain_line(groups: pd.DataFrame, window: tuple[int, int], model: TrendKind, spline_df: int, alpha: float,
                quasi: bool, profiles: Mapping[str, ProfileResult] | None) -> LineTrend | None:
    """:func:`app.stats.trend_line.fit_line` of year groups; None where it declines or its search fails."""
    try:
        return fit_line(groups["year"].astype(int).tolist(), groups["forced"].astype(int).tolist(),
                        groups["voluntary"].astype(int).tolist(), window, model, spline_df=spline_df, alpha=alpha,
                        quasi=quasi, profiles={k: (p.low, p.high, p.message) for k, p in (profiles or {}).items()})
    except ArithmeticError:  # a root or quantile search that did not converge: the statsmodels path below
        return None


def _from_line(line: LineTrend, window: tuple[int, int]) -> TrendFit:
    """A ``TrendFit`` of the plain-Python straight or spline trend (:mod:`app.stats.trend_line`)."""
    fit, q, c = line.fit, line.quasi, line.curvature
    b = line.log_or
    quasi = None if q is None else QuasiTrend(q["dispersion"], q["se"], q["conf_int"], q["decade_conf_int"],
                                              q["message"])
    curvature = None if c is None else Curvature(c["spline_df"], tuple(c["knots"]), c["deviance"], c["statistic"],
                                                 c["df"], c["p"])
    observed = pd.DataFrame(line.observed)
    return TrendFit(
        model=line.model, window=window, centre=line.centre, alpha=line.alpha,  # type: ignore[arg-type]
        n_groups=len(line.observed), n_years=len(line.observed), departures=int(observed["total"].sum()),
        forced=int(observed["forced"].sum()), coefficients=pd.DataFrame(line.coefficients),
        covariance=pd.DataFrame(fit.cov, index=list(line.names), columns=list(line.names)),
        log_or=b, se=line.se, odds_ratio=math.exp(b), conf_int=dict(line.conf_int),
        decade_odds_ratio=math.exp(10.0 * b), decade_conf_int=dict(line.decade_conf_int), deviance=fit.deviance,
        pearson_chi2=fit.pearson_chi2, df_resid=fit.df_resid, dispersion=fit.dispersion, llf=fit.llf,
        converged=True, separated=False, quasi=quasi, curvature=curvature, observed=observed,
        fitted=pd.DataFrame(line.fitted), messages=line.messages,
        profiles={k: ProfileResult(*v) for k, v in line.profiles.items()},
    )
