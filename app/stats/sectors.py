"""Trends within sectors, the common trend adjusted for sector, and a test of equal trends.

Each sector with enough usable data gets its own intercept and slope (the same numbers as fitting
that sector alone). Sectors that cannot support a trend are listed with the reason and left out of
every model here, so the heterogeneity test and the common trend compare like with like.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from app.stats.cells import Cells
from app.stats.design import design_matrix, window_centre
from app.stats.profile import fit_grouped_binomial, profile_interval
from app.stats.trend import Interval, TrendError, TrendFit, fit_trend
from app.stats.trend_report import fit_to_dict, json_interval, json_number

SectorStatus = Literal["fitted", "skipped"]


@dataclass(frozen=True)
class SectorTrend:
    """The trend within one sector (``status="fitted"``) or why it was not fitted (``"skipped"``).

    ``odds_ratio`` is exp(slope) per year; ``conf_int`` holds ``wald`` and ``profile`` intervals on
    the odds-ratio scale (None when skipped; a profile end the data cannot bound is 0 or inf).
    """

    sector: str
    status: SectorStatus
    reason: str | None
    departures: int
    forced: int
    n_years: int
    log_or: float
    se: float
    odds_ratio: float | None
    conf_int: dict[str, Interval | None]
    messages: tuple[str, ...]


@dataclass(frozen=True)
class Heterogeneity:
    """Likelihood-ratio test of equal yearly trends across the fitted sectors.

    Interaction model (sector intercepts and sector slopes) against the additive model (sector
    intercepts, one common slope): ``statistic`` = deviance(additive) - deviance(interaction) on
    ``df`` = number of sectors - 1; ``p`` from the chi-squared distribution.
    """

    statistic: float
    df: int
    p: float
    deviance_additive: float
    deviance_interaction: float
    sectors: tuple[str, ...]


@dataclass(frozen=True)
class SectorTrends:
    """Result of :func:`fit_sector_trends`; ``common`` is the ``"sector"`` TrendFit over fitted sectors."""

    window: tuple[int, int]
    centre: float
    alpha: float
    min_departures: int
    sectors: tuple[SectorTrend, ...]
    common: TrendFit | None
    heterogeneity: Heterogeneity | None
    messages: tuple[str, ...]


def _skip_reason(groups: pd.DataFrame, min_departures: int) -> str | None:
    departures = int(groups["forced"].sum() + groups["voluntary"].sum())
    years = groups["year"].nunique()
    if departures < min_departures:
        return f"only {departures} departures (fewer than {min_departures})"
    if int(groups["forced"].sum()) == 0:
        return "no forced departures"
    if int(groups["voluntary"].sum()) == 0:
        return "no voluntary departures"
    if years < 3:
        return f"departures in only {years} year(s); a trend needs at least 3"
    return None


def _sector_trend(sector: str, groups: pd.DataFrame, centre: float, alpha: float,
                  min_departures: int) -> SectorTrend:
    from scipy import stats  # lazy: scipy.stats costs ~0.6 s to import, kept off start-up

    forced = groups["forced"].to_numpy(dtype=float)
    totals = forced + groups["voluntary"].to_numpy(dtype=float)

    def result(status: SectorStatus, reason: str | None, b: float = math.nan, se: float = math.nan,
               conf: dict[str, Interval | None] | None = None, messages: tuple[str, ...] = ()) -> SectorTrend:
        return SectorTrend(sector=sector, status=status, reason=reason, departures=int(totals.sum()),
                           forced=int(forced.sum()), n_years=int(groups["year"].nunique()), log_or=b,
                           se=se, odds_ratio=math.exp(b) if math.isfinite(b) else None,
                           conf_int=conf or {"wald": None, "profile": None}, messages=messages)

    reason = _skip_reason(groups, min_departures)
    if reason is not None:
        return result("skipped", reason)
    X = np.column_stack([np.ones(len(groups)), groups["year"].to_numpy(dtype=float) - centre])
    fit = fit_grouped_binomial(forced, totals, X)
    if fit.separated or not fit.converged:
        reason = ("the forced share is perfectly separated by year" if fit.separated
                  else "the fit did not converge")
        return result("skipped", reason, messages=fit.messages)
    b, se = float(fit.params[1]), float(fit.bse[1])
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    prof = profile_interval(forced, totals, X, 1, alpha)
    conf: dict[str, Interval | None] = {
        "wald": (math.exp(b - z * se), math.exp(b + z * se)),
        "profile": (math.exp(prof.low), math.exp(prof.high)),
    }
    return result("fitted", None, b, se, conf, fit.messages + ((prof.message,) if prof.message else ()))


def _subset(cells: Cells, keep: np.ndarray) -> Cells:
    """Cells restricted to the groups in ``keep`` (boolean, one per group), firm matrix included."""
    idx = np.flatnonzero(keep)
    cols = np.concatenate([idx, idx + cells.n_groups])
    matrix = cells.firm_matrix[:, cols].tocsr()
    firms = np.asarray(matrix.sum(axis=1)).ravel() > 0
    return Cells(groups=cells.groups.loc[keep].reset_index(drop=True), firm_ids=cells.firm_ids[firms],
                 firm_matrix=matrix[firms], window=cells.window, by_sector=cells.by_sector)


def _heterogeneity(groups: pd.DataFrame, centre: float) -> tuple[Heterogeneity | None, list[str]]:
    from scipy import stats  # lazy: scipy.stats costs ~0.6 s to import, kept off start-up

    additive = design_matrix(groups, "sector", centre)
    n_sectors = additive.slope
    dummies = additive.matrix[:, :n_sectors]
    t = additive.matrix[:, n_sectors]
    interaction = np.column_stack([dummies, dummies * t[:, None]])
    forced = groups["forced"].to_numpy(dtype=float)
    totals = forced + groups["voluntary"].to_numpy(dtype=float)
    small = fit_grouped_binomial(forced, totals, additive.matrix)
    big = fit_grouped_binomial(forced, totals, interaction)
    if small.separated or big.separated or not (small.converged and big.converged):
        return None, ["The test of equal trends could not be computed: " +
                      " ".join(dict.fromkeys(small.messages + big.messages))]
    statistic = max(small.deviance - big.deviance, 0.0)
    df = n_sectors - 1
    names = tuple(name[len("sector["):-1] for name in additive.names[:n_sectors])
    return Heterogeneity(statistic=statistic, df=df, p=float(stats.chi2.sf(statistic, df)),
                         deviance_additive=small.deviance, deviance_interaction=big.deviance,
                         sectors=names), []


def fit_sector_trends(cells_by_sector: Cells, *, min_departures: int = 20, alpha: float = 0.05,
                      centre: float | None = None) -> SectorTrends:
    """Fit the yearly trend within each sector and test whether the trends differ.

    Parameters
    ----------
    cells_by_sector : Cells
        Counts built with ``by_sector=True``.
    min_departures : int
        Sectors with fewer counted departures in the window are listed but not fitted.
    alpha : float
        1 - confidence level.
    centre : float, optional
        Year subtracted before fitting (window midpoint by default); slopes, odds ratios and
        deviances do not depend on it.

    Returns
    -------
    SectorTrends
        Sectors are skipped (with a reason) for too few departures, no forced or no voluntary
        departures, fewer than 3 years, separation or non-convergence. The common trend
        (``"sector"`` model) and the likelihood-ratio test of equal trends use the fitted sectors
        only; the test needs at least two.
    """
    if not cells_by_sector.by_sector:
        raise ValueError("fit_sector_trends needs cells built with by_sector=True.")
    if min_departures < 1:
        raise ValueError("min_departures must be at least 1.")
    if not 0.0 < alpha < 1.0:
        raise ValueError("alpha must lie strictly between 0 and 1.")
    groups = cells_by_sector.groups
    centre = window_centre(cells_by_sector.window) if centre is None else float(centre)
    trends = tuple(_sector_trend(str(name), part, centre, alpha, min_departures)
                   for name, part in groups.groupby("sector", sort=True))
    fitted = [t.sector for t in trends if t.status == "fitted"]
    messages = [f"{t.sector}: not fitted ({t.reason})." for t in trends if t.status == "skipped"]
    keep = groups["sector"].isin(fitted).to_numpy()
    common: TrendFit | None = None
    heterogeneity: Heterogeneity | None = None
    if fitted:
        try:
            common = fit_trend(_subset(cells_by_sector, keep), "sector", alpha=alpha)
        except TrendError as exc:
            messages.append(f"The common trend could not be fitted: {exc}")
    if len(fitted) >= 2:
        heterogeneity, notes = _heterogeneity(groups.loc[keep].reset_index(drop=True), centre)
        messages += notes
        if heterogeneity is not None and common is not None and common.quasi is not None:
            messages.append("The test of equal trends assumes binomial variation; with the overdispersion "
                            "found here its p-value is too small.")
    else:
        messages.append("Fewer than two sectors could be fitted, so equal trends cannot be tested.")
    return SectorTrends(window=cells_by_sector.window, centre=centre, alpha=alpha,
                        min_departures=min_departures, sectors=trends, common=common,
                        heterogeneity=heterogeneity, messages=tuple(messages))


def sector_trends_to_dict(result: SectorTrends) -> dict[str, object]:
    """JSON-friendly view: ``sectors`` (one object per sector), ``heterogeneity``, ``common``."""
    sectors = [{"sector": t.sector, "status": t.status, "reason": t.reason,
                "odds_ratio": json_number(t.odds_ratio), "log_or": json_number(t.log_or),
                "se": json_number(t.se),
                "conf_int": {k: json_interval(v) for k, v in t.conf_int.items()},
                "departures": t.departures, "forced": t.forced, "n_years": t.n_years,
                "messages": list(t.messages)} for t in result.sectors]
    het = None
    if result.heterogeneity is not None:
        h = result.heterogeneity
        het = {"statistic": h.statistic, "df": h.df, "p": h.p, "deviance_additive": h.deviance_additive,
               "deviance_interaction": h.deviance_interaction, "sectors": list(h.sectors)}
    return {"window": list(result.window), "alpha": result.alpha, "min_departures": result.min_departures,
            "sectors": sectors, "heterogeneity": het,
            "common": fit_to_dict(result.common) if result.common is not None else None,
            "messages": list(result.messages)}
