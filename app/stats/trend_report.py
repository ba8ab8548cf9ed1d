"""What a trend fit says: its one plain-language sentence and its JSON-ready form.

Kept apart from the model fit (:mod:`app.stats.trend`) so that wording and serialisation can change
without touching the statistics, and so that readers of stored results need not import the fit.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from app.stats.trend import Interval, TrendFit
from app.stats.trend_words import trend_words

__all__ = ["fit_to_dict", "json_interval", "json_number", "trend_sentence"]


def trend_sentence(fit: TrendFit) -> str:
    """One plain-language sentence on the yearly change in the odds of a forced departure.

    Uses the profile interval (the quasi-binomial one when overdispersion triggered a refit).
    Says "no clear change" whenever the interval includes an odds ratio of 1 (``trend_words``).
    """
    interval = fit.quasi.conf_int["profile"] if fit.quasi is not None else fit.conf_int["profile"]
    return trend_words(fit.window, fit.alpha, fit.odds_ratio, interval, fit.quasi is not None)


def json_number(value: float | None) -> float | None:
    """JSON cannot carry NaN or infinity; they become null (the messages say why)."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def json_interval(bounds: Interval | None) -> list[float | None] | None:
    """An interval as a two-item JSON list (non-finite ends become null), or None."""
    return None if bounds is None else [json_number(bounds[0]), json_number(bounds[1])]


def _records(frame: pd.DataFrame) -> list[dict[str, object]]:
    out: list[dict[str, object]] = []
    for row in frame.to_dict(orient="records"):
        out.append({str(k): (int(v) if isinstance(v, (int, np.integer)) else
                             json_number(float(v)) if isinstance(v, (float, np.floating)) else v)
                    for k, v in row.items()})
    return out


def fit_to_dict(fit: TrendFit) -> dict[str, object]:
    """JSON-friendly view of a :class:`TrendFit` (the CLI's ``fit --json`` payload).

    Keys include ``odds_ratio``, ``conf_int`` {``wald``, ``profile``: [low, high]}, ``window``,
    ``departures``, ``forced`` and ``dispersion``; NaN and infinite values become null.
    """
    quasi = None
    if fit.quasi is not None:
        quasi = {"dispersion": json_number(fit.quasi.dispersion), "se": json_number(fit.quasi.se),
                 "conf_int": {k: json_interval(v) for k, v in fit.quasi.conf_int.items()},
                 "decade_conf_int": {k: json_interval(v) for k, v in fit.quasi.decade_conf_int.items()}}
    curvature = None
    if fit.curvature is not None:
        c = fit.curvature
        curvature = {"spline_df": c.spline_df, "knots": list(c.knots), "deviance": c.deviance,
                     "statistic": c.statistic, "df": c.df, "p": c.p}
    return {
        "model": fit.model, "window": list(fit.window), "centre": fit.centre, "alpha": fit.alpha,
        "departures": fit.departures, "forced": fit.forced, "n_years": fit.n_years,
        "n_groups": fit.n_groups, "odds_ratio": json_number(fit.odds_ratio), "log_or": json_number(fit.log_or),
        "se": json_number(fit.se), "conf_int": {k: json_interval(v) for k, v in fit.conf_int.items()},
        "decade_odds_ratio": json_number(fit.decade_odds_ratio),
        "decade_conf_int": {k: json_interval(v) for k, v in fit.decade_conf_int.items()},
        "deviance": fit.deviance, "pearson_chi2": fit.pearson_chi2, "df_resid": fit.df_resid,
        "dispersion": json_number(fit.dispersion), "llf": fit.llf, "converged": fit.converged,
        "separated": fit.separated, "quasi": quasi, "curvature": curvature,
        "coefficients": _records(fit.coefficients), "observed": _records(fit.observed),
        "fitted": _records(fit.fitted), "sentence": trend_sentence(fit), "messages": list(fit.messages),
    }
