"""Design matrices for the grouped trend models, shared by the single fit and the batched bootstrap."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
import pandas as pd

from app.types import check_choice

TrendModel = Literal["linear", "sector"]
TREND_MODELS: tuple[TrendModel, ...] = get_args(TrendModel)


@dataclass(frozen=True)
class Design:
    """A design matrix with named columns and the position of the year slope.

    Attributes
    ----------
    matrix : numpy.ndarray, shape (n_groups, n_params)
    names : tuple of str
        Column names, e.g. ``("const", "year")`` or ``("sector[Energy]", ..., "year")``.
    slope : int
        Index of the per-year slope b1 (log odds ratio per year) in ``names``.
    centre : float
        The year subtracted before fitting: ``year - centre`` is the slope's covariate.
    """

    matrix: np.ndarray
    names: tuple[str, ...]
    slope: int
    centre: float


def window_centre(window: tuple[int, int]) -> float:
    """Midpoint of the window; centring keeps b0 interpretable and the fit well conditioned."""
    return (window[0] + window[1]) / 2.0


def design_matrix(groups: pd.DataFrame, model: TrendModel, centre: float) -> Design:
    """Build the design matrix of a trend model over grouped cells.

    Parameters
    ----------
    groups : pandas.DataFrame
        ``Cells.groups``: columns ``year`` and ``sector``.
    model : {"linear", "sector"}
        ``linear``: logit p = b0 + b1 (year - centre).
        ``sector``: one intercept per sector (no global constant) plus a common slope b1.
    centre : float
        Year subtracted from ``year``.

    Returns
    -------
    Design
    """
    check_choice(model, TREND_MODELS, "model")
    t = groups["year"].to_numpy(dtype=float) - centre
    if model == "linear":
        matrix = np.column_stack([np.ones_like(t), t])
        return Design(matrix, ("const", "year"), 1, centre)
    sectors = sorted(groups["sector"].astype(str).unique())
    dummies = (groups["sector"].astype(str).to_numpy()[:, None] == np.array(sectors)[None, :]).astype(float)
    matrix = np.column_stack([dummies, t])
    names = tuple(f"sector[{s}]" for s in sectors) + ("year",)
    return Design(matrix, names, len(sectors), centre)
