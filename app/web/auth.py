"""Team mode: sign-in, roles and the audit page. On as soon as the store holds one account.

With no account Helmshift stays the single analyst's loopback tool it always was. With accounts every page
and API needs a signed-in session (a signed, expiring cookie) or an API token (``Authorization: Bearer``),
and each request is checked against the role it needs:

* viewer: read every page and API, download exports;
* analyst: also import, map (codes, rules, case overrides: adding and removing one), set windows, start,
  stop and extend runs;
* admin: also delete what others rely on (a roster, an intake profile, an account), read the audit trail
  and manage accounts (``/accounts``, :mod:`app.web.accounts`).

Plain ASGI middleware, like :mod:`app.web.security`, so that no route can be forgotten: :data:`ROLE_TABLE`
names the role of every route that changes something (and of the admin pages); any other GET needs a viewer,
and any other change an admin. ``tests/test_roles.py`` fails when a route of the app is missing from the table
or the table names a route the app no longer has, and walks the whole route table for every role.
"""

from __future__ import annotations

import json
import re
import time
from collections.abc import Awaitable, Callable, MutableMapping
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any
from urllib.parse import quote

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from itsdangerous import BadSignature, URLSafeTimedSerializer
from starlette.concurrency import run_in_threadpool

from app.store import Account, AuditEvent, Store, StoreError
from app.store.accounts import FAILED_LOGIN_WINDOW, MAX_FAILED_LOGINS
from app.store.audit import reset_actor, set_actor
from app.types import AccountRole
from app.web.deps import BadRequest
from app.web.forms import read_form
from app.web.rendering import as_json, render

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

COOKIE = "helmshift_session"
SESSION_SECONDS = 12 * 3600
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})
PUBLIC_PREFIXES = ("/static/", "/vendor/")
PUBLIC_PATHS = frozenset({"/login", "/api/health"})

#: Who may do what, route by route (paths as the routers write them). Why each delete is where it is:
#: removing a case override saves the mapping's next version without it (every earlier version, and every run
#: made with it, stays), so it is as reversible as adding one and belongs to the analyst who may add one;
#: deleting a roster removes records other analysts' work reads, an intake profile is the desk's shared
#: recipe for a source's files, and accounts are the admin's to manage, so those three stay with admins.
ROLE_TABLE: dict[tuple[str, str], AccountRole] = {
    # admin pages
    ("GET", "/accounts"): "admin",
    ("GET", "/audit"): "admin",
    ("GET", "/api/audit"): "admin",
    ("POST", "/accounts"): "admin",
    ("POST", "/accounts/{name}/role"): "admin",
    ("POST", "/accounts/{name}/delete"): "admin",
    ("POST", "/rosters/{roster_id}/delete"): "admin",
    ("POST", "/profiles/{profile_id}/delete"): "admin",
    # the analyst's work: imports, mappings, rules, overrides, windows, runs
    ("POST", "/api/rosters"): "analyst",
    ("POST", "/rosters/upload"): "analyst",
    ("POST", "/rosters/review"): "analyst",
    ("POST", "/rosters/confirm"): "analyst",
    ("POST", "/rosters/{roster_id}/universe"): "analyst",
    ("POST", "/rosters/{roster_id}/universe/derive"): "analyst",
    ("POST", "/rosters/{roster_id}/reasons"): "analyst",
    ("POST", "/rosters/{roster_id}/mapping/import"): "analyst",
    ("POST", "/rosters/{roster_id}/mapping/select"): "analyst",
    ("POST", "/rosters/{roster_id}/rules"): "analyst",
    ("POST", "/rosters/{roster_id}/rules/import"): "analyst",
    ("POST", "/rosters/{roster_id}/rules/preset"): "analyst",
    ("POST", "/rosters/{roster_id}/overrides"): "analyst",
    ("POST", "/api/rosters/{roster_id}/overrides"): "analyst",
    ("POST", "/rosters/{roster_id}/overrides/delete"): "analyst",
    ("POST", "/rosters/{roster_id}/window"): "analyst",
    ("POST", "/rosters/{roster_id}/briefing/settings"): "analyst",
    ("POST", "/rosters/{roster_id}/resampling"): "analyst",
    ("POST", "/runs/{run_id}/cancel"): "analyst",
    ("POST", "/runs/{run_id}/extend"): "analyst",
    # everyone signed in
    ("POST", "/logout"): "viewer",
}


def _pattern(template: str) -> re.Pattern[str]:
    """A route's path template as a regular expression (``{name}`` is one path segment)."""
    parts = re.split(r"\{[^}/]+\}", template)
    return re.compile("[^/]+".join(re.escape(part) for part in parts) + r"\Z")


_ROLE_PATTERNS: dict[str, list[tuple[re.Pattern[str], AccountRole]]] = {}
for (_method, _template), _role in ROLE_TABLE.items():
    _ROLE_PATTERNS.setdefault(_method, []).append((_pattern(_template), _role))
#: how long the "is any account there?" answer is reused (team mode switches on within this time)
_ACCOUNTS_TTL = 2.0


def required_role(method: str, path: str) -> AccountRole | None:
    """The least role a request needs in team mode; ``None`` for the sign-in page and static files."""
    if path in PUBLIC_PATHS or path.startswith(PUBLIC_PREFIXES):
        return None
    method = method.upper()
    for pattern, role in _ROLE_PATTERNS.get("GET" if method in SAFE_METHODS else method, ()):
        if pattern.match(path):
            return role
    # a read is a viewer's; a change nobody put in the table is refused below admin until someone decides
    return "viewer" if method in SAFE_METHODS else "admin"


def _serializer(store: Store) -> URLSafeTimedSerializer:
    return URLSafeTimedSerializer(store.secret("session"), salt="helmshift-session")


def session_cookie_value(store: Store, account: Account) -> str:
    return _serializer(store).dumps({"a": account.id, "e": account.session_epoch})


def account_from_cookie(store: Store, value: str) -> Account | None:
    try:
        data = _serializer(store).loads(value, max_age=SESSION_SECONDS)
        account = store.get_account(int(data["a"]))
    except (BadSignature, KeyError, TypeError, ValueError):
        return None
    return account if account.session_epoch == data.get("e") else None


def _wants_html(method: str, path: str, headers: dict[str, str]) -> bool:
    return (method in SAFE_METHODS and not path.startswith("/api/")
            and "application/json" not in headers.get("accept", ""))


class AuthMiddleware:
    """Sign-in and role checks whenever the store holds an account."""

    def __init__(self, app: ASGIApp, *, store: Store) -> None:
        self.app = app
        self.store = store
        self._checked_at = -1e9
        self._team_mode = False

    def team_mode(self) -> bool:
        now = time.monotonic()
        if now - self._checked_at > _ACCOUNTS_TTL:
            self._team_mode = self.store.has_accounts()
            self._checked_at = now
        return self._team_mode

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or not self.team_mode():
            await self.app(scope, receive, send)
            return
        method = scope.get("method", "GET").upper()
        path = scope.get("path", "/")
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope.get("headers", [])}
        account = self._identify(headers)
        scope.setdefault("state", {})["account"] = account
        needed = required_role(method, path)
        if needed is not None:
            if account is None:
                if _wants_html(method, path, headers):
                    target = path + (("?" + scope["query_string"].decode("latin-1")) if scope.get("query_string") else "")
                    await _send(send, 303, b"", [(b"location", f"/login?next={quote(target)}".encode())])
                else:
                    await _json(send, 401, "Sign in first: this Helmshift has accounts (send a session cookie "
                                           "or an API token as 'Authorization: Bearer ...').",
                                [(b"www-authenticate", b'Bearer realm="helmshift"')])
                return
            if not account.may(needed):
                await _json(send, 403, f"Your role ({account.role}) may not do this; it needs {needed}.")
                return
        token = set_actor(account.name) if account is not None else None
        try:
            await self.app(scope, receive, send)
        finally:
            if token is not None:
                reset_actor(token)

    def _identify(self, headers: dict[str, str]) -> Account | None:
        auth = headers.get("authorization", "")
        if auth.lower().startswith("bearer "):
            return self.store.account_for_token(auth[7:].strip())
        for part in headers.get("cookie", "").split(";"):
            name, _, value = part.strip().partition("=")
            if name == COOKIE and value:
                return account_from_cookie(self.store, value)
        return None


async def _send(send: Send, status: int, body: bytes, headers: list[tuple[bytes, bytes]]) -> None:
    await send({"type": "http.response.start", "status": status,
                "headers": [(b"content-length", str(len(body)).encode()), *headers]})
    await send({"type": "http.response.body", "body": body})


async def _json(send: Send, status: int, message: str, headers: list[tuple[bytes, bytes]] | None = None) -> None:
    body = json.dumps({"error": message}).encode()
    await _send(send, status, body, [(b"content-type", b"application/json"), *(headers or [])])


# -- pages: sign in, sign out, the audit trail ---------------------------------------------------------

router = APIRouter()


@dataclass(frozen=True)
class LoginPage:
    next: str
    message: str | None
    username: str


@dataclass(frozen=True)
class AuditPage:
    events: list[AuditEvent]
    user: str | None
    action: str | None
    since: str | None


def _safe_next(value: str | None) -> str:
    """Only a path on this server (never another site) may follow a sign-in."""
    if value and value.startswith("/") and not value.startswith("//") and "\\" not in value:
        return value
    return "/"


@router.get("/login", name="login_page", response_class=HTMLResponse, include_in_schema=False)
def login_page(request: Request, next: str = "/") -> HTMLResponse:
    return render(request, "login.html", LoginPage(_safe_next(next), None, ""))


@router.post("/login", name="login_submit", include_in_schema=False)
async def login_submit(request: Request) -> Response:
    form = await read_form(request)
    fields = {k: str(form.get(k, "")) for k in ("username", "password", "next")}
    # checking a password is deliberately slow (argon2id): off the event loop
    return await run_in_threadpool(_login_submit, request, fields)


def _login_submit(request: Request, fields: dict[str, str]) -> Response:
    store: Store = request.app.state.store
    username = fields["username"].strip()
    password = fields["password"]
    target = _safe_next(fields["next"] or "/")
    failures, oldest = store.failed_logins_recently(username)
    if failures >= MAX_FAILED_LOGINS and oldest is not None:
        wait = FAILED_LOGIN_WINDOW - (datetime.now(UTC) - datetime.fromisoformat(oldest))
        minutes = max(1, int(wait.total_seconds() // 60) + 1)
        page = LoginPage(target, f"Too many failed sign-ins for {username!r}; try again in {minutes} minute(s).",
                         username)
        return render(request, "login.html", page, status=429)
    account = store.check_password(username, password)
    if account is None:
        return render(request, "login.html", LoginPage(target, "Wrong name or password.", username), status=401)
    response = RedirectResponse(target, status_code=303)
    response.set_cookie(COOKIE, session_cookie_value(store, account), max_age=SESSION_SECONDS, httponly=True,
                        samesite="strict", secure=request.url.scheme == "https", path="/")
    return response


@router.post("/logout", name="logout", include_in_schema=False)
def logout(request: Request) -> Response:
    response = RedirectResponse("/login", status_code=303)
    response.delete_cookie(COOKIE, path="/", httponly=True, samesite="strict",
                           secure=request.url.scheme == "https")
    return response


def audit_data(store: Store, *, user: str | None, action: str | None, since: str | None) -> AuditPage:
    try:
        events = store.audit_events(user=user or None, action=action or None, since=since or None, limit=500)
    except StoreError as exc:
        raise BadRequest(str(exc)) from exc
    return AuditPage(events, user or None, action or None, since or None)


@router.get("/audit", name="audit_page", response_class=HTMLResponse, include_in_schema=False)
def audit_page(request: Request, user: str = "", action: str = "", since: str = "") -> HTMLResponse:
    return render(request, "audit.html", audit_data(request.app.state.store, user=user, action=action, since=since))


@router.get("/api/audit", name="audit_api", include_in_schema=False)
def audit_api(request: Request, user: str = "", action: str = "", since: str = "") -> JSONResponse:
    return as_json(audit_data(request.app.state.store, user=user, action=action, since=since))
