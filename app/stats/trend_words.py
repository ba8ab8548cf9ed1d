"""The trend's sentences from plain numbers (no numpy or pandas), shared by every path that prints a fit.

:func:`app.stats.trend_report.trend_sentence` and :func:`app.stats.headline.headline_sentence` word a
``TrendFit``; the first ``helmshift fit`` of new counts (``app.stats.trend_line``, no pandas) words the same
numbers. Both call these functions, so the sentences cannot drift apart.
"""

from __future__ import annotations

import math

__all__ = ["INTERVAL_METHOD", "headline_words", "interval_words", "trend_words"]

#: the one interval method every model headline, table caption and takeaway names
INTERVAL_METHOD = "profile likelihood"
Interval = tuple[float, float]


def _pct(value: float) -> str:
    if math.isinf(value):
        return "an unbounded amount"
    return f"{value:.1f}%" if abs(value) >= 0.1 else f"{value:.2g}%"


def _change(ratio: float) -> str:
    """Describe an odds ratio per year as a signed change, e.g. 'a rise of 2.1%'."""
    if ratio >= 1.0:
        return f"a rise of {_pct((ratio - 1.0) * 100.0)}"
    return f"a fall of {_pct((1.0 - ratio) * 100.0)}"


def trend_words(window: tuple[int, int], alpha: float, odds_ratio: float | None, interval: Interval | None,
                quasi: bool) -> str:
    """One plain-language sentence on the yearly change in the odds of a forced departure.

    ``interval`` is the profile interval of the odds ratio (the quasi-binomial one when ``quasi``). Says "no
    clear change" whenever the interval includes an odds ratio of 1.
    """
    span = f"{window[0]}\u2013{window[1]}"
    level = f"{round((1.0 - alpha) * 100):g}%"
    if odds_ratio is None or interval is None:
        return (f"Across {span}, the trend in the odds that a departure was forced cannot be estimated: "
                "the forced share is perfectly separated by year, so any single number would mislead.")
    low, high = interval
    kind = f"{level} profile interval" + (", allowing for overdispersion," if quasi else "")
    ratio = odds_ratio
    if low > 1.0:
        ends = f"{_pct((low - 1.0) * 100.0)} to {_pct((high - 1.0) * 100.0)}"
        return (f"Across {span}, the odds that a departure was forced rose by about "
                f"{_pct((ratio - 1.0) * 100.0)} a year ({kind} {ends}).")
    if high < 1.0:
        ends = f"{_pct((1.0 - high) * 100.0)} to {_pct((1.0 - low) * 100.0)}"
        return (f"Across {span}, the odds that a departure was forced fell by about "
                f"{_pct((1.0 - ratio) * 100.0)} a year ({kind} {ends}).")
    return (f"Across {span}, there was no clear change in the odds that a departure was forced: the "
            f"estimate is {_change(ratio)} a year, but the {kind.replace(',', '').rstrip()} runs from "
            f"{_change(low)} to {_change(high)}.")


def interval_words(alpha: float, quasi: bool) -> str:
    """E.g. "95% profile-likelihood interval" (", allowing for overdispersion" when the fit widened it)."""
    level = f"{round((1.0 - alpha) * 100):g}%"
    return f"{level} {INTERVAL_METHOD.replace(' ', '-')} interval" + (
        ", allowing for overdispersion" if quasi else "")


def _whole_pct(share: float) -> int:
    return int(math.floor(share * 100.0 + 0.5))


def _ratio(value: float) -> str:
    return "unbounded" if math.isinf(value) else f"{value:.3f}"


def headline_words(window: tuple[int, int], alpha: float, odds_ratio: float, interval: Interval, quasi: bool,
                   first: tuple[int, float], last: tuple[int, float]) -> str:
    """The finding sentence: the fitted share (``first``, ``last``: year and share) at both ends and the
    change in percentage points first, then the odds ratio per year with its profile interval.

    Shares are whole percents and the change is the difference of the two numbers as printed, so the
    sentence adds up as read ("from 19% to 32%, +13 percentage points").
    """
    a, b = _whole_pct(first[1]), _whole_pct(last[1])
    change = b - a
    points = "percentage point" if abs(change) == 1 else "percentage points"
    low, high = interval
    odds = (f"the odds ratio per year is {_ratio(odds_ratio)} ({interval_words(alpha, quasi)} "
            f"{_ratio(low)} to {_ratio(high)})")
    share = "the fitted share of departures that were forced"
    span = f"{window[0]}–{window[1]}"
    if low > 1.0 or high < 1.0:
        verb = "rose" if low > 1.0 else "fell"
        return (f"Across {span}, {share} {verb} from {a}% in {first[0]} to {b}% in {last[0]} "
                f"({change:+d} {points}); {odds}.")
    return (f"Across {span}, {share} went from {a}% in {first[0]} to {b}% in {last[0]} "
            f"({change:+d} {points}), but this is no clear change: {odds}, which includes 1.")
