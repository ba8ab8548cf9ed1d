"""Rosters: the list, one roster's detail with its rejected rows, the rejected-rows CSV and delete.

The upload steps (preview, review, confirm, one-call import) are in :mod:`app.web.roster_upload`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.analysis.cellstore import memoised, roster_counts, roster_fingerprint
from app.intake.ingest import RejectGroup, group_rejections, rejected_rows_csv
from app.store import RejectedRow, Roster, Store, StoreError
from app.web.deps import NotFound, app_settings, app_store, require_confirmation
from app.web.forms import Upload, read_form
from app.web.rendering import as_json, render
from app.web.route_docs import api_errors, download, form_body, page_errors, redirect
from app.web.schemas import SectorCount, define, list_of

router = APIRouter()

REJECTED_PAGE = 50

@dataclass(frozen=True)
class RostersPage:
    """Every stored roster, newest last, and the upload limit the form states."""

    rosters: list[Roster]
    upload_limit_mb: float
    message: str | None = None


RostersBody = define(RostersPage, "RostersBody")


@dataclass(frozen=True)
class RosterDetailPage:
    """One roster: counts, years, sectors, settings and its rejected rows."""

    roster: Roster
    years: tuple[int, int] | None
    firms: int
    sectors: list[dict[str, Any]]
    mapping_name: str | None
    window: tuple[int, int] | None
    rejected: list[RejectedRow]
    rejected_total: int
    rejected_groups: list[RejectGroup] = field(default_factory=list)
    rejected_page: int = 1
    rejected_pages: int = 1
    runs: int = 0


RosterDetailBody = define(RosterDetailPage, "RosterDetailBody", fields={"sectors": list_of(SectorCount)},
                          descriptions={"rejected": "one page of the rejected rows (rejected_page of rejected_pages)",
                                        "rejected_groups": "rejected rows grouped by reason, largest first"})


def rosters_data(store: Store, upload_limit: int, message: str | None = None) -> RostersPage:
    return RostersPage(store.list_rosters(), upload_limit / (1024 * 1024), message)


def roster_detail_data(store: Store, roster_id: int, page: int = 1) -> RosterDetailPage:
    roster = _roster_or_404(store, roster_id)
    counts = roster_counts(store, roster)  # the cell store: no read of the departures themselves
    firms, by_sector = memoised(store, ("firm_counts", roster.id, roster_fingerprint(roster)),
                                lambda: store.firm_counts(roster.id))
    rejected = store.rejected(roster.id)
    settings = store.settings(roster.id)
    years = (int(counts["year"].min()), int(counts["year"].max())) if len(counts) else None
    pages = max(1, -(-len(rejected) // REJECTED_PAGE))
    at = min(max(page, 1), pages)
    sectors: list[dict[str, Any]] = (
        by_sector.sort_values("departures", ascending=False).to_dict("records")  # type: ignore[assignment]
        if len(by_sector) else []
    )
    return RosterDetailPage(
        roster=roster, years=years, firms=firms,
        sectors=sectors, mapping_name=settings.mapping_name, window=settings.window,
        rejected=rejected[(at - 1) * REJECTED_PAGE:at * REJECTED_PAGE], rejected_total=len(rejected),
        rejected_groups=group_rejections(rejected), rejected_page=at, rejected_pages=pages,
        runs=len(store.list_runs(roster.id)),
    )


def _roster_or_404(store: Store, roster_id: int) -> Roster:
    try:
        return store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc


@router.get("/rosters", response_class=HTMLResponse, name="rosters_page")
def rosters_page(request: Request) -> HTMLResponse:
    page = rosters_data(app_store(request), app_settings(request).upload_limit)
    return render(request, "rosters.html", page, active="rosters")


@router.get("/api/rosters", name="rosters_api", response_model=None,
            responses={200: {"model": RostersBody, "description": "Every stored roster"}})
def rosters_api(request: Request) -> JSONResponse:
    return as_json(rosters_data(app_store(request), app_settings(request).upload_limit))


# ":int" so that GET /rosters/upload and /rosters/confirm answer 405 (POST only), not a 422 about the id
@router.get("/rosters/{roster_id:int}", response_class=HTMLResponse, name="roster_detail",
            responses=page_errors(404))
def roster_detail(request: Request, roster_id: int, page: int = 1) -> HTMLResponse:
    page_data = roster_detail_data(app_store(request), roster_id, page)
    return render(request, "roster_detail.html", page_data, roster=page_data.roster, active="roster")


@router.get("/api/rosters/{roster_id}", name="roster_detail_api", response_model=None,
            responses={200: {"model": RosterDetailBody, "description": "One roster"}, **api_errors(404)})
def roster_detail_api(request: Request, roster_id: int, page: int = 1) -> JSONResponse:
    return as_json(roster_detail_data(app_store(request), roster_id, page))


@router.get("/rosters/{roster_id}/rejected.csv", name="roster_rejected_csv", response_class=Response,
            responses={**download("The rejected rows with their reasons", "text/csv"), **page_errors(404)})
def roster_rejected_csv(request: Request, roster_id: int) -> Response:
    store = app_store(request)
    roster = _roster_or_404(store, roster_id)
    body = rejected_rows_csv(store.rejected(roster.id))
    return Response(body, media_type="text/csv; charset=utf-8", headers={
        "content-disposition": f'attachment; filename="rejected-rows-{roster.id}.csv"'})


@router.post("/rosters/{roster_id}/delete", name="roster_delete", status_code=303,
             response_class=RedirectResponse, responses=redirect("the roster list", page_errors(400, 404)),
             openapi_extra=form_body({"confirm": {
                 "type": "string", "enum": ["yes"],
                 "description": "must be yes: the server refuses a delete without it"}}, required=("confirm",)))
async def roster_delete(request: Request, roster_id: int) -> RedirectResponse:
    """Delete a roster, its departures, rejected rows and settings; its runs stay readable."""
    form = await read_form(request)
    return await run_in_threadpool(_roster_delete, request, roster_id, form)


def _roster_delete(request: Request, roster_id: int, form: dict[str, str | Upload]) -> RedirectResponse:
    store = app_store(request)
    roster = _roster_or_404(store, roster_id)
    require_confirmation(form, f"roster {roster.name!r}")
    store.delete_roster(roster.id)
    return RedirectResponse(request.url_for("rosters_page"), status_code=303)
