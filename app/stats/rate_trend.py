"""The Poisson trend in a turnover rate per firm-year, its profile interval and the decomposition sentence.

Model, per fiscal year t with E_t firm-years (``app.stats.rates.count_rates``)::

    events_t ~ Poisson(E_t * exp(a + b (t - centre)))

fitted as a Poisson GLM with offset log E_t (statsmodels); the rate ratio per year is exp(b), with Wald and
profile-likelihood intervals, and a quasi-Poisson version when the Pearson dispersion is well above 1 (the
share model's rule). statsmodels and scipy.stats are imported inside the functions (start-up time).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np

from app.stats.design import window_centre
from app.stats.rates import RateTable
from app.stats.trend import QUASI_DISPERSION, QUASI_MIN_DF
from app.stats.trend_report import json_interval, json_number

__all__ = ["QuasiRate", "RateError", "RateTrend", "decomposition_sentence", "fit_rate_trend",
           "poisson_profile_interval", "rate_trend_to_dict"]

_BRACKET_STEPS = (0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0, 32.0, 64.0)

Measure = Literal["forced", "voluntary"]
Interval = tuple[float, float]


class RateError(ValueError):
    """The data cannot support a rate trend (no events, too few years with firm-years, ...)."""


@dataclass(frozen=True)
class QuasiRate:
    """Quasi-Poisson intervals: Wald SE times sqrt(dispersion); profile deviance difference / dispersion."""

    dispersion: float
    se: float
    conf_int: dict[str, Interval]
    message: str


@dataclass(frozen=True)
class RateTrend:
    """Result of :func:`fit_rate_trend`: the Poisson trend in one turnover rate.

    ``rate_ratio`` = exp(slope), the multiplicative change in the rate per fiscal year, with ``conf_int``
    ``wald`` and ``profile`` on the ratio scale (a profile end the data cannot bound is 0 or inf, with a
    message). ``intercept`` is the log rate per firm-year at ``centre``. ``llf`` includes log(y!).
    """

    measure: Measure
    window: tuple[int, int]
    centre: float
    alpha: float
    events: int
    firm_years: int
    n_years: int
    intercept: float
    log_rr: float
    se: float
    rate_ratio: float
    conf_int: dict[str, Interval]
    deviance: float
    pearson_chi2: float
    df_resid: int
    dispersion: float
    llf: float
    converged: bool
    quasi: QuasiRate | None
    messages: tuple[str, ...]

    def headline_interval(self) -> Interval:
        """The interval sentences use: profile (quasi-Poisson when overdispersion triggered a refit)."""
        return self.quasi.conf_int["profile"] if self.quasi is not None else self.conf_int["profile"]


def _poisson_glm(events: np.ndarray, X: np.ndarray, offset: np.ndarray) -> tuple[dict[str, float | np.ndarray],
                                                                                  list[str]]:
    import statsmodels.api as sm
    from statsmodels.tools.sm_exceptions import ConvergenceWarning

    with warnings.catch_warnings(record=True) as caught, np.errstate(all="warn"):
        warnings.simplefilter("always")
        res = sm.GLM(events, X, family=sm.families.Poisson(), offset=offset).fit(tol=1e-12, maxiter=200)
        out: dict[str, float | np.ndarray] = {
            "params": np.asarray(res.params, dtype=float), "bse": np.asarray(res.bse, dtype=float),
            "deviance": float(res.deviance), "pearson_chi2": float(res.pearson_chi2),
            "df_resid": float(res.df_resid), "llf": float(res.llf), "converged": float(bool(res.converged)),
        }
    notes = []
    for w in caught:
        if issubclass(w.category, ConvergenceWarning):
            out["converged"] = 0.0
            notes.append("The Poisson fit did not converge; treat the estimates with caution.")
        else:
            notes.append(f"The fitting routine warned: {w.message}")
    return out, sorted(set(notes))


def _profile_deviance(events: np.ndarray, exposure: np.ndarray, t: np.ndarray) -> Callable[[float], float]:
    """D(b): the Poisson deviance with slope b and the intercept at its MLE given b.

    With one intercept the score equation gives it in closed form, exp(a) = sum(y) / sum(E exp(b t)),
    so the profile is exact without an inner fit (statsmodels has no profile interval for GLMs).
    """
    total = float(events.sum())
    positive = events > 0

    def deviance(b: float) -> float:
        log_w = np.log(exposure) + b * t
        log_mu = log_w + math.log(total) - float(np.logaddexp.reduce(log_w))
        # sum(y - mu) = 0 at the intercept's MLE, so only the y log(y / mu) terms remain
        return float(2.0 * np.sum(events[positive] * (np.log(events[positive]) - log_mu[positive])))

    return deviance


def poisson_profile_interval(events: np.ndarray, exposure: np.ndarray, t: np.ndarray, *, b_hat: float,
                             se: float, alpha: float = 0.05, dispersion: float = 1.0
                             ) -> tuple[float, float, str | None]:
    """Profile-likelihood interval for the slope of ``log rate = a + b t`` (Poisson, offset log exposure).

    The interval is {b : (D(b) - D(b_hat)) / dispersion <= chi2_{1, 1 - alpha}}; each end is found by
    ``scipy.optimize.brentq`` (xtol 1e-12) after bracketing in multiples of the Wald SE. An end the
    profile never reaches is returned as -inf / inf with a message.

    Parameters
    ----------
    events, exposure, t : numpy.ndarray
        Counts, firm-years (> 0) and centred years, one entry per fiscal year.
    b_hat, se : float
        The slope's MLE and Wald standard error (bracketing scale).
    alpha : float
    dispersion : float
        1 for Poisson; the Pearson dispersion for the quasi-Poisson profile.

    Returns
    -------
    (low, high, message) on the slope (log rate ratio) scale.
    """
    from scipy import optimize, stats

    deviance = _profile_deviance(np.asarray(events, float), np.asarray(exposure, float), np.asarray(t, float))
    d_min = deviance(b_hat)
    cut = float(stats.chi2.ppf(1.0 - alpha, 1))

    def excess(b: float) -> float:
        return (deviance(b) - d_min) / dispersion - cut

    ends: list[float] = []
    notes: list[str] = []
    for sign, side in ((-1.0, "lower"), (1.0, "upper")):
        root = None
        inner = b_hat
        for k in _BRACKET_STEPS:
            outer = b_hat + sign * k * se
            value = excess(outer)
            if math.isfinite(value) and value > 0:
                lo, hi = sorted((inner, outer))
                root = float(optimize.brentq(excess, lo, hi, xtol=1e-12, rtol=4 * np.finfo(float).eps))
                break
            inner = outer
        if root is None:
            ends.append(sign * math.inf)
            notes.append(f"The profile likelihood never falls far enough on the {side} side, so the "
                         f"{side} end of the rate ratio's interval is open.")
        else:
            ends.append(root)
    return ends[0], ends[1], " ".join(notes) or None


def _ratio(bounds: tuple[float, float]) -> Interval:
    return (math.exp(bounds[0]), math.exp(bounds[1]))


def fit_rate_trend(table: RateTable, measure: Measure = "forced", *, alpha: float | None = None) -> RateTrend:
    """Fit the Poisson trend in the forced (or voluntary) rate per firm-year over the window.

    Parameters
    ----------
    table : RateTable
        Counts and firm-years per year (:func:`count_rates`); years without firm-years are absent.
    measure : {"forced", "voluntary"}
    alpha : float, optional
        1 - confidence level; the table's by default.

    Returns
    -------
    RateTrend

    Raises
    ------
    RateError
        Fewer than 3 years with firm-years, or no events of this kind in the window.
    """
    from scipy import stats

    if measure not in ("forced", "voluntary"):
        raise ValueError(f"measure must be one of forced, voluntary; got {measure!r}.")
    alpha = table.alpha if alpha is None else alpha
    years = table.years
    span = f"{table.window[0]}\u2013{table.window[1]}"
    if len(years) < 3:
        raise RateError(f"A rate trend needs firm-years in at least 3 fiscal years; {span} has {len(years)}.")
    events = years[measure].to_numpy(dtype=float)
    if events.sum() == 0:
        raise RateError(f"There are no {measure} departures among the universe's firm-years in {span}.")
    exposure = years["firm_years"].to_numpy(dtype=float)
    centre = window_centre(table.window)
    t = years["year"].to_numpy(dtype=float) - centre
    X = np.column_stack([np.ones_like(t), t])
    res, messages = _poisson_glm(events, X, np.log(exposure))
    params, bse = np.asarray(res["params"]), np.asarray(res["bse"])
    b, se = float(params[1]), float(bse[1])
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    low, high, note = poisson_profile_interval(events, exposure, t, b_hat=b, se=se, alpha=alpha)
    messages += [note] if note else []
    df_resid = int(round(float(res["df_resid"])))
    dispersion = float(res["pearson_chi2"]) / df_resid if df_resid > 0 else math.nan
    quasi = None
    if dispersion > QUASI_DISPERSION and df_resid >= QUASI_MIN_DF:
        se_q = se * math.sqrt(dispersion)
        q_low, q_high, q_note = poisson_profile_interval(events, exposure, t, b_hat=b, se=se_q, alpha=alpha,
                                                         dispersion=dispersion)
        message = (f"The yearly {measure} counts vary more than a Poisson model allows (Pearson dispersion "
                   f"{dispersion:.2f}), so quasi-Poisson intervals are also given (Wald widened by "
                   "sqrt(dispersion), profile deviance divided by it).")
        quasi = QuasiRate(dispersion=dispersion, se=se_q,
                          conf_int={"wald": _ratio((b - z * se_q, b + z * se_q)), "profile": _ratio((q_low, q_high))},
                          message=message)
        messages += [message] + ([q_note] if q_note else [])
    return RateTrend(
        measure=measure, window=table.window, centre=centre, alpha=alpha, events=int(events.sum()),
        firm_years=int(exposure.sum()), n_years=len(years), intercept=float(params[0]), log_rr=b, se=se,
        rate_ratio=math.exp(b), conf_int={"wald": _ratio((b - z * se, b + z * se)), "profile": _ratio((low, high))},
        deviance=float(res["deviance"]), pearson_chi2=float(res["pearson_chi2"]), df_resid=df_resid,
        dispersion=dispersion, llf=float(res["llf"]), converged=bool(res["converged"]), quasi=quasi,
        messages=tuple(dict.fromkeys(messages)),
    )


def rate_trend_to_dict(fit: RateTrend) -> dict[str, object]:
    """JSON-friendly view of a :class:`RateTrend`; non-finite numbers become null."""
    quasi = None
    if fit.quasi is not None:
        quasi = {"dispersion": json_number(fit.quasi.dispersion), "se": json_number(fit.quasi.se),
                 "conf_int": {k: json_interval(v) for k, v in fit.quasi.conf_int.items()}}
    return {
        "measure": fit.measure, "window": list(fit.window), "centre": fit.centre, "alpha": fit.alpha,
        "events": fit.events, "firm_years": fit.firm_years, "n_years": fit.n_years,
        "rate_ratio": json_number(fit.rate_ratio), "log_rr": json_number(fit.log_rr), "se": json_number(fit.se),
        "intercept": json_number(fit.intercept),
        "conf_int": {k: json_interval(v) for k, v in fit.conf_int.items()},
        "deviance": fit.deviance, "pearson_chi2": fit.pearson_chi2, "df_resid": fit.df_resid,
        "dispersion": json_number(fit.dispersion), "llf": fit.llf, "converged": fit.converged, "quasi": quasi,
        "messages": list(fit.messages),
    }


# -- the plain-language decomposition ------------------------------------------------------------------
Direction = Literal["rose", "fell", "flat"]


def _direction(interval: Interval | None) -> Direction:
    if interval is None:
        return "flat"
    if interval[0] > 1.0:
        return "rose"
    if interval[1] < 1.0:
        return "fell"
    return "flat"


def _per_year(ratio: float) -> str:
    pct = abs(ratio - 1.0) * 100.0
    return f"{pct:.1f}% a year" if pct >= 0.1 else f"{pct:.2g}% a year"


def _phrase(subject: str, fit: RateTrend) -> str:
    d = _direction(fit.headline_interval())
    if d == "flat":
        return f"{subject} {'was' if subject.startswith('the') else 'were'} flat"
    return f"{subject} {d}, {_per_year(fit.rate_ratio)}"


def decomposition_sentence(share_interval: Interval | None, forced: RateTrend, voluntary: RateTrend) -> str:
    """Say why the forced share moved, in terms of the forced and the voluntary rate per firm-year.

    A part "rose" or "fell" when its headline interval (profile; quasi when refitted) excludes 1 and is
    "flat" otherwise; ``share_interval`` is the interval of the share's odds ratio per year (None when
    the share trend could not be fitted). Example: "the forced share fell because voluntary exits rose,
    3.6% a year, while the forced rate was flat".
    """
    share = _direction(share_interval)
    f_dir, v_dir = _direction(forced.headline_interval()), _direction(voluntary.headline_interval())
    f_text, v_text = _phrase("the forced rate", forced), _phrase("voluntary exits", voluntary)
    span = f"Across {forced.window[0]}\u2013{forced.window[1]}"
    level = f"{round((1.0 - forced.alpha) * 100):g}%"
    tail = (f" (per 100 firm-years; {level} profile intervals; the forced rate's ratio per year is "
            f"{forced.rate_ratio:.3f}, {forced.headline_interval()[0]:.3f} to {forced.headline_interval()[1]:.3f}).")
    if share == "flat":
        return (f"{span}, the forced share showed no clear change; per firm-year, {f_text} and {v_text}"
                + tail)
    # the parts that push the share in its own direction
    pushes_forced = f_dir == share
    pushes_voluntary = v_dir == ("fell" if share == "rose" else "rose")
    if pushes_voluntary and not pushes_forced:
        reason = f"because {v_text}, while {f_text}"
    elif pushes_forced and not pushes_voluntary:
        reason = f"because {f_text}, while {v_text}"
    elif pushes_forced and pushes_voluntary:
        reason = f"because {f_text} and {v_text}"
    else:
        reason = (f"although neither rate per firm-year moved clearly in that direction: {f_text} and "
                  f"{v_text}")
    return f"{span}, the forced share {share} {reason}" + tail
