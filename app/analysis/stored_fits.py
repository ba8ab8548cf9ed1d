"""A trend fit already recorded for the same counts, served again without fitting (issue 13, start-up).

A fit depends only on the counted groups (their fingerprint), the window, the model options and the code of
the statistics. ``run_trend`` records each fit as a run whose result carries everything ``helmshift fit
--json`` prints and the ``engine`` tag below; a later command that finds such a run for the same counts
prints it again without importing scipy.stats or statsmodels, which are most of a cold start.

This module imports no model code on purpose (only pandas via the cell store): that is its point.
``app.analysis.quick_fit`` does the same without pandas or SQLAlchemy for the command line.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

from app.analysis.cellstore import groups_from_counts
from app.analysis.inputs import AnalysisInput
from app.analysis.quick_fit import PROFILE_KEY, SUMMARY_KEYS, engine_tag, fit_params
from app.stats.cells import groups_fingerprint
from app.store import Run, Store

if TYPE_CHECKING:  # the model code is imported where a fit needs it, not by a reader of stored fits
    from app.stats.profile import ProfileResult

__all__ = ["PROFILE_KEY", "SUMMARY_KEYS", "counts_fingerprint", "engine_tag", "fit_params", "matches",
           "profiles_to_json", "stored_fit", "stored_profiles", "stored_summary"]


def matches(run: Run, inp: AnalysisInput, params: dict[str, Any], fingerprint: str) -> bool:
    """A finished fit run of these counts, window, mapping version and options, from this statistics code."""
    return (run.kind == "fit" and run.status == "done" and run.result is not None
            and run.fingerprint == fingerprint and run.params == params and run.window == inp.window
            and run.roster_version == inp.roster.version
            and run.mapping_name == (inp.mapping.name if inp.mapping else None)
            and run.mapping_version == (inp.mapping.version if inp.mapping else None)
            and run.result.get("engine") == engine_tag())


def counts_fingerprint(inp: AnalysisInput, *, by_sector: bool) -> str:
    """``inp.group_cells(by_sector=...).fingerprint()`` without building the cells (no sparse matrix)."""
    return groups_fingerprint(groups_from_counts(inp.counts, inp.window, by_sector=by_sector))


def stored_fit(store: Store, inp: AnalysisInput, params: dict[str, Any]) -> Run | None:
    """The newest recorded fit that ``fit_summary`` may print instead of fitting again, if any."""
    fingerprint = counts_fingerprint(inp, by_sector=params["model"] == "sector")
    found = [run for run in store.list_runs(inp.roster.id, "fit") if matches(run, inp, params, fingerprint)]
    found = [run for run in found if all(key in (run.result or {}) for key in SUMMARY_KEYS)]
    return max(found, key=lambda run: run.id) if found else None


def stored_profiles(store: Store, inp: AnalysisInput, params: dict[str, Any], fingerprint: str
                    ) -> dict[str, ProfileResult] | None:
    """The profile-likelihood ends a recorded fit of these counts, window and options found (``TrendFit.profiles``),
    or None. The engine tag in ``matches`` guarantees the same statistics code, hence the same ends."""
    from app.stats.profile import ProfileResult

    found = [run for run in store.list_runs(inp.roster.id, "fit")
             if matches(run, inp, params, fingerprint) and PROFILE_KEY in (run.result or {})]
    if not found:
        return None
    stored = (max(found, key=lambda run: run.id).result or {})[PROFILE_KEY]
    return {name: ProfileResult(-math.inf if low is None else float(low), math.inf if high is None else float(high),
                                message) for name, (low, high, message) in stored.items()}


def profiles_to_json(profiles: dict[str, ProfileResult]) -> dict[str, list[Any]]:
    """``TrendFit.profiles`` as a run's result keeps them: an open end (infinite) is null, as in every JSON."""
    return {name: [p.low if math.isfinite(p.low) else None, p.high if math.isfinite(p.high) else None, p.message]
            for name, p in profiles.items()}


def stored_summary(store: Store, inp: AnalysisInput, *, model: str = "linear", spline_df: int = 3,
                   quasi: bool = False) -> dict[str, Any] | None:
    """``fit_summary`` of a fit already recorded for these counts and options, or None (nothing fitted)."""
    run = stored_fit(store, inp, fit_params(model, spline_df, quasi))
    if run is None or run.result is None:
        return None
    payload = {k: v for k, v in run.result.items() if k not in ("engine", PROFILE_KEY, "fitted_share", "headline")}
    payload.update({"roster": inp.roster.name, "mapping": inp.mapping_label, "run": run.id,
                    "sentence": run.result["sentence"], "warnings": inp.warnings(),
                    "fitted_share": run.result["fitted_share"], "headline": run.result["headline"]})
    return payload
