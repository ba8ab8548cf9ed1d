"""What a page or a command needs, gathered once: roster + mapping + window, then the statistics.

This is the only place that joins the store and ``app.stats``; routes and CLI commands call it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Literal

import pandas as pd

from app.reasons import parse_mapping_csv
from app.spreadsheet_safety import safe_csv
from app.stats.cells import Cells, assign_categories, build_cells
from app.stats.coverage import WindowSuggestion, YearFlag, coverage_table, flag_years, suggest_window
from app.stats.sectors import SectorTrends, fit_sector_trends, sector_trends_to_dict
from app.stats.trend import TrendFit, fit_to_dict, fit_trend, trend_sentence
from app.store import MappingVersion, Roster, Run, Store, StoreError
from app.types import CATEGORIES, UNMAPPED

if TYPE_CHECKING:
    from app.export import Provenance

MODEL_LABELS = {
    "linear": "binomial GLM, logit(forced share) linear in fiscal year",
    "sector": "binomial GLM, sector intercepts + common linear trend in fiscal year",
    "spline": "binomial GLM, linear trend compared with a natural cubic spline in fiscal year",
}

WindowSource = Literal["given", "chosen", "suggested"]


@dataclass(frozen=True)
class AnalysisInput:
    """A roster read through one mapping version and one window: everything a model needs.

    ``records`` holds every accepted departure with its ``category`` (forced, voluntary, excluded or
    unmapped); models use only forced and voluntary departures inside ``window``.
    """

    roster: Roster
    mapping: MappingVersion | None
    records: pd.DataFrame = field(repr=False)
    window: tuple[int, int]
    window_source: WindowSource
    coverage: pd.DataFrame = field(repr=False)
    suggestion: WindowSuggestion
    flags: list[YearFlag]

    @property
    def mapping_label(self) -> str:
        return f"{self.mapping.name} v{self.mapping.version}" if self.mapping else "no mapping"

    def in_window(self) -> pd.DataFrame:
        years = self.records["year"]
        return self.records.loc[(years >= self.window[0]) & (years <= self.window[1])]

    def unmapped_codes(self) -> pd.DataFrame:
        """Codes without a category that occur inside the window, with their counts, most common first."""
        inside = self.in_window()
        counts = inside.loc[inside["category"] == UNMAPPED, "reason"].value_counts()
        return pd.DataFrame({"code": counts.index.astype(str), "count": counts.to_numpy()})

    def cells(self, *, by_sector: bool = False) -> Cells:
        return build_cells(self.records, self.window, by_sector=by_sector)

    def counts_nothing(self) -> bool:
        """True when the mapping counts no departure as forced or voluntary (every code excluded)."""
        return not self.records["category"].isin(["forced", "voluntary"]).any()

    def warnings(self) -> list[str]:
        notes: list[str] = [NOTHING_COUNTED] if self.mapping is not None and self.counts_nothing() else []
        unmapped = self.unmapped_codes()
        if len(unmapped):
            total = int(unmapped["count"].sum())
            notes.append(
                f"{len(unmapped)} reason code(s) covering {total} departure(s) in the window have no "
                "category and are left out; map them on the Reason codes page."
            )
        return notes


def parse_mapping_ref(ref: str) -> tuple[str, int | None]:
    """``NAME`` or ``NAME:VERSION``."""
    name, sep, version = ref.rpartition(":")
    if sep and version.isdigit():
        return name, int(version)
    return ref, None


def load_input(
    store: Store,
    roster_ref: int | str,
    *,
    mapping: str | None = None,
    window: tuple[int, int] | None = None,
    require_mapping: bool = True,
    threshold: float = 0.5,
) -> AnalysisInput:
    """Read a roster through a mapping (the roster's chosen one by default) and fix the window.

    The window is, in order of preference: the one given, the one chosen for the roster on the
    Coverage page, the suggested window of full coverage.
    """
    roster = store.get_roster(roster_ref)
    settings = store.settings(roster.id)
    version: MappingVersion | None = None
    if mapping:
        name, number = parse_mapping_ref(mapping)
        version = store.get_mapping(name, number)
    elif settings.mapping_name:
        version = store.get_mapping(settings.mapping_name)
    if version is None and require_mapping:
        raise StoreError(
            f"Roster {roster.name!r} has no reason-code mapping yet; confirm the suggested categories on "
            "the Reason codes page or run `helmshift mapping import`."
        )
    records = store.departures(roster.id)
    if records.empty:
        raise StoreError(f"Roster {roster.name!r} has no accepted departures.")
    records["category"] = assign_categories(records["reason"], version.categories if version else {})
    table = coverage_table(records["year"], records["category"])
    try:
        suggestion = suggest_window(table, threshold=threshold)
        flags = flag_years(table, threshold=threshold)
    except ValueError:
        # a valid mapping that excludes every code: nothing to suggest from; every page shows the whole
        # span and says why no trend can be fitted (NOTHING_COUNTED), instead of failing
        suggestion, flags = _whole_span(table, threshold), []
    source: WindowSource
    if window is not None:
        first, last = int(records["year"].min()), int(records["year"].max())
        if window[0] > last or window[1] < first:
            raise StoreError(f"The window {window[0]}-{window[1]} lies outside the roster's years {first}-{last}.")
        source = "given"
    elif settings.window is not None:
        window, source = settings.window, "chosen"
    else:
        window, source = suggestion.window, "suggested"
    return AnalysisInput(roster, version, records, window, source, table, suggestion, flags)


NOTHING_COUNTED = ("The mapping counts no departure as forced or voluntary (every code is excluded), so there is "
                   "nothing to fit; change the categories on the Reason codes page.")


def _whole_span(table: pd.DataFrame, threshold: float) -> WindowSuggestion:
    years = table["year"].astype(int)
    return WindowSuggestion(
        window=(int(years.min()), int(years.max())), median=0.0, cutoff=0.0, threshold=float(threshold),
        basis="not_excluded", rule="no year has any counted record (every code is excluded), so the whole span "
        "of years is shown", below_cutoff=(),
    )


def input_for_run(store: Store, run: Run) -> AnalysisInput:
    """The exact input a stored run used: its mapping version and window."""
    mapping = f"{run.mapping_name}:{run.mapping_version}" if run.mapping_name else None
    return load_input(store, run.roster_id, mapping=mapping, window=run.window)


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
        "flags": [{"year": f.year, "kind": f.kind, "message": f.message} for f in inp.flags],
        "warnings": inp.warnings(),
    }


def import_mapping_file(store: Store, data: bytes, *, roster: int | str, name: str,
                        author: str = "analyst") -> dict[str, Any]:
    """Save a mapping CSV as the next version of ``name``; report codes not in the roster.

    Unknown categories and duplicate codes reject the whole file (nothing saved). Codes that do not
    occur in this roster are kept (they serve other rosters) and reported.
    """
    target = store.get_roster(roster)
    parsed = parse_mapping_csv(data)
    roster_codes = set(store.reason_counts(target.id)["code"].astype(str))
    saved = store.save_mapping_version(name, parsed.categories, parsed.labels, author=author,
                                       note=f"imported from CSV for roster {target.name}")
    if store.settings(target.id).mapping_name is None:
        store.update_settings(target.id, mapping_name=name)
    not_in_roster = sorted(set(parsed.categories) - roster_codes)
    unmapped = sorted(roster_codes - set(parsed.categories))
    return {"mapping": saved.name, "version": saved.version, "codes": len(saved.categories),
            "not_in_roster": not_in_roster, "unmapped_in_roster": unmapped}


def export_mapping_csv(store: Store, *, name: str, version: int | None = None) -> str:
    mapping = store.get_mapping(name, version)
    rows = [[code, cat, mapping.labels.get(code, "")] for code, cat in sorted(mapping.categories.items())]
    return safe_csv(rows, ["code", "category", "label"])


def provenance_for(inp: AnalysisInput, *, model: str = "linear", interval_method: str = "Wald and profile likelihood",
                   resamples: int | None = None, seed: int | None = None, unit: str | None = None,
                   by_sector: bool = False) -> Provenance:
    """What every chart, deck and brief states about where its numbers came from."""
    from app.export import Provenance

    cats = inp.mapping.categories if inp.mapping else {}
    grouped = tuple((c, tuple(sorted(code for code, cat in cats.items() if cat == c))) for c in CATEGORIES)
    return Provenance(
        roster=inp.roster.name, roster_fingerprint=inp.cells(by_sector=by_sector).fingerprint(),
        mapping_name=inp.mapping.name if inp.mapping else "none",
        mapping_version=inp.mapping.version if inp.mapping else 0, window=inp.window,
        model=MODEL_LABELS.get(model, model), interval_method=interval_method, resamples=resamples,
        seed=seed, unit=unit, categories=grouped,
    )


@dataclass(frozen=True)
class TrendOutcome:
    """A trend fit and the id of the stored run that records it."""

    fit: TrendFit
    run_id: int


def _record_run(store: Store, inp: AnalysisInput, params: dict[str, Any], fingerprint: str,
                result: dict[str, Any], seconds: float) -> int:
    """Store a finished fit as a run, unless an identical one (same data, mapping, window, options) exists."""
    for run in store.list_runs(inp.roster.id, "fit"):
        if (run.fingerprint == fingerprint and run.params == params and run.window == inp.window
                and run.mapping_version == (inp.mapping.version if inp.mapping else None)
                and run.mapping_name == (inp.mapping.name if inp.mapping else None)):
            return run.id
    run_id = store.create_run(
        kind="fit", roster_id=inp.roster.id, params=params, fingerprint=fingerprint,
        mapping_name=inp.mapping.name if inp.mapping else None,
        mapping_version=inp.mapping.version if inp.mapping else None, window=inp.window, status="running",
    )
    store.finish_run(run_id, result, seconds=seconds)
    return run_id


def run_trend(store: Store, inp: AnalysisInput, *, model: str = "linear", spline_df: int = 3) -> TrendOutcome:
    """Fit the trend over the window and record the run."""
    import time

    started = time.perf_counter()
    cells = inp.cells(by_sector=model == "sector")
    fit = fit_trend(cells, model, spline_df=spline_df)  # type: ignore[arg-type]
    params: dict[str, Any] = {"model": model} | ({"spline_df": spline_df} if model == "spline" else {})
    run_id = _record_run(store, inp, params, cells.fingerprint(), fit_to_dict(fit),
                         time.perf_counter() - started)
    return TrendOutcome(fit, run_id)


def run_sectors(store: Store, inp: AnalysisInput, *, min_departures: int = 20) -> tuple[SectorTrends, int]:
    """Per-sector trends, the sector-adjusted common trend and the test of equal trends; recorded."""
    import time

    started = time.perf_counter()
    cells = inp.cells(by_sector=True)
    result = fit_sector_trends(cells, min_departures=min_departures)
    run_id = _record_run(store, inp, {"model": "by_sector", "min_departures": min_departures},
                         cells.fingerprint(), dict(sector_trends_to_dict(result)), time.perf_counter() - started)
    return result, run_id


def fit_summary(store: Store, inp: AnalysisInput, *, model: str = "linear", by_sector: bool = False) -> dict[str, Any]:
    """The command line's ``fit --json`` object (and the trend page's JSON twin)."""
    outcome = run_trend(store, inp, model=model)
    payload: dict[str, Any] = dict(fit_to_dict(outcome.fit))
    payload.update({"roster": inp.roster.name, "mapping": inp.mapping_label, "run": outcome.run_id,
                    "sentence": trend_sentence(outcome.fit), "warnings": inp.warnings()})
    if by_sector:
        sectors, _ = run_sectors(store, inp)
        view = sector_trends_to_dict(sectors)
        payload["sectors"] = view["sectors"]
        payload["heterogeneity"] = view["heterogeneity"]
        payload["sector_messages"] = list(sectors.messages)
    return payload


def robustness_summary(store: Store, inp: AnalysisInput, *, extra_mappings: list[str],
                       vary: list[str]) -> dict[str, Any]:
    """The command line's ``robustness --json`` object."""
    from app.robustness import check_robustness, robustness_to_dict

    result = check_robustness(store, inp, extra_mappings=extra_mappings, vary=vary)
    return {"roster": inp.roster.name, "mapping": inp.mapping_label, **robustness_to_dict(result)}
