"""Rosters: list, upload with a confirm step for column roles, detail with rejected rows."""

from __future__ import annotations

import codecs
from dataclasses import dataclass, field
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.ingest import (
    DuplicateRosterError,
    RosterFileError,
    RosterPreview,
    default_roster_name,
    import_roster,
    preview_roster,
    rejected_rows_csv,
    same_file_roster,
)
from app.store import RejectedRow, Roster, Store, StoreError
from app.types import ROLES
from app.web.deps import NotFound, app_settings, app_store, app_uploads, require_confirmation
from app.web.forms import Upload, read_form
from app.web.rendering import as_json, render
from app.web.route_docs import (
    FILE,
    FORM_AGAIN,
    GUARDS,
    api_errors,
    download,
    form_body,
    page_errors,
    redirect,
)
from app.web.schemas import RosterDetailBody, RosterImportBody, RostersBody

router = APIRouter()

REJECTED_SHOWN = 200


@dataclass(frozen=True)
class RostersPage:
    """Every stored roster, newest last, and the upload limit the form states."""

    rosters: list[Roster]
    upload_limit_mb: float
    message: str | None = None


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
    runs: int = 0


@dataclass(frozen=True)
class ConfirmPage:
    """The preview of an uploaded file with the detected column roles, waiting for confirmation."""

    token: str
    filename: str
    preview: RosterPreview
    roles: dict[str, str | None]
    name: str
    error: str | None = None
    duplicate_of: Roster | None = None
    rejected: list[RejectedRow] = field(default_factory=list)
    role_names: tuple[str, ...] = field(default=ROLES)


def rosters_data(store: Store, upload_limit: int, message: str | None = None) -> RostersPage:
    return RostersPage(store.list_rosters(), upload_limit / (1024 * 1024), message)


def roster_detail_data(store: Store, roster_id: int) -> RosterDetailPage:
    roster = _roster_or_404(store, roster_id)
    deps = store.departures(roster.id)
    rejected = store.rejected(roster.id)
    settings = store.settings(roster.id)
    years = (int(deps["year"].min()), int(deps["year"].max())) if len(deps) else None
    sectors: list[dict[str, Any]] = (
        deps.assign(sector=deps["sector"].fillna("(none)"))
        .groupby("sector").agg(departures=("id", "size"), firms=("firm_id", "nunique"))
        .reset_index().sort_values("departures", ascending=False).to_dict("records")  # type: ignore[assignment]
        if len(deps) else []
    )
    return RosterDetailPage(
        roster=roster, years=years, firms=int(deps["firm_id"].nunique()) if len(deps) else 0,
        sectors=sectors, mapping_name=settings.mapping_name, window=settings.window,
        rejected=rejected[:REJECTED_SHOWN], rejected_total=len(rejected), runs=len(store.list_runs(roster.id)),
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


def _read_upload(form: dict[str, str | Upload]) -> tuple[str, bytes]:
    upload = form.get("file")
    if not isinstance(upload, Upload):
        raise RosterFileError("Choose a CSV or XLSX file to upload.")
    return upload.filename, upload.data


_FILE_OPTIONS = {
    "sheet": {"type": "string", "description": "XLSX sheet name; the first sheet when empty"},
    "encoding": {"type": "string", "description": "text encoding, e.g. utf-8 or cp1252; detected when empty"},
}
_ROLE_FIELDS = {f"role_{r}": {"type": "string", "description": f"column holding {r}; empty for none"}
                for r in ROLES}


@router.post("/rosters/upload", response_class=HTMLResponse, name="roster_upload",
             responses={**FORM_AGAIN, **GUARDS},
             openapi_extra=form_body({"file": FILE, **_FILE_OPTIONS}, required=("file",), multipart=True))
async def roster_upload(request: Request) -> HTMLResponse:
    """First step: keep the file aside, show its first rows and the column roles we detected."""
    form = await read_form(request)
    return await run_in_threadpool(_roster_upload, request, form)


def _roster_upload(request: Request, form: dict[str, str | Upload]) -> HTMLResponse:
    store = app_store(request)
    try:
        filename, data = _read_upload(form)
        encoding, sheet = _file_options(form)
        preview = preview_roster(data, filename, encoding=encoding, sheet=sheet)
    except RosterFileError as exc:
        failed = rosters_data(store, app_settings(request).upload_limit, message=str(exc))
        return render(request, "rosters.html", failed, status=400, active="rosters")
    pending = app_uploads(request).put(filename, data)
    page = ConfirmPage(
        token=pending.token, filename=filename, preview=preview,
        roles={r: preview.roles.get(r) for r in ROLES}, name=default_roster_name(store, filename),
        duplicate_of=same_file_roster(store, data),
    )
    return render(request, "roster_confirm.html", page, active="rosters")


def _file_options(form: dict[str, str | Upload]) -> tuple[str | None, str | None]:
    """(encoding, sheet) as the readers take them; an encoding Python cannot name is refused here.

    codecs.lookup raises ValueError, not LookupError, for a name with a NUL character in it (the fuzz
    test sent one), which the readers do not expect.
    """
    encoding = str(form.get("encoding") or "") or None
    if encoding is not None:
        try:
            codecs.lookup(encoding)
        except (LookupError, ValueError):
            raise RosterFileError(f"Unknown text encoding {encoding!r}; try utf-8, cp1252 or latin-1.") from None
    return encoding, str(form.get("sheet") or "") or None


@router.post("/rosters/confirm", name="roster_confirm", response_model=None, status_code=303,
             response_class=RedirectResponse, responses=redirect("the new roster's page", FORM_AGAIN),
             openapi_extra=form_body({
                 "token": {"type": "string", "description": "the upload step's token"},
                 "name": {"type": "string"}, **_FILE_OPTIONS, **_ROLE_FIELDS,
                 "allow_same_file": {"type": "string", "enum": ["yes"],
                                     "description": "import a file whose bytes were imported before"},
             }, required=("token",)))
async def roster_confirm(request: Request) -> Response:
    """Second step: import with the roles the analyst confirmed; all rows land or none do."""
    form = await read_form(request)
    return await run_in_threadpool(_roster_confirm, request, form)


def _roster_confirm(request: Request, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    token = str(form.get("token") or "")
    pending = app_uploads(request).get(token)
    if pending is None:
        expired = rosters_data(store, app_settings(request).upload_limit,
                               message="That upload has expired or was already imported; choose the file again.")
        return render(request, "rosters.html", expired, status=400, active="rosters")
    # a role set to "none" arrives as "" and stays empty (detection must not put it back)
    roles: dict[str, str] = {r: str(form.get(f"role_{r}") or "") for r in ROLES if f"role_{r}" in form}
    name = str(form.get("name") or "").strip() or None
    try:
        encoding, sheet = _file_options(form)
        report = import_roster(
            store, pending.data, pending.filename, name=name, roles=roles, encoding=encoding, sheet=sheet,
            allow_same_file=form.get("allow_same_file") == "yes",
        )
    except (RosterFileError, DuplicateRosterError, StoreError) as exc:
        preview = preview_roster(pending.data, pending.filename)
        page = ConfirmPage(
            token=token, filename=pending.filename, preview=preview,
            roles={r: roles.get(r) or None for r in ROLES}, name=name or default_roster_name(store, pending.filename),
            error=str(exc), duplicate_of=same_file_roster(store, pending.data),
            rejected=list(getattr(exc, "rejected", []))[:REJECTED_SHOWN],
        )
        return render(request, "roster_confirm.html", page, status=400, active="rosters")
    app_uploads(request).drop(token)
    return RedirectResponse(request.url_for("roster_detail", roster_id=report.roster.id), status_code=303)


@router.post("/api/rosters", name="rosters_import_api", response_model=None, status_code=201,
             responses={201: {"model": RosterImportBody, "description": "Imported"}, **api_errors(400, 409),
                        **GUARDS},
             openapi_extra=form_body({"file": FILE, "name": {"type": "string"}, **_FILE_OPTIONS,
                                      **_ROLE_FIELDS}, required=("file",), multipart=True))
async def rosters_import_api(request: Request) -> JSONResponse:
    """Import in one call: multipart ``file``, optional ``name``, ``sheet``, ``encoding`` and ``role_<ROLE>``."""
    form = await read_form(request)
    return await run_in_threadpool(_rosters_import_api, request, form)


def _rosters_import_api(request: Request, form: dict[str, str | Upload]) -> JSONResponse:
    store = app_store(request)
    try:
        filename, data = _read_upload(form)
        roles: dict[str, str] = {r: str(form.get(f"role_{r}")) for r in ROLES if form.get(f"role_{r}")}
        encoding, sheet = _file_options(form)
        report = import_roster(
            store, data, filename, name=str(form.get("name") or "").strip() or None, roles=roles or None,
            encoding=encoding, sheet=sheet,
        )
    except DuplicateRosterError as exc:
        return JSONResponse({"error": str(exc)}, status_code=409)
    except (RosterFileError, StoreError) as exc:
        return JSONResponse({"error": str(exc)}, status_code=400)
    return JSONResponse({
        "roster": report.roster.name, "id": report.roster.id, "rows": report.rows,
        "accepted": report.accepted, "rejected": report.rejected, "duplicates": report.duplicates,
    }, status_code=201)


# ":int" so that GET /rosters/upload and /rosters/confirm answer 405 (POST only), not a 422 about the id
@router.get("/rosters/{roster_id:int}", response_class=HTMLResponse, name="roster_detail",
            responses=page_errors(404))
def roster_detail(request: Request, roster_id: int) -> HTMLResponse:
    page = roster_detail_data(app_store(request), roster_id)
    return render(request, "roster_detail.html", page, roster=page.roster, active="roster")


@router.get("/api/rosters/{roster_id}", name="roster_detail_api", response_model=None,
            responses={200: {"model": RosterDetailBody, "description": "One roster"}, **api_errors(404)})
def roster_detail_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(roster_detail_data(app_store(request), roster_id))


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
