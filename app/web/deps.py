"""Access to the app-wide services (store, settings, uploads, jobs) from a request."""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING

from fastapi import Request

from app.config import Settings
from app.store import Store
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
