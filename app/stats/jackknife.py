"""Leave-one-out (jackknife) cases over a resampling unit, and the BCa acceleration built from them.

Leaving out any one departure of a given cell gives the same data, so the departure jackknife has
at most one distinct case per (group, category) cell, weighted by the cell's count. Firms whose
count rows are identical likewise give one case weighted by how many such firms there are. The
acceleration computed from weighted distinct cases equals the one from all n cases.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import sparse


@dataclass(frozen=True)
class JackknifeCases:
    """Distinct leave-one-out data sets.

    Attributes
    ----------
    cells : numpy.ndarray of int, shape (n_cases, n_cells)
        Cell counts (forced cells then voluntary cells) with one unit left out.
    weights : numpy.ndarray of int, shape (n_cases,)
        How many units give this case; they sum to the number of units.
    """

    cells: np.ndarray
    weights: np.ndarray


def departure_cases(cells: np.ndarray) -> JackknifeCases:
    """Leave-one-departure-out cases: one per non-empty cell, weighted by its count.

    Parameters
    ----------
    cells : numpy.ndarray of int, shape (n_cells,)
        Counts per cell.
    """
    cells = np.asarray(cells, dtype=np.int64)
    occupied = np.flatnonzero(cells > 0)
    cases = np.repeat(cells[None, :], occupied.size, axis=0)
    cases[np.arange(occupied.size), occupied] -= 1
    return JackknifeCases(cells=cases, weights=cells[occupied])


def _distinct_rows(unit_matrix: sparse.csr_matrix) -> tuple[sparse.csr_matrix, np.ndarray, np.ndarray]:
    """The canonical integer matrix, the first row of each distinct count row, and its multiplicity."""
    matrix = sparse.csr_matrix(unit_matrix, dtype=np.int64)
    matrix.sum_duplicates()
    matrix.sort_indices()
    matrix.eliminate_zeros()
    keys: dict[bytes, int] = {}
    first_row: list[int] = []
    weights: list[int] = []
    indptr, indices, data = matrix.indptr, matrix.indices, matrix.data
    for row in range(matrix.shape[0]):
        lo, hi = indptr[row], indptr[row + 1]
        key = indices[lo:hi].tobytes() + b"|" + data[lo:hi].tobytes()
        slot = keys.setdefault(key, len(first_row))
        if slot == len(first_row):
            first_row.append(row)
            weights.append(1)
        else:
            weights[slot] += 1
    return matrix, np.asarray(first_row, dtype=np.int64), np.asarray(weights, dtype=np.int64)


def cluster_cases(unit_matrix: sparse.csr_matrix) -> JackknifeCases:
    """Leave-one-cluster-out cases (a cluster is a firm): one per distinct count row.

    Parameters
    ----------
    unit_matrix : scipy.sparse.csr_matrix, shape (n_units, n_cells)
        Counts per unit and cell (``Cells.firm_matrix``).
    """
    chunks = list(cluster_case_chunks(unit_matrix, max(unit_matrix.shape[0], 1)))
    return JackknifeCases(cells=np.concatenate([c.cells for c in chunks]),
                          weights=np.concatenate([c.weights for c in chunks]))


def cluster_case_chunks(unit_matrix: sparse.csr_matrix, chunk: int) -> Iterator[JackknifeCases]:
    """:func:`cluster_cases` in pieces of at most ``chunk`` cases, in the same order.

    Each case is the column totals minus one distinct unit row, built only when its piece is
    needed, so that a quarter of a million firms never sit in one dense array.

    Parameters
    ----------
    unit_matrix : scipy.sparse.csr_matrix, shape (n_units, n_cells)
        Counts per unit and cell (``Cells.firm_matrix``).
    chunk : int
        Most cases per piece (at least 1).

    Yields
    ------
    JackknifeCases
        Consecutive pieces; concatenated they equal :func:`cluster_cases`.
    """
    if chunk < 1:
        raise ValueError(f"chunk must be at least 1; got {chunk!r}.")
    matrix, first_row, weights = _distinct_rows(unit_matrix)
    total = np.asarray(matrix.sum(axis=0)).ravel()
    if first_row.size == 0:
        yield JackknifeCases(cells=np.empty((0, matrix.shape[1]), dtype=np.int64),
                             weights=np.empty(0, dtype=np.int64))
        return
    for lo in range(0, first_row.size, chunk):
        rows = first_row[lo:lo + chunk]
        yield JackknifeCases(cells=total[None, :] - matrix[rows].toarray(), weights=weights[lo:lo + chunk])


def jackknife_acceleration(
    values: Sequence[np.ndarray],
    weights: Sequence[np.ndarray | None] | None = None,
) -> float:
    """BCa acceleration from jackknife values (Efron & Tibshirani 1993, eq. 14.15).

    ``a = sum_j sum_i U_ji**3 / n_j**3 / (6 (sum_j sum_i U_ji**2 / n_j**2) ** 1.5)`` with
    ``U_ji = (n_j - 1) (mean_j - theta_(ji))``, the form scipy.stats.bootstrap uses, so several
    independent samples (e.g. two groups) each contribute their own leave-one-out values. For one
    sample it reduces to ``sum(d**3) / (6 sum(d**2) ** 1.5)`` with ``d = mean - theta_(i)``.

    Parameters
    ----------
    values : sequence of arrays
        Leave-one-out estimates, one array per independent sample (``[theta_i]`` for one sample).
    weights : sequence of arrays or None, optional
        Multiplicity of each value (a distinct case standing for several identical ones); all
        ones when omitted.

    Returns
    -------
    float
        The acceleration; NaN when a value is not finite or all values are equal.
    """
    samples = [np.asarray(v, dtype=float).ravel() for v in values]
    weight_list: list[np.ndarray | None] = [None] * len(samples) if weights is None else list(weights)
    if len(weight_list) != len(samples):
        raise ValueError("values and weights must describe the same number of samples.")
    num = den = 0.0
    for theta, given in zip(samples, weight_list, strict=True):
        w = np.ones_like(theta) if given is None else np.asarray(given, dtype=float).ravel()
        if theta.shape != w.shape:
            raise ValueError("each weights array must match its values array.")
        if not np.all(np.isfinite(theta)):
            return float("nan")
        n = float(w.sum())
        u = (n - 1.0) * (np.dot(w, theta) / n - theta)
        num += float(np.dot(w, u**3)) / n**3
        den += float(np.dot(w, u**2)) / n**2
    if den == 0.0:
        return float("nan")
    return num / (6.0 * den**1.5)
