"""Names of the statistics a bootstrap can resample, kept free of numpy so the command line can list them
in ``--help`` without loading the statistics (see :mod:`app.stats.statistics`)."""

from __future__ import annotations

from typing import Literal, get_args

StatisticName = Literal["slope", "decade_odds_ratio", "sector_slope", "heterogeneity", "spline_bend",
                        "period_difference"]
STATISTICS: tuple[StatisticName, ...] = get_args(StatisticName)
Scale = Literal["log", "identity"]

#: what each statistic is, in the words of the pages (the CLI's --help lists these)
STATISTIC_HELP: dict[str, str] = {
    "slope": "odds ratio per year (the year slope of the straight or sector-adjusted trend)",
    "decade_odds_ratio": "odds ratio per decade (ten times the year slope, exponentiated)",
    "sector_slope": "one sector's own odds ratio per year (name it with --sector)",
    "heterogeneity": "likelihood-ratio statistic of equal trends across the fitted sectors",
    "spline_bend": "likelihood-ratio statistic of the spline bend test (natural cubic spline vs straight trend)",
    "period_difference": "difference in the forced share, second period minus first (a proportion)",
}

__all__ = ["STATISTICS", "STATISTIC_HELP", "Scale", "StatisticName"]
