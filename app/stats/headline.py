"""Headlines in shares: the fitted forced share at both ends of the window, then the odds ratio per year.

A board reads "the odds rose by 8% a year" as "the share rose 8 points a year". The headline therefore
leads with what the model says about the share itself (fitted at the first and last year, with its band),
the change in percentage points, and only then the odds ratio per year with its interval, always naming
the same interval method: profile likelihood (allowing for overdispersion when the fit did).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from app.stats.trend import TrendFit
from app.stats.trend_report import trend_sentence
from app.stats.trend_words import INTERVAL_METHOD, headline_words, interval_words

__all__ = ["FittedShare", "INTERVAL_METHOD", "fitted_share", "headline_fields", "headline_sentence",
           "interval_label", "model_interval"]


@dataclass(frozen=True)
class FittedShare:
    """The fitted forced share in one year, with its delta-method band (logit scale, transformed back)."""

    year: int
    share: float
    low: float | None
    high: float | None

    def as_dict(self) -> dict[str, Any]:
        return {"year": self.year, "share": self.share, "low": self.low, "high": self.high}


def fitted_share(fit: TrendFit) -> tuple[FittedShare, FittedShare] | None:
    """The fitted share at the first and the last year of the window that has counted departures.

    These are the ends of ``fit.fitted`` (the curve the Trend chart draws: for the sector-adjusted model at
    the departures' sector mix, for the spline model the spline). ``None`` when nothing was fitted.
    """
    frame = fit.fitted
    if frame.empty or not math.isfinite(float(frame["fit"].iloc[0])):
        return None

    def at(i: int) -> FittedShare:
        row = frame.iloc[i]
        low, high = float(row["low"]), float(row["high"])
        return FittedShare(int(row["year"]), float(row["fit"]), low if math.isfinite(low) else None,
                           high if math.isfinite(high) else None)

    return at(0), at(-1)


def model_interval(fit: TrendFit) -> tuple[float, float] | None:
    """The odds-ratio interval the headline quotes: profile likelihood, quasi-binomial when overdispersed."""
    return fit.quasi.conf_int["profile"] if fit.quasi is not None else fit.conf_int["profile"]


def interval_label(fit: TrendFit) -> str:
    """E.g. "95% profile-likelihood interval" (", allowing for overdispersion" when the fit widened it)."""
    return interval_words(fit.alpha, fit.quasi is not None)


def headline_sentence(fit: TrendFit) -> str:
    """The finding sentence of the trend: shares and percentage points first, then the odds ratio.

    Shares are whole percents and the change is the difference of the two numbers as printed, so the
    sentence adds up as read ("from 19% to 32%, +13 percentage points"); the exact values are in
    :func:`fitted_share`. When the slope cannot be estimated the plain trend sentence says why.
    """
    ends = fitted_share(fit)
    interval = model_interval(fit)
    if ends is None or fit.odds_ratio is None or interval is None:
        return trend_sentence(fit)
    first, last = ends
    return headline_words(fit.window, fit.alpha, fit.odds_ratio, interval, fit.quasi is not None,
                          (first.year, first.share), (last.year, last.share))


def headline_fields(fit: TrendFit) -> dict[str, Any]:
    """``fitted_share`` {"first", "last"} and ``headline`` for JSON (``helmshift fit --json``, the API)."""
    ends = fitted_share(fit)
    shares = None if ends is None else {"first": ends[0].as_dict(), "last": ends[1].as_dict()}
    return {"fitted_share": shares, "headline": headline_sentence(fit)}
