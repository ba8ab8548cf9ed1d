"""Coverage: departures per year by category, the suggested window, and the window control."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import pandas as pd
from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse
from starlette.concurrency import run_in_threadpool

from app.analysis.inputs import AnalysisInput, load_input
from app.analysis.rates import RatesSection, rates_section
from app.briefing.findings import coverage_finding
from app.stats.coverage import WindowSuggestion, YearFlag
from app.store import Roster, Store, StoreError
from app.web.departures import mapping_ref
from app.web.deps import BadRequest, NotFound, app_store
from app.web.figures import FigureSpec, figure_spec, page_memo
from app.web.forms import Upload, read_form
from app.web.rendering import as_json, context_line, render
from app.web.route_docs import api_errors, form_body, page_errors, query, redirect
from app.web.schemas import CoverageYear, define, list_of

router = APIRouter()


@dataclass(frozen=True)
class CoveragePage:
    """The yearly table, the rule-based suggestion, flagged years and the window in use."""

    roster: Roster
    mapping_label: str
    table: pd.DataFrame
    suggestion: WindowSuggestion
    flags: list[YearFlag]
    window: tuple[int, int]
    window_source: str
    threshold: float
    warnings: list[str]
    figure: FigureSpec = field(metadata={"json_skip": True})
    #: turnover per 100 firm-years over the roster's universe (no trend here; Trend fits it)
    rates: RatesSection | None = None
    records_mapping: str | None = field(default=None, metadata={"json_skip": True})
    #: rows still in post (no departure date, a code saying the executive has not left): no departure of any
    #: year, so no year of ``table`` counts them
    still_in_post: int = 0


CoverageBody = define(CoveragePage, "CoverageBody", fields={"table": list_of(CoverageYear)})


def coverage_data(store: Store, roster_id: int, *, threshold: float = 0.5) -> CoveragePage:
    try:
        inp = load_input(store, roster_id, require_mapping=False, threshold=threshold)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    return _page(inp, threshold, rates_section(store, inp, fit=False))


def _page(inp: AnalysisInput, threshold: float, rates: RatesSection | None = None) -> CoveragePage:
    figure = page_memo(inp.store, ("coverage", *inp.key, threshold, inp.window_source),
                       lambda: figure_spec(coverage_finding(inp).figure))
    return CoveragePage(
        roster=inp.roster, mapping_label=inp.mapping_label, table=inp.coverage, suggestion=inp.suggestion,
        flags=inp.flags, window=inp.window, window_source=inp.window_source, threshold=threshold,
        warnings=inp.warnings(), figure=figure, rates=rates, records_mapping=mapping_ref(inp.mapping),
        still_in_post=inp.in_post,
    )


def _threshold(request: Request) -> float:
    raw = request.query_params.get("threshold", "0.5")
    try:
        value = float(raw)
    except ValueError:
        raise BadRequest(f"threshold must be a number between 0.05 and 1; got {raw!r}.") from None
    if not 0.05 <= value <= 1:
        raise BadRequest(f"threshold must be between 0.05 and 1; got {value}.")
    return value


_THRESHOLD = query(("threshold", {"type": "number", "minimum": 0.05, "maximum": 1, "default": 0.5},
                    "a year is covered with at least this share of the median year's count"))


@router.get("/rosters/{roster_id}/coverage", response_class=HTMLResponse, name="coverage_page",
            responses=page_errors(400, 404), openapi_extra=_THRESHOLD)
def coverage_page(request: Request, roster_id: int) -> HTMLResponse:
    page = coverage_data(app_store(request), roster_id, threshold=_threshold(request))
    return render(request, "coverage.html", page, roster=page.roster, active="coverage",
                  context_line=context_line(page.mapping_label, page.window))


@router.get("/api/rosters/{roster_id}/coverage", name="coverage_api", response_model=None,
            responses={200: {"model": CoverageBody, "description": "Departures per year and the window"},
                       **api_errors(400, 404)}, openapi_extra=_THRESHOLD)
def coverage_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(coverage_data(app_store(request), roster_id, threshold=_threshold(request)))


def _year(form: Any, key: str) -> int:
    raw = str(form.get(key) or "").strip()
    if not raw.isdecimal():
        raise BadRequest(f"The window's {key.replace('window_', '')} year must be a year such as 1998; got {raw!r}.")
    return int(raw)


@router.post("/rosters/{roster_id}/window", name="window_save", status_code=303,
             response_class=RedirectResponse, responses=redirect("the Coverage page", page_errors(400, 404)),
             openapi_extra=form_body({
                 "window_from": {"type": "integer", "minimum": 0, "description": "first fiscal year"},
                 "window_to": {"type": "integer", "minimum": 0, "description": "last fiscal year"},
                 "reset": {"type": "string", "description": "any value: go back to the suggested window"},
             }))
async def window_save(request: Request, roster_id: int) -> RedirectResponse:
    """Remember the analysis window for this roster; trend and resampling use it by default."""
    form = await read_form(request)
    return await run_in_threadpool(_window_save, request, roster_id, form)


def _window_save(request: Request, roster_id: int, form: dict[str, str | Upload]) -> RedirectResponse:
    store = app_store(request)
    page = coverage_data(store, roster_id)
    if form.get("reset"):
        for key in ("window_from", "window_to"):
            if form.get(key):
                _year(form, key)  # a malformed year is refused even beside reset, as the schema says
        store.update_settings(page.roster.id, clear_window=True)
    else:
        lo, hi = _year(form, "window_from"), _year(form, "window_to")
        years = page.table["year"]
        if lo > hi:
            raise BadRequest(f"The window starts ({lo}) after it ends ({hi}).")
        if lo < int(years.min()) or hi > int(years.max()):
            raise BadRequest(f"The window must lie within the roster's years {int(years.min())}–{int(years.max())}.")
        if hi - lo < 2:
            raise BadRequest("A trend needs a window of at least three years.")
        store.update_settings(page.roster.id, window=(lo, hi))
    return RedirectResponse(request.url_for("coverage_page", roster_id=page.roster.id), status_code=303)
