"""The statistics a bootstrap can resample: each maps a stack of resampled cell counts to one value per resample.

A statistic is evaluated on rows of cell counts laid out as :mod:`app.stats.sampling` draws them (forced
counts per group, then voluntary counts per group, over ``Cells.groups``), so every statistic that works on
the same cells sees exactly the same resamples for the same seed. Fits are batched through
:func:`app.stats.irls.fit_batch`; a statistic that compares two models (the likelihood-ratio statistics)
runs both fits as two batches over the same rows.

Statistics on the log odds-ratio scale (``scale == "log"``) are reported exponentiated; the others are
reported as they are. Where a per-resample standard error exists (the information-matrix SE of a fitted
coefficient at its estimate, or the binomial SE of a difference in shares) it is returned as well, for the
studentized interval; the likelihood-ratio statistics have none.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
from scipy.special import expit

from app.stats.cells import Cells
from app.stats.design import design_matrix
from app.stats.irls import fit_batch, solve_spd_stack
from app.stats.statistic_names import MEASURE_STATISTICS, STATISTICS, Scale
from app.stats.trend import SPLINE_DFS, natural_spline_basis

#: failure reason of a resample in which one period has no counted departure
EMPTY_PERIOD = "empty_period"


class Evaluated(NamedTuple):
    """One value per row (NaN where it failed), the failure reasons, and standard errors where they exist."""

    values: np.ndarray
    failure: np.ndarray
    standard_errors: np.ndarray | None


@dataclass(frozen=True)
class Statistic:
    """A statistic over the groups of one set of cells.

    Attributes
    ----------
    name : str
        One of ``STATISTICS``.
    label : str
        What the reported value is, for pages and exports.
    scale : {"log", "identity"}
        ``log``: values are log odds ratios, reported exponentiated.
    by_sector : bool
        Whether the cells must be sector-years.
    options : dict
        Everything besides the cells that fixes the statistic (stored with a run).
    evaluate : callable(rows, warm=False) -> Evaluated
        ``rows`` of shape (n, 2 * n_groups); ``warm`` starts fits from the original estimate (for
        leave-one-out cases; statistics without a fit ignore it).
    """

    name: str
    label: str
    scale: Scale
    by_sector: bool
    options: dict[str, Any]
    evaluate: Callable[..., Evaluated] = field(repr=False)

    def original(self, cells: Cells) -> tuple[float, float]:
        """(estimate, its standard error or NaN) on the original counts; a ValueError naming why it fails."""
        out = self.evaluate(_row(cells)[None, :])
        if out.failure[0] or not np.isfinite(out.values[0]):
            raise ValueError(f"The {self.label} cannot be computed on these counts ({out.failure[0] or 'not finite'}), "
                             "so there is nothing to bootstrap.")
        se = float(out.standard_errors[0]) if out.standard_errors is not None else float("nan")
        return float(out.values[0]), se


def information_se(X: np.ndarray, beta: np.ndarray, totals: np.ndarray, column: int) -> np.ndarray:
    """Standard error of coefficient ``column`` for each row of ``beta``: ``sqrt([(X' W X)^-1]_jj)``.

    ``W = n mu (1 - mu)`` at the estimate, the expected (= observed, for the logit link) information of the
    binomial GLM, which is what statsmodels' ``bse`` reports. Rows with NaN coefficients give NaN.

    Parameters
    ----------
    X : numpy.ndarray, shape (n_groups, n_params)
    beta : numpy.ndarray, shape (n_fits, n_params)
    totals : numpy.ndarray, shape (n_fits, n_groups)
    column : int

    Returns
    -------
    numpy.ndarray, shape (n_fits,)
    """
    out = np.full(beta.shape[0], np.nan)
    ok = np.isfinite(beta).all(axis=1)
    if not ok.any():
        return out
    mu = expit(beta[ok] @ X.T)
    weights = totals[ok] * mu * (1.0 - mu)
    p = X.shape[1]
    outer = (X[:, :, None] * X[:, None, :]).reshape(X.shape[0], p * p)
    info = (weights @ outer).reshape(-1, p, p)
    unit = np.zeros((info.shape[0], p))
    unit[:, column] = 1.0
    with np.errstate(invalid="ignore"):
        out[ok] = np.sqrt(solve_spd_stack(info, unit)[:, column])
    return out


def _coefficient(X: np.ndarray, columns: np.ndarray, coef: int, original: np.ndarray, factor: float = 1.0
                 ) -> Callable[..., Evaluated]:
    """Coefficient ``coef`` (times ``factor``) of the logit fit of the groups in ``columns``, with its SE.

    ``warm=True`` starts every fit from the fit of ``original`` (leave-one-out cases, which are close to it:
    two or three IRLS steps instead of five or six, the same estimate to the convergence tolerance).
    """
    n_all = original.size // 2
    full = fit_batch(X, original[None, columns], (original[columns] + original[columns + n_all])[None, :])
    start = None if full.failure[0] else full.beta[0]

    def evaluate(rows: np.ndarray, warm: bool = False) -> Evaluated:
        forced = rows[:, columns]
        totals = forced + rows[:, columns + n_all]
        fit = fit_batch(X, forced, totals, start=start if warm else None)
        se = information_se(X, fit.beta, totals, coef)
        return Evaluated(factor * fit.beta[:, coef], fit.failure, factor * se)

    return evaluate


def coefficient_statistic(cells: Cells, matrix: np.ndarray, coef: int, label: str = "odds ratio per year"
                          ) -> Statistic:
    """Any coefficient of any design over ``cells`` as a statistic (log scale), e.g. a model's year slope."""
    return Statistic("slope", label, "log", cells.by_sector, {},
                     _coefficient(np.asarray(matrix, dtype=float), np.arange(cells.n_groups), coef, _row(cells)))


def _row(cells: Cells) -> np.ndarray:
    return np.concatenate([cells.forced, cells.voluntary]).astype(float)


def _likelihood_ratio(small: np.ndarray, big: np.ndarray, columns: np.ndarray
                      ) -> Callable[[np.ndarray], Evaluated]:
    """deviance(small) - deviance(big) (at least 0) over the groups in ``columns``: two batched fits."""

    def evaluate(rows: np.ndarray, warm: bool = False) -> Evaluated:
        n_all = rows.shape[1] // 2
        forced = rows[:, columns]
        totals = forced + rows[:, columns + n_all]
        a = fit_batch(small, forced, totals)
        b = fit_batch(big, forced, totals)
        failure = np.where(a.failure != "", a.failure, b.failure)
        values = np.where(failure == "", np.maximum(a.deviance - b.deviance, 0.0), np.nan)
        return Evaluated(values, failure, None)

    return evaluate


def _period_difference(groups: pd.DataFrame, periods: tuple[tuple[int, int], tuple[int, int]]
                       ) -> Callable[[np.ndarray], Evaluated]:
    years = groups["year"].to_numpy(dtype=np.int64)
    masks = [((years >= a) & (years <= b)).astype(float) for a, b in periods]

    def evaluate(rows: np.ndarray, warm: bool = False) -> Evaluated:
        n = rows.shape[1] // 2
        forced, totals = rows[:, :n], rows[:, :n] + rows[:, n:]
        f = np.column_stack([forced @ m for m in masks])
        t = np.column_stack([totals @ m for m in masks])
        empty = (t == 0).any(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            p = f / t
            se = np.sqrt((p * (1.0 - p) / t).sum(axis=1))
        values = np.where(empty, np.nan, p[:, 1] - p[:, 0])
        failure = np.where(empty, EMPTY_PERIOD, "").astype("<U14")
        return Evaluated(values, failure, np.where(empty, np.nan, se))

    return evaluate


def _centred(groups: pd.DataFrame, centre: float) -> np.ndarray:
    return groups["year"].to_numpy(dtype=float) - centre


def make_statistic(name: str, cells: Cells, *, centre: float, model: str = "linear", sector: str | None = None,
                   sectors: tuple[str, ...] | None = None, spline_df: int = 3,
                   periods: tuple[tuple[int, int], tuple[int, int]] | None = None) -> Statistic:
    """The statistic ``name`` over ``cells``.

    Parameters
    ----------
    name : str
        One of ``STATISTICS``.
    cells : Cells
        The cells that will be resampled: sector-years for ``sector_slope``, ``heterogeneity`` and the
        ``slope`` of the ``sector`` model, years otherwise.
    centre : float
        Year subtracted before fitting (the window's midpoint).
    model : {"linear", "sector"}
        For ``slope`` and ``decade_odds_ratio``: the straight or the sector-adjusted trend.
    sector : str
        For ``sector_slope``: the sector whose own trend is resampled.
    sectors : tuple of str
        For ``heterogeneity``: the fitted sectors the test uses (as the Sectors page fits them).
    spline_df : int
        For ``spline_bend``: 2 to 6.
    periods : ((int, int), (int, int))
        For ``period_difference``: the first and second period, inclusive years.

    Returns
    -------
    Statistic

    Raises
    ------
    ValueError
        On an unknown name, missing or unusable option, or cells of the wrong kind; the message says which.
    """
    if name not in STATISTICS:
        raise ValueError(f"statistic must be one of {', '.join(STATISTICS)}; got {name!r}.")
    if name in MEASURE_STATISTICS:
        raise ValueError(f"The {name} statistic is computed on cells of its own: see app.stats.measures.")
    groups = cells.groups
    needs_sectors = name in ("sector_slope", "heterogeneity") or (name in ("slope", "decade_odds_ratio")
                                                                  and model == "sector")
    if needs_sectors != cells.by_sector:
        kind = "sector-year" if needs_sectors else "year"
        raise ValueError(f"The {name} statistic (model {model}) is computed on {kind} cells.")
    everything = np.arange(len(groups))
    if name in ("slope", "decade_odds_ratio"):
        if model not in ("linear", "sector"):
            raise ValueError(f"model must be linear or sector; got {model!r}.")
        design = design_matrix(groups, model, centre)  # type: ignore[arg-type]
        per = 10.0 if name == "decade_odds_ratio" else 1.0
        label = "odds ratio per decade" if per == 10.0 else "odds ratio per year"
        if model == "sector":
            label += " (adjusted for sector)"
        return Statistic(name, label, "log", needs_sectors, {"model": model},
                         _coefficient(design.matrix, everything, design.slope, _row(cells), per))
    if name == "sector_slope":
        names = sorted(set(groups["sector"].astype(str)))
        if sector not in names:
            raise ValueError(f"sector must be one of {', '.join(names)}; got {sector!r}.")
        columns = np.flatnonzero(groups["sector"].astype(str).to_numpy() == sector)
        X = np.column_stack([np.ones(columns.size), _centred(groups.iloc[columns], centre)])
        return Statistic(name, f"odds ratio per year in {sector}", "log", True, {"sector": sector},
                         _coefficient(X, columns, 1, _row(cells)))
    if name == "heterogeneity":
        present = sorted(set(groups["sector"].astype(str)))
        chosen = tuple(sorted(sectors)) if sectors else ()
        if len(chosen) < 2 or not set(chosen) <= set(present):
            raise ValueError(f"The test of equal trends needs at least two of the sectors {', '.join(present)}; "
                             f"got {', '.join(chosen) or 'none'}.")
        columns = np.flatnonzero(groups["sector"].astype(str).isin(chosen).to_numpy())
        part = groups.iloc[columns]
        additive = design_matrix(part, "sector", centre)
        dummies = additive.matrix[:, :additive.slope]
        interaction = np.column_stack([dummies, dummies * additive.matrix[:, [additive.slope]]])
        return Statistic(name, "likelihood-ratio statistic of equal trends", "identity", True,
                         {"sectors": list(chosen)}, _likelihood_ratio(additive.matrix, interaction, columns))
    if name == "spline_bend":
        if spline_df not in SPLINE_DFS:
            raise ValueError(f"spline_df must be one of {', '.join(map(str, SPLINE_DFS))}; got {spline_df!r}.")
        years = groups["year"].to_numpy(dtype=float)
        if len(np.unique(years)) < spline_df + 2:
            raise ValueError(f"Too few years for a spline with {spline_df} df.")
        basis, _ = natural_spline_basis(years, spline_df)
        straight = np.column_stack([np.ones_like(years), years - centre])
        spline = np.column_stack([np.ones_like(years), basis])
        return Statistic(name, f"likelihood-ratio statistic of the bend test ({spline_df} df spline)", "identity",
                         False, {"spline_df": int(spline_df)}, _likelihood_ratio(straight, spline, everything))
    if periods is None:
        raise ValueError("period_difference needs two periods, e.g. 1997-2009:2010-2022.")
    (a, b), (c, d) = periods
    if not (a <= b < c <= d):
        raise ValueError(f"The first period must end before the second starts; got {a}-{b} and {c}-{d}.")
    return Statistic(name, f"difference in the forced share, {c}\u2013{d} minus {a}\u2013{b}", "identity", False,
                     {"periods": [[int(a), int(b)], [int(c), int(d)]]}, _period_difference(groups, ((a, b), (c, d))))


def firm_strata(cells_by_sector: Cells) -> tuple[np.ndarray, tuple[str, ...]]:
    """Each firm's sector (as an index into the sorted sector names), for resampling firms within sector.

    A firm whose counted departures fall in more than one sector (it was reclassified) is placed in the
    sector of most of its departures, the first in name order on a tie.

    Returns
    -------
    (strata, names) : numpy.ndarray of int (one per firm, in ``firm_ids`` order), tuple of str
    """
    if not cells_by_sector.by_sector:
        raise ValueError("Firm strata need cells built with by_sector=True.")
    names = tuple(sorted(set(cells_by_sector.groups["sector"].astype(str))))
    n = cells_by_sector.n_groups
    sector_of_group = np.searchsorted(names, cells_by_sector.groups["sector"].astype(str).to_numpy())
    column_sector = np.concatenate([sector_of_group, sector_of_group])
    to_sector = np.zeros((2 * n, len(names)))
    to_sector[np.arange(2 * n), column_sector] = 1.0
    per_sector = np.asarray(cells_by_sector.firm_matrix @ to_sector)
    return np.argmax(per_sector, axis=1).astype(np.int64), names
