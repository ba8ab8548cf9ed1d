"""Percentile, basic and BCa intervals from stored bootstrap replicates, with Monte Carlo error.

Everything here works on replicate values alone (plus the jackknife values for the BCa
acceleration), so intervals can be recomputed from a stored run without drawing again.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy.special import ndtr, ndtri

from app.stats.jackknife import jackknife_acceleration

IntervalMethod = Literal["percentile", "basic", "bca"]
INTERVAL_METHODS: tuple[IntervalMethod, ...] = ("percentile", "basic", "bca")

#: replicate values re-drawn at once when estimating Monte Carlo error (8 bytes each)
PASS_ELEMENTS = 1_000_000
#: re-resamples of the replicates used to estimate Monte Carlo error
MC_RESAMPLES = 200


@dataclass(frozen=True)
class BootstrapIntervals:
    """Percentile, basic and BCa intervals on the scale of the replicates given.

    Attributes
    ----------
    alpha : float
        Two-sided error rate: each interval covers ``1 - alpha``.
    successful : int
        Finite replicates used (failed resamples are left out, so intervals are conditional on
        a successful fit).
    bounds : dict of str to (float, float)
        ``percentile``, ``basic``, ``bca``.
    mc_error : dict of str to (float, float)
        Monte Carlo standard error of each bound: the SD of that bound over ``MC_RESAMPLES``
        re-resamples (with replacement) of the replicates, acceleration held fixed.
    acceleration : float
        Jackknife acceleration ``a``.
    bias : float
        Bias correction ``z0 = ndtri(share of replicates below the estimate)``, ties counting
        half (as scipy.stats.bootstrap).
    standard_error : float
        SD of the replicates (ddof 1).
    """

    alpha: float
    successful: int
    bounds: dict[str, tuple[float, float]]
    mc_error: dict[str, tuple[float, float]]
    acceleration: float
    bias: float
    standard_error: float



def check_alpha(alpha: float) -> float:
    """``alpha`` as a float strictly between 0 and 1, or a ValueError that says so."""
    if not 0.0 < float(alpha) < 1.0:
        raise ValueError(f"alpha must be between 0 and 1 (exclusive); got {alpha!r}.")
    return float(alpha)


def _quantile_sorted(ordered: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Linear-interpolation quantiles (numpy's default, Hyndman & Fan type 7) of sorted rows."""
    n = ordered.shape[-1]
    h = np.clip(q, 0.0, 1.0) * (n - 1)
    lo = np.floor(h).astype(np.int64)
    hi = np.minimum(lo + 1, n - 1)
    below = np.take_along_axis(ordered, lo, axis=-1)
    above = np.take_along_axis(ordered, hi, axis=-1)
    return below + (h - lo) * (above - below)


def _bounds(ordered: np.ndarray, estimate: float, alpha: float, accel: float
            ) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Interval bounds for each row of sorted replicates: arrays of shape (rows, 2)."""
    rows, b = ordered.shape
    levels = np.tile([alpha / 2, 1 - alpha / 2], (rows, 1))
    pct = _quantile_sorted(ordered, levels)
    basic = 2 * estimate - pct[:, ::-1]
    below = (ordered < estimate).sum(axis=1) + (ordered <= estimate).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        z0 = ndtri(below / (2.0 * b))
        z = ndtri(levels)
        shifted = z0[:, None] + z
        adjusted = ndtr(z0[:, None] + shifted / (1 - accel * shifted))
    bca = _quantile_sorted(ordered, np.nan_to_num(adjusted, nan=0.0))
    bca[~np.isfinite(adjusted).all(axis=1)] = np.nan
    return {"percentile": pct, "basic": basic, "bca": bca}, z0


def intervals_from_replicates(
    estimate: float,
    replicates: np.ndarray,
    jackknife_values: np.ndarray,
    alpha: float = 0.05,
    *,
    jackknife_weights: np.ndarray | None = None,
    mc_seed: int = 0,
    mc_resamples: int = MC_RESAMPLES,
) -> BootstrapIntervals:
    """Percentile, basic and BCa intervals from stored bootstrap replicates.

    Parameters
    ----------
    estimate : float
        The statistic on the original data.
    replicates : numpy.ndarray
        Bootstrap values of the statistic; NaN marks failed resamples, which are left out.
    jackknife_values : numpy.ndarray
        Leave-one-unit-out values of the statistic (distinct cases), for the BCa acceleration.
    alpha : float
        Two-sided error rate (0.05 gives 95% intervals).
    jackknife_weights : numpy.ndarray, optional
        Multiplicity of each jackknife value.
    mc_seed : int
        Seed of the re-resampling that estimates Monte Carlo error.
    mc_resamples : int
        Re-resamples for the Monte Carlo error (at least 2; 0 skips it and gives NaN errors).

    Returns
    -------
    BootstrapIntervals
        Percentile: the ``alpha/2`` and ``1 - alpha/2`` quantiles (linear interpolation).
        Basic: ``2 estimate - `` those quantiles, swapped. BCa: Efron & Tibshirani (1993) §14.3
        with ``z0`` from the share below the estimate and ``a`` from the jackknife. These equal
        ``scipy.stats.bootstrap(..., n_resamples=0, bootstrap_result=...)`` on the same values.
    """
    alpha = check_alpha(alpha)
    values = np.asarray(replicates, dtype=float)
    finite = np.sort(values[np.isfinite(values)])
    if finite.size < 2:
        raise ValueError("at least 2 successful resamples are needed for an interval.")
    weights = None if jackknife_weights is None else [np.asarray(jackknife_weights)]
    accel = jackknife_acceleration([np.asarray(jackknife_values, dtype=float)], weights)
    bounds, z0 = _bounds(finite[None, :], float(estimate), alpha, accel)

    rng = np.random.default_rng(mc_seed)
    per_pass = max(1, PASS_ELEMENTS // finite.size)
    redrawn: dict[str, list[np.ndarray]] = {m: [np.full((1, 2), np.nan)] for m in INTERVAL_METHODS}
    if mc_resamples:
        redrawn = {m: [] for m in INTERVAL_METHODS}
    if mc_resamples == 1 or mc_resamples < 0:
        raise ValueError(f"mc_resamples must be 0 or at least 2; got {mc_resamples!r}.")
    for lo in range(0, mc_resamples, per_pass):
        rows = min(per_pass, mc_resamples - lo)
        again = np.sort(finite[rng.integers(0, finite.size, size=(rows, finite.size))], axis=1)
        for method, value in _bounds(again, float(estimate), alpha, accel)[0].items():
            redrawn[method].append(value)
    mc_error: dict[str, tuple[float, float]] = {}
    for method in INTERVAL_METHODS:
        stacked = np.concatenate(redrawn[method])
        usable = stacked.shape[0] > 1 and np.isfinite(stacked).all()
        sd = np.std(stacked, axis=0, ddof=1) if usable else np.full(2, np.nan)
        mc_error[method] = (float(sd[0]), float(sd[1]))
    return BootstrapIntervals(
        alpha=alpha, successful=int(finite.size),
        bounds={m: (float(v[0, 0]), float(v[0, 1])) for m, v in bounds.items()},
        mc_error=mc_error, acceleration=accel, bias=float(z0[0]),
        standard_error=float(np.std(finite, ddof=1)),
    )

