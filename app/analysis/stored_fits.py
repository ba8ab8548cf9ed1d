"""A trend fit already recorded for the same counts, served again without fitting (issue 13, start-up).

A fit depends only on the counted groups (their fingerprint), the window, the model options and the code of
the statistics. ``run_trend`` records each fit as a run whose result carries everything ``helmshift fit
--json`` prints and the ``engine`` tag below; a later command that finds such a run for the same counts
prints it again without importing scipy.stats or statsmodels, which are most of a cold start.

This module imports no model code on purpose (only pandas via the cell store): that is its point.
"""

from __future__ import annotations

import hashlib
from functools import cache
from pathlib import Path
from typing import Any

from app import __version__
from app.analysis.cellstore import groups_from_counts
from app.analysis.inputs import AnalysisInput
from app.stats.cells import groups_fingerprint
from app.store import Run, Store

STATS_DIR = Path(__file__).resolve().parents[1] / "stats"
#: the fields of ``helmshift fit --json`` that come from the fit itself (the rest are labels and warnings)
SUMMARY_KEYS = ("fitted_share", "headline")


@cache
def engine_tag() -> str:
    """Names the statistics code a stored result came from: any change to ``app/stats`` gives a new tag.

    A stored fit is served again only under the same tag, so a changed engine never prints old numbers.
    """
    digest = hashlib.sha256(__version__.encode())
    for path in sorted(STATS_DIR.glob("*.py")):
        digest.update(path.name.encode() + b"\0" + path.read_bytes() + b"\0")
    return digest.hexdigest()[:16]


def fit_params(model: str, spline_df: int, quasi: bool) -> dict[str, Any]:
    """The options a fit run records (and is matched on)."""
    return ({"model": model} | ({"spline_df": spline_df} if model == "spline" else {})
            | ({"quasi": True} if quasi else {}))


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


def stored_summary(store: Store, inp: AnalysisInput, *, model: str = "linear", spline_df: int = 3,
                   quasi: bool = False) -> dict[str, Any] | None:
    """``fit_summary`` of a fit already recorded for these counts and options, or None (nothing fitted)."""
    run = stored_fit(store, inp, fit_params(model, spline_df, quasi))
    if run is None or run.result is None:
        return None
    payload = {k: v for k, v in run.result.items() if k not in ("engine", "fitted_share", "headline")}
    payload.update({"roster": inp.roster.name, "mapping": inp.mapping_label, "run": run.id,
                    "sentence": run.result["sentence"], "warnings": inp.warnings(),
                    "fitted_share": run.result["fitted_share"], "headline": run.result["headline"]})
    return payload
