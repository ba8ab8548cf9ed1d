"""The straight trend (and the spline bend test) on yearly counts in plain Python: what ``fit_trend`` computes
for the ``"linear"`` and ``"spline"`` models, without numpy, pandas, scipy or statsmodels.

:func:`app.stats.trend.fit_trend` builds its ``TrendFit`` from :func:`fit_line` for those two models, and the
first ``helmshift fit`` of new counts (``app.analysis.quick_fit``) prints :func:`line_payload` of the same
result, so both print the same numbers to the last digit (issue 13: the first fit under 0.5 s, where numpy,
pandas and statsmodels alone take seconds to import). The model, options and messages are those documented in
:mod:`app.stats.trend`. :func:`fit_line` returns None for anything unusual (separation, no convergence, a
failed spline fit, data ``fit_trend`` refuses), and the caller takes the statsmodels path, which says why.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from app.stats.plain_dist import chi2_sf, clopper_pearson, normal_quantile, normal_sf, wilson
from app.stats.plain_logit import Matrix, PlainFit, fit_logit, profile_ends
from app.stats.trend_words import headline_words, trend_words

__all__ = ["LineTrend", "fit_line", "line_payload", "spline_basis"]

#: as ``app.stats.trend`` (kept equal by tests/test_stats_plain.py)
QUASI_DISPERSION = 1.5
QUASI_MIN_DF = 5
SPLINE_DFS = (2, 3, 4, 5, 6)
THIN_YEAR = 10

Ends = tuple[float, float, str | None]  # a profile interval on the logit scale, and its note


@dataclass(frozen=True)
class LineTrend:
    """The numbers of a ``TrendFit`` for the straight or spline model, as plain values (same meanings)."""

    model: str
    window: tuple[int, int]
    centre: float
    alpha: float
    names: tuple[str, ...]
    fit: PlainFit
    z: float
    coefficients: list[dict[str, Any]]
    conf_int: dict[str, tuple[float, float]]
    decade_conf_int: dict[str, tuple[float, float]]
    quasi: dict[str, Any] | None
    curvature: dict[str, Any] | None
    observed: list[dict[str, Any]]
    fitted: list[dict[str, Any]]
    messages: tuple[str, ...]
    profiles: dict[str, Ends]

    @property
    def log_or(self) -> float:
        return self.fit.params[1]

    @property
    def se(self) -> float:
        return self.fit.bse[1]


def spline_basis(years: Sequence[float], df: int) -> tuple[Matrix, tuple[float, ...]]:
    """``app.stats.trend.natural_spline_basis`` in plain Python: knots at the 0, 1/df, ..., 1 quantiles of
    the distinct years (linear interpolation, numpy's default), the truncated-power basis of ESL eq. 5.4-5.5."""
    distinct = sorted(set(years))
    last = len(distinct) - 1

    def quantile(q: float) -> float:
        position = q * last
        i = min(int(position), last - 1)
        return distinct[i] + (distinct[i + 1] - distinct[i]) * (position - i)

    knots = tuple([float(distinct[0])] + [quantile(j / df) for j in range(1, df)] + [float(distinct[-1])])
    lo, span = knots[0], knots[-1] - knots[0]
    k = [(v - lo) / span for v in knots]

    def d(u: float, j: int) -> float:
        return (max(u - k[j], 0.0) ** 3 - max(u - k[-1], 0.0) ** 3) / (k[-1] - k[j])

    rows = []
    for year in years:
        u = (year - lo) / span
        rows.append([u] + [d(u, j) - d(u, len(k) - 2) for j in range(len(k) - 2)])
    return rows, knots


def _expit_band(v: float) -> float:
    return 0.5 * (1.0 + math.tanh(0.5 * v))  # as ``app.stats.trend._band``


def _band(rows: Matrix, params: Sequence[float], cov: Matrix, scale: float, z: float
          ) -> list[tuple[float, float, float]]:
    out = []
    for row in rows:
        eta = sum(p * x for p, x in zip(params, row, strict=True))
        var = sum(row[i] * cov[i][j] * scale * row[j] for i in range(len(row)) for j in range(len(row)))
        se = math.sqrt(var)
        out.append((_expit_band(eta), _expit_band(eta - z * se), _expit_band(eta + z * se)))
    return out


def _exp_pair(bounds: tuple[float, float], per: float = 1.0) -> tuple[float, float]:
    return (math.exp(per * bounds[0]), math.exp(per * bounds[1]))


def quasi_message(dispersion: float, asked: bool) -> str:
    """Why quasi-binomial intervals are given and how they are made (one wording for every trend model)."""
    how = ("Wald intervals scaled by sqrt(dispersion) and profile intervals with the deviance difference "
           "divided by the dispersion.")
    if asked:
        return (f"Quasi-binomial intervals are given as asked (Pearson dispersion {dispersion:.2f}, below "
                f"the {QUASI_DISPERSION} at which they are given anyway): {how}")
    return (f"The counts vary more than a binomial model allows (Pearson dispersion "
            f"{dispersion:.2f}), so quasi-binomial intervals are also given: {how}")


def _quasi(ends: Ends, b: float, se: float, dispersion: float, z: float, asked: bool) -> dict[str, Any]:
    """``app.stats.trend._quasi``: Wald scaled by sqrt(dispersion), profile with the deviance divided by it."""
    se_q = se * math.sqrt(dispersion)
    wald = (b - z * se_q, b + z * se_q)
    message = quasi_message(dispersion, asked)
    return {"dispersion": dispersion, "se": se_q,
            "conf_int": {"wald": _exp_pair(wald), "profile": _exp_pair(ends[:2])},
            "decade_conf_int": {"wald": _exp_pair(wald, 10.0), "profile": _exp_pair(ends[:2], 10.0)},
            "message": message}


def fit_line(years: Sequence[int], forced: Sequence[int], voluntary: Sequence[int], window: tuple[int, int],
             model: str = "linear", *, spline_df: int = 3, alpha: float = 0.05, quasi: bool = False,
             profiles: Mapping[str, Ends] | None = None) -> LineTrend | None:
    """The ``"linear"`` or ``"spline"`` trend of ``fit_trend`` over one row per year (years ascending, each
    with at least one counted departure), or None where ``fit_trend`` must answer (see the module)."""
    totals = [f + v for f, v in zip(forced, voluntary, strict=True)]
    if (model not in ("linear", "spline") or spline_df not in SPLINE_DFS or not 0.0 < alpha < 1.0 or not years
            or any(n <= 0 for n in totals) or sum(forced) == 0 or sum(voluntary) == 0 or len(set(years)) < 3
            or list(years) != sorted(set(years))):
        return None
    centre = (window[0] + window[1]) / 2.0
    X = [[1.0, year - centre] for year in years]
    f_, n_ = [float(f) for f in forced], [float(n) for n in totals]
    fit = fit_logit(f_, n_, X)
    if fit is None:
        return None
    z = normal_quantile(1.0 - alpha / 2.0)
    cut = z * z  # chi2 with 1 df at 1 - alpha: the square of the normal quantile at 1 - alpha / 2
    b, se = fit.params[1], fit.bse[1]
    known = dict(profiles or {})
    messages: list[str] = []
    prof = known.get("binomial") or profile_ends(f_, n_, X, 1, fit, cut)
    used = {"binomial": prof}
    messages += [prof[2]] if prof[2] else []
    wald = (b - z * se, b + z * se)
    conf = {"wald": _exp_pair(wald), "profile": _exp_pair(prof[:2])}
    decade = {"wald": _exp_pair(wald, 10.0), "profile": _exp_pair(prof[:2], 10.0)}
    dispersion = fit.dispersion
    refit = None
    over = dispersion > QUASI_DISPERSION and fit.df_resid >= QUASI_MIN_DF
    if quasi and not (math.isfinite(dispersion) and dispersion > 0):
        messages.append("The quasi-binomial intervals need a positive dispersion estimate, which needs "
                        "at least one residual degree of freedom and some residual variation; none is given.")
    elif over or quasi:
        used["quasi"] = known.get("quasi") or profile_ends(f_, n_, X, 1, fit, cut, dispersion)
        refit = _quasi(used["quasi"], b, se, dispersion, z, asked=not over)
        messages.append(refit["message"])

    observed = []
    for year, f, v, n in zip(years, forced, voluntary, totals, strict=True):
        (wl, wh), (cl, ch) = wilson(f, n, alpha), clopper_pearson(f, n, alpha)
        observed.append({"year": year, "forced": f, "voluntary": v, "total": n, "share": f / n,
                         "wilson_low": wl, "wilson_high": wh, "cp_low": cl, "cp_high": ch})
    thin = [row["year"] for row in observed if row["total"] < THIN_YEAR]
    if thin:
        messages.append(f"{len(thin)} year(s) have fewer than {THIN_YEAR} counted departures "
                        f"({', '.join(map(str, thin))}); their shares are imprecise.")

    rows, params, cov = X, fit.params, fit.cov
    curvature = None
    if model == "spline":
        if len(set(years)) < spline_df + 2:
            messages.append(f"Too few years for a spline with {spline_df} df; curvature was not tested.")
        else:
            basis, knots = spline_basis([float(y) for y in years], spline_df)
            spline_x = [[1.0, *row] for row in basis]
            spline = fit_logit(f_, n_, spline_x)
            if spline is None:  # its failure message comes from the statsmodels path
                return None
            statistic = max(fit.deviance - spline.deviance, 0.0)
            curvature = {"spline_df": spline_df, "knots": list(knots), "deviance": spline.deviance,
                         "statistic": statistic, "df": spline_df - 1, "p": chi2_sf(statistic, spline_df - 1)}
            rows, params, cov = spline_x, spline.params, spline.cov
            if refit is not None and dispersion > QUASI_DISPERSION:
                messages.append("The curvature test assumes binomial variation; with the overdispersion "
                                "found here its p-value is too small.")
    band = _band(rows, params, cov, dispersion if refit is not None else 1.0, z)
    fitted = [{"year": year, "fit": fit_, "low": low, "high": high}
              for year, (fit_, low, high) in zip(years, band, strict=True)]
    names = ("const", "year")
    coefficients = [{"name": name, "estimate": est, "se": s, "z": est / s, "p": 2.0 * normal_sf(abs(est / s))}
                    for name, est, s in zip(names, fit.params, fit.bse, strict=True)]
    return LineTrend(model=model, window=(int(window[0]), int(window[1])), centre=centre, alpha=alpha,
                     names=names, fit=fit, z=z, coefficients=coefficients, conf_int=conf, decade_conf_int=decade,
                     quasi=refit, curvature=curvature, observed=observed, fitted=fitted,
                     messages=tuple(dict.fromkeys(messages)), profiles=used)


def _number(value: float | None) -> float | None:
    return value if value is None or math.isfinite(value) else None


def _interval(bounds: tuple[float, float] | None) -> list[float | None] | None:
    return None if bounds is None else [_number(bounds[0]), _number(bounds[1])]


def line_payload(line: LineTrend) -> dict[str, Any]:
    """``fit_to_dict`` + ``headline_fields`` of the ``TrendFit`` built from ``line``: the same keys, order and
    values (tests/test_quick_fit.py compares the JSON byte for byte)."""
    fit, quasi = line.fit, line.quasi
    interval = quasi["conf_int"]["profile"] if quasi is not None else line.conf_int["profile"]
    odds = math.exp(line.log_or)
    sentence = trend_words(line.window, line.alpha, odds, interval, quasi is not None)
    first, last = line.fitted[0], line.fitted[-1]

    def share(row: dict[str, Any]) -> dict[str, Any]:
        return {"year": row["year"], "share": row["fit"], "low": _number(row["low"]), "high": _number(row["high"])}

    return {
        "model": line.model, "window": list(line.window), "centre": line.centre, "alpha": line.alpha,
        "departures": sum(row["total"] for row in line.observed),
        "forced": sum(row["forced"] for row in line.observed), "n_years": len(line.observed),
        "n_groups": len(line.observed), "odds_ratio": _number(odds), "log_or": _number(line.log_or),
        "se": _number(line.se), "conf_int": {k: _interval(v) for k, v in line.conf_int.items()},
        "decade_odds_ratio": _number(math.exp(10.0 * line.log_or)),
        "decade_conf_int": {k: _interval(v) for k, v in line.decade_conf_int.items()},
        "deviance": fit.deviance, "pearson_chi2": fit.pearson_chi2, "df_resid": fit.df_resid,
        "dispersion": _number(fit.dispersion), "llf": fit.llf, "converged": True, "separated": False,
        "quasi": None if quasi is None else {
            "dispersion": _number(quasi["dispersion"]), "se": _number(quasi["se"]),
            "conf_int": {k: _interval(v) for k, v in quasi["conf_int"].items()},
            "decade_conf_int": {k: _interval(v) for k, v in quasi["decade_conf_int"].items()}},
        "curvature": None if line.curvature is None else dict(line.curvature),
        "coefficients": [{k: _number(v) if isinstance(v, float) else v for k, v in row.items()}
                         for row in line.coefficients],
        "observed": [{k: _number(v) if isinstance(v, float) else v for k, v in row.items()} for row in line.observed],
        "fitted": [{k: _number(v) if isinstance(v, float) else v for k, v in row.items()} for row in line.fitted],
        "sentence": sentence, "messages": list(line.messages),
        "fitted_share": {"first": share(first), "last": share(last)},
        "headline": headline_words(line.window, line.alpha, odds, interval, quasi is not None,
                                   (first["year"], first["fit"]), (last["year"], last["fit"])),
    }
