"""Turnover rates per firm-year: firm-years from spans, rates per 100 firm-years with exact Poisson intervals.

A *share* (forced / counted departures) can move because either of its parts moves; a *rate* divides a
count of departures by the firm-years at risk (the universe of firms in the index each fiscal year), so the
forced and the voluntary rate can be followed separately. Their trends are in :mod:`app.stats.rate_trend`.

scipy.stats is imported inside the functions (start-up time, as in ``trend``).
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["PER", "RateTable", "count_rates", "expand_spans", "garwood_interval", "rate_table",
           "universe_fingerprint"]

#: rates are reported per this many firm-years
PER = 100.0


def garwood_interval(counts: np.ndarray | pd.Series, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Exact (Garwood 1936) confidence interval for a Poisson mean, in count units.

    lower = chi2.ppf(alpha/2, 2x) / 2 (0 when x = 0), upper = chi2.ppf(1 - alpha/2, 2x + 2) / 2
    (Garwood, *Biometrika* 28, 437-442). Divide by the exposure to get a rate interval.

    Parameters
    ----------
    counts : array_like of int
        Observed event counts (non-negative).
    alpha : float
        1 - confidence level.

    Returns
    -------
    (low, high) : tuple of numpy.ndarray of float
    """
    from scipy import stats  # lazy: scipy.stats costs ~0.6 s to import

    x = np.asarray(counts, dtype=float)
    if np.any(x < 0) or np.any(x != np.floor(x)):
        raise ValueError("Poisson counts must be non-negative whole numbers.")
    if not 0.0 < alpha < 1.0:
        raise ValueError("alpha must lie strictly between 0 and 1.")
    with np.errstate(invalid="ignore"):
        low = np.where(x > 0, stats.chi2.ppf(alpha / 2.0, 2.0 * np.maximum(x, 1.0)) / 2.0, 0.0)
    high = stats.chi2.ppf(1.0 - alpha / 2.0, 2.0 * x + 2.0) / 2.0
    return np.asarray(low, dtype=float), np.asarray(high, dtype=float)


def expand_spans(spans: pd.DataFrame) -> pd.DataFrame:
    """Firm-years (``firm_id``, ``year``) from inclusive spans (``firm_id``, ``first_year``, ``last_year``).

    Overlapping spans of one firm count each year once.
    """
    lengths = (spans["last_year"] - spans["first_year"] + 1).to_numpy(dtype=np.int64)
    if np.any(lengths < 1):
        raise ValueError("A span ends before it starts.")
    firms = np.repeat(spans["firm_id"].astype(str).to_numpy(), lengths)
    starts = np.repeat(spans["first_year"].to_numpy(dtype=np.int64), lengths)
    offsets = np.arange(int(lengths.sum())) - np.repeat(np.cumsum(lengths) - lengths, lengths)
    out = pd.DataFrame({"firm_id": firms, "year": starts + offsets})
    return out.drop_duplicates().sort_values(["firm_id", "year"]).reset_index(drop=True)


def universe_fingerprint(firm_years: pd.DataFrame) -> str:
    """A short sha256 of the sorted firm-years, so a run can prove which universe it divided by."""
    frame = firm_years[["firm_id", "year"]].astype({"firm_id": str, "year": "int64"})
    frame = frame.sort_values(["firm_id", "year"]).reset_index(drop=True)
    return hashlib.sha256(frame.to_csv(index=False).encode()).hexdigest()[:16]


@dataclass(frozen=True)
class RateTable:
    """Departures and firm-years per fiscal year inside a window, with rates per 100 firm-years.

    Attributes
    ----------
    years : pandas.DataFrame
        One row per fiscal year of the window with firm-years: ``year``, ``firm_years``, ``forced``,
        ``voluntary``, ``forced_rate_per_100``, ``forced_low``, ``forced_high``,
        ``voluntary_rate_per_100``, ``voluntary_low``, ``voluntary_high`` (exact Poisson intervals,
        per 100 firm-years).
    outside : int
        Counted (forced or voluntary) departures in the window whose firm-year is not in the universe;
        they are left out of the rates (numerator and denominator must cover the same firm-years).
    no_universe_years : tuple of int
        Years of the window with departures but no firm-years at all.
    window : tuple of int
    alpha : float
    """

    years: pd.DataFrame
    outside: int
    no_universe_years: tuple[int, ...]
    window: tuple[int, int]
    alpha: float

    @property
    def firm_years(self) -> int:
        return int(self.years["firm_years"].sum())


def count_rates(records: pd.DataFrame, firm_years: pd.DataFrame, window: tuple[int, int],
                alpha: float = 0.05) -> RateTable:
    """Count forced and voluntary departures per fiscal year over the universe's firm-years.

    Parameters
    ----------
    records : pandas.DataFrame
        Departures with ``firm_id``, ``year`` and ``category``; only forced and voluntary ones count.
    firm_years : pandas.DataFrame
        The universe: one row per (``firm_id``, ``year``) the firm was in the index.
    window : (int, int)
        Inclusive fiscal years.
    alpha : float
        1 - confidence level of the per-year intervals.

    Returns
    -------
    RateTable
    """
    lo, hi = window
    fy = firm_years.loc[(firm_years["year"] >= lo) & (firm_years["year"] <= hi), ["firm_id", "year"]]
    fy = fy.astype({"firm_id": str, "year": "int64"}).drop_duplicates()
    dep = records.loc[records["category"].isin(["forced", "voluntary"])
                      & (records["year"] >= lo) & (records["year"] <= hi), ["firm_id", "year", "category"]]
    dep = dep.astype({"firm_id": str, "year": "int64"})
    inside = dep.merge(fy, on=["firm_id", "year"], how="inner")
    exposure = fy.groupby("year").size().rename("firm_years")
    counts = pd.crosstab(inside["year"], inside["category"]).reindex(columns=["forced", "voluntary"],
                                                                      fill_value=0)
    return rate_table(counts, exposure, window, alpha=alpha, outside=len(dep) - len(inside),
                      departure_years=dep["year"].unique().tolist())


def rate_table(counts: pd.DataFrame, exposure: pd.Series, window: tuple[int, int], *, alpha: float = 0.05,
               outside: int = 0, departure_years: Iterable[int] = ()) -> RateTable:
    """The ``RateTable`` of counts already made: what ``count_rates`` builds after counting.

    ``counts``: forced and voluntary departures inside the universe per year (index ``year``, columns
    ``forced``, ``voluntary``); ``exposure``: firm-years per year of the window (index ``year``, name
    ``firm_years``); ``outside``: counted departures of the window outside the universe; ``departure_years``:
    the window's years with a counted departure. Lets a caller count in SQL instead of passing every record.
    """
    lo, hi = window
    table = pd.DataFrame(exposure).join(counts, how="left").fillna(0).astype("int64").reset_index()
    table = table.rename(columns={"index": "year"}).sort_values("year").reset_index(drop=True)
    for measure in ("forced", "voluntary"):
        low, high = garwood_interval(table[measure].to_numpy(), alpha)
        e = table["firm_years"].to_numpy(dtype=float)
        table[f"{measure}_rate_per_100"] = PER * table[measure] / e
        table[f"{measure}_low"] = PER * low / e
        table[f"{measure}_high"] = PER * high / e
    missing = sorted(set(departure_years) - set(table["year"].tolist()))
    return RateTable(years=table, outside=int(outside),
                     no_universe_years=tuple(int(y) for y in missing), window=(int(lo), int(hi)), alpha=alpha)
