"""Names of the statistics a bootstrap can resample, kept free of numpy so the command line can list them
in ``--help`` without loading the statistics (see :mod:`app.stats.statistics`)."""

from __future__ import annotations

from typing import Literal, get_args

StatisticName = Literal["slope", "decade_odds_ratio", "sector_slope", "heterogeneity", "spline_bend",
                        "period_difference", "rate_ratio", "adjusted_odds_ratio"]
STATISTICS: tuple[StatisticName, ...] = get_args(StatisticName)
Scale = Literal["log", "identity"]
#: statistics built on cells of their own (a universe's firm-years; the adjusted model's cells), not the share's
MEASURE_STATISTICS: tuple[StatisticName, ...] = ("rate_ratio", "adjusted_odds_ratio")

#: what each statistic is, in the words of the pages (the CLI's --help lists these)
STATISTIC_HELP: dict[str, str] = {
    "slope": "odds ratio per year (the year slope of the straight or sector-adjusted trend)",
    "decade_odds_ratio": "odds ratio per decade (ten times the year slope, exponentiated)",
    "sector_slope": "one sector's own odds ratio per year (name it with --sector)",
    "heterogeneity": "likelihood-ratio statistic of equal trends across the fitted sectors",
    "spline_bend": "likelihood-ratio statistic of the spline bend test (natural cubic spline vs straight trend)",
    "period_difference": "difference in the forced share, second period minus first (a proportion)",
    "rate_ratio": "forced departures per 100 firm-years, ratio per year (Poisson, firm-years as exposure; needs a "
                  "universe; firms of the universe resampled with their firm-years)",
    "adjusted_odds_ratio": "odds ratio per year adjusted for age, tenure and sector (choose with --adjust)",
}

__all__ = ["MEASURE_STATISTICS", "STATISTICS", "STATISTIC_HELP", "Scale", "StatisticName"]
