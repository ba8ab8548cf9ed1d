"""The natural cubic spline basis in year that the trend's bend test and its bootstrap use."""

from __future__ import annotations

import numpy as np

#: spline df the bend test accepts; more than 6 would chase year-to-year noise in a 20-30 year window
SPLINE_DFS = (2, 3, 4, 5, 6)

__all__ = ["SPLINE_DFS", "natural_spline_basis"]


def natural_spline_basis(x: np.ndarray, df: int, *, knots: tuple[float, ...] | None = None
                         ) -> tuple[np.ndarray, tuple[float, ...]]:
    """Natural cubic spline basis in ``x`` without the constant column.

    Knots sit at the 0, 1/df, ..., 1 quantiles of the distinct values of ``x`` (boundary knots at
    the ends). The basis is the truncated-power form of Hastie, Tibshirani & Friedman, *The
    Elements of Statistical Learning*, eq. 5.4-5.5: column 1 is linear in ``x`` (rescaled to
    [0, 1] for conditioning) so a model with a constant plus this basis nests the straight trend.

    Parameters
    ----------
    x : numpy.ndarray
        Covariate values (years).
    df : int
        Columns returned (2 to 6); the spline has df + 1 knots.
    knots : tuple of float, optional
        Reuse the knots of an earlier call (e.g. to evaluate a fitted spline at new years).

    Returns
    -------
    (numpy.ndarray of shape (len(x), df), tuple of float knots)
    """
    if df not in SPLINE_DFS:
        raise ValueError(f"spline_df must be one of {', '.join(map(str, SPLINE_DFS))}; got {df!r}.")
    x = np.asarray(x, dtype=float)
    if knots is not None and len(knots) != df + 1:
        raise ValueError(f"A spline with {df} df needs {df + 1} knots; got {len(knots)}.")
    knots_ = np.quantile(np.unique(x), np.linspace(0.0, 1.0, df + 1)) if knots is None else np.asarray(knots)
    if len(np.unique(knots_)) < len(knots_):
        raise ValueError(f"A spline with {df} df needs at least {df + 1} distinct years.")
    lo, span = knots_[0], knots_[-1] - knots_[0]
    u, k = (x - lo) / span, (knots_ - lo) / span

    def d(j: int) -> np.ndarray:
        return (np.clip(u - k[j], 0, None) ** 3 - np.clip(u - k[-1], 0, None) ** 3) / (k[-1] - k[j])

    columns = [u] + [d(j) - d(len(k) - 2) for j in range(len(k) - 2)]
    return np.column_stack(columns), tuple(float(v) for v in knots_)
