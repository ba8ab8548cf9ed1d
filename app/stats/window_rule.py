"""The window rule on plain yearly counts (no numpy or pandas): the core of ``coverage.suggest_window``.

Kept in plain Python so the quick fit path (``app.analysis.quick_fit``) applies exactly the rule the pages
apply without importing pandas; :func:`app.stats.coverage.suggest_window` calls it too, so there is one rule.
"""

from __future__ import annotations

import statistics
from collections.abc import Sequence

__all__ = ["longest_run"]


def longest_run(counts: Sequence[int], threshold: float) -> tuple[float, float, list[bool], tuple[int, int]]:
    """Median yearly count, cutoff (``threshold`` x median), which years pass, and the chosen run.

    A year passes when its count is positive and at least the cutoff. The run is the longest stretch of
    consecutive passing years; among equally long ones the larger total wins, then the later one. Returns
    the run as (first index, last index). ``counts`` must hold a positive count.
    """
    values = [int(c) for c in counts]
    median = float(statistics.median(values))
    cutoff = threshold * median
    passes = [c > 0 and c >= cutoff for c in values]
    best: tuple[int, int, int, int] | None = None  # (length, total, start index, end index)
    start = None
    for i, ok in enumerate([*passes, False]):
        if ok and start is None:
            start = i
        elif not ok and start is not None:
            candidate = (i - start, sum(values[start:i]), start, i - 1)
            if best is None or candidate[:3] > best[:3]:
                best = candidate
            start = None
    if best is None:
        raise ValueError("no year has a positive count; there is no run to choose.")
    return median, cutoff, passes, (best[2], best[3])
