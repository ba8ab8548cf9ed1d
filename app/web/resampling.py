"""Resampling: start bootstrap runs, watch their progress, read their intervals and histograms."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.analysis.inputs import input_for_run, load_input
from app.analysis.jobs import create_bootstrap_run, extend_run
from app.analysis.run_params import (
    MAX_RESAMPLES,
    STRATIFY,
    bootstrap_params,
    check_spline_df,
    default_seed,
    measure_intervals,
)
from app.analysis.runs import run_trend
from app.briefing.findings import bootstrap_finding
from app.stats.statistic_names import STATISTIC_HELP, STATISTICS
from app.stats.trend import TrendError
from app.store import Roster, Run, Store, StoreError
from app.types import UNITS
from app.web.deps import BadRequest, NotFound, app_jobs, app_store
from app.web.figures import FigureSpec, figure_spec
from app.web.forms import Upload, read_form
from app.web.rendering import as_json, render
from app.web.route_docs import FORM_AGAIN, api_errors, form_body, page_errors, query, redirect
from app.web.run_numbers import bootstrap_number, ordinals
from app.web.schemas import BootstrapRunOut, IntervalRow, Percent, define, list_of, one_of

router = APIRouter()

METHODS = ("percentile", "basic", "bca", "normal", "studentized")
METHOD_LABELS = {"percentile": "percentile", "basic": "basic", "bca": "BCa", "normal": "normal",
                 "studentized": "studentized"}


@dataclass(frozen=True)
class ResamplingPage:
    """The start form's defaults and every bootstrap run of the roster."""

    roster: Roster
    mapping_label: str
    window: tuple[int, int] | None
    runs: list[Run]
    #: the seed the start form offers: derived from the roster's id and data, the same on every visit
    default_seed: int
    error: str | None = None
    warnings: list[str] = field(default_factory=list)
    max_resamples: int = MAX_RESAMPLES
    units: tuple[str, ...] = UNITS
    statistics: tuple[str, ...] = STATISTICS
    statistic_help: dict[str, str] = field(default_factory=lambda: dict(STATISTIC_HELP))
    sectors: list[str] = field(default_factory=list)
    #: run id -> "Bootstrap N", the run's number among the roster's bootstrap runs (links keep the run id)
    run_numbers: dict[int, int] = field(default_factory=dict)


RunsBody = define(ResamplingPage, "RunsBody", fields={"runs": list_of(BootstrapRunOut)})


@dataclass(frozen=True)
class RunPage:
    """One bootstrap run: its state, and when done its intervals, histogram and comparison.

    ``roster`` is None when the roster was deleted: the stored intervals stay readable, nothing is redrawn.
    """

    roster: Roster | None
    run: Run
    method: str
    rows: list[dict[str, Any]] = field(default_factory=list)
    comparison: str | None = None
    comparison_found: bool = False
    figure: FigureSpec | None = field(default=None, metadata={"json_skip": True})
    percent: int = 0
    roster_deleted: bool = False
    #: the roster's newest version when it is newer than the one the run read (a refresh came since)
    newer_version: int | None = None
    #: "Bootstrap N": the run's number among its roster's bootstrap runs
    number: int = 0


RunBody = define(RunPage, "RunBody", fields={"run": BootstrapRunOut, "method": one_of(METHODS),
                                             "rows": list_of(IntervalRow), "percent": Percent})


def resampling_data(store: Store, roster_id: int, error: str | None = None) -> ResamplingPage:
    roster = _roster(store, roster_id)
    warnings: list[str] = []
    try:
        inp = load_input(store, roster.id)
        mapping_label, window, warnings = inp.mapping_label, inp.window, inp.warnings()
        sectors = sorted(set(inp.group_cells(by_sector=True).groups["sector"].astype(str)))
    except StoreError as exc:
        mapping_label, window, error, sectors = "no mapping", None, error or str(exc), []
    runs = store.list_runs(roster.id, "bootstrap")
    return ResamplingPage(roster, mapping_label, window, runs, default_seed=default_seed(roster), error=error,
                          warnings=warnings, sectors=sectors, run_numbers=ordinals(runs))



def _roster(store: Store, roster_id: int) -> Roster:
    try:
        return store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc


def _run(store: Store, run_id: int) -> Run:
    try:
        run = store.get_run(run_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    if run.kind != "bootstrap":
        raise NotFound(f"Run {run_id} is a {run.kind} run, not a bootstrap run.")
    return run


def _width(iv: Any) -> float | None:
    if not iv or iv[0] is None or iv[1] is None or iv[0] <= 0:
        return None
    return math.log(iv[1]) - math.log(iv[0])


def compare_units(store: Store, run: Run, method: str) -> tuple[str | None, bool]:
    """Say whether firm resampling widened the interval against departure resampling, same settings.

    Returns the sentence and whether a run to compare with was found.
    """
    if run.result is None or run.params.get("statistic") == "rate_ratio":  # a rate resamples firms only
        return None, False
    other_unit = "departure" if run.params["unit"] == "firm" else "firm"
    for other in store.list_runs(run.roster_id, "bootstrap"):
        if (other.status == "done" and other.params.get("unit") == other_unit and other.result
                and other.fingerprint == run.fingerprint and other.window == run.window
                and other.mapping_version == run.mapping_version and other.mapping_name == run.mapping_name
                and other.params.get("model") == run.params.get("model")
                and other.params.get("statistic", "slope") == run.params.get("statistic", "slope")
                and other.params.get("adjust") == run.params.get("adjust")):
            firm, dep = (run, other) if run.params["unit"] == "firm" else (other, run)
            wf = _width(firm.result["conf_int"][method]) if firm.result else None
            wd = _width(dep.result["conf_int"][method]) if dep.result else None
            if not wf or not wd:
                return None, False
            change = wf / wd - 1
            # below ~5% the difference is within the Monte Carlo noise of a few thousand resamples
            verb = "widened" if change > 0.05 else "narrowed" if change < -0.05 else "barely changed"
            amount = f" by {abs(change) * 100:.0f}%" if verb != "barely changed" else ""
            note = (" Departures of one firm are not independent, so the firm interval is the one to quote."
                    if change > 0.05 else "")
            return (f"Resampling whole firms {verb} the 95% {METHOD_LABELS[method]} interval{amount} compared with "
                    f"resampling departures (run {dep.id if firm is run else firm.id}, same data, mapping and "
                    f"window; widths on the log scale).{note}"), True
    return (f"No finished {other_unit}-resampling run with the same data, mapping and window yet; start one to see "
            "whether firm clustering widens the interval."), False


def run_data(store: Store, run_id: int, method: str = "bca") -> RunPage:
    if method not in METHODS:
        raise BadRequest(f"method must be one of {', '.join(METHODS)}; got {method!r}.")
    run = _run(store, run_id)
    if run.result is not None and method not in run.result["conf_int"]:
        method = "bca"  # a run stored before normal and studentized intervals existed
    try:
        roster: Roster | None = store.get_roster(run.roster_id)
    except StoreError:
        roster = None  # deleted; roster ids are never reused, so this run cannot point at other data
    percent = int(100 * run.progress_done / run.progress_total) if run.progress_total else 0
    newer = roster.latest_version if roster is not None and roster.latest_version > run.roster_version else None
    number = bootstrap_number(store, run)
    if run.status != "done" or run.result is None:
        return RunPage(roster, run, method, percent=percent, roster_deleted=roster is None, newer_version=newer,
                       number=number)
    result = run.result
    rows = [{"method": METHOD_LABELS[m], "interval": result["conf_int"][m], "mc_error": result["mc_error"][m],
             "source": f"bootstrap, B = {result['resamples']:,}"} for m in METHODS if m in result["conf_int"]]
    if roster is None:
        return RunPage(None, run, method, rows, percent=100, roster_deleted=True, number=number)
    rows += model_rows(store, run)
    fig = bootstrap_finding(store, run.id, method).figure
    comparison, found = compare_units(store, run, method)
    return RunPage(roster, run, method, rows, comparison, found, figure_spec(fig, titled=False), 100,
                   newer_version=newer, number=number)


def model_rows(store: Store, run: Run) -> list[dict[str, Any]]:
    """Model-based intervals of the number a run resampled, where the pages report them (the share's slope,
    the rate ratio, the adjusted odds ratio), beside the bootstrap's."""
    statistic = run.params.get("statistic", "slope")
    try:
        inp = input_for_run(store, run)
        if statistic == "slope":
            ci = run_trend(store, inp, model=run.params.get("model", "linear")).fit.conf_int
            pairs, source = [("Wald", ci.get("wald")), ("profile likelihood", ci.get("profile"))], "trend fit (model-based)"
        elif statistic in ("rate_ratio", "adjusted_odds_ratio"):
            pairs, source = measure_intervals(store, inp, run.params)
        else:
            return []
    except (ValueError, StoreError, TrendError) as exc:
        return [{"method": "model-based", "interval": None, "mc_error": None, "source": str(exc)}]
    return [{"method": name, "interval": iv, "mc_error": None, "source": source} for name, iv in pairs]


@router.get("/rosters/{roster_id}/resampling", response_class=HTMLResponse, name="resampling_page",
            responses=page_errors(404))
def resampling_page(request: Request, roster_id: int) -> HTMLResponse:
    page = resampling_data(app_store(request), roster_id)
    return render(request, "resampling.html", page, roster=page.roster, active="resampling_page")


@router.get("/api/rosters/{roster_id}/runs", name="runs_api", response_model=None,
            responses={200: {"model": RunsBody, "description": "The roster's bootstrap runs"},
                       **api_errors(404)})
def runs_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(resampling_data(app_store(request), roster_id))


def _int_field(form: Any, key: str, default: int) -> int:
    raw = str(form.get(key) or default).strip().replace(",", "").replace("_", "")
    if not raw.isdecimal():
        raise BadRequest(f"{key} must be a whole number; got {raw!r}.")
    return int(raw)


@router.post("/rosters/{roster_id}/resampling", name="resampling_start", response_model=None, status_code=303,
             response_class=RedirectResponse, responses=redirect("the run's page", FORM_AGAIN, page_errors(404)),
             openapi_extra=form_body({
                 "unit": {"type": "string", "enum": list(UNITS), "default": "firm", "description": "what to resample"},
                 "resamples": {"type": "integer", "minimum": 100, "maximum": MAX_RESAMPLES, "default": 2000,
                               "description": "B, the number of resamples (thousands separators allowed)"},
                 "seed": {"type": "integer", "minimum": 0, "maximum": 2**63 - 1, "default": 1},
                 "model": {"type": "string", "enum": ["linear", "sector"], "default": "linear"},
                 "statistic": {"type": "string", "enum": list(STATISTICS), "default": "slope",
                               "description": "what to bootstrap"},
                 "sector": {"type": "string", "description": "sector_slope: the sector"},
                 "spline_df": {"type": "integer", "minimum": 2, "maximum": 6, "default": 3,
                               "description": "spline_bend: the spline's df"},
                 "periods": {"type": "string", "description": "period_difference: FROM-TO:FROM-TO (default: the "
                                                              "window's last third against the rest)"},
                 "stratify": {"type": "string", "enum": list(STRATIFY), "default": "none",
                              "description": "sector: draw firms within their sector (unit firm)"},
                 "adjust": {"type": "string", "default": "age,tenure,sector",
                            "description": "adjusted_odds_ratio: what the model adjusts for (comma-separated)"},
             }))
async def resampling_start(request: Request, roster_id: int) -> Response:
    """Store the run, hand it to a worker, and go to its page (which shows the progress)."""
    form = await read_form(request)
    return await run_in_threadpool(_resampling_start, request, roster_id, form)


def _resampling_start(request: Request, roster_id: int, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    roster = _roster(store, roster_id)
    try:
        statistic = str(form.get("statistic") or "slope")
        # checked whatever the statistic (the form always sends it; a value out of range is a mistake)
        spline_df = check_spline_df(_int_field(form, "spline_df", 3))
        params = bootstrap_params(unit=str(form.get("unit") or "firm"), resamples=_int_field(form, "resamples", 2000),
                                  seed=_int_field(form, "seed", 1), model=str(form.get("model") or "linear"),
                                  statistic=statistic, sector=str(form.get("sector") or "") or None,
                                  spline_df=spline_df if statistic == "spline_bend" else None,
                                  periods=str(form.get("periods") or "").strip() or None,
                                  stratify=str(form.get("stratify") or "none"),
                                  adjust=str(form["adjust"]) if "adjust" in form else None)
        inp = load_input(store, roster.id)
        run_id = create_bootstrap_run(store, inp, params)
    except (ValueError, BadRequest) as exc:
        page = resampling_data(store, roster.id, error=str(exc))
        return render(request, "resampling.html", page, roster=page.roster, active="resampling_page", status=400)
    app_jobs(request).submit(run_id)
    return RedirectResponse(request.url_for("run_page", run_id=run_id), status_code=303)


_METHOD = query(("method", {"type": "string", "enum": list(METHODS), "default": "bca"},
                 "the interval marked on the histogram"))


@router.get("/runs/{run_id}", response_class=HTMLResponse, name="run_page", responses=page_errors(400, 404),
            openapi_extra=_METHOD)
def run_page(request: Request, run_id: int) -> HTMLResponse:
    page = run_data(app_store(request), run_id, request.query_params.get("method", "bca"))
    return render(request, "run.html", page, roster=page.roster, active="resampling_page", cautions_open=True)


@router.get("/api/runs/{run_id}", name="run_api", response_model=None,
            responses={200: {"model": RunBody, "description": "One bootstrap run; intervals once it is done"},
                       **api_errors(400, 404)}, openapi_extra=_METHOD)
def run_api(request: Request, run_id: int) -> JSONResponse:
    return as_json(run_data(app_store(request), run_id, request.query_params.get("method", "bca")))


@router.get("/runs/{run_id}/progress", response_class=HTMLResponse, name="run_progress",
            responses={200: {"description": "The progress partial; HX-Refresh: true once the run has ended",
                             "headers": {"HX-Refresh": {"schema": {"type": "string", "enum": ["true"]}}}},
                       **page_errors(404)})
def run_progress(request: Request, run_id: int) -> HTMLResponse:
    """The progress partial, polled by the page; once the run has ended it asks the page to reload."""
    page = run_data(app_store(request), run_id)
    response = render(request, "_partials/run_progress.html", page)
    if page.run.status not in ("queued", "running"):
        response.headers["HX-Refresh"] = "true"
    return response


@router.post("/runs/{run_id}/cancel", name="run_cancel", status_code=303, response_class=RedirectResponse,
             responses=redirect("the run's page", page_errors(404)))
def run_cancel(request: Request, run_id: int) -> RedirectResponse:
    store = app_store(request)
    run = _run(store, run_id)
    if run.status in ("queued", "running"):
        store.request_cancel(run.id)
    return RedirectResponse(request.url_for("run_page", run_id=run.id), status_code=303)


@router.post("/runs/{run_id}/extend", name="run_extend", status_code=303, response_class=RedirectResponse,
             responses=redirect("the run's page", page_errors(400, 404)),
             openapi_extra=form_body({"extra": {
                 "type": "integer", "minimum": 0, "maximum": MAX_RESAMPLES,
                 "description": f"resamples to add (0: finish the planned ones); the total stays <= {MAX_RESAMPLES}",
             }}))
async def run_extend(request: Request, run_id: int) -> RedirectResponse:
    """Add resamples to a finished, cancelled or interrupted run; stored replicates are kept."""
    form = await read_form(request)
    return await run_in_threadpool(_run_extend, request, run_id, form)


def _run_extend(request: Request, run_id: int, form: dict[str, str | Upload]) -> RedirectResponse:
    store = app_store(request)
    run = _run(store, run_id)
    if run.status in ("queued", "running"):
        raise BadRequest("This run is still going; wait for it to end before extending it.")
    if not any(r.id == run.roster_id for r in store.list_rosters()):
        raise BadRequest("This run's roster was deleted, so the run cannot be extended; its results stay readable.")
    extra = _int_field(form, "extra", 0)
    try:
        extend_run(store, run.id, extra)
    except ValueError as exc:
        raise BadRequest(str(exc)) from exc
    app_jobs(request).submit(run.id)
    return RedirectResponse(request.url_for("run_page", run_id=run.id), status_code=303)
