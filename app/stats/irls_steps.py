"""The solve of one IRLS step for a stack of fits: in closed form on arrow designs, by elimination otherwise.

One intercept per sector and a common year slope, or one intercept and a slope (the straight trend, one
block), give an ``X' W X`` that is diagonal over the indicator columns plus a dense last row and column
(an arrow design). :class:`ArrowStep` solves each IRLS step of such a design through the Schur complement
of that diagonal, :class:`GeneralStep` any design by elimination (:func:`solve_spd_stack`);
:func:`app.stats.irls.fit_batch` runs the same loop with either.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ArrowDesign:
    """A design of block indicators plus one last covariate column, e.g. one intercept per sector
    and a common year slope (the linear trend is the one-block case).

    Its ``X' W X`` is an arrow matrix: diagonal over the indicator columns plus a dense last row
    and column, so every IRLS step is solved through the Schur complement of that diagonal in
    O(n_params) instead of a general p x p elimination.

    Attributes
    ----------
    block : numpy.ndarray of int, shape (n_groups,)
        Indicator column that is 1 in each row.
    covariate : numpy.ndarray, shape (n_groups,)
        The last column of the design.
    indicators : numpy.ndarray, shape (n_groups, n_params - 1)
        The indicator columns, contiguous.
    """

    block: np.ndarray
    covariate: np.ndarray
    indicators: np.ndarray


def arrow_design(X: np.ndarray) -> ArrowDesign | None:
    """Detect an arrow design: columns ``0 .. p-2`` are 0/1 with exactly one 1 per row.

    Returns None for any other design (which then takes the general solver).
    """
    X = np.asarray(X, dtype=float)
    if X.ndim != 2 or X.shape[1] < 2 or X.shape[0] == 0:
        return None
    indicators = X[:, :-1]
    # (== comparisons, not np.isin: this runs once per batch of fits, and isin's set machinery cost ~5% of a
    # 10,000-resample departure bootstrap)
    if not (((indicators == 0.0) | (indicators == 1.0)).all() and (indicators.sum(axis=1) == 1.0).all()):
        return None
    return ArrowDesign(block=np.argmax(indicators, axis=1), covariate=np.ascontiguousarray(X[:, -1]),
                       indicators=np.ascontiguousarray(indicators))


def solve_arrow_stack(arrow: ArrowDesign, weights: np.ndarray, xtwz: np.ndarray) -> np.ndarray:
    """Solve ``(X' W_k X) beta_k = xtwz_k`` for every row ``k`` of ``weights`` on an arrow design.

    This is the elimination :func:`solve_spd_stack` performs on the same matrices
    (indicator pivots first; their columns do not interact), written out: the last pivot is the Schur
    complement ``c - sum_s b_s**2 / d_s`` with ``d_s`` the weight of block ``s``, ``b_s`` its
    weighted covariate sum and ``c`` the weighted sum of squared covariates. Systems that are not
    numerically positive definite (same pivot test as ``solve_spd_stack``) give a NaN row.
    """
    t = arrow.covariate
    d = weights @ arrow.indicators
    b = (weights * t) @ arrow.indicators
    c = weights @ (t * t)
    u, v = xtwz[:, :-1], xtwz[:, -1]
    scale = np.maximum(d.max(axis=1), np.abs(c))
    singular = ~(scale > 0) | ~(d > 1e-13 * scale[:, None]).all(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = b / d
        schur = c - (ratio * b).sum(axis=1)
        singular |= ~(schur > 1e-13 * scale)
        last = (v - (ratio * u).sum(axis=1)) / schur
        out = np.empty_like(xtwz)
        out[:, :-1] = u / d - ratio * last[:, None]
    out[:, -1] = last
    out[singular] = np.nan
    return out


class ArrowStep:
    """One IRLS step on an arrow design: the closed-form solve and the new linear predictor.

    With one block (an intercept and a slope) the solve runs on plain vectors: every sum over blocks in
    :func:`solve_arrow_stack` then has a single term, so the numbers are the same bit for bit, from the
    same matrix products, in half the numpy calls. Callers hold numpy's error state (divisions by a zero
    pivot give the NaN rows).
    """

    def __init__(self, arrow: ArrowDesign) -> None:
        self.arrow = arrow
        self.squares = arrow.covariate * arrow.covariate
        self.one_block = arrow.indicators.shape[1] == 1

    def solve(self, weights: np.ndarray, xtwz: np.ndarray) -> np.ndarray:
        """New coefficients, shape (n_fits, n_params); NaN rows where the system is singular."""
        if not self.one_block:
            return solve_arrow_stack(self.arrow, weights, xtwz)
        ones = self.arrow.indicators
        d = (weights @ ones)[:, 0]
        b = ((weights * self.arrow.covariate) @ ones)[:, 0]
        c = weights @ self.squares
        ratio = b / d
        schur = c - ratio * b
        # the pivot tests of solve_arrow_stack in one: d and the Schur complement above 1e-13 of the scale
        # (NaN fails; a zero scale leaves d <= 0, which fails too)
        regular = np.minimum(d, schur) > 1e-13 * np.maximum(d, np.abs(c))
        u, v = xtwz[:, 0], xtwz[:, 1]
        out = np.empty_like(xtwz)
        last = np.divide(v - ratio * u, schur, out=out[:, 1])
        np.subtract(u / d, ratio * last, out=out[:, 0])
        if not regular.all():
            out[~regular] = np.nan
        return out

    def linear(self, beta: np.ndarray, out: np.ndarray) -> np.ndarray:
        """``beta @ X.T`` written into ``out``: each group's block coefficient plus slope times covariate."""
        np.multiply(beta[:, -1:], self.arrow.covariate, out=out)
        out += beta[:, :1] if self.one_block else beta[:, self.arrow.block]
        return out


class GeneralStep:
    """One IRLS step on any design: ``X' W X`` for every fit as one matrix product, then elimination."""

    def __init__(self, X: np.ndarray) -> None:
        self.X = X
        self.p = X.shape[1]
        # X_i X_j per group, so that X' W X for every fit is one matrix product
        self.outer = (X[:, :, None] * X[:, None, :]).reshape(X.shape[0], self.p**2)

    def solve(self, weights: np.ndarray, xtwz: np.ndarray) -> np.ndarray:
        return solve_spd_stack((weights @ self.outer).reshape(-1, self.p, self.p), xtwz)

    def linear(self, beta: np.ndarray, out: np.ndarray) -> np.ndarray:
        return np.matmul(beta, self.X.T, out=out)


def solve_spd_stack(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve each symmetric positive definite system ``a[k] x = b[k]``.

    Gaussian elimination without pivoting (safe for positive definite matrices), vectorised over
    the stack: a few numpy calls per column instead of one LAPACK call per system, and each
    system's arithmetic does not depend on the others. A system that is not numerically
    positive definite gives a NaN row.
    """
    m = np.concatenate([a, b[:, :, None]], axis=2)
    p = a.shape[1]
    scale = np.abs(np.diagonal(a, axis1=1, axis2=2)).max(axis=1)
    singular = ~(scale > 0)
    for k in range(p):
        pivot = m[:, k, k]
        singular |= ~(pivot > 1e-13 * scale)
        pivot = np.where(singular, 1.0, pivot)
        m[:, k, k:] /= pivot[:, None]
        if k + 1 < p:
            m[:, k + 1:, k:] -= m[:, k + 1:, k, None] * m[:, k, None, k:]
    x = np.empty_like(b)
    for k in range(p - 1, -1, -1):
        x[:, k] = m[:, k, p] - (m[:, k, k + 1:p] * x[:, k + 1:]).sum(axis=1)
    x[singular] = np.nan
    return x
