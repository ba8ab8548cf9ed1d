"""Period comparison: is the forced share in one run of years different from the share in another?

The shares are pooled over each period's counted (forced + voluntary) departures. Their difference (second
minus first, in percentage points) gets Newcombe's hybrid score interval (Newcombe 1998, method 10: Wilson
intervals of each share combined), computed by statsmodels; the odds ratio between the periods gets a
profile-likelihood interval from the same grouped logit machinery as the trend, so every model interval
Helmshift quotes is profile likelihood.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from app.stats.profile import fit_grouped_binomial, profile_interval

__all__ = ["Period", "PeriodComparison", "PeriodError", "Span", "compare_periods", "default_periods", "parse_periods"]

Span = tuple[int, int]


class PeriodError(ValueError):
    """Periods that cannot be compared (overlapping, reversed, empty); the message says which and why."""


@dataclass(frozen=True)
class Period:
    years: Span
    forced: int
    total: int
    share: float
    conf_int: tuple[float, float]  # Wilson score interval of the share

    def as_dict(self) -> dict[str, Any]:
        return {"years": list(self.years), "forced": self.forced, "total": self.total, "share": self.share,
                "conf_int": list(self.conf_int)}


@dataclass(frozen=True)
class PeriodComparison:
    first: Period
    second: Period
    difference: float  # second share minus first share (a proportion; x 100 for percentage points)
    conf_int: tuple[float, float]  # Newcombe hybrid score interval of the difference
    odds_ratio: float | None
    odds_ratio_conf_int: tuple[float, float] | None  # profile likelihood
    alpha: float
    sentence: str

    def as_dict(self) -> dict[str, Any]:
        def finite(v: float | None) -> float | None:
            return v if v is not None and math.isfinite(v) else None

        oci = self.odds_ratio_conf_int
        return {"first": self.first.as_dict(), "second": self.second.as_dict(), "difference": self.difference,
                "conf_int": list(self.conf_int), "difference_method": "Newcombe hybrid score",
                "odds_ratio": finite(self.odds_ratio),
                "odds_ratio_conf_int": None if oci is None else [finite(oci[0]), finite(oci[1])],
                "odds_ratio_method": "profile likelihood", "alpha": self.alpha, "sentence": self.sentence}


def default_periods(window: Span) -> tuple[Span, Span]:
    """The last third of the window (rounded to whole years, at least one) against the years before it."""
    lo, hi = window
    n = hi - lo + 1
    if n < 2:
        raise PeriodError(f"A window of {n} year(s) cannot be split into two periods.")
    last = min(n - 1, max(1, round(n / 3)))
    return (lo, hi - last), (hi - last + 1, hi)


_SPAN = re.compile(r"\s*(\d{4})\s*[-–]\s*(\d{4})\s*")


def parse_periods(text: str) -> tuple[Span, Span]:
    """``1997-2009:2010-2022`` (an en dash works too) -> ((1997, 2009), (2010, 2022))."""
    parts = text.split(":")
    spans = [_SPAN.fullmatch(p) for p in parts]
    if len(parts) != 2 or not all(spans):
        raise PeriodError(f"Periods look like 1997-2009:2010-2022 (first:second); got {text!r}.")
    (a, b), (c, d) = ((int(m.group(1)), int(m.group(2))) for m in spans if m)
    return (a, b), (c, d)


def _check(first: Span, second: Span) -> None:
    for name, (a, b) in (("first", first), ("second", second)):
        if a > b:
            raise PeriodError(f"The {name} period starts ({a}) after it ends ({b}).")
    if not first[1] < second[0]:
        raise PeriodError(f"The first period ({first[0]}–{first[1]}) must end before the second "
                          f"({second[0]}–{second[1]}) starts.")


def _period(counts: pd.DataFrame, span: Span, alpha: float, name: str) -> Period:
    from statsmodels.stats.proportion import proportion_confint

    inside = counts.loc[counts["year"].between(*span)]
    forced, total = int(inside["forced"].sum()), int(inside["total"].sum())
    if total == 0:
        raise PeriodError(f"The {name} period {span[0]}–{span[1]} has no forced or voluntary departures.")
    low, high = proportion_confint(forced, total, alpha=alpha, method="wilson")
    return Period(span, forced, total, forced / total, (float(low), float(high)))


def _odds_ratio(first: Period, second: Period, alpha: float) -> tuple[float | None, tuple[float, float] | None]:
    forced = np.array([first.forced, second.forced], dtype=float)
    totals = np.array([first.total, second.total], dtype=float)
    if np.any(forced == 0) or np.any(forced == totals):  # a period all forced or none: OR is 0 or infinite
        return None, None
    X = np.array([[1.0, 0.0], [1.0, 1.0]])
    fit = fit_grouped_binomial(forced, totals, X)
    prof = profile_interval(forced, totals, X, 1, alpha)
    return math.exp(float(fit.params[1])), (math.exp(prof.low), math.exp(prof.high))


def _years(span: Span) -> str:
    return str(span[0]) if span[0] == span[1] else f"{span[0]}–{span[1]}"


def _sentence(cmp: PeriodComparison) -> str:
    f, s = cmp.first, cmp.second
    a, b = (int(math.floor(p.share * 100 + 0.5)) for p in (f, s))
    level = f"{round((1 - cmp.alpha) * 100):g}%"
    lo, hi = (v * 100 for v in cmp.conf_int)
    clear = "" if lo > 0 or hi < 0 else ", which includes no difference"
    text = (f"In {_years(s.years)}, {b}% of counted departures were forced, against {a}% in "
            f"{_years(f.years)}: {b - a:+d} percentage points ({level} Newcombe interval "
            f"{lo:+.1f} to {hi:+.1f}{clear})")
    if cmp.odds_ratio is not None and cmp.odds_ratio_conf_int is not None:
        olo, ohi = cmp.odds_ratio_conf_int
        text += (f"; odds ratio between the periods {cmp.odds_ratio:.3f} ({level} profile-likelihood interval "
                 f"{olo:.3f} to {ohi:.3f})")
    return text + "."


def compare_periods(counts: pd.DataFrame, first: Span, second: Span, *, alpha: float = 0.05) -> PeriodComparison:
    """Compare the pooled forced share of two periods.

    Parameters
    ----------
    counts : pandas.DataFrame
        One row per fiscal year with ``year``, ``forced`` and ``total`` (forced + voluntary) counts.
    first, second : (int, int)
        Inclusive year ranges; the first must end before the second starts.
    alpha : float
        1 - confidence level.
    """
    from statsmodels.stats.proportion import confint_proportions_2indep

    _check(first, second)
    p1, p2 = _period(counts, first, alpha, "first"), _period(counts, second, alpha, "second")
    low, high = confint_proportions_2indep(p2.forced, p2.total, p1.forced, p1.total, method="newcomb",
                                           compare="diff", alpha=alpha)
    odds, odds_ci = _odds_ratio(p1, p2, alpha)
    draft = PeriodComparison(p1, p2, p2.share - p1.share, (float(low), float(high)), odds, odds_ci, alpha, "")
    return PeriodComparison(**{**draft.__dict__, "sentence": _sentence(draft)})
