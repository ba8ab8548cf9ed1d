"""Accounts page (team mode, admins only): list, add, change a role, remove; every change is audited.

The role check is the auth middleware's (``/accounts`` paths need an admin, app/web/auth.py); the store
writes each change with its audit event in one transaction and keeps at least one admin. With no account
yet the page only says how to add the first one from the command line: a form that any local browser tab
could post would be a poor way to decide who administers the store.
"""

from __future__ import annotations

from dataclasses import dataclass

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.store import Account, Store, StoreError
from app.types import ACCOUNT_ROLES
from app.web.deps import BadRequest, app_store, require_confirmation
from app.web.forms import Upload, read_form
from app.web.rendering import render

router = APIRouter()

FIRST_ACCOUNT = ("There are no accounts yet, so this Helmshift is the single analyst's local tool. Add the first "
                 "account, an admin, from the command line: HELMSHIFT_PASSWORD=... helmshift user add NAME "
                 "--role admin.")


@dataclass(frozen=True)
class AccountsPage:
    accounts: list[Account]
    roles: tuple[str, ...]
    message: str | None = None
    error: str | None = None


def accounts_data(store: Store, *, message: str | None = None, error: str | None = None) -> AccountsPage:
    return AccountsPage(store.list_accounts(), tuple(ACCOUNT_ROLES), message, error)


@router.get("/accounts", name="accounts_page", response_class=HTMLResponse, include_in_schema=False)
def accounts_page(request: Request, done: str = "") -> HTMLResponse:
    store = app_store(request)
    message = {"added": "Account added.", "role": "Role changed.", "removed": "Account removed."}.get(done)
    return render(request, "accounts.html", accounts_data(
        store, message=message, error=None if store.has_accounts() else FIRST_ACCOUNT))


def _again(request: Request, error: str) -> HTMLResponse:
    return render(request, "accounts.html", accounts_data(app_store(request), error=error), status=400)


def _done(request: Request, what: str) -> RedirectResponse:
    return RedirectResponse(request.url_for("accounts_page").include_query_params(done=what), status_code=303)


def _field(form: dict[str, str | Upload], name: str) -> str:
    value = form.get(name)
    return value if isinstance(value, str) else ""


@router.post("/accounts", name="account_add", include_in_schema=False)
async def account_add(request: Request) -> Response:
    form = await read_form(request)
    return await run_in_threadpool(_account_add, request, form)


def _account_add(request: Request, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    if not store.has_accounts():
        raise BadRequest(FIRST_ACCOUNT)
    try:
        store.add_account(_field(form, "username"), _field(form, "role"), _field(form, "password"))
    except ValueError as exc:  # StoreError, or a role that is not one of the three
        return _again(request, f"{exc} Nothing was added.")
    return _done(request, "added")


@router.post("/accounts/{name}/role", name="account_role", include_in_schema=False)
async def account_role(request: Request, name: str) -> Response:
    form = await read_form(request)
    return await run_in_threadpool(_account_role, request, name, form)


def _account_role(request: Request, name: str, form: dict[str, str | Upload]) -> Response:
    try:
        app_store(request).set_role(name, _field(form, "role"))
    except ValueError as exc:
        return _again(request, f"{exc} The role was not changed.")
    return _done(request, "role")


@router.post("/accounts/{name}/delete", name="account_delete", include_in_schema=False)
async def account_delete(request: Request, name: str) -> Response:
    form = await read_form(request)
    return await run_in_threadpool(_account_delete, request, name, form)


def _account_delete(request: Request, name: str, form: dict[str, str | Upload]) -> Response:
    require_confirmation(form, f"the account {name!r} and its API tokens")
    try:
        app_store(request).remove_account(name)
    except StoreError as exc:
        return _again(request, f"{exc} Nothing was removed.")
    return _done(request, "removed")
