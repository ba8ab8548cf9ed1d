"""Bootstrap statistics of the other measures: the forced rate's ratio per year and the adjusted odds ratio.

Both run through the same engine as the share statistics (:mod:`app.stats.sampling`: seeded blocks, firm
multiplicities pushed through a firm matrix), on cells of their own:

* ``rate_ratio``: the resampling unit is a firm of the *universe* (every firm in the index during the window,
  with or without departures). Its row of the firm matrix holds its forced departures per fiscal year and
  then its firm-years per fiscal year, so a resample's row is (forced events per year, firm-years per year)
  and each drawn firm brings its exposure as well as its departures. In the engine's ``Cells`` the
  ``voluntary`` column of ``groups`` therefore holds the **firm-years** of each year (:func:`rate_cells`).
  Each resample is refitted by the batched Poisson IRLS (:mod:`app.stats.poisson_batch`) with log
  firm-years as offset, the model of :func:`app.stats.rate_trend.fit_rate_trend`.
* ``adjusted_odds_ratio``: the cells of :func:`app.stats.adjusted.bootstrap_cells` (year x bands x sector,
  firm x cell counts); each resample is refitted by the batched binomial IRLS on the adjusted design.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy import sparse

from app.stats.adjusted import design as adjusted_design
from app.stats.adjusted import parse_adjust
from app.stats.cells import Cells
from app.stats.irls import fit_batch
from app.stats.poisson_batch import fit_poisson_batch
from app.stats.statistics import Evaluated, Statistic, information_se

RATE_LABEL = "forced departures per 100 firm-years, ratio per year"
#: why departures cannot be the resampling unit of a rate (shown as the error)
RATE_NEEDS_FIRMS = ("Departure resampling does not make sense for a rate: the firm-years at risk would stay fixed "
                    "while only the departures vary; resample whole firms of the universe (unit firm), each "
                    "bringing its firm-years and its departures.")


def rate_cells(firm_years: pd.DataFrame, forced: pd.DataFrame, window: tuple[int, int]) -> Cells:
    """The rate bootstrap's cells: one group per fiscal year of the window with firm-years.

    Parameters
    ----------
    firm_years : pandas.DataFrame
        The universe: ``firm_id``, ``year`` (duplicates count once).
    forced : pandas.DataFrame
        Forced departures: ``firm_id``, ``year``, ``departures`` (counts; rows outside the window or outside
        the universe's firm-years are left out, as the Rates section leaves them out).
    window : (int, int)

    Returns
    -------
    Cells
        ``groups``: ``year``, ``sector`` (""), ``forced`` (events inside the universe) and ``voluntary`` (the
        year's **firm-years**); ``firm_ids``: the universe's firms with a firm-year in the window, sorted;
        ``firm_matrix``: firm x (forced per year, then firm-years per year).
    """
    lo, hi = window
    fy = firm_years[["firm_id", "year"]].astype({"firm_id": str, "year": "int64"})
    fy = fy.loc[fy["year"].between(lo, hi)].drop_duplicates()
    if fy.empty:
        raise ValueError(f"The universe has no firm-years in {lo}\u2013{hi}, so there is no rate to resample.")
    years = np.sort(fy["year"].unique())
    codes, firm_ids = pd.factorize(fy["firm_id"], sort=True)
    n, n_firms = len(years), len(firm_ids)
    exposure = sparse.csr_matrix((np.ones(len(fy), dtype=np.int64), (codes, n + np.searchsorted(years, fy["year"]))),
                                 shape=(n_firms, 2 * n))
    dep = forced[["firm_id", "year", "departures"]].astype({"firm_id": str, "year": "int64", "departures": "int64"})
    dep = dep.merge(fy, on=["firm_id", "year"], how="inner")
    events = sparse.csr_matrix((dep["departures"].to_numpy(),
                                (pd.Index(firm_ids).get_indexer(dep["firm_id"]), np.searchsorted(years, dep["year"]))),
                               shape=(n_firms, 2 * n))
    matrix = (exposure + events).tocsr()
    matrix.sum_duplicates()
    totals = np.asarray(matrix.sum(axis=0)).ravel().astype(np.int64)
    groups = pd.DataFrame({"year": years.astype(np.int64), "sector": "", "forced": totals[:n], "voluntary": totals[n:]})
    return Cells(groups=groups, firm_ids=np.asarray(firm_ids), firm_matrix=matrix, window=(int(lo), int(hi)),
                 by_sector=False)


def rate_ratio_statistic(cells: Cells, centre: float) -> Statistic:
    """The log rate ratio per year of the forced rate (Poisson, offset log firm-years) over :func:`rate_cells`,
    with its information-matrix standard error (statsmodels' ``bse``) for the studentized interval."""
    t = cells.groups["year"].to_numpy(dtype=float) - centre
    X = np.column_stack([np.ones_like(t), t])

    def evaluate(rows: np.ndarray, warm: bool = False) -> Evaluated:
        n = rows.shape[1] // 2
        fit = fit_poisson_batch(X, rows[:, :n], rows[:, n:])
        return Evaluated(fit.beta[:, 1], fit.failure, fit.se[:, 1])

    return Statistic("rate_ratio", RATE_LABEL, "log", False, {}, evaluate)


def adjusted_statistic(cells: Cells, adjust: Sequence[str]) -> Statistic:
    """The adjusted model's odds ratio per year (log scale) over the cells of ``bootstrap_cells``, with its
    information-matrix standard error (the studentized interval's; the page's clustered SE is not redrawn)."""
    chosen = parse_adjust(adjust)
    if not {"age_band", "tenure_band"} <= set(cells.groups.columns):
        raise ValueError("The adjusted odds ratio is computed on the adjusted model's cells (year x bands x sector).")
    X, _ = adjusted_design(cells.groups, chosen)
    columns = np.arange(cells.n_groups)
    n_all = cells.n_groups
    full = fit_batch(X, cells.forced[None, :], cells.totals[None, :])
    start = None if full.failure[0] else full.beta[0]

    def evaluate(rows: np.ndarray, warm: bool = False) -> Evaluated:
        forced = rows[:, columns]
        totals = forced + rows[:, columns + n_all]
        # warm: leave-one-out cases start from the full fit (the same estimate to the tolerance, fewer steps)
        fit = fit_batch(X, forced, totals, start=start if warm else None)
        return Evaluated(fit.beta[:, 1], fit.failure, information_se(X, fit.beta, totals, 1))

    what = ", ".join(chosen) if chosen else "nothing"
    return Statistic("adjusted_odds_ratio", f"odds ratio per year adjusted for {what}", "log", cells.by_sector,
                     {"adjust": list(chosen)}, evaluate)


__all__ = ["RATE_LABEL", "RATE_NEEDS_FIRMS", "adjusted_statistic", "rate_cells", "rate_ratio_statistic"]
