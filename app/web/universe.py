"""Universe: which firms were in the index in which fiscal years (the denominator of turnover rates).

Upload a firm-year or span file, or derive spans from the roster (an approximation); see the summary, the
flags (roster firms missing from the universe, universe years with no roster rows) and the rejected rows.
"""

from __future__ import annotations

from dataclasses import dataclass

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.analysis.inputs import load_input
from app.analysis.rates import APPROXIMATE, SHARE_VS_RATE, UniverseFlags, universe_overview
from app.intake.ingest import rejected_rows_csv
from app.intake.readers import RosterFileError
from app.intake.universe import UNIVERSE_ROLES, derive_universe
from app.store import RejectedRow, Roster, Store, StoreError, Universe
from app.web.deps import NotFound, app_store
from app.web.forms import Upload, read_form
from app.web.import_worker import WorkerLost, import_universe_apart
from app.web.rendering import as_json, render
from app.web.route_docs import (
    FILE,
    FORM_AGAIN,
    WORKER_LOST,
    api_errors,
    download,
    form_body,
    page_errors,
    redirect,
)
from app.web.schemas import define

router = APIRouter()

REJECTED_SHOWN = 200


@dataclass(frozen=True)
class UniversePage:
    """The roster's current universe (or none), its firms per year, flags, rejected rows and past imports."""

    roster: Roster
    universe: Universe | None
    approximate_note: str | None
    years: list[dict[str, int]]
    flags: UniverseFlags | None
    flag_messages: list[str]
    rejected: list[RejectedRow]
    history: list[Universe]
    roles: tuple[str, ...]
    caution: str
    message: str | None = None


UniverseBody = define(UniversePage, "UniverseBody")


def _roster_or_404(store: Store, roster_id: int) -> Roster:
    try:
        return store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc


def universe_data(store: Store, roster_id: int, *, message: str | None = None) -> UniversePage:
    roster = _roster_or_404(store, roster_id)
    universe = store.current_universe(roster.id)
    years: list[dict[str, int]] = []
    flags = None
    rejected: list[RejectedRow] = []
    if universe is not None:
        # counted in SQL from the cell store: the page reads no departure and no firm-year list
        years, flags = universe_overview(store, load_input(store, roster.id, require_mapping=False), universe)
        rejected = store.universe_rejected(universe.id)[:REJECTED_SHOWN]
    return UniversePage(
        roster=roster, universe=universe,
        approximate_note=APPROXIMATE if universe is not None and universe.approximate else None,
        years=years, flags=flags, flag_messages=flags.messages() if flags else [], rejected=rejected,
        history=store.list_universes(roster.id), roles=UNIVERSE_ROLES, caution=SHARE_VS_RATE, message=message,
    )


@router.get("/rosters/{roster_id}/universe", response_class=HTMLResponse, name="universe_page",
            responses=page_errors(404))
def universe_page(request: Request, roster_id: int) -> HTMLResponse:
    page = universe_data(app_store(request), roster_id)
    return render(request, "universe.html", page, roster=page.roster, active="universe_page")


@router.get("/api/rosters/{roster_id}/universe", name="universe_api", response_model=None,
            responses={200: {"model": UniverseBody, "description": "The roster's universe of firm-years"},
                       **api_errors(404)})
def universe_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(universe_data(app_store(request), roster_id))


_COLUMNS = {f"column_{r}": {"type": "string", "description": f"header holding the {r.replace('_', ' ')}"}
            for r in UNIVERSE_ROLES}


@router.post("/rosters/{roster_id}/universe", name="universe_upload", status_code=303,
             response_class=RedirectResponse,
             responses=redirect("the Universe page", FORM_AGAIN, WORKER_LOST, page_errors(404)),
             openapi_extra=form_body({"file": FILE, **_COLUMNS}, required=("file",), multipart=True))
async def universe_upload(request: Request, roster_id: int) -> Response:
    """Import a universe file for this roster (all rows or none); on a problem, the page again with why."""
    form = await read_form(request)
    return await run_in_threadpool(_universe_upload, request, roster_id, form)


def _universe_upload(request: Request, roster_id: int, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    roster = _roster_or_404(store, roster_id)
    upload = form.get("file")
    roles = {r: str(form.get(f"column_{r}") or "").strip() for r in UNIVERSE_ROLES}
    try:
        if not isinstance(upload, Upload) or not upload.data:
            raise RosterFileError("Choose a universe file (CSV or XLSX) to upload.")
        # in a worker process, like a roster import: a large firm-year file must not stall the server
        import_universe_apart(store, roster.id, upload.data, upload.filename,
                              roles={r: h for r, h in roles.items() if h})
    except (RosterFileError, WorkerLost) as exc:
        page = universe_data(store, roster.id, message=str(exc))
        return render(request, "universe.html", page, status=503 if isinstance(exc, WorkerLost) else 400,
                      roster=page.roster, active="universe_page")
    return RedirectResponse(request.url_for("universe_page", roster_id=roster.id), status_code=303)


@router.post("/rosters/{roster_id}/universe/derive", name="universe_derive", status_code=303,
             response_class=RedirectResponse, responses=redirect("the Universe page", FORM_AGAIN, page_errors(404)))
def universe_derive(request: Request, roster_id: int) -> Response:
    """Derive spans from the roster itself (first to last year each firm appears): an approximation."""
    store = app_store(request)
    roster = _roster_or_404(store, roster_id)
    try:
        derive_universe(store, roster.id)
    except RosterFileError as exc:
        page = universe_data(store, roster.id, message=str(exc))
        return render(request, "universe.html", page, status=400, roster=page.roster, active="universe_page")
    return RedirectResponse(request.url_for("universe_page", roster_id=roster.id), status_code=303)


@router.get("/rosters/{roster_id}/universe/rejected.csv", name="universe_rejected_csv", response_class=Response,
            responses={**download("The universe's rejected rows with their reasons", "text/csv"),
                       **page_errors(404)})
def universe_rejected_csv(request: Request, roster_id: int) -> Response:
    store = app_store(request)
    roster = _roster_or_404(store, roster_id)
    universe = store.current_universe(roster.id)
    if universe is None:
        raise NotFound(f"Roster {roster.name!r} has no universe yet.")
    body = rejected_rows_csv(store.universe_rejected(universe.id))
    return Response(body, media_type="text/csv; charset=utf-8", headers={
        "content-disposition": f'attachment; filename="universe-rejected-{universe.id}.csv"'})

