"""Turn departure records into the count cells every model in ``app.stats`` works on.

A *group* is one fiscal year (or one sector-year when fitting by sector). Each group has two
cells: forced and voluntary departures. Excluded and unmapped departures never enter a model.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from app.stats.codekeys import code_key
from app.types import UNMAPPED

if TYPE_CHECKING:  # scipy.sparse is imported where a firm matrix is built, not at start-up
    from scipy import sparse


def assign_categories(reasons: pd.Series, categories: Mapping[str, str]) -> pd.Series:
    """Map each reason code to its category; codes the mapping lacks become ``"unmapped"``.

    Codes match by :func:`code_key`, so a mapping naming "Retired" also covers "RETIRED " and "retired".

    Parameters
    ----------
    reasons : pandas.Series of str
        The roster's reason codes, one per departure.
    categories : mapping of str to str
        Code -> ``forced`` / ``voluntary`` / ``excluded``.

    Returns
    -------
    pandas.Series of str, aligned with ``reasons``.
    """
    by_key = {code_key(c): cat for c, cat in categories.items()}
    codes, uniq = pd.factorize(reasons, use_na_sentinel=True)
    per_code = np.array([by_key.get(code_key(u), UNMAPPED) for u in uniq] + [UNMAPPED], dtype=object)
    return pd.Series(per_code[codes], index=reasons.index, dtype=object).astype(str)


@dataclass(frozen=True)
class Cells:
    """Grouped counts of forced and voluntary departures, plus the firm-by-cell matrix.

    Attributes
    ----------
    groups : pandas.DataFrame
        One row per group, sorted by (sector, year): columns ``year`` (int), ``sector`` (str;
        ``""`` unless ``by_sector``), ``forced`` and ``voluntary`` (int counts). Only groups with
        at least one counted departure appear.
    firm_ids : numpy.ndarray
        The distinct firm ids with at least one counted departure, in row order of ``firm_matrix``.
    firm_matrix : scipy.sparse.csr_matrix, shape (n_firms, 2 * n_groups)
        Counts per firm; column ``g`` holds forced departures in group ``g``, column
        ``n_groups + g`` voluntary departures in group ``g``. Row sums over firms give ``groups``.
    window : tuple of int
        First and last fiscal year kept (inclusive).
    by_sector : bool
        Whether groups are sector-years.
    """

    groups: pd.DataFrame
    firm_ids: np.ndarray
    firm_matrix: sparse.csr_matrix
    window: tuple[int, int]
    by_sector: bool

    @property
    def n_groups(self) -> int:
        return len(self.groups)

    @property
    def forced(self) -> np.ndarray:
        return self.groups["forced"].to_numpy(dtype=np.int64)

    @property
    def voluntary(self) -> np.ndarray:
        return self.groups["voluntary"].to_numpy(dtype=np.int64)

    @property
    def totals(self) -> np.ndarray:
        return self.forced + self.voluntary

    def fingerprint(self) -> str:
        """A short sha256 of the counts, so an export can prove which data it came from."""
        return groups_fingerprint(self.groups)


def groups_fingerprint(groups: pd.DataFrame) -> str:
    """``Cells.fingerprint`` of these groups (a short sha256 of their CSV form)."""
    return hashlib.sha256(groups.to_csv(index=False).encode()).hexdigest()[:16]


def build_cells(
    records: pd.DataFrame,
    window: tuple[int, int] | None = None,
    *,
    by_sector: bool = False,
) -> Cells:
    """Count forced and voluntary departures per group and per firm.

    Parameters
    ----------
    records : pandas.DataFrame
        One row per departure with columns ``firm_id``, ``year`` (int), ``category`` (str), and
        ``sector`` when ``by_sector``.
    window : (int, int), optional
        Inclusive range of fiscal years to keep; all years when omitted.
    by_sector : bool
        Group by (sector, year) instead of year. Missing sectors count as ``"(none)"``.

    Returns
    -------
    Cells
    """
    frame = records.loc[records["category"].isin(["forced", "voluntary"])]
    years = frame["year"].astype("int64")
    if window is None:
        window = (int(years.min()), int(years.max())) if len(frame) else (0, 0)
    frame = frame.loc[(years >= window[0]) & (years <= window[1])]
    sector = (frame["sector"].fillna("(none)").astype(str) if by_sector
              else pd.Series("", index=frame.index, dtype=object))
    keyed = pd.DataFrame({
        "sector": sector.to_numpy(), "year": frame["year"].astype("int64").to_numpy(),
        "forced": (frame["category"] == "forced").to_numpy(),
        "firm": frame["firm_id"].astype(str).to_numpy(),
    })
    grouped = keyed.groupby(["sector", "year"], sort=True)["forced"].agg(["sum", "count"])
    groups = pd.DataFrame({
        "year": grouped.index.get_level_values("year").astype("int64"),
        "sector": grouped.index.get_level_values("sector").astype(str),
        "forced": grouped["sum"].to_numpy(dtype=np.int64),
        "voluntary": (grouped["count"] - grouped["sum"]).to_numpy(dtype=np.int64),
    })
    n_groups = len(groups)
    group_index = pd.MultiIndex.from_arrays([groups["sector"], groups["year"]])
    gpos = group_index.get_indexer(pd.MultiIndex.from_arrays([keyed["sector"], keyed["year"]]))
    col = np.where(keyed["forced"].to_numpy(), gpos, gpos + n_groups)
    firm_codes, firm_ids = pd.factorize(keyed["firm"], sort=True)
    from scipy import sparse

    matrix = sparse.csr_matrix(
        (np.ones(len(keyed), dtype=np.int64), (firm_codes, col)),
        shape=(len(firm_ids), 2 * n_groups),
    )
    matrix.sum_duplicates()
    return Cells(groups=groups, firm_ids=np.asarray(firm_ids), firm_matrix=matrix,
                 window=(int(window[0]), int(window[1])), by_sector=by_sector)
