"""Per-roster run numbers for lists and headings: "Fit 3", "Bootstrap 2".

The global run id stays in every link, the JSON and the exports (ids are never reused); the number is only
the run's place among the roster's runs of its kind, oldest first, so an analyst's fits and bootstrap runs
count up from 1 separately.
"""

from __future__ import annotations

from collections.abc import Iterable

from app.store import Run, Store

#: fits recorded by Sectors and by the turnover rates, not listed among Trend's stored fits
_NOT_TREND = ("by_sector", "rate")


def ordinals(runs: Iterable[Run]) -> dict[int, int]:
    """Run id -> its 1-based place among ``runs`` by id (ids grow with time and are never reused)."""
    return {run_id: n for n, run_id in enumerate(sorted(r.id for r in runs), start=1)}


def trend_fits(store: Store, roster_id: int) -> list[Run]:
    """The roster's stored trend fits, newest first."""
    return [r for r in store.list_runs(roster_id, "fit") if r.params.get("model") not in _NOT_TREND]


def bootstrap_number(store: Store, run: Run) -> int:
    """The run's number among its roster's bootstrap runs."""
    return ordinals(store.list_runs(run.roster_id, "bootstrap"))[run.id]
