"""Mappings beside the Reason codes page: choose a roster's mapping, import a mapping CSV as a new version, and
download a version as CSV."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.analysis.mapping_files import export_mapping_csv, import_mapping_file
from app.intake.reasons import MappingFileError
from app.store import StoreError
from app.web.deps import BadRequest, NotFound, app_store, version_csv
from app.web.forms import Upload, read_form
from app.web.reasons import reasons_data
from app.web.rendering import render
from app.web.route_docs import FILE, GUARDS, download, form_body, page_errors, query, redirect

router = APIRouter()


@router.post("/rosters/{roster_id}/mapping/select", name="mapping_select", status_code=303,
             response_class=RedirectResponse, responses=redirect("the Reason codes page", page_errors(400, 404)),
             openapi_extra=form_body({"mapping_name": {"type": "string"}}, required=("mapping_name",)))
async def mapping_select(request: Request, roster_id: int) -> RedirectResponse:
    form = await read_form(request)
    return await run_in_threadpool(_mapping_select, request, roster_id, form)


def _mapping_select(request: Request, roster_id: int, form: dict[str, str | Upload]) -> RedirectResponse:
    store = app_store(request)
    page = reasons_data(store, roster_id)
    name = str(form.get("mapping_name") or "")
    try:
        store.get_mapping(name)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    store.update_settings(page.roster.id, mapping_name=name)
    return RedirectResponse(request.url_for("reasons_page", roster_id=page.roster.id), status_code=303)


@router.post("/rosters/{roster_id}/mapping/import", name="mapping_import", response_model=None,
             response_class=HTMLResponse, responses={**page_errors(400, 404), **GUARDS},
             openapi_extra=form_body({"file": FILE, "mapping_name": {"type": "string"}},
                                     required=("file", "mapping_name"), multipart=True))
async def mapping_import(request: Request, roster_id: int) -> Response:
    form = await read_form(request)
    return await run_in_threadpool(_mapping_import, request, roster_id, form)


def _mapping_import(request: Request, roster_id: int, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    page = reasons_data(store, roster_id)
    upload = form.get("file")
    name = str(form.get("mapping_name") or "").strip()
    if not isinstance(upload, Upload) or not name:
        raise BadRequest("Choose a mapping CSV (code,category[,label]) and give the mapping a name.")
    try:
        outcome = import_mapping_file(store, upload.data, roster=page.roster.id, name=name)
    except (MappingFileError, StoreError) as exc:
        refreshed = reasons_data(store, roster_id, error=str(exc))
        return render(request, "reasons.html", refreshed, roster=refreshed.roster, active="reasons", status=400)
    store.update_settings(page.roster.id, mapping_name=name)
    note = f"Imported {outcome['codes']} codes as {name} v{outcome['version']}."
    if outcome["not_in_roster"]:
        note += f" {len(outcome['not_in_roster'])} code(s) do not occur in this roster and were kept for others."
    refreshed = reasons_data(store, roster_id, message=note)
    return render(request, "reasons.html", refreshed, roster=refreshed.roster, active="reasons")


@router.get("/mappings/{name:path}.csv", name="mapping_csv", response_class=Response,
            responses={**download("The mapping version as code,category,label", "text/csv"),
                       **page_errors(400, 404)},
            openapi_extra=query(("version", {"type": "integer", "minimum": 1}, "default: the latest")))
def mapping_csv(request: Request, name: str) -> Response:
    """A mapping version as CSV; ``name`` may hold any character, slashes included."""
    return version_csv(request, name, "mapping", export_mapping_csv)
