"""A bootstrap run's parameters: checked when the run is made, and what they mean when it runs.

The statistic a run resamples, its options (sector, spline df, periods), the resampling unit and whether firms
are drawn within their sector; filled in from the data when the run is created so it replays exactly.
"""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np

from app.analysis.inputs import AnalysisInput
from app.stats.cells import Cells
from app.stats.design import window_centre
from app.stats.draws import SAMPLER, check_sampler
from app.stats.periods import default_periods, parse_periods
from app.stats.sectors import fit_sector_trends
from app.stats.statistics import STATISTICS, Statistic, firm_strata, make_statistic
from app.store import Roster
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
                     periods: Any = None, stratify: str = "none", sampler: int = SAMPLER) -> dict[str, Any]:
    """A bootstrap run's parameters, checked; the statistic's options are stored only for the statistic that
    uses them, and ``statistic``/``stratify`` only when not the default (older runs read the same).

    ``periods`` is ``1997-2009:2010-2022`` or two (first, last) pairs; ``sectors`` (equal-trends test) and
    default ``periods`` are filled in from the data when the run is created. ``sampler`` (the firm-draw scheme,
    ``app.stats.draws.SAMPLERS``) is always stored: a run without one was drawn by sampler 1."""
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
    """The statistic a run's parameters name, over the run's cells."""
    periods = params.get("periods")
    return make_statistic(params.get("statistic", "slope"), cells, centre=window_centre(cells.window),
                          model=params.get("model", "linear"), sector=params.get("sector"),
                          sectors=tuple(params.get("sectors") or ()), spline_df=int(params.get("spline_df", 3)),
                          periods=None if periods is None else (tuple(periods[0]), tuple(periods[1])))


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
    if params.get("statistic") == "heterogeneity" and not params.get("sectors"):
        het = fit_sector_trends(inp.group_cells(by_sector=True), min_departures=SECTOR_MIN_DEPARTURES).heterogeneity
        if het is None:
            raise ValueError("Fewer than two sectors can be fitted, so equal trends cannot be tested or resampled.")
        params["sectors"] = list(het.sectors)
    if params.get("statistic") == "period_difference" and not params.get("periods"):
        first, second = default_periods(inp.window)
        params["periods"] = [list(first), list(second)]
    cells = inp.group_cells(by_sector=by_sector(params))
    statistic_for(params, cells).original(cells)
    return params
