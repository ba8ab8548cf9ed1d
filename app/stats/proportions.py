"""Confidence intervals for the forced share of departures in one group (year or sector-year)."""

from __future__ import annotations

import numpy as np
import pandas as pd


def share_intervals(forced: np.ndarray | pd.Series | list[int], total: np.ndarray | pd.Series | list[int],
                    alpha: float = 0.05) -> pd.DataFrame:
    """Observed share forced / total with Wilson and Clopper-Pearson intervals.

    Parameters
    ----------
    forced, total : array_like of int
        Forced departures and all counted departures per group (0 <= forced <= total).
    alpha : float
        1 - confidence level (0.05 gives 95% intervals).

    Returns
    -------
    pandas.DataFrame
        Columns ``share``, ``wilson_low``, ``wilson_high``, ``cp_low``, ``cp_high``, one row per
        group in input order. Wilson is the score interval (no continuity correction), which stays
        inside [0, 1] and is not zero-width at 0 / n; Clopper-Pearson is the exact (beta) interval,
        with a lower bound of exactly 0 when forced = 0 and an upper bound of exactly 1 when
        forced = total. Groups with total 0 get NaN everywhere.
    """
    from statsmodels.stats.proportion import proportion_confint

    x = np.asarray(forced, dtype=float)
    n = np.asarray(total, dtype=float)
    if x.shape != n.shape or x.ndim != 1:
        raise ValueError("forced and total must be one-dimensional and of the same length.")
    if not 0.0 < alpha < 1.0:
        raise ValueError("alpha must lie strictly between 0 and 1.")
    if np.any(n < 0) or np.any(x < 0) or np.any(x > n):
        raise ValueError("Counts must satisfy 0 <= forced <= total.")
    columns = ["share", "wilson_low", "wilson_high", "cp_low", "cp_high"]
    out = pd.DataFrame(np.nan, index=range(len(x)), columns=columns)
    has = n > 0
    if np.any(has):
        xs, ns = x[has], n[has]
        wl, wh = proportion_confint(xs, ns, alpha=alpha, method="wilson")
        cl, ch = proportion_confint(xs, ns, alpha=alpha, method="beta")
        # The beta quantile at x = 0 (x = n) is exactly 0 (1) in theory; pin it so that rounding
        # inside the quantile function can never leave a tiny positive lower bound.
        cl = np.where(xs == 0, 0.0, cl)
        ch = np.where(xs == ns, 1.0, ch)
        out.loc[has, "share"] = xs / ns
        out.loc[has, "wilson_low"] = np.clip(wl, 0.0, 1.0)
        out.loc[has, "wilson_high"] = np.clip(wh, 0.0, 1.0)
        out.loc[has, "cp_low"] = cl
        out.loc[has, "cp_high"] = ch
    return out
