"""The adjusted trend of a roster (issue 16): fitted from the detailed firm cells, recorded as a run.

The fit needs firm x cell counts for its clustered standard errors, so it reads ``roster_firm_cells`` with
the age/tenure/interim key (never the records); pages ask for it only when the analyst does, and the result
is memoised per roster version, mapping version (which pins the rules), window and adjustment set. The mix
diagnostic reads the per-roster detailed cells only.
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from app.analysis.cellstore import detail_counts, in_window, memoised
from app.analysis.inputs import AnalysisInput
from app.analysis.runs import _record_run
from app.stats.adjusted import (
    AdjustedCells,
    AdjustedFit,
    MixShift,
    collapse,
    fit_adjusted,
    mix_by_year,
    mix_shift,
    parse_adjust,
)
from app.stats.trend_report import json_interval, json_number
from app.store import Store

MODEL = "adjusted"


def adjusted_cells(inp: AnalysisInput, adjust: tuple[str, ...]) -> AdjustedCells:
    """Forced and voluntary departures of the window, collapsed to the adjusted model's cells (memoised)."""
    def compute() -> AdjustedCells:
        firms = inp.store.firm_cell_counts(inp.roster.id, inp.roster.version, detail=True)
        return adjusted_cells_from(inp.categorised(firms), inp.window, adjust)
    return memoised(inp.store, ("adjusted_cells", *inp.key, adjust), compute)


def adjusted_cells_from(firms: pd.DataFrame, window: tuple[int, int], adjust: tuple[str, ...]) -> AdjustedCells:
    """The adjusted model's cells of categorised firm cells (detailed key, with ``category``): the window's
    forced and voluntary departures, collapsed. Shared by the saved mapping's fit and the robustness readings."""
    frame = in_window(firms, window)
    return collapse(frame.loc[frame["category"].isin(["forced", "voluntary"])], adjust)


def _fingerprint(data: AdjustedCells) -> str:
    return hashlib.sha256(data.cells.to_csv(index=False).encode()).hexdigest()[:16]


@dataclass(frozen=True)
class AdjustedOutcome:
    fit: AdjustedFit
    run_id: int
    result: dict[str, Any]


def run_adjusted(store: Store, inp: AnalysisInput, adjust: str | tuple[str, ...]) -> AdjustedOutcome:
    """Fit the adjusted trend and record it as a run (params: model and adjust; the mapping version pins the
    rules). Its firm bootstrap is a bootstrap run of its own (``adjusted_summary``)."""
    chosen = parse_adjust(adjust)
    started = time.perf_counter()
    data = adjusted_cells(inp, chosen)
    fit = memoised(store, ("fit_adjusted", *inp.key, chosen), lambda: fit_adjusted(data, inp.window))
    params: dict[str, Any] = {"model": MODEL, "adjust": list(chosen)}
    result = adjusted_to_dict(fit)
    run_id = _record_run(store, inp, params, _fingerprint(data), result, time.perf_counter() - started)
    return AdjustedOutcome(fit, run_id, result)


def adjusted_to_dict(fit: AdjustedFit, bootstrap: tuple[float, float] | None = None) -> dict[str, Any]:
    """The JSON of an adjusted fit: ``odds_ratio``, ``cluster_se``, ``conf_int`` {cluster, bootstrap},
    ``departures``, ``dropped`` and the rest of the coefficients (log odds, with clustered SEs)."""
    se = np.sqrt(np.diag(fit.cluster_cov))
    return {
        "model": MODEL, "adjust": list(fit.adjust), "window": list(fit.window),
        "odds_ratio": json_number(fit.odds_ratio), "coef": json_number(fit.coef),
        "cluster_se": json_number(fit.cluster_se),
        "conf_int": {"cluster": json_interval(fit.cluster_interval),
                     "bootstrap": json_interval(bootstrap) if bootstrap else None},
        "departures": fit.departures, "forced": fit.forced, "firms": fit.firms, "dropped": dict(fit.dropped),
        "coefficients": [{"term": str(name), "log_odds": json_number(float(b)), "cluster_se": json_number(float(s))}
                         for name, b, s in zip(fit.params.index, fit.params.to_numpy(), se, strict=True)],
    }


def adjusted_sentence(fit: AdjustedFit) -> str:
    lo, hi = fit.cluster_interval
    what = ", ".join(fit.adjust) if fit.adjust else "nothing (the plain trend)"
    direction = ("rose" if lo > 1 else "fell" if hi < 1 else "showed no clear change")
    dropped = sum(fit.dropped.values())
    return (f"Adjusted for {what}, the odds that a departure was forced {direction}: odds ratio "
            f"{fit.odds_ratio:.3f} per year (95% firm-clustered interval {lo:.3f} to {hi:.3f}; "
            f"{fit.departures:,} departures from {fit.firms:,} firms"
            + (f", {dropped:,} left out for a missing {'/'.join(k for k, v in fit.dropped.items() if v)}"
               if dropped else "") + ").")


def adjusted_summary(store: Store, inp: AnalysisInput, adjust: str | tuple[str, ...]) -> dict[str, Any]:
    """The command line's ``fit --model adjusted --json`` object (its firm bootstrap:
    ``app.analysis.adjusted_bootstrap.adjusted_fit_summary``)."""
    outcome = run_adjusted(store, inp, adjust)
    return {"roster": inp.roster.name, "mapping": inp.mapping_label,
            "rules": [r.describe() for r in (inp.mapping.rules if inp.mapping else ())],
            **outcome.result, "sentence": adjusted_sentence(outcome.fit), "run": outcome.run_id}


@dataclass(frozen=True)
class MixSection:
    """Age and tenure mix of counted departures by year (shares per band) and whether each moved."""

    age: list[dict[str, Any]]
    tenure: list[dict[str, Any]]
    sentences: list[str]
    moved: bool


def _shares(table: pd.DataFrame) -> list[dict[str, Any]]:
    totals = table.sum(axis=1)
    return [{"year": int(y), "departures": int(totals[y]),
             "shares": {str(b): (float(table.loc[y, b] / totals[y]) if totals[y] else None) for b in table.columns}}
            for y in table.index]


def mix_section(inp: AnalysisInput) -> MixSection:
    """The diagnostic on Trend: from the per-roster detailed cells (no firm counts, no records)."""
    def compute() -> tuple[MixSection, list[MixShift]]:
        frame = inp.categorised(detail_counts(inp.store, inp.roster))
        frame = in_window(frame, inp.window)
        frame = frame.loc[frame["category"].isin(["forced", "voluntary"])]
        tables = {name: mix_by_year(frame, name) for name in ("age", "tenure")}
        shifts = [mix_shift(tables[name], name) for name in ("age", "tenure")]
        section = MixSection(_shares(tables["age"]), _shares(tables["tenure"]), [s.sentence for s in shifts],
                             any(s.moved for s in shifts))
        return section, shifts
    return memoised(inp.store, ("mix", *inp.key), compute)[0]
