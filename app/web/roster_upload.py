"""Uploading a roster: keep the file aside, preview it with the detected column roles, review the dry run
with the analyst's choices, then import all rows or none (as a new roster or a stored roster's next version).
"""

from __future__ import annotations

import codecs
from dataclasses import dataclass, field
from typing import Any, cast

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.intake.dates import month_name
from app.intake.ingest import (
    DATE_ORDERS,
    DateOrder,
    DuplicateRosterError,
    Review,
    RosterFileError,
    RosterPreview,
    default_roster_name,
    preview_roster,
    same_file_roster,
)
from app.intake.profiles import (
    check_profile_name,
    chosen_profile,
    proposed_profiles,
    resolve_options,
    save_profile,
)
from app.store import RejectedRow, Roster, Store, StoreError
from app.types import ROLES
from app.web.deps import BadRequest, app_settings, app_store, app_uploads
from app.web.forms import Upload, read_form
from app.web.import_worker import WorkerLost, import_roster_apart, review_roster_apart
from app.web.rendering import render
from app.web.rosters import rosters_data
from app.web.route_docs import FILE, FORM_AGAIN, GUARDS, WORKER_LOST, api_errors, form_body, redirect
from app.web.schemas import RosterImportBody

router = APIRouter()

REJECTED_SHOWN = 200
MONTHS = tuple((m, month_name(m)) for m in range(1, 13))


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
    header_row: int = 1
    date_order: str = "auto"
    fy_end: int = 12
    review: Review | None = None
    review_error: str | None = None
    months: tuple[tuple[int, str], ...] = MONTHS
    #: a stored roster to add the file to as its next version (a refresh); None: a new roster
    into: int | None = None
    #: the rosters it could be added to (id, name), and the one whose columns the file has (a hint, not a choice)
    targets: tuple[tuple[int, str], ...] = ()
    same_columns_as: tuple[int, str] | None = None
    #: saved intake profiles (names), the one whose header set this file has (offered, not applied), the one
    #: applied to the choices above, and the name to save this import's choices under
    profiles: tuple[str, ...] = ()
    proposed_profile: str | None = None
    profile: str | None = None
    save_profile: str = ""


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
    review, review_error = _try_review(data, filename, roles=None, encoding=encoding, sheet=sheet,
                                       header_row=None, date_order="auto", fy_end=12)
    page = ConfirmPage(
        token=pending.token, filename=filename, preview=preview,
        roles={r: preview.roles.get(r) for r in ROLES}, name=default_roster_name(store, filename),
        duplicate_of=same_file_roster(store, data), header_row=preview.header_row,
        review=review, review_error=review_error, **_targets(store, preview.headers),
        **_profile_offer(store, preview.headers),
    )
    return render(request, "roster_confirm.html", page, active="rosters")


def _try_review(data: bytes, filename: str, **options: Any) -> tuple[Review | None, str | None]:
    """The dry run for the confirm page (in a worker process: it reads every row); a file-level problem, or a
    worker that ended, is shown beside the controls instead."""
    try:
        return review_roster_apart(data, filename, **options), None
    except (RosterFileError, WorkerLost) as exc:
        return None, str(exc)


def _intake_options(form: dict[str, str | Upload]) -> tuple[int | None, DateOrder, int]:
    """(header row, date reading, fiscal-year-end month) from the confirm form, refused with a clear message."""
    raw_header = str(form.get("header_row") or "").strip()
    header_row: int | None = None
    if raw_header:
        if not raw_header.isdecimal() or not 1 <= int(raw_header) <= 1_000_000:
            raise RosterFileError(f"The header row must be a line number (1, 2, ...); got {raw_header[:20]!r}.")
        header_row = int(raw_header)
    order = str(form.get("date_order") or "auto")
    if order not in DATE_ORDERS:
        raise RosterFileError(f"Date reading must be one of {', '.join(DATE_ORDERS)}; got {order[:20]!r}.")
    raw_fy = str(form.get("fy_end") or "12")
    if not raw_fy.isdecimal() or not 1 <= int(raw_fy) <= 12:
        raise RosterFileError(f"The fiscal-year end must be a month number 1..12; got {raw_fy[:20]!r}.")
    return header_row, order, int(raw_fy)


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


_INTAKE_FIELDS: dict[str, dict[str, Any]] = {
    "into": {"type": "string", "description": "id of a stored roster: import the file as its next version "
                                              "(a refresh); empty for a new roster"},
    "header_row": {"type": "string", "description": "1-based line (or sheet row) of the header; found when empty"},
    "date_order": {"type": "string", "enum": list(DATE_ORDERS), "description": "reading of d/m vs m/d dates"},
    "fy_end": {"type": "string", "description": "month (1-12) in which fiscal years end; default 12"},
    "profile": {"type": "string", "description": "a saved intake profile (applied on review with apply_profile)"},
    "apply_profile": {"type": "string", "enum": ["yes"], "description": "replace the choices by the profile's"},
    "save_profile": {"type": "string", "description": "on import: save these choices as an intake profile"},
}


def _into(form: dict[str, str | Upload]) -> int | None:
    raw = str(form.get("into") or "").strip()
    if not raw:
        return None
    if not raw.isdecimal() or len(raw) > 18:
        raise RosterFileError(f"into must be the id of a stored roster; got {raw[:40]!r}.")
    return int(raw)


def _targets(store: Store, headers: tuple[str, ...]) -> dict[str, Any]:
    """The confirm page's refresh choices: every roster, and the newest whose column headers the file has."""
    rosters = store.list_rosters()
    same = [r for r in rosters if r.columns and set(r.columns.values()) <= set(headers)]
    return {"targets": tuple((r.id, r.name) for r in rosters),
            "same_columns_as": (same[-1].id, same[-1].name) if same else None}


def _profile_offer(store: Store, headers: tuple[str, ...]) -> dict[str, Any]:
    """The confirm page's profile choices: every saved profile, and the newest one saved from these headers."""
    matching = proposed_profiles(store, headers)
    return {"profiles": tuple(p.name for p in store.list_profiles()),
            "proposed_profile": matching[0].name if matching else None}


def _confirm_form(form: dict[str, str | Upload]) -> tuple[dict[str, str], str | None]:
    # a role set to "none" arrives as "" and stays empty (detection must not put it back)
    roles: dict[str, str] = {r: str(form.get(f"role_{r}") or "") for r in ROLES if f"role_{r}" in form}
    return roles, str(form.get("name") or "").strip() or None


def _expired(request: Request) -> HTMLResponse:
    expired = rosters_data(app_store(request), app_settings(request).upload_limit,
                           message="That upload has expired or was already imported; choose the file again.")
    return render(request, "rosters.html", expired, status=400, active="rosters")


@router.post("/rosters/review", response_class=HTMLResponse, name="roster_review", responses={**FORM_AGAIN, **GUARDS},
             openapi_extra=form_body({
                 "token": {"type": "string", "description": "the upload step's token"},
                 "name": {"type": "string"}, **_FILE_OPTIONS, **_ROLE_FIELDS, **_INTAKE_FIELDS,
             }, required=("token",)))
async def roster_review(request: Request) -> Response:
    """The dry run again with the analyst's choices (header row, roles, date reading, fiscal-year end); stores nothing."""
    form = await read_form(request)
    return await run_in_threadpool(_roster_review, request, form)


def _roster_review(request: Request, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    token = str(form.get("token") or "")
    pending = app_uploads(request).get(token)
    if pending is None:
        return _expired(request)
    roles, name = _confirm_form(form)
    error: str | None = None
    into: int | None = None
    applied: str | None = None
    try:
        encoding, sheet = _file_options(form)
        header_row, order, fy_end = _intake_options(form)
        into = _into(form)
        if form.get("apply_profile") == "yes" and form.get("profile"):  # the profile replaces the choices above
            chosen = chosen_profile(store, str(form.get("profile")))
            roles, header_row, fy_end = dict(chosen.roles), chosen.header_row, chosen.fy_end
            order = cast(DateOrder, chosen.date_order)  # the store saves one of DATE_ORDERS only
            applied = chosen.name
        preview = preview_roster(pending.data, pending.filename, encoding=encoding, sheet=sheet, roles=roles,
                                 header_row=header_row)
    except RosterFileError as exc:
        encoding, sheet, header_row, order, fy_end, error = None, None, None, "auto", 12, str(exc)
        preview = preview_roster(pending.data, pending.filename)
        roles, applied = {}, None
    review, review_error = _try_review(pending.data, pending.filename, roles=roles or None, encoding=encoding,
                                       sheet=sheet, header_row=header_row, date_order=order, fy_end=fy_end)
    page = ConfirmPage(
        token=token, filename=pending.filename, preview=preview,
        roles={r: preview.roles.get(r) for r in ROLES}, name=name or default_roster_name(store, pending.filename),
        duplicate_of=same_file_roster(store, pending.data), error=error, header_row=preview.header_row,
        date_order=order, fy_end=fy_end, review=review, review_error=review_error, into=into,
        **_targets(store, preview.headers), **_profile_offer(store, preview.headers), profile=applied,
        save_profile=str(form.get("save_profile") or "")[:200],
    )
    return render(request, "roster_confirm.html", page, status=400 if error else 200, active="rosters")


@router.post("/rosters/confirm", name="roster_confirm", response_model=None, status_code=303,
             response_class=RedirectResponse, responses=redirect("the new roster's page", FORM_AGAIN, WORKER_LOST),
             openapi_extra=form_body({
                 "token": {"type": "string", "description": "the upload step's token"},
                 "name": {"type": "string"}, **_FILE_OPTIONS, **_ROLE_FIELDS, **_INTAKE_FIELDS,
                 "allow_same_file": {"type": "string", "enum": ["yes"],
                                     "description": "import a file whose bytes were imported before"},
             }, required=("token",)))
async def roster_confirm(request: Request) -> Response:
    """Last step: import with the choices the analyst reviewed; all rows land or none do."""
    form = await read_form(request)
    return await run_in_threadpool(_roster_confirm, request, form)


def _roster_confirm(request: Request, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    token = str(form.get("token") or "")
    pending = app_uploads(request).get(token)
    if pending is None:
        return _expired(request)
    roles, name = _confirm_form(form)
    header_row, order, fy_end = None, "auto", 12
    into: int | None = None
    try:
        encoding, sheet = _file_options(form)
        header_row, order, fy_end = _intake_options(form)
        into = _into(form)
        typed = str(form.get("save_profile") or "")
        save_as = check_profile_name(typed) if typed.strip() else None
        report = import_roster_apart(
            store, pending.data, pending.filename, name=None if into else name, roles=roles, encoding=encoding,
            sheet=sheet, allow_same_file=_allow_same_file(form), header_row=header_row,
            date_order=order, fy_end=fy_end, into=into,
        )
    except (RosterFileError, DuplicateRosterError, StoreError, WorkerLost) as exc:
        try:
            preview = preview_roster(pending.data, pending.filename, header_row=header_row)
        except RosterFileError:
            preview = preview_roster(pending.data, pending.filename)
        page = ConfirmPage(
            token=token, filename=pending.filename, preview=preview,
            roles={r: roles.get(r) or None for r in ROLES}, name=name or default_roster_name(store, pending.filename),
            error=str(exc), duplicate_of=same_file_roster(store, pending.data),
            rejected=list(getattr(exc, "rejected", []))[:REJECTED_SHOWN], header_row=preview.header_row,
            date_order=order, fy_end=fy_end, into=into, **_targets(store, preview.headers),
            **_profile_offer(store, preview.headers), save_profile=str(form.get("save_profile") or "")[:200],
        )
        return render(request, "roster_confirm.html", page, status=503 if isinstance(exc, WorkerLost) else 400,
                      active="rosters")
    app_uploads(request).drop(token)
    if save_as:  # the roles used are the file's own headers, so this cannot be refused after the import
        save_profile(store, save_as, headers=report.headers, roles=report.roles, header_row=report.header_row,
                     date_order=order, fy_end=fy_end)
    if report.version > 1:  # a refresh: show what changed
        url = request.url_for("roster_diff", roster_id=report.roster.id)
        return RedirectResponse(f"{url}?from={report.version - 1}&to={report.version}", status_code=303)
    return RedirectResponse(request.url_for("roster_detail", roster_id=report.roster.id), status_code=303)


_API_FIELDS: dict[str, dict[str, Any]] = {
    "name": {"type": "string", "description": "the new roster's name; the file's name when empty"},
    "into": _INTAKE_FIELDS["into"],
    "profile": {"type": "string", "description": "a saved intake profile: its roles, header row, date reading "
                                                 "and fiscal-year end, each unless given here"},
    "header_row": _INTAKE_FIELDS["header_row"],
    "date_order": {"type": "string", "enum": list(DATE_ORDERS), "description": "reading of d/m vs m/d dates; "
                                                                              "default: the profile's, else auto"},
    "fy_end": {"type": "string", "description": "month (1-12) in which fiscal years end; default: the "
                                                "profile's, else 12"},
    "allow_same_file": {"type": "string", "enum": ["yes"],
                        "description": "import a file whose bytes were imported before"},
}


@router.post("/api/rosters", name="rosters_import_api", response_model=None, status_code=201,
             responses={201: {"model": RosterImportBody, "description": "Imported"}, **api_errors(400, 404, 409, 503),
                        **GUARDS},
             openapi_extra=form_body({"file": FILE, **_API_FIELDS, **_FILE_OPTIONS, **_ROLE_FIELDS},
                                     required=("file",), multipart=True))
async def rosters_import_api(request: Request) -> JSONResponse:
    """Import in one call: multipart ``file`` and the options of ``helmshift import`` (``name``, ``into``,
    ``profile``, ``header_row``, ``date_order``, ``fy_end``, ``sheet``, ``encoding``, ``role_<ROLE>``)."""
    form = await read_form(request)
    return await run_in_threadpool(_rosters_import_api, request, form)


def _api_choices(store: Store, form: dict[str, str | Upload]) -> dict[str, Any]:
    """The import options of the API call: each field given, else the profile's, else the default."""
    roles: dict[str, str] = {r: str(form.get(f"role_{r}")) for r in ROLES if form.get(f"role_{r}")}
    given = {k: str(form.get(k) or "").strip() for k in ("header_row", "date_order", "fy_end")}
    present: dict[str, str | Upload] = {k: v for k, v in given.items() if v}
    header_row, order, fy_end = _intake_options(present)
    profile = chosen_profile(store, str(form.get("profile"))) if str(form.get("profile") or "").strip() else None
    return resolve_options(profile, roles=roles, header_row=header_row, date_order=order if given["date_order"]
                           else None, fy_end=fy_end if given["fy_end"] else None)


def _allow_same_file(form: dict[str, str | Upload]) -> bool:
    """``allow_same_file=yes`` imports a file already stored once more; any other value than "yes" or nothing is
    refused rather than read as no (a probe's ``allow_same_file=1`` silently answered 409)."""
    value = str(form.get("allow_same_file") or "")
    if value not in ("", "yes"):
        raise BadRequest(f"allow_same_file takes \"yes\" (or leave it out); got {value[:40]!r}.")
    return value == "yes"


def _rosters_import_api(request: Request, form: dict[str, str | Upload]) -> JSONResponse:
    store = app_store(request)
    try:
        filename, data = _read_upload(form)
        encoding, sheet = _file_options(form)
        into = _into(form)
        if into is not None:
            try:
                store.get_roster(into)
            except StoreError:
                return JSONResponse({"error": f"No roster number {into} is stored, so the file was not imported "
                                              "as its next version."}, status_code=404)
        report = import_roster_apart(
            store, data, filename, name=str(form.get("name") or "").strip() or None, encoding=encoding,
            sheet=sheet, into=into, allow_same_file=_allow_same_file(form),
            **_api_choices(store, form),
        )
    except DuplicateRosterError as exc:
        return JSONResponse({"error": str(exc)}, status_code=409)
    except (RosterFileError, StoreError) as exc:
        return JSONResponse({"error": str(exc)}, status_code=400)
    except WorkerLost as exc:
        return JSONResponse({"error": str(exc)}, status_code=503)
    return JSONResponse({
        "roster": report.roster.name, "id": report.roster.id, "rows": report.rows,
        "accepted": report.accepted, "rejected": report.rejected, "duplicates": report.duplicates,
        "version": report.version, "added": report.added, "removed": report.removed, "changed": report.changed,
        "header_row": report.header_row, "columns": report.roles, "messages": list(report.messages),
    }, status_code=201)
