"""Percentile, basic, BCa, normal and studentized intervals from stored bootstrap replicates, with Monte Carlo error.

Everything here works on replicate values alone (plus the jackknife values for the BCa
acceleration, and each resample's standard error for the studentized interval), so intervals can
be recomputed from a stored run without drawing again.

Normal: Davison & Hinkley (1997) eq. 5.5, the bias-corrected normal approximation
``estimate - b -/+ z_{1-alpha/2} sd`` with ``b = mean(replicates) - estimate`` and ``sd`` their
standard deviation (ddof 1): Efron & Tibshirani (1993) ch. 13's standard interval with the
bootstrap's bias estimate (ch. 10) taken off; R's ``boot.ci(type = "norm")`` computes the same.
Studentized (bootstrap-t): Efron & Tibshirani (1993) ch. 12.5, Davison & Hinkley (1997) eq. 5.7:
``t* = (replicate - estimate) / se*`` with ``se*`` each resample's own standard error, and the
interval ``(estimate - se t*_{1-alpha/2}, estimate - se t*_{alpha/2})`` with ``se`` the standard
error on the original data.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy.special import ndtr, ndtri

from app.stats.jackknife import jackknife_acceleration

IntervalMethod = Literal["percentile", "basic", "bca", "normal", "studentized"]
INTERVAL_METHODS: tuple[IntervalMethod, ...] = ("percentile", "basic", "bca", "normal", "studentized")

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
        ``percentile``, ``basic``, ``bca``, ``normal``, ``studentized`` (NaN where no standard
        error per resample was given, or one of them is not finite or is zero).
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
    centre = 2 * estimate - ordered.mean(axis=1)
    half = ndtri(1 - alpha / 2) * np.std(ordered, axis=1, ddof=1)
    normal = np.column_stack([centre - half, centre + half])
    return {"percentile": pct, "basic": basic, "bca": bca, "normal": normal}, z0


def _studentized(t_sorted: np.ndarray | None, estimate: float, se: float, alpha: float) -> np.ndarray:
    """Bootstrap-t bounds for each row of sorted studentized replicates (NaN rows where unavailable)."""
    if t_sorted is None or not np.isfinite(se):
        return np.full((1 if t_sorted is None else t_sorted.shape[0], 2), np.nan)
    q = _quantile_sorted(t_sorted, np.tile([alpha / 2, 1 - alpha / 2], (t_sorted.shape[0], 1)))
    return estimate - se * q[:, ::-1]


def intervals_from_replicates(
    estimate: float,
    replicates: np.ndarray,
    jackknife_values: np.ndarray,
    alpha: float = 0.05,
    *,
    jackknife_weights: np.ndarray | None = None,
    mc_seed: int = 0,
    mc_resamples: int = MC_RESAMPLES,
    standard_errors: np.ndarray | None = None,
    estimate_se: float = float("nan"),
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
    standard_errors : numpy.ndarray, optional
        Each resample's standard error of the statistic (aligned with ``replicates``), for the
        studentized interval; the Monte Carlo re-resampling draws (replicate, standard error) pairs.
    estimate_se : float
        The statistic's standard error on the original data (studentized interval).

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
    kept = np.isfinite(values)
    order = np.argsort(values[kept], kind="stable")  # the sorted replicates, with their standard errors
    finite = values[kept][order]
    if finite.size < 2:
        raise ValueError("at least 2 successful resamples are needed for an interval.")
    t_values: np.ndarray | None = None
    if standard_errors is not None:
        se = np.asarray(standard_errors, dtype=float)
        if se.shape != values.shape:
            raise ValueError("standard_errors must have one entry per replicate.")
        with np.errstate(divide="ignore", invalid="ignore"):
            t_values = (finite - float(estimate)) / se[kept][order]
        if not np.isfinite(t_values).all():
            t_values = None
    weights = None if jackknife_weights is None else [np.asarray(jackknife_weights)]
    accel = jackknife_acceleration([np.asarray(jackknife_values, dtype=float)], weights)
    bounds, z0 = _bounds(finite[None, :], float(estimate), alpha, accel)
    bounds["studentized"] = _studentized(None if t_values is None else np.sort(t_values)[None, :],
                                         float(estimate), float(estimate_se), alpha)

    rng = np.random.default_rng(mc_seed)
    per_pass = max(1, PASS_ELEMENTS // finite.size)
    redrawn: dict[str, list[np.ndarray]] = {m: [np.full((1, 2), np.nan)] for m in INTERVAL_METHODS}
    if mc_resamples:
        redrawn = {m: [] for m in INTERVAL_METHODS}
    if mc_resamples == 1 or mc_resamples < 0:
        raise ValueError(f"mc_resamples must be 0 or at least 2; got {mc_resamples!r}.")
    for lo in range(0, mc_resamples, per_pass):
        rows = min(per_pass, mc_resamples - lo)
        picked = rng.integers(0, finite.size, size=(rows, finite.size))
        again = np.sort(finite[picked], axis=1)
        for method, value in _bounds(again, float(estimate), alpha, accel)[0].items():
            redrawn[method].append(value)
        t_again = None if t_values is None else np.sort(t_values[picked], axis=1)
        redrawn["studentized"].append(_studentized(t_again, float(estimate), float(estimate_se), alpha))
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

