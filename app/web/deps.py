"""Access to the app-wide services (store, settings, uploads, jobs) from a request."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING

from fastapi import Request
from fastapi.responses import Response

from app.config import Settings
from app.stats.adjusted import AdjustedError, parse_adjust
from app.store import MAX_ID, Store, StoreError
from app.web.uploads import UploadStash

if TYPE_CHECKING:
    from app.analysis.jobs import JobRunner


class NotFound(Exception):
    """A roster, mapping or run that does not exist; rendered as a 404 page or JSON error."""


class BadRequest(Exception):
    """Input the analyst can correct; rendered as a 400 with the message."""


def require_confirmation(form: Mapping[str, object], what: str) -> None:
    """Destructive routes act only when the form carries ``confirm=yes`` (the page's checkbox); the browser's
    ``required`` attribute alone is no guard against a bare POST."""
    if form.get("confirm") != "yes":
        raise BadRequest(f"Nothing was deleted: to delete {what}, tick the confirmation box "
                         "(send confirm=yes with the form).")


def app_store(request: Request) -> Store:
    store: Store = request.app.state.store
    return store


def app_settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def app_uploads(request: Request) -> UploadStash:
    uploads: UploadStash = request.app.state.uploads
    return uploads


def app_jobs(request: Request) -> JobRunner:
    jobs: JobRunner = request.app.state.jobs
    return jobs


def flag_arg(request: Request, name: str) -> bool:
    """A 0/1 query switch (absent: 0); anything else is a 400 naming it."""
    value = request.query_params.get(name, "0")
    if value not in ("0", "1"):
        raise BadRequest(f"{name} must be 0 or 1; got {value!r}.")
    return value == "1"


def adjust_arg(request: Request, switch: str) -> tuple[str, ...] | None:
    """The ``adjust`` values as an adjustment set when the ``switch`` flag is 1, else None. The values are checked
    whenever given, as the schema says: one outside it is a 400 even with the switch off."""
    on = flag_arg(request, switch)
    given = request.query_params.getlist("adjust")
    if not (on or given):
        return None
    try:
        parsed = parse_adjust(given)
    except AdjustedError as exc:
        raise BadRequest(str(exc)) from None
    return parsed if on else None


def version_csv(request: Request, name: str, what: str, export: Callable[..., str], suffix: str = "") -> Response:
    """A mapping version's ``export`` (its codes, or its rules: ``what``) as a CSV download; ``?version=N`` or
    the latest. A version that is not a whole number of at least 1 is refused, not read as "the latest" (live
    fuzzing found that); one past the store's ids is a 404 without a lookup (SQLite cannot even compare it)."""
    raw = request.query_params.get("version")
    if raw and not (raw.isdecimal() and int(raw) >= 1):
        raise BadRequest(f"version must be a {what} version number (1 or more); got {raw!r}.")
    version = int(raw) if raw else None
    if version is not None and version > MAX_ID:
        raise NotFound(f"No version {version} of mapping {name!r} is stored.")
    try:
        text = export(app_store(request), name=name, version=version)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    safe_name = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name)[:60] or "mapping"
    return Response(text, media_type="text/csv; charset=utf-8",
                    headers={"content-disposition": f'attachment; filename="{safe_name}{suffix}.csv"'})


def window_query(request: Request) -> tuple[int, int] | None:
    """The ``from`` and ``to`` fiscal years of a page's or export's address, or None when neither is given; a
    window with one end, a non-number or the first year after the last is refused, not replaced by the default
    window (live fuzzing found an export answering ``to=-1`` with the default window's numbers)."""
    lo, hi = request.query_params.get("from"), request.query_params.get("to")
    if not lo and not hi:
        return None
    if not (lo and hi and lo.isdecimal() and hi.isdecimal()) or int(lo) > int(hi):
        raise BadRequest("The window needs a first and a last fiscal year, first before last (e.g. 1998 and 2022).")
    return int(lo), int(hi)
