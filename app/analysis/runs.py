"""Fits that pages and commands ask for, recorded as runs, and their plain-value summaries."""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

from app.analysis.cellstore import cells_from_counts, memoised
from app.analysis.inputs import AnalysisInput
from app.analysis.stored_fits import (
    PROFILE_KEY,
    engine_tag,
    fit_params,
    matches,
    profiles_to_json,
    stored_profiles,
    stored_summary,
)
from app.stats.coverage import suggest_window
from app.stats.headline import headline_fields
from app.stats.periods import PeriodComparison, compare_periods, default_periods
from app.stats.sectors import SectorTrends, fit_sector_trends, sector_trends_to_dict
from app.stats.trend import TrendFit, fit_trend
from app.stats.trend_report import fit_to_dict, trend_sentence
from app.store import Store


@dataclass(frozen=True)
class TrendOutcome:
    """A trend fit and the id of the stored run that records it."""

    fit: TrendFit
    run_id: int


def _record_run(store: Store, inp: AnalysisInput, params: dict[str, Any], fingerprint: str,
                result: dict[str, Any], seconds: float) -> int:
    """Store a finished fit as a run, unless an identical one (same data, mapping, window, options and
    statistics code: ``engine_tag``) exists."""
    for run in store.list_runs(inp.roster.id, "fit"):
        if matches(run, inp, params, fingerprint):
            return run.id
    result = {**result, "engine": engine_tag()}  # names the statistics code it came from
    run_id = store.create_run(
        kind="fit", roster_id=inp.roster.id, params=params, fingerprint=fingerprint,
        mapping_name=inp.mapping.name if inp.mapping else None,
        mapping_version=inp.mapping.version if inp.mapping else None, window=inp.window, status="running",
        roster_version=inp.roster.version,
    )
    store.finish_run(run_id, result, seconds=seconds)
    return run_id


def run_trend(store: Store, inp: AnalysisInput, *, model: str = "linear", spline_df: int = 3,
              quasi: bool = False) -> TrendOutcome:
    """Fit the trend over the window and record the run (``quasi``: quasi-binomial intervals whatever the
    dispersion).

    The profile-likelihood ends, the slowest part of a fit, are read from a fit run already recorded for the
    same counts, window, options and statistics code when there is one (``stored_profiles``), so the first
    page visit after a server start or a change back to an earlier mapping or window skips the root search.
    """
    started = time.perf_counter()
    cells = inp.group_cells(by_sector=model == "sector")
    params = fit_params(model, spline_df, quasi)
    fingerprint = cells.fingerprint()
    # a fit depends only on the counts, window and options: memoised for repeated pages (the run is still recorded)
    fit = memoised(inp.store, ("fit_trend", *inp.key, model, spline_df, quasi),
                   lambda: fit_trend(cells, model, spline_df=spline_df, quasi=quasi,  # type: ignore[arg-type]
                                     profiles=stored_profiles(store, inp, params, fingerprint)))
    # the result carries what ``helmshift fit --json`` prints, so a later command can print it without
    # fitting again (app.analysis.stored_fits), and the profile ends for the next fit of these counts
    result = {**fit_to_dict(fit), **headline_fields(fit), PROFILE_KEY: profiles_to_json(fit.profiles)}
    run_id = _record_run(store, inp, params, fingerprint, result, time.perf_counter() - started)
    return TrendOutcome(fit, run_id)


def run_sectors(store: Store, inp: AnalysisInput, *, min_departures: int = 20) -> tuple[SectorTrends, int]:
    """Per-sector trends, the sector-adjusted common trend and the test of equal trends; recorded."""
    started = time.perf_counter()
    cells = inp.group_cells(by_sector=True)
    result = memoised(inp.store, ("fit_sectors", *inp.key, min_departures),
                      lambda: fit_sector_trends(cells, min_departures=min_departures))
    run_id = _record_run(store, inp, {"model": "by_sector", "min_departures": min_departures},
                         cells.fingerprint(), dict(sector_trends_to_dict(result)), time.perf_counter() - started)
    return result, run_id


def period_comparison(inp: AnalysisInput, periods: tuple[tuple[int, int], tuple[int, int]] | None = None,
                      ) -> PeriodComparison:
    """The forced share of two periods compared (default: the window's last third against the rest).

    Periods may reach outside the analysis window: they count every forced and voluntary departure of
    their years under the input's mapping. Raises ``PeriodError`` for periods that cannot be compared.
    """
    first, second = periods if periods is not None else default_periods(inp.window)

    def compare() -> PeriodComparison:
        years = inp.counts["year"]
        # every year of the roster, read from the cell store (no read of the records)
        groups = cells_from_counts(inp.counts, (int(years.min()), int(years.max()))).groups
        counts = groups.assign(total=groups["forced"] + groups["voluntary"])
        return compare_periods(counts, first, second)

    # memoised: its profile-likelihood interval was ~60% of a warm Trend visit (benchmarks/README.md)
    return memoised(inp.store, ("periods", *inp.key, first, second), compare)


def fit_summary(store: Store, inp: AnalysisInput, *, model: str = "linear", by_sector: bool = False,
                spline_df: int = 3, quasi: bool = False,
                periods: tuple[tuple[int, int], tuple[int, int]] | None = None, reuse: bool = True
                ) -> dict[str, Any]:
    """The command line's ``fit --json`` object (and the trend page's JSON twin).

    With ``reuse`` a fit already recorded for the same counts and options is printed again without fitting
    (``app.analysis.stored_fits.stored_summary``).

    ``headline`` and ``fitted_share`` lead with the fitted share at both ends of the window; ``periods``
    is there when ``periods`` are given.
    """
    payload = stored_summary(store, inp, model=model, spline_df=spline_df, quasi=quasi) if reuse else None
    if payload is None:
        outcome = run_trend(store, inp, model=model, spline_df=spline_df, quasi=quasi)
        payload = dict(fit_to_dict(outcome.fit))
        payload.update({"roster": inp.roster.name, "mapping": inp.mapping_label, "run": outcome.run_id,
                        "sentence": trend_sentence(outcome.fit), "warnings": inp.warnings(),
                        **headline_fields(outcome.fit)})
    if periods is not None:
        payload["periods"] = period_comparison(inp, periods).as_dict()
    if by_sector:
        sectors, _ = run_sectors(store, inp)
        view = sector_trends_to_dict(sectors)
        payload["sectors"] = view["sectors"]
        payload["heterogeneity"] = view["heterogeneity"]
        payload["sector_messages"] = list(sectors.messages)
    return payload


def coverage_summary(inp: AnalysisInput, *, threshold: float = 0.5) -> dict[str, Any]:
    """The coverage table and window suggestion as plain values (CLI ``--json`` and the API)."""
    suggestion = suggest_window(inp.coverage, threshold=threshold)
    years = [
        {k: int(row[k]) for k in ("year", "departures", "forced", "voluntary", "excluded", "unmapped")}
        for row in inp.coverage.to_dict("records")
    ]
    return {
        "roster": inp.roster.name, "mapping": inp.mapping_label, "years": years,
        "suggested_window": list(suggestion.window), "rule": suggestion.rule,
        "window": list(inp.window), "window_source": inp.window_source,
        "still_in_post": inp.in_post,
        "flags": [{"year": f.year, "kind": f.kind, "message": f.message} for f in inp.flags],
        "warnings": inp.warnings(),
    }


def refresh_comparison(store: Store, inp: AnalysisInput, run_id: int) -> dict[str, Any] | None:
    """The same fit (options, mapping version, window) on the roster's version before the newest, when one was
    made there: the finding before and after the refresh, side by side ("1.021 -> 1.024"). None otherwise."""
    if inp.roster.version < 2:
        return None
    now = store.get_run(run_id)
    for run in store.list_runs(inp.roster.id, "fit"):
        if (run.roster_version < inp.roster.version and run.status == "done" and run.result
                and run.params == now.params and run.window == now.window
                and (run.mapping_name, run.mapping_version) == (now.mapping_name, now.mapping_version)):
            before, after = run.result.get("odds_ratio"), (now.result or {}).get("odds_ratio")
            if before is None or after is None:
                return None
            return {"from_version": run.roster_version, "to_version": inp.roster.version, "run_before": run.id,
                    "odds_ratio_before": before, "odds_ratio_after": after,
                    "sentence": f"Odds ratio per year {before:.3f} -> {after:.3f} after the refresh "
                                f"(roster version {run.roster_version} -> {inp.roster.version}, same mapping "
                                "and window)."}
    return None
