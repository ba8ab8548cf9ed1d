"""Sectors (does the trend hold within each sector?) and Robustness (under other readings of "forced")."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse

from app.analysis.cellstore import roster_counts
from app.analysis.inputs import load_input
from app.analysis.robustness import Robustness, check_robustness, offered_mappings
from app.analysis.robustness_measures import default_adjust
from app.analysis.rules import PRESET_NAME, PRESET_SOURCE
from app.analysis.runs import run_sectors
from app.briefing.findings import robustness_finding_from, sectors_finding_from
from app.stats.sectors import SectorTrends
from app.store import Roster, Store, StoreError
from app.web.departures import mapping_ref
from app.web.deps import BadRequest, NotFound, adjust_arg, app_store, flag_arg
from app.web.figures import FigureSpec, figure_spec, page_memo
from app.web.rendering import as_json, render
from app.web.route_docs import api_errors, page_errors, query
from app.web.schemas import define

router = APIRouter()


@dataclass(frozen=True)
class SectorsPage:
    """Per-sector trends, the sector-adjusted common trend and the test of equal trends."""

    roster: Roster
    mapping_label: str
    window: tuple[int, int] | None
    result: SectorTrends | None
    verdict: str | None
    error: str | None
    figure: FigureSpec | None = field(default=None, metadata={"json_skip": True})
    warnings: list[str] = field(default_factory=list)
    records_mapping: str | None = field(default=None, metadata={"json_skip": True})


SectorsBody = define(SectorsPage, "SectorsBody")


@dataclass(frozen=True)
class RobustnessPage:
    """The trend under each variant of the mapping."""

    roster: Roster
    mapping_label: str
    result: Robustness | None
    mapping_names: list[tuple[str, int]]
    chosen: list[str]
    vary: list[str]
    codes: list[str]
    error: str | None
    figure: FigureSpec | None = field(default=None, metadata={"json_skip": True})
    warnings: list[str] = field(default_factory=list)
    #: the academic preset (retirement below 60 counts as forced) is among the readings
    preset: bool = False
    preset_label: str = f"{PRESET_NAME}: {PRESET_SOURCE}"
    #: what each reading's adjusted odds ratio adjusts for (the analyst's choice, else the roster's fields)
    adjust: list[str] = field(default_factory=list)
    #: the readings also carry the forced rate ratio and the adjusted odds ratio (asked for: they read the firm
    #: counts, as the adjusted trend on Trend does)
    measures: bool = False


RobustnessBody = define(RobustnessPage, "RobustnessBody",
                        descriptions={"chosen": "the other mappings compared, as name:version"})


def _roster(store: Store, roster_id: int) -> Roster:
    try:
        return store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc


def sectors_data(store: Store, roster_id: int, *, min_departures: int = 20) -> SectorsPage:
    roster = _roster(store, roster_id)
    try:
        inp = load_input(store, roster.id)
        result, _ = run_sectors(store, inp, min_departures=min_departures)
    except (StoreError, ValueError) as exc:
        return SectorsPage(roster, "no mapping", None, None, None, str(exc))
    if not any(t.status == "fitted" for t in result.sectors):  # nothing to draw: say why instead
        return SectorsPage(roster, inp.mapping_label, inp.window, result, None,
                           "No sector could be fitted on its own. " + " ".join(result.messages),
                           warnings=inp.warnings(), records_mapping=mapping_ref(inp.mapping))

    def draw() -> tuple[str, FigureSpec]:
        finding = sectors_finding_from(inp, result)
        return finding.takeaway, figure_spec(finding.figure, titled=False)

    takeaway, figure = page_memo(store, ("sectors", *inp.key, min_departures), draw)
    return SectorsPage(roster, inp.mapping_label, inp.window, result, takeaway, None, figure, inp.warnings(),
                       mapping_ref(inp.mapping))


def robustness_data(store: Store, roster_id: int, *, extra: list[str], vary: list[str],
                    preset: bool = False, adjust: tuple[str, ...] | None = None,
                    measures: bool = False) -> RobustnessPage:
    roster = _roster(store, roster_id)
    names = store.list_mappings()
    codes = sorted(set(roster_counts(store, roster)["reason"].astype(str)))
    chosen_adjust = adjust if adjust is not None else default_adjust(roster)
    try:
        inp = load_input(store, roster.id)
        chosen: list[str] | Literal["covering"] = extra or "covering"  # default: mappings covering the codes
        if not extra:
            extra = offered_mappings(store, inp)[0]
        # the variants read stored bootstrap runs: their state is part of the key
        runs = tuple((r.id, r.finished_at, r.progress_done) for r in store.list_runs(roster.id, "bootstrap")
                     if r.status == "done")
        # the rate ratios read the roster's current universe (a new import is a new id, never reused)
        universe = store.current_universe(roster.id)
        key = (*inp.key, tuple(extra), chosen == "covering", tuple(vary), runs, preset, chosen_adjust,
               universe.id if universe is not None else None, measures)
        result = page_memo(store, ("robustness", *key),
                           lambda: check_robustness(store, inp, extra_mappings=chosen, vary=vary, preset=preset,
                                                    adjust=chosen_adjust, measures=measures))
    except (StoreError, ValueError) as exc:
        return RobustnessPage(roster, "no mapping", None, names, extra, vary, codes, str(exc), preset=preset,
                              adjust=list(chosen_adjust), measures=measures)
    if all(v.odds_ratio is None for v in result.variants):  # nothing to draw: the table says why
        return RobustnessPage(roster, inp.mapping_label, result, names, extra, vary, codes, None, None,
                              inp.warnings(), preset=preset, adjust=list(chosen_adjust), measures=measures)
    figure = page_memo(store, ("robustness-figure", *key),
                       lambda: figure_spec(robustness_finding_from(inp, result).figure, titled=False))
    return RobustnessPage(roster, inp.mapping_label, result, names, extra, vary, codes, None, figure,
                          inp.warnings(), preset=preset, adjust=list(chosen_adjust), measures=measures)


def _min_departures(request: Request) -> int:
    raw = request.query_params.get("min_departures", "20")
    if not raw.isdecimal() or not 1 <= int(raw) <= 10_000:
        raise BadRequest(f"min_departures must be a whole number from 1 to 10000; got {raw!r}.")
    return int(raw)


_MIN_DEPARTURES = query(("min_departures", {"type": "integer", "minimum": 1, "maximum": 10_000, "default": 20},
                         "fit a sector only with at least this many counted departures"))
_ROBUSTNESS_QUERY = query(
    ("mapping", {"type": "array", "items": {"type": "string"}},
     "other mappings to compare, as name:version (repeatable; default: every other mapping)"),
    ("vary", {"type": "array", "items": {"type": "string"}},
     "reason codes whose category to move (repeatable)"),
    ("preset", {"type": "integer", "enum": [0, 1], "default": 0},
     "1: also read the codes with the academic preset (retirement below 60 counts as forced)"),
    ("measures", {"type": "integer", "enum": [0, 1], "default": 0},
     "1: each reading also gives the forced rate ratio (with a universe) and the adjusted odds ratio per year "
     "(reads the firm counts)"),
    ("adjusting", {"type": "integer", "enum": [0, 1], "default": 0},
     "1: the ``adjust`` values are the adjustment set (none given: adjust for nothing); 0: age, tenure and "
     "sector where the roster has them"),
    ("adjust", {"type": "array", "items": {"type": "string", "enum": ["age", "tenure", "sector"]}},
     "what each reading's adjusted odds ratio adjusts for (repeatable, with adjusting=1)"))


@router.get("/rosters/{roster_id}/sectors", response_class=HTMLResponse, name="sectors_page",
            responses=page_errors(400, 404), openapi_extra=_MIN_DEPARTURES)
def sectors_page(request: Request, roster_id: int) -> HTMLResponse:
    page = sectors_data(app_store(request), roster_id, min_departures=_min_departures(request))
    return render(request, "sectors.html", page, roster=page.roster, active="sectors_page", cautions_open=True)


@router.get("/api/rosters/{roster_id}/sectors", name="sectors_api", response_model=None,
            responses={200: {"model": SectorsBody, "description": "The trend within each sector"},
                       **api_errors(400, 404)}, openapi_extra=_MIN_DEPARTURES)
def sectors_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(sectors_data(app_store(request), roster_id, min_departures=_min_departures(request)))


def _robustness_args(request: Request) -> dict[str, Any]:
    preset = flag_arg(request, "preset")
    measures = flag_arg(request, "measures")
    adjust = adjust_arg(request, "adjusting")
    return {"extra": [m for m in request.query_params.getlist("mapping") if m],
            "vary": [c for c in request.query_params.getlist("vary") if c], "preset": preset,
            "adjust": adjust, "measures": measures}


@router.get("/rosters/{roster_id}/robustness", response_class=HTMLResponse, name="robustness_page",
            responses=page_errors(400, 404), openapi_extra=_ROBUSTNESS_QUERY)
def robustness_page(request: Request, roster_id: int) -> HTMLResponse:
    page = robustness_data(app_store(request), roster_id, **_robustness_args(request))
    return render(request, "robustness.html", page, roster=page.roster, active="robustness_page",
                  cautions_open=True)


@router.get("/api/rosters/{roster_id}/robustness", name="robustness_api", response_model=None,
            responses={200: {"model": RobustnessBody, "description": "The trend under other mappings"},
                       **api_errors(400, 404)}, openapi_extra=_ROBUSTNESS_QUERY)
def robustness_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(robustness_data(app_store(request), roster_id, **_robustness_args(request)))
