"""A bootstrap run's parameters: checked when the run is made, and what they mean when it runs.

The statistic a run resamples, its options (sector, spline df, periods), the resampling unit and whether firms
are drawn within their sector; filled in from the data when the run is created so it replays exactly.
"""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np

from app.analysis.adjusted import adjusted_cells
from app.analysis.cellstore import memoised
from app.analysis.inputs import AnalysisInput
from app.analysis.rates import run_rates, universe_or_error
from app.stats.adjusted import ADJUSTMENTS, bootstrap_cells, fit_adjusted, parse_adjust
from app.stats.cells import Cells
from app.stats.design import window_centre
from app.stats.draws import SAMPLER, check_sampler
from app.stats.measures import RATE_NEEDS_FIRMS, adjusted_statistic, rate_cells, rate_ratio_statistic
from app.stats.periods import default_periods, parse_periods
from app.stats.sectors import fit_sector_trends
from app.stats.statistic_names import MEASURE_STATISTICS
from app.stats.statistics import STATISTICS, Statistic, firm_strata, make_statistic
from app.store import Roster, Store
from app.types import UNITS, check_choice


def default_seed(roster: Roster) -> int:
    """A six-digit seed from the roster's id and file digest: stable across visits and commands (so a reload
    does not silently change the draws an analyst is about to start, and the page and ``helmshift bootstrap``
    offer the same one), different between rosters and after a refresh."""
    digest = hashlib.sha256(f"{roster.id}:{roster.sha256}".encode()).digest()
    return int.from_bytes(digest[:8], "big") % 900_000 + 100_000


#: the most resamples one run may ask for (a bound on time and storage, far above what intervals need)
MAX_RESAMPLES = 200_000

#: how firms are drawn: all together, or within their sector (each resample keeps each sector's firm count)
STRATIFY = ("none", "sector")
#: departures a sector needs to enter the test of equal trends (as on the Sectors page)
SECTOR_MIN_DEPARTURES = 20


def bootstrap_params(*, unit: str, resamples: int, seed: int, model: str = "linear", statistic: str = "slope",
                     sector: str | None = None, sectors: list[str] | None = None, spline_df: int | None = None,
                     periods: Any = None, stratify: str = "none", adjust: Any = None,
                     sampler: int = SAMPLER) -> dict[str, Any]:
    """A bootstrap run's parameters, checked; the statistic's options are stored only for the statistic that
    uses them, and ``statistic``/``stratify`` only when not the default (older runs read the same).

    ``periods`` is ``1997-2009:2010-2022`` or two (first, last) pairs; ``sectors`` (equal-trends test) and
    default ``periods`` are filled in from the data when the run is created. ``sampler`` (the firm-draw scheme,
    ``app.stats.draws.SAMPLERS``) is always stored: a run without one was drawn by sampler 1. ``adjust``
    (adjusted_odds_ratio: ``age,tenure,sector`` or a list, default all three) is stored as a list; a
    rate_ratio run's universe is filled in at creation (``universe_id``, ``universe_fingerprint``)."""
    check_choice(unit, UNITS, "unit")
    check_choice(model, ("linear", "sector"), "model")
    check_choice(statistic, STATISTICS, "statistic")
    check_choice(stratify, STRATIFY, "stratify")
    if not 100 <= resamples <= MAX_RESAMPLES:
        raise ValueError(f"resamples must be between 100 and {MAX_RESAMPLES}; got {resamples}.")
    if not 0 <= seed < 2**63:
        raise ValueError(f"seed must be a non-negative integer below 2**63; got {seed}.")
    if stratify == "sector" and unit != "firm":
        raise ValueError("stratify sector resamples whole firms within their sector; choose unit firm.")
    if statistic == "rate_ratio" and unit != "firm":
        raise ValueError(RATE_NEEDS_FIRMS)
    if statistic in MEASURE_STATISTICS and stratify != "none":
        raise ValueError(f"The {statistic} statistic draws firms from all firms; drawing them within their sector "
                         "is offered for the share statistics only.")
    params: dict[str, Any] = {"unit": unit, "resamples": int(resamples), "seed": int(seed), "model": model,
                              "sampler": check_sampler(sampler)}
    if statistic != "slope":
        params["statistic"] = statistic
    if stratify != "none":
        params["stratify"] = stratify
    if statistic == "sector_slope":
        if not sector:
            raise ValueError("The sector_slope statistic needs a sector (--sector NAME).")
        params["sector"] = str(sector)
    if statistic == "heterogeneity" and sectors:
        params["sectors"] = sorted(str(s) for s in sectors)
    if statistic == "spline_bend":
        params["spline_df"] = check_spline_df(3 if spline_df is None else spline_df)
    if statistic == "adjusted_odds_ratio":
        params["adjust"] = list(parse_adjust(ADJUSTMENTS if adjust is None else adjust))
    if statistic == "period_difference" and periods:
        (a, b), (c, d) = parse_periods(periods) if isinstance(periods, str) else periods
        params["periods"] = [[int(a), int(b)], [int(c), int(d)]]
    return params


def check_spline_df(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 2 <= value <= 6:
        raise ValueError(f"spline_df must be a whole number from 2 to 6; got {value!r}.")
    return value


def by_sector(params: dict[str, Any]) -> bool:
    """Whether a run's statistic is computed on sector-year cells."""
    return params.get("model") == "sector" or params.get("statistic") in ("sector_slope", "heterogeneity")


def statistic_for(params: dict[str, Any], cells: Cells) -> Statistic:
    """The statistic a run's parameters name, over the run's cells (:func:`cells_for`)."""
    if params.get("statistic") == "rate_ratio":
        return rate_ratio_statistic(cells, window_centre(cells.window))
    if params.get("statistic") == "adjusted_odds_ratio":
        return adjusted_statistic(cells, params.get("adjust", ()))
    periods = params.get("periods")
    return make_statistic(params.get("statistic", "slope"), cells, centre=window_centre(cells.window),
                          model=params.get("model", "linear"), sector=params.get("sector"),
                          sectors=tuple(params.get("sectors") or ()), spline_df=int(params.get("spline_df", 3)),
                          periods=None if periods is None else (tuple(periods[0]), tuple(periods[1])))


def cells_for(inp: AnalysisInput, params: dict[str, Any], *, firms: bool = True) -> Cells:
    """The cells a run's statistic resamples: the share's (years or sector-years; ``firms`` False: without
    reading the firm counts, for fingerprints), the universe's firm-years with the forced departures
    (rate_ratio) or the adjusted model's cells (adjusted_odds_ratio)."""
    statistic = params.get("statistic")
    if statistic == "rate_ratio":
        if "universe_id" not in params:
            raise ValueError("A rate_ratio run names its universe (universe_id).")
        return rate_run_cells(inp, int(params["universe_id"]))
    if statistic == "adjusted_odds_ratio":
        return bootstrap_cells(adjusted_cells(inp, parse_adjust(params.get("adjust", ()))), inp.window)[0]
    sectors = by_sector(params)
    return inp.cells(by_sector=sectors) if firms else inp.group_cells(by_sector=sectors)


def rate_run_cells(inp: AnalysisInput, universe_id: int) -> Cells:
    """Universe firms x (forced departures per year, firm-years per year) over the window (memoised).

    Departures are categorised as the share and the Rates section categorise them (code, then the mapping's
    rules, then its case overrides: ``AnalysisInput.categorised_firms``), so the original estimate is the rate
    ratio the Rates section reports."""
    def compute() -> Cells:
        firms = inp.categorised_firms()
        forced = firms.loc[(firms["category"] == "forced").to_numpy()]
        return rate_cells(inp.store.universe_firm_years(universe_id), forced, inp.window)
    return memoised(inp.store, ("rate_cells", *inp.key, universe_id), compute)


def strata_for(inp: AnalysisInput, params: dict[str, Any], cells: Cells) -> np.ndarray | None:
    """Each firm's sector when the run resamples firms within sectors (else None)."""
    if params.get("stratify", "none") != "sector":
        return None
    sectors = cells if cells.by_sector else inp.cells(by_sector=True)
    if not np.array_equal(sectors.firm_ids, cells.firm_ids):
        raise ValueError("The firms of the sector counts differ from the run's firms; cannot stratify.")
    return firm_strata(sectors)[0]


def _resolve(inp: AnalysisInput, params: dict[str, Any]) -> dict[str, Any]:
    """Fill in what a run's statistic takes from the data at creation: the sectors of the equal-trends test,
    default periods; and check the statistic can be computed on the original counts."""
    params = dict(params)
    if params.get("statistic") == "rate_ratio" and "universe_id" not in params:
        universe = universe_or_error(inp.store, inp.roster.id, inp.roster.name)
        params |= {"universe_id": universe.id, "universe_fingerprint": universe.fingerprint}
    if params.get("statistic") == "heterogeneity" and not params.get("sectors"):
        het = fit_sector_trends(inp.group_cells(by_sector=True), min_departures=SECTOR_MIN_DEPARTURES).heterogeneity
        if het is None:
            raise ValueError("Fewer than two sectors can be fitted, so equal trends cannot be tested or resampled.")
        params["sectors"] = list(het.sectors)
    if params.get("statistic") == "period_difference" and not params.get("periods"):
        first, second = default_periods(inp.window)
        params["periods"] = [list(first), list(second)]
    cells = cells_for(inp, params, firms=False)
    statistic_for(params, cells).original(cells)
    return params


def measure_intervals(store: Store, inp: AnalysisInput, params: dict[str, Any]
                      ) -> tuple[list[tuple[str, tuple[float, float] | None]], str]:
    """The model-based intervals the pages report for a rate_ratio or adjusted_odds_ratio run's number, and
    where they come from (for the run page, beside the bootstrap's)."""
    if params.get("statistic") == "rate_ratio":
        analysis = run_rates(store, inp, record=False)
        if analysis.universe.id != params.get("universe_id"):
            raise ValueError("The roster has another universe since this run; its model-based intervals are not "
                             "those of this run's firm-years.")
        forced = analysis.forced
        if forced is None:
            raise ValueError(analysis.error or "The forced rate's trend cannot be fitted.")
        pairs: list[tuple[str, tuple[float, float] | None]] = [("Wald", forced.conf_int["wald"]),
                                                               ("profile likelihood", forced.conf_int["profile"])]
        if forced.quasi is not None:
            pairs.append(("quasi-Poisson profile", forced.quasi.conf_int["profile"]))
        return pairs, "Poisson fit of the forced rate (model-based)"
    chosen = parse_adjust(params.get("adjust", ()))
    fit = memoised(store, ("fit_adjusted", *inp.key, chosen),
                   lambda: fit_adjusted(adjusted_cells(inp, chosen), inp.window))
    return [("firm-clustered Wald", fit.cluster_interval)], "adjusted fit (model-based, clustered by firm)"
