"""The versions of a roster and what changed between two of them (issue 14: roster refreshes).

A refresh (``helmshift import FILE --into ROSTER`` or "add as a new version of" on the confirm page) stores
next week's file as the roster's next version; this page lists the versions and shows the diff with the
records: added, removed and changed departures (changed fields marked), by the identity rule of
:mod:`app.intake.refresh`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from fastapi import APIRouter, Query, Request
from fastapi.responses import HTMLResponse, JSONResponse

from app.intake.refresh import RosterDiff, diff_versions
from app.store import Roster, Store, StoreError
from app.web.deps import BadRequest, NotFound, app_store
from app.web.rendering import as_json, render
from app.web.route_docs import api_errors, page_errors
from app.web.schemas import define

router = APIRouter()

#: records listed per kind on the page (the counts are always complete; the CLI lists every record)
SHOWN = 200


@dataclass(frozen=True)
class RosterDiffPage:
    """A roster's versions, and the departures added, removed and changed from one version to another."""

    roster: Roster
    versions: list[Roster]
    diff: RosterDiff | None
    shown: int = SHOWN
    message: str | None = None
    runs_before: list[int] = field(default_factory=list)


RosterDiffBody = define(RosterDiffPage, "RosterDiffBody", descriptions={
    "diff": "none when the roster has a single version",
    "runs_before": "ids of runs made on the older version (they reopen on it; re-run to use the newer one)"})


def roster_diff_data(store: Store, roster_id: int, start: int | None = None, end: int | None = None) -> RosterDiffPage:
    try:
        roster = store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    versions = store.roster_versions(roster.id)
    if roster.latest_version < 2 and start is None and end is None:
        return RosterDiffPage(roster, versions, None, message="This roster has one version so far; import next "
                              "week's file as a new version of it to see what changed.")
    to = end if end is not None else roster.latest_version
    frm = start if start is not None else max(to - 1, 1)
    try:
        diff = diff_versions(store, roster.id, frm, to, limit=SHOWN)
    except StoreError as exc:
        raise BadRequest(str(exc)) from exc
    runs = [r.id for r in store.list_runs(roster.id) if r.roster_version == frm]
    return RosterDiffPage(roster, versions, diff, runs_before=runs)


@router.get("/rosters/{roster_id}/versions", response_class=HTMLResponse, name="roster_diff",
            responses=page_errors(400, 404))
def roster_diff(request: Request, roster_id: int, start: int | None = Query(None, alias="from", ge=1, le=10**9),
                end: int | None = Query(None, alias="to", ge=1, le=10**9)) -> HTMLResponse:
    page = roster_diff_data(app_store(request), roster_id, start, end)
    return render(request, "roster_diff.html", page, roster=page.roster, active="roster")


@router.get("/api/rosters/{roster_id}/versions", name="roster_diff_api", response_model=None,
            responses={200: {"model": RosterDiffBody, "description": "The roster's versions and a diff of two"},
                       **api_errors(400, 404)})
def roster_diff_api(request: Request, roster_id: int, start: int | None = Query(None, alias="from", ge=1, le=10**9),
                    end: int | None = Query(None, alias="to", ge=1, le=10**9)) -> JSONResponse:
    return as_json(roster_diff_data(app_store(request), roster_id, start, end))
