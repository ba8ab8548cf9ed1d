"""Case-level overrides from the Departures page: set a record's category for this mapping, with a note, or
remove an override. Each change saves the next version of the roster's mapping (app/analysis/overrides.py).

The HTML forms answer 303 back to the Departures page; a client that accepts JSON gets the roster's overrides
in the new version instead (the JSON twin, also ``GET /api/rosters/{id}/overrides``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any
from urllib.parse import parse_qsl, urlencode

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.analysis.inputs import current_mapping
from app.analysis.overrides import (
    add_override,
    overrides_to_list,
    remove_override,
    resolve_overrides,
)
from app.store import MAX_ID, OVERRIDE_NOTE_MAX, MappingConflict, MappingVersion, Roster, Store, StoreError
from app.types import CATEGORIES
from app.web.deps import BadRequest, NotFound, app_store, require_confirmation
from app.web.forms import Upload, read_form
from app.web.rendering import as_json
from app.web.route_docs import GUARDS, api_errors, form_body, page_errors, redirect
from app.web.schemas import OverrideOut, define, list_of

router = APIRouter()


@dataclass(frozen=True)
class OverridesList:
    """The case overrides of one roster in a mapping version, each located in the roster's current version."""

    roster: Roster
    mapping: str | None
    overrides: list[dict[str, Any]]


OverridesBody = define(OverridesList, "OverridesBody", fields={"overrides": list_of(OverrideOut)},
                       descriptions={"mapping": "NAME:VERSION of the mapping version read (None: no mapping)"})


def overrides_list(store: Store, roster: Roster, mapping: MappingVersion | None) -> OverridesList:
    resolved = resolve_overrides(store, roster, mapping)
    return OverridesList(roster, f"{mapping.name}:{mapping.version}" if mapping else None,
                         overrides_to_list(resolved, mapping))


def _roster(store: Store, roster_id: int) -> Roster:
    try:
        return store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc


def _number(form: dict[str, str | Upload], name: str, what: str, *, required: bool = True) -> int | None:
    raw = str(form.get(name) or "").strip()
    if not raw and not required:
        return None
    if not raw.isdecimal() or not 0 < int(raw) <= MAX_ID:
        raise BadRequest(f"{name} must be {what}; got {raw!r}. Nothing was saved.")
    return int(raw)


def _mapping(store: Store, roster: Roster, form: dict[str, str | Upload]) -> MappingVersion:
    """The newest version of the mapping the form names (default: the roster's), checked against the version
    the page showed (``based_on``): an override is never added to a version the analyst did not see."""
    try:
        mapping = current_mapping(store, roster, str(form.get("mapping_name") or "").strip() or None)
    except StoreError as exc:
        raise BadRequest(str(exc)) from exc
    based_on = _number(form, "based_on", "the mapping version the page showed", required=False)
    if based_on is not None and based_on != mapping.version:
        raise BadRequest(str(MappingConflict(mapping.name, based_on, mapping.version, mapping.author)))
    return mapping


def _answer(request: Request, store: Store, roster: Roster, saved: MappingVersion,
            form: dict[str, str | Upload]) -> Response:
    if "application/json" in request.headers.get("accept", "") or request.url.path.startswith("/api/"):
        return as_json(overrides_list(store, roster, saved))
    # back to the Departures page the form was on, now counting with the new version
    back = [(k, v) for k, v in parse_qsl(str(form.get("back") or "")) if k not in ("mapping", "page")]
    query = urlencode([*back, ("mapping", f"{saved.name}:{saved.version}")])
    return RedirectResponse(f"{request.url_for('departures_page', roster_id=roster.id)}?{query}", status_code=303)


_SAVE_FORM = form_body({
    "departure_id": {"type": "integer", "minimum": 1, "maximum": MAX_ID,
                     "description": "the record (its id on the Departures page)"},
    "category": {"type": "string", "enum": list(CATEGORIES), "description": "what the record counts as"},
    "note": {"type": "string", "maxLength": OVERRIDE_NOTE_MAX, "description": "why (required)"},
    "mapping_name": {"type": "string", "description": "the mapping (default: the roster's)"},
    "based_on": {"type": "integer", "minimum": 1, "maximum": MAX_ID,
                 "description": "the mapping version the page showed; a newer one refuses the change"},
    "back": {"type": "string", "description": "the Departures page's query string, to return to"},
}, required=("departure_id", "category", "note"))


@router.post("/rosters/{roster_id}/overrides", name="override_save", status_code=303,
             response_class=RedirectResponse, responses=redirect("the Departures page", page_errors(400, 404)),
             openapi_extra=_SAVE_FORM)
async def override_save(request: Request, roster_id: int) -> Response:
    form = await read_form(request)
    return await run_in_threadpool(_override_save, request, roster_id, form)


@router.post("/api/rosters/{roster_id}/overrides", name="overrides_api_save", response_model=None,
             responses={200: {"model": OverridesBody, "description": "The roster's overrides in the new version"},
                        **api_errors(400, 404), **GUARDS}, openapi_extra=_SAVE_FORM)
async def overrides_api_save(request: Request, roster_id: int) -> Response:
    form = await read_form(request)
    return await run_in_threadpool(_override_save, request, roster_id, form)


def _override_save(request: Request, roster_id: int, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    roster = _roster(store, roster_id)
    departure_id = _number(form, "departure_id", "the id of a record on the Departures page")
    assert departure_id is not None
    category = str(form.get("category") or "").strip()
    if category not in CATEGORIES:
        raise BadRequest(f"category must be one of {', '.join(CATEGORIES)}; got {category!r}. Nothing was saved.")
    mapping = _mapping(store, roster, form)
    try:
        saved = add_override(store, roster, mapping, departure_id, category, str(form.get("note") or ""))
    except StoreError as exc:  # MappingConflict too: someone saved the mapping meanwhile
        raise BadRequest(f"{exc} Nothing was saved." if "not saved" not in str(exc) else str(exc)) from exc
    return _answer(request, store, roster, saved, form)


@router.post("/rosters/{roster_id}/overrides/delete", name="override_delete", status_code=303,
             response_class=RedirectResponse, responses=redirect("the Departures page", page_errors(400, 404)),
             openapi_extra=form_body({
                 "confirm": {"type": "string", "enum": ["yes"], "description": "required: yes"},
                 "position": {"type": "integer", "minimum": 1, "maximum": MAX_ID,
                              "description": "the override's number (as the Reason codes page lists it)"},
                 "mapping_name": {"type": "string", "description": "the mapping (default: the roster's)"},
                 "based_on": {"type": "integer", "minimum": 1, "maximum": MAX_ID,
                              "description": "the mapping version the page showed"},
                 "back": {"type": "string", "description": "the Departures page's query string"},
             }, required=("confirm", "position")))
async def override_delete(request: Request, roster_id: int) -> Response:
    form = await read_form(request)
    return await run_in_threadpool(_override_delete, request, roster_id, form)


def _override_delete(request: Request, roster_id: int, form: dict[str, str | Upload]) -> Response:
    require_confirmation(form, "this case override (the mapping's next version is saved without it)")
    store = app_store(request)
    roster = _roster(store, roster_id)
    position = _number(form, "position", "the number of one of the roster's overrides")
    assert position is not None
    mapping = _mapping(store, roster, form)
    try:
        saved = remove_override(store, mapping, position, roster=roster)
    except StoreError as exc:
        raise BadRequest(str(exc)) from exc
    return _answer(request, store, roster, saved, form)


@router.get("/api/rosters/{roster_id}/overrides", name="overrides_api", response_model=None,
            responses={200: {"model": OverridesBody, "description": "The roster's case overrides"},
                       **api_errors(400, 404)},
            openapi_extra={"parameters": [{"name": "mapping", "in": "query", "required": False,
                                           "schema": {"type": "string"},
                                           "description": "NAME or NAME:VERSION (default: the roster's)"}]})
def overrides_api(request: Request, roster_id: int) -> JSONResponse:
    store = app_store(request)
    roster = _roster(store, roster_id)
    ref = request.query_params.get("mapping", "").strip() or None
    if ref is None and not store.settings(roster.id).mapping_name:
        return as_json(overrides_list(store, roster, None))
    try:
        mapping = current_mapping(store, roster, ref)
    except StoreError as exc:  # a mapping (or version) that is not stored: not found, as everywhere else
        raise NotFound(str(exc)) from exc
    return as_json(overrides_list(store, roster, mapping))
