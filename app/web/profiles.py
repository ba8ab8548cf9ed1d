"""Intake profiles: the list of saved ways of reading a source's files, and delete (issue 14).

Profiles are saved at import (``helmshift import --save-profile`` or the confirm page) and offered when a later
file has the same headers (:mod:`app.intake.profiles`); this page shows what each one would apply.
"""

from __future__ import annotations

from dataclasses import dataclass

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse
from starlette.concurrency import run_in_threadpool

from app.intake.roles import ROLE_LABELS
from app.store import IntakeProfile, Store, StoreError
from app.web.deps import NotFound, app_store, require_confirmation
from app.web.forms import Upload, read_form
from app.web.rendering import as_json, render
from app.web.route_docs import form_body, page_errors, redirect
from app.web.schemas import define

router = APIRouter()

#: how each date reading is worded on the page (the values are those of ``helmshift import --date-order``)
DATE_READINGS = {"auto": "day/month or month/day, decided over the whole column", "dmy": "day/month/year",
                 "mdy": "month/day/year"}
MONTHS = ("January", "February", "March", "April", "May", "June", "July", "August", "September", "October",
          "November", "December")


@dataclass(frozen=True)
class ProfilesPage:
    """Every saved intake profile, by name."""

    profiles: list[IntakeProfile]
    message: str | None = None


ProfilesBody = define(ProfilesPage, "ProfilesBody", descriptions={
    "profiles": "each with its header set (sorted), roles (role -> column), header_row (null: found by scoring), "
                "date_order (auto, dmy or mdy) and fy_end (month 1-12)"})


def profiles_data(store: Store, message: str | None = None) -> ProfilesPage:
    return ProfilesPage(store.list_profiles(), message)


def _profile_or_404(store: Store, profile_id: int) -> IntakeProfile:
    try:
        return store.profile_by_id(profile_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc


@router.get("/profiles", response_class=HTMLResponse, name="profiles_page")
def profiles_page(request: Request) -> HTMLResponse:
    return render(request, "profiles.html", profiles_data(app_store(request)), active="profiles",
                  role_labels=ROLE_LABELS, date_readings=DATE_READINGS, months=MONTHS)


@router.get("/api/profiles", name="profiles_api", response_model=None,
            responses={200: {"model": ProfilesBody, "description": "Every saved intake profile"}})
def profiles_api(request: Request) -> JSONResponse:
    return as_json(profiles_data(app_store(request)))


@router.post("/profiles/{profile_id}/delete", name="profile_delete", status_code=303,
             response_class=RedirectResponse, responses=redirect("the profile list", page_errors(400, 404)),
             openapi_extra=form_body({"confirm": {
                 "type": "string", "enum": ["yes"],
                 "description": "must be yes: the server refuses a delete without it"}}, required=("confirm",)))
async def profile_delete(request: Request, profile_id: int) -> RedirectResponse:
    """Delete a saved intake profile; rosters imported with it stay as they are."""
    form = await read_form(request)
    return await run_in_threadpool(_profile_delete, request, profile_id, form)


def _profile_delete(request: Request, profile_id: int, form: dict[str, str | Upload]) -> RedirectResponse:
    store = app_store(request)
    profile = _profile_or_404(store, profile_id)
    require_confirmation(form, f"intake profile {profile.name!r}")
    try:
        store.delete_profile(profile.id)
    except StoreError as exc:  # deleted by someone else between the read and the delete
        raise NotFound(str(exc)) from exc
    return RedirectResponse(request.url_for("profiles_page"), status_code=303)
