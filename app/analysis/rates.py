"""Turnover rates per 100 firm-years over a roster's universe, their Poisson trends and the decomposition.

Joins the roster (through its mapping and window), its current universe of firm-years and ``app.stats.rates``;
records each rate fit as a run whose parameters name the universe and its fingerprint.
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass
from typing import Any

import pandas as pd

from app.analysis.cellstore import cells_from_counts, memoised
from app.analysis.inputs import AnalysisInput
from app.analysis.runs import _record_run
from app.stats.cells import assign_categories
from app.stats.rate_trend import (
    RateError,
    RateTrend,
    decomposition_sentence,
    fit_rate_trend,
    rate_trend_to_dict,
)
from app.stats.rates import RateTable, rate_table
from app.stats.trend import TrendError, fit_trend
from app.stats.trend_report import json_interval, json_number
from app.store import Store, StoreError, Universe

__all__ = ["SHARE_VS_RATE", "RateAnalysis", "RatesSection", "UniverseFlags", "categorised_universe_firms",
           "mark_inside", "rate_summary", "rates_section", "run_rates", "universe_flags", "universe_overview",
           "universe_or_error", "universe_rate_table"]

#: shown wherever a rate appears (pages, command output)
SHARE_VS_RATE = ("Share vs rate: the forced share (forced / counted departures) can rise while the forced rate "
                 "per firm-year stays flat, if voluntary exits fall, and fall while it stays flat, if voluntary "
                 "exits rise; read the share and the two rates together.")
APPROXIMATE = ("This universe was derived from the roster (first to last year each firm appears), an "
               "approximation: firms with no rows and years before a firm's first row are missing, so rates "
               "are overstated where that matters.")


@dataclass(frozen=True)
class UniverseFlags:
    """What does not line up between a roster and its universe.

    ``missing_firms``: roster firms with a counted (forced or voluntary) departure that never appear in the
    universe (first 20 listed, ``missing_count`` in all). ``empty_years``: universe years with no roster
    record at all (a gap in the roster, or truly no turnover).
    """

    missing_firms: tuple[str, ...]
    missing_count: int
    empty_years: tuple[int, ...]

    def messages(self) -> list[str]:
        out = []
        if self.missing_count:
            shown = ", ".join(self.missing_firms[:5]) + (", ..." if self.missing_count > 5 else "")
            out.append(f"{self.missing_count:,} roster firm(s) with counted departures are not in the universe "
                       f"({shown}); their departures are left out of the rates.")
        if self.empty_years:
            out.append(f"{len(self.empty_years)} universe year(s) have no roster rows at all "
                       f"({', '.join(map(str, self.empty_years[:10]))}{', ...' if len(self.empty_years) > 10 else ''})"
                       "; check that the roster covers them before reading a rate of zero.")
        return out


def universe_flags(records: pd.DataFrame, firm_years: pd.DataFrame) -> UniverseFlags:
    """Compare a roster's records (with ``category``) with a universe's firm-years."""
    counted = records.loc[records["category"].isin(["forced", "voluntary"]), "firm_id"].astype(str)
    missing = sorted(set(counted) - set(firm_years["firm_id"].astype(str)))
    empty = sorted(set(firm_years["year"].astype(int)) - set(records["year"].astype(int)))
    return UniverseFlags(tuple(missing[:20]), len(missing), tuple(int(y) for y in empty))


def universe_or_error(store: Store, roster_id: int, roster_name: str) -> Universe:
    universe = store.current_universe(roster_id)
    if universe is None:
        raise StoreError(f"Roster {roster_name!r} has no universe of firm-years yet; import one with "
                         "`helmshift universe import FILE --roster ROSTER` or on the roster's Universe page "
                         "(where it can also be derived from the roster, as an approximation).")
    return universe


@dataclass(frozen=True)
class RateAnalysis:
    """Rates per year, both Poisson trends, the share's direction and the sentence that joins them."""

    universe: Universe
    table: RateTable
    forced: RateTrend | None
    voluntary: RateTrend | None
    share_odds_ratio: float | None
    share_interval: tuple[float, float] | None
    sentence: str | None
    error: str | None
    flags: UniverseFlags
    messages: tuple[str, ...]
    run_id: int | None

    def years(self) -> list[dict[str, Any]]:
        """Per-year rows with the interval of the forced rate (JSON-ready)."""
        out = []
        for r in self.table.years.to_dict("records"):
            out.append({
                "year": int(r["year"]), "firm_years": int(r["firm_years"]), "forced": int(r["forced"]),
                "voluntary": int(r["voluntary"]), "forced_rate_per_100": float(r["forced_rate_per_100"]),
                "interval": [float(r["forced_low"]), float(r["forced_high"])],
                "voluntary_rate_per_100": float(r["voluntary_rate_per_100"]),
                "voluntary_interval": [float(r["voluntary_low"]), float(r["voluntary_high"])],
            })
        return out


@dataclass(frozen=True)
class _UniverseCounts:
    """A roster's counts against its universe, read in SQL from the firm cells (no departure is read)."""

    counts: pd.DataFrame  # year, reason, inside, departures, category
    exposure: pd.Series  # firm-years per year (index year)
    outside_firms: pd.DataFrame  # firm_id, reason of firms with no firm-year in the universe (inside the window)


def _universe_counts(store: Store, inp: AnalysisInput, universe: Universe, window: tuple[int, int] | None
                     ) -> _UniverseCounts:
    """Counts against the universe with each departure categorised as the share categorises it (code, then the
    mapping's rules, then its case overrides): by code alone in SQL when the mapping reclassifies nothing,
    else from the categorised firm cells split by the inside flag of their firm-year (issue 16)."""
    roster_id, version = inp.roster.id, inp.roster.version

    def by_code() -> _UniverseCounts:
        categories = inp.mapping.categories if inp.mapping else {}
        counts = store.universe_cell_counts(roster_id, universe.id, version)
        counts = counts.assign(category=assign_categories(counts["reason"], categories))
        outside = store.firms_outside_universe(roster_id, universe.id, window, version)
        outside = outside.assign(category=assign_categories(outside["reason"], categories))
        return _UniverseCounts(counts, store.universe_exposure(universe.id), outside)

    def reclassified() -> _UniverseCounts:
        firms = categorised_universe_firms(store, inp, universe.id)
        counts = _inside_counts(firms)
        missing = set(store.firms_outside_universe(roster_id, universe.id, window, version)["firm_id"].astype(str))
        rows = firms.loc[firms["firm_id"].astype(str).isin(missing)]
        if window is not None:
            rows = rows.loc[rows["year"].between(*window)]
        outside = (rows[["firm_id", "reason", "category"]].drop_duplicates()
                   .sort_values(["firm_id", "reason", "category"]).reset_index(drop=True))
        return _UniverseCounts(counts, store.universe_exposure(universe.id), outside)

    # a universe id names one stored set of firm-years (never changed, never reused)
    return memoised(store, ("universe_counts", *inp.key, universe.id, window),
                    reclassified if inp.reclassifies else by_code)


def categorised_universe_firms(store: Store, inp: AnalysisInput, universe_id: int) -> pd.DataFrame:
    """The input's categorised firm cells (``AnalysisInput.categorised_firms``: code, rules, case overrides)
    with ``inside``: whether the cell's (firm, year) is one of the universe's firm-years (flagged in SQL).
    What the Rates section and the rate_ratio bootstrap's cells both count, so each classifies a departure as
    the share does. Not memoised (one row per firm cell): callers memoise what they derive from it."""
    return mark_inside(store, inp, universe_id, inp.categorised_firms())


def mark_inside(store: Store, inp: AnalysisInput, universe_id: int, firms: pd.DataFrame) -> pd.DataFrame:
    """``firms`` (firm cells of the input's roster version) with ``inside``: whether the cell's (firm, year)
    is one of the universe's firm-years (flagged in SQL). The robustness readings flag the firm cells once and
    categorise them per reading (app.analysis.robustness_measures)."""
    flags = store.universe_firm_year_flags(inp.roster.id, universe_id, inp.roster.version)
    keyed = firms[["firm_id", "year"]].astype({"firm_id": str, "year": "int64"})
    flags = flags.astype({"firm_id": str, "year": "int64"})
    # one flag per firm-year, so the left join keeps the firm cells' rows and order
    inside = keyed.merge(flags, on=["firm_id", "year"], how="left")["inside"]
    return firms.assign(inside=inside.eq(True).to_numpy(dtype=bool))


def _inside_counts(firms: pd.DataFrame) -> pd.DataFrame:
    """Categorised firm cells with ``inside`` summed to (year, reason, inside, category) counts."""
    counts = (firms.groupby(["year", "reason", "inside", "category"], sort=True)["departures"].sum()
              .reset_index())
    return counts.loc[counts["departures"] > 0].reset_index(drop=True)


def universe_rate_table(firms: pd.DataFrame, exposure: pd.Series, window: tuple[int, int]) -> RateTable:
    """The rate table of categorised firm cells with ``inside`` (``mark_inside``) over ``exposure`` (firm-years
    per year): what ``run_rates`` tabulates for a version that reclassifies, for a reading that is not a saved
    version (robustness)."""
    empty = pd.DataFrame({"firm_id": [], "reason": [], "category": []})
    return _rate_table(_UniverseCounts(_inside_counts(firms), exposure, empty), window)


def _flags(inp: AnalysisInput, found: _UniverseCounts, window: tuple[int, int] | None) -> UniverseFlags:
    """``universe_flags`` from counts: the same missing firms and empty years as comparing every record."""
    counted = found.outside_firms.loc[found.outside_firms["category"].isin(["forced", "voluntary"]), "firm_id"]
    missing = sorted(set(counted.astype(str)))
    years = inp.counts.loc[inp.counts["departures"] > 0, "year"].astype(int)
    universe_years = found.exposure.index.to_numpy()
    if window is not None:
        years = years[years.between(*window)]
        universe_years = universe_years[(universe_years >= window[0]) & (universe_years <= window[1])]
    empty = sorted(set(int(y) for y in universe_years) - set(years.tolist()))
    return UniverseFlags(tuple(missing[:20]), len(missing), tuple(empty))


def _rate_table(found: _UniverseCounts, window: tuple[int, int]) -> RateTable:
    """``count_rates`` over the universe from counts: the same table as joining every record."""
    c = found.counts
    counted = c.loc[c["category"].isin(["forced", "voluntary"]) & c["year"].between(*window)]
    inside = counted.loc[counted["inside"]]
    counts = (inside.groupby(["year", "category"])["departures"].sum().unstack(fill_value=0)
              .reindex(columns=["forced", "voluntary"], fill_value=0))
    exposure = found.exposure.loc[(found.exposure.index >= window[0]) & (found.exposure.index <= window[1])]
    return rate_table(counts, exposure, window, outside=int(counted.loc[~counted["inside"], "departures"].sum()),
                      departure_years=counted.loc[counted["departures"] > 0, "year"].unique().tolist())


def run_rates(store: Store, inp: AnalysisInput, *, record: bool = True) -> RateAnalysis:
    """Rates and trends over the window with the roster's current universe; recorded as a run when fitted.

    Raises ``StoreError`` when the roster has no universe yet.
    """
    started = time.perf_counter()
    universe = universe_or_error(store, inp.roster.id, inp.roster.name)
    found = _universe_counts(store, inp, universe, inp.window)
    table = _rate_table(found, inp.window)
    flags = _flags(inp, found, inp.window)
    messages = flags.messages()
    if universe.approximate:
        messages.insert(0, APPROXIMATE)
    if table.outside:
        messages.append(f"{table.outside:,} counted departure(s) in the window fall outside the universe's "
                        "firm-years and are left out of the rates.")
    if table.no_universe_years:
        messages.append("The universe has no firm-years in " + ", ".join(map(str, table.no_universe_years))
                        + "; those years have no rate.")
    try:
        forced, voluntary = fit_rate_trend(table, "forced"), fit_rate_trend(table, "voluntary")
    except RateError as exc:
        return RateAnalysis(universe, table, None, None, None, None, None, str(exc), flags, tuple(messages), None)
    share_or: float | None = None
    share_interval: tuple[float, float] | None = None
    try:
        inside = found.counts.loc[found.counts["inside"]]
        share = memoised(store, ("rates_share", *inp.key, universe.id),
                         lambda: fit_trend(cells_from_counts(inside, inp.window)))
        share_or = share.odds_ratio
        bounds = share.quasi.conf_int["profile"] if share.quasi is not None else share.conf_int["profile"]
        share_interval = bounds
    except TrendError as exc:
        messages.append(f"The forced share's trend could not be fitted ({exc}); the sentence reads it as flat.")
    sentence = decomposition_sentence(share_interval, forced, voluntary)
    messages += list(forced.messages) + list(voluntary.messages)
    run_id = None
    if record:
        params = {"model": "rate", "universe_id": universe.id, "universe_fingerprint": universe.fingerprint,
                  "universe_source": universe.source}
        fingerprint = hashlib.sha256(table.years.to_csv(index=False).encode()).hexdigest()[:16]
        result = {"measure": "rate", "rate_ratio": forced.rate_ratio, "forced": rate_trend_to_dict(forced),
                  "voluntary": rate_trend_to_dict(voluntary), "share_odds_ratio": json_number(share_or),
                  "sentence": sentence, "universe_fingerprint": universe.fingerprint}
        run_id = _record_run(store, inp, params, fingerprint, result, time.perf_counter() - started)
    return RateAnalysis(universe, table, forced, voluntary, share_or, share_interval, sentence, None, flags,
                        tuple(dict.fromkeys(messages)), run_id)


def rate_summary(store: Store, inp: AnalysisInput) -> dict[str, Any]:
    """The command line's ``fit --measure rate --json`` object."""
    a = run_rates(store, inp)
    if a.error is not None or a.forced is None or a.voluntary is None:
        raise RateError(a.error or "The rate trend could not be fitted.")
    u = a.universe
    return {
        "measure": "rate", "roster": inp.roster.name, "mapping": inp.mapping_label, "window": list(inp.window),
        "rate_ratio": json_number(a.forced.rate_ratio),
        "conf_int": {k: json_interval(v) for k, v in a.forced.conf_int.items()},
        "quasi": rate_trend_to_dict(a.forced)["quasi"], "dispersion": json_number(a.forced.dispersion),
        "voluntary_rate_ratio": json_number(a.voluntary.rate_ratio),
        "voluntary_conf_int": {k: json_interval(v) for k, v in a.voluntary.conf_int.items()},
        "share_odds_ratio": json_number(a.share_odds_ratio), "share_conf_int": json_interval(a.share_interval),
        "firm_years": a.table.firm_years, "forced": a.forced.events, "voluntary": a.voluntary.events,
        "years": a.years(), "sentence": a.sentence, "run": a.run_id,
        "universe": {"id": u.id, "source": u.source, "approximate": u.approximate, "fingerprint": u.fingerprint,
                     "firms": u.firms, "firm_years": u.firm_years},
        "caution": SHARE_VS_RATE, "messages": list(a.messages),
    }


@dataclass(frozen=True)
class RatesSection:
    """The Rates section of Coverage (table only) and Trend (table and both trends), as plain values.

    ``error`` says why there is nothing to show (no universe yet, or no trend could be fitted).
    """

    universe_id: int | None
    universe_label: str | None
    approximate: bool
    firm_years: int
    years: list[dict[str, Any]]
    forced: dict[str, Any] | None
    voluntary: dict[str, Any] | None
    sentence: str | None
    error: str | None
    messages: list[str]
    caution: str = SHARE_VS_RATE


def _label(u: Universe) -> str:
    kind = "derived from the roster (approximation)" if u.approximate else f"imported from {u.source_name}"
    return f"universe {u.id}, {kind}: {u.firms:,} firms, {u.firm_years:,} firm-years [{u.fingerprint}]"


def rates_section(store: Store, inp: AnalysisInput, *, fit: bool) -> RatesSection:
    """Rates per year over the roster's current universe; with ``fit``, both Poisson trends (recorded)."""
    universe = store.current_universe(inp.roster.id)
    if universe is None:
        return RatesSection(None, None, False, 0, [], None, None, None,
                            "No universe of firm-years yet: import one (or derive one) on the Universe page to "
                            "see turnover rates per 100 firm-years.", [])
    if fit:
        a = run_rates(store, inp)
        return RatesSection(
            universe.id, _label(universe), universe.approximate, a.table.firm_years, a.years(),
            rate_trend_to_dict(a.forced) if a.forced else None,
            rate_trend_to_dict(a.voluntary) if a.voluntary else None, a.sentence, a.error, list(a.messages))
    found = _universe_counts(store, inp, universe, inp.window)
    table = _rate_table(found, inp.window)
    flags = _flags(inp, found, inp.window)
    view = RateAnalysis(universe, table, None, None, None, None, None, None, flags, (), None)
    messages = ([APPROXIMATE] if universe.approximate else []) + flags.messages()
    if table.outside:
        messages.append(f"{table.outside:,} counted departure(s) in the window fall outside the universe's "
                        "firm-years and are left out of the rates.")
    return RatesSection(universe.id, _label(universe), universe.approximate, table.firm_years, view.years(),
                        None, None, None, None, messages)


def universe_overview(store: Store, inp: AnalysisInput, universe: Universe
                      ) -> tuple[list[dict[str, int]], UniverseFlags]:
    """The Universe page's table (firms and roster rows per universe year) and flags over every year, from
    counts: the same values as comparing every record with every firm-year."""
    found = _universe_counts(store, inp, universe, None)
    rows = inp.counts.groupby("year")["departures"].sum().reindex(found.exposure.index, fill_value=0)
    years = [{"year": int(y), "firms": int(n), "roster_rows": int(k)}
             for y, n, k in zip(found.exposure.index.to_numpy(), found.exposure.to_numpy(), rows.to_numpy(),
                                strict=True)]
    return years, _flags(inp, found, None)
