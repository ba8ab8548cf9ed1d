"""Team mode: accounts, sign-in, roles on every route, tokens, sessions and the audit trail.

The role each request needs follows from its method and path (app/web/auth.py); these tests walk the app's
whole route table, so a new route is covered the day it is added. Role names and the 401/403 split follow
common practice for web APIs (RFC 9110 sections 15.5.2 and 15.5.4: 401 = not authenticated, 403 = not
allowed).
"""

from __future__ import annotations

import html
import re
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from app.config import Settings
from app.store import Store, StoreError
from app.web.app import create_app
from app.web.auth import COOKIE, required_role

PASSWORD = "correct horse battery"
ROLES = ("viewer", "analyst", "admin")
RANK = {None: -1, "viewer": 0, "analyst": 1, "admin": 2}


def every_route(app: Any) -> list[tuple[str, str]]:
    """(method, path template) of every route the app serves, found by walking its routers."""
    found: list[tuple[str, str]] = []

    def walk(routes: Any) -> None:
        for route in routes:
            methods, path = getattr(route, "methods", None), getattr(route, "path", None)
            if methods and path:
                found.extend((m, path) for m in sorted(methods) if m != "HEAD")
            elif hasattr(route, "original_router"):
                walk(route.original_router.routes)
            elif hasattr(route, "routes"):
                walk(route.routes)

    walk(app.routes)
    return sorted(set(found))


def fill(path: str, ids: dict[str, str]) -> str:
    def one(match: re.Match[str]) -> str:
        name = match.group(1).split(":")[0]
        return ids.get(name, "1")
    return re.sub(r"\{([^}]+)\}", one, path)


@pytest.fixture
def team(demo_store: Store) -> Iterator[tuple[TestClient, Store, dict[str, str]]]:
    for role in ROLES:
        demo_store.add_account(f"{role}1", role, PASSWORD)
    app = create_app(Settings(db_url=demo_store.url), demo_store, start_jobs=False)
    roster = demo_store.list_rosters()[0]
    run_id = demo_store.create_run(kind="fit", roster_id=roster.id, params={"model": "linear"}, fingerprint="x",
                                   mapping_name=None, mapping_version=None, window=None, status="done")
    name, _ = demo_store.list_mappings()[0]
    ids = {"roster_id": str(roster.id), "run_id": str(run_id), "name": name, "mapping": name, "version": "1",
           "chart": "trend", "fmt": "png", "path": "css/helmshift.css"}
    with TestClient(app) as client:
        yield client, demo_store, ids


def sign_in(client: TestClient, name: str, password: str = PASSWORD) -> Any:
    return client.post("/login", data={"username": name, "password": password, "next": "/rosters"},
                       follow_redirects=False)


def test_the_role_rules() -> None:
    assert required_role("GET", "/login") is None and required_role("GET", "/static/css/x.css") is None
    assert required_role("GET", "/rosters/1/trend") == "viewer"
    assert required_role("GET", "/api/runs/3") == "viewer"
    assert required_role("POST", "/rosters/1/window") == "analyst"
    assert required_role("POST", "/rosters/1/delete") == "admin"
    assert required_role("POST", "/rosters/1/overrides/delete") == "analyst"
    # a change no one has given a role (no such route) is refused below admin, never let through
    assert required_role("POST", "/rosters/1/coverage") == "admin" and required_role("DELETE", "/api/rosters") == "admin"
    assert required_role("POST", "/rosters/1/x/delete") == "admin"
    assert required_role("GET", "/audit") == "admin" and required_role("GET", "/api/audit") == "admin"
    assert required_role("POST", "/logout") == "viewer"


def test_every_route_for_every_role(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, store, ids = team
    routes = every_route(client.app)
    assert len(routes) > 30
    # signing out and deleting last, so that the session and the roster stay for every other request
    routes.sort(key=lambda r: (r[1] == "/logout", r[1].endswith("/delete")))
    checked = 0
    for who in (None, *ROLES):
        client.cookies.clear()
        if who:
            assert sign_in(client, f"{who}1").status_code == 303
        for method, template in routes:
            if who == "admin" and template.endswith("/delete"):
                continue  # would remove the roster the later checks need; covered below
            path = fill(template, ids)
            needed = required_role(method, path)
            r = client.request(method, path, follow_redirects=False, headers={"accept": "application/json"})
            if needed is None:
                # open to everyone (the sign-in form itself answers 401 to an empty name and password)
                assert r.status_code != 403 and (r.status_code != 401 or path == "/login"), (who, method, path)
            elif who is None:
                assert r.status_code == 401, (method, path, r.status_code)
            elif RANK[who] < RANK[needed]:
                assert r.status_code == 403, (who, method, path, r.status_code)
                assert needed in r.json()["error"]
            else:
                assert r.status_code not in (401, 403), (who, method, path, r.status_code, r.text[:200])
            checked += 1
    assert checked > 4 * 30
    assert store.list_rosters(), "no delete may have passed for a role below admin"


def test_an_admin_may_delete(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, store, ids = team
    sign_in(client, "analyst1")
    assert client.post(f"/rosters/{ids['roster_id']}/delete", data={"confirm": "yes"}).status_code == 403
    client.cookies.clear()
    sign_in(client, "admin1")
    r = client.post(f"/rosters/{ids['roster_id']}/delete", data={"confirm": "yes"}, follow_redirects=False)
    assert r.status_code in (200, 303)
    assert store.list_rosters() == []
    events = store.audit_events(action="roster_delete")
    assert [e.user for e in events] == ["admin1"]


def test_anonymous_pages_go_to_sign_in_and_back(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, _, ids = team
    r = client.get(f"/rosters/{ids['roster_id']}/trend?years=2000-2010", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"].startswith("/login?next=")
    login = client.get(r.headers["location"])
    assert login.status_code == 200 and 'name="password"' in login.text
    assert 'value="/rosters/1/trend?years=2000-2010"' in login.text.replace(ids["roster_id"], "1", 1)
    # health and static files stay open: they hold no roster data
    assert client.get("/api/health").status_code == 200
    assert client.get("/static/css/helmshift.css").status_code == 200


def test_sign_in_sets_a_strict_session_cookie(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, _, _ = team
    r = sign_in(client, "viewer1")
    assert r.status_code == 303 and r.headers["location"] == "/rosters"
    cookie = r.headers["set-cookie"]
    assert cookie.startswith(f"{COOKIE}=")
    assert "HttpOnly" in cookie and "SameSite=strict" in cookie.replace("Strict", "strict")
    assert "Max-Age=43200" in cookie and "Secure" not in cookie  # plain http on loopback
    assert client.get("/rosters").status_code == 200
    client.post("/logout")
    assert client.get("/api/rosters").status_code == 401


def test_next_never_leaves_the_site(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, _, _ = team
    for target in ("https://elsewhere.example/", "//elsewhere.example/x", "/\\elsewhere.example"):
        r = client.post("/login", data={"username": "viewer1", "password": PASSWORD, "next": target},
                        follow_redirects=False)
        assert r.headers["location"] == "/"
        client.cookies.clear()


def test_wrong_passwords_are_refused_and_then_rate_limited(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, store, _ = team
    for _ in range(5):
        r = sign_in(client, "analyst1", "wrong password!")
        assert r.status_code == 401 and "Wrong name or password" in r.text
    r = sign_in(client, "analyst1")  # even the right password waits now
    assert r.status_code == 429 and "Too many failed sign-ins" in r.text
    assert COOKIE not in r.headers.get("set-cookie", "")
    # an unknown name answers exactly like a wrong password
    assert sign_in(client, "nobody", "whatever at all").status_code == 401
    failed = store.audit_events(action="login_failed")
    assert len(failed) == 6 and {e.user for e in failed} == {"analyst1", "nobody"}


def test_a_sign_in_name_no_account_can_have_is_recorded_shortened(
        team: tuple[TestClient, Store, dict[str, str]]) -> None:
    # probe (session 7): anyone could write a 1 MB name into the audit trail, once per attempt, by signing in
    # with it; account names are 1 to 64 printable characters (app/store/accounts.py), so a longer or unprintable
    # name is recorded as its first 64 printable characters and its length, and still counts for the rate limit
    client, store, _ = team
    long_name = "u" * 200_000
    for _ in range(5):
        assert sign_in(client, long_name, "wrong password!").status_code == 401
    assert sign_in(client, long_name, "wrong password!").status_code == 429
    odd = sign_in(client, "bo\u202ess\tx", "wrong password!")
    assert odd.status_code == 401
    failed = store.audit_events(action="login_failed")
    assert {e.user for e in failed} == {"u" * 64 + "… (200,000 characters)", "bo?ss?x"}
    assert all(len(e.target) < 120 for e in failed)


def test_an_audit_filter_that_is_not_a_time_is_refused(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    # probe (session 7): since=yesterday was compared as text ('y' sorts after every ISO time) and answered
    # "No events", as if nothing had happened
    client, store, _ = team
    assert sign_in(client, "admin1").status_code == 303
    for bad in ("yesterday", "2026-13-01", "9" * 400):
        for path in ("/audit", "/api/audit"):
            r = client.get(path, params={"since": bad})
            assert r.status_code == 400, (path, bad, r.status_code)
            assert "since must be an ISO date or time such as 2026-12-01" in html.unescape(r.text)
    with pytest.raises(StoreError, match="since must be"):
        store.audit_events(since="last week")
    events = client.get("/api/audit", params={"since": "2000-01-01"}).json()["events"]
    assert events and events == client.get("/api/audit").json()["events"]


def test_expired_and_revoked_sessions(team: tuple[TestClient, Store, dict[str, str]],
                                      monkeypatch: pytest.MonkeyPatch) -> None:
    import itsdangerous.timed

    from app.web.auth import session_cookie_value

    client, store, _ = team
    account = store.get_account("viewer1")
    real_time = itsdangerous.timed.time.time
    monkeypatch.setattr(itsdangerous.timed.time, "time", lambda: real_time() - 13 * 3600)
    old = session_cookie_value(store, account)
    monkeypatch.setattr(itsdangerous.timed.time, "time", real_time)

    def answer(cookie: str) -> int:
        client.cookies.set(COOKIE, cookie)
        return client.get("/api/rosters").status_code

    assert answer(old) == 401
    fresh = session_cookie_value(store, account)
    assert answer(fresh) == 200
    assert answer(fresh[:-2] + ("xx" if not fresh.endswith("xx") else "yy")) == 401
    store.set_password("viewer1", "another long password")
    assert answer(fresh) == 401


def test_api_tokens_carry_the_accounts_role(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, store, ids = team
    token = store.create_token("viewer1")
    assert token.startswith("hs_") and len(token) > 40
    auth = {"authorization": f"Bearer {token}"}
    assert client.get("/api/rosters", headers=auth).status_code == 200
    r = client.post(f"/rosters/{ids['roster_id']}/window", headers=auth, data={"window_from": "2000"})
    assert r.status_code == 403
    assert client.get("/api/rosters", headers={"authorization": "Bearer hs_not-a-token"}).status_code == 401
    store.remove_account("viewer1")
    assert client.get("/api/rosters", headers=auth).status_code == 401


def test_cross_site_posts_are_still_refused_when_signed_in(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, store, ids = team
    sign_in(client, "admin1")
    r = client.post(f"/rosters/{ids['roster_id']}/delete", data={"confirm": "yes"},
                    headers={"origin": "http://elsewhere.example"})
    assert r.status_code == 403
    assert store.list_rosters()


def test_the_audit_trail_names_the_user_of_every_change(team: tuple[TestClient, Store, dict[str, str]]) -> None:
    client, store, ids = team
    sign_in(client, "analyst1")
    roster = ids["roster_id"]
    assert client.post(f"/rosters/{roster}/window", data={"window_from": "2000", "window_to": "2015"},
                       follow_redirects=False).status_code in (200, 303)
    r = client.post(f"/rosters/{roster}/resampling", data={"unit": "departure", "resamples": "100", "seed": "4"},
                    follow_redirects=False)
    assert r.status_code == 303
    events = store.audit_events(user="analyst1")
    actions = {e.action for e in events}
    assert {"roster_settings", "run_start"} <= actions
    run = max(store.list_runs(int(roster), "bootstrap"), key=lambda r: r.id)
    assert run.author == "analyst1"
    # the admin page shows them; an analyst may not read it
    assert client.get("/audit").status_code == 403
    client.cookies.clear()
    sign_in(client, "admin1")
    page = client.get("/api/audit", params={"user": "analyst1"})
    assert page.status_code == 200
    assert {e["action"] for e in page.json()["events"]} >= {"roster_settings", "run_start"}
    assert "analyst1" in client.get("/audit").text


def test_no_account_means_single_analyst_mode(demo_store: Store) -> None:
    app = create_app(Settings(db_url=demo_store.url), demo_store, start_jobs=False)
    with TestClient(app) as client:
        assert client.get("/api/rosters").status_code == 200
        assert client.get("/rosters").status_code == 200
        roster = demo_store.list_rosters()[0]
        client.post(f"/rosters/{roster.id}/window", data={"window_from": "2000", "window_to": "2015"})
    assert demo_store.audit_events(action="roster_settings")[0].user == "local analyst"


def test_the_role_table_names_exactly_the_apps_changes(demo_store: Store) -> None:
    """Every route that changes something has a role decided in ROLE_TABLE, and the table names no route the
    app does not have (a renamed route would silently fall back to admin-only)."""
    from app.web.auth import ROLE_TABLE

    app = create_app(Settings(db_url=demo_store.url), demo_store, start_jobs=False)
    routes = set(every_route(app))
    changes = {(m, p) for m, p in routes if m not in ("GET", "HEAD", "OPTIONS") and p != "/login"}
    assert changes and changes <= set(ROLE_TABLE), sorted(changes - set(ROLE_TABLE))
    assert set(ROLE_TABLE) <= routes, sorted(set(ROLE_TABLE) - routes)


#: The decision for every route that deletes or removes something, written out here (not read from
#: app/web/auth.py) so that a change of role is a change of this test too. Removing a case override saves the
#: mapping's next version without it (earlier versions and their runs stay), so the analyst who may add one
#: may remove one; a roster, an intake profile and an account are removed for everyone, so admins only.
DELETES = {
    "/rosters/{roster_id}/overrides/delete": "analyst",
    "/profiles/{profile_id}/delete": "admin",
    "/accounts/{name}/delete": "admin",
    "/rosters/{roster_id}/delete": "admin",
}


def test_every_delete_route_is_decided(demo_store: Store) -> None:
    app = create_app(Settings(db_url=demo_store.url), demo_store, start_jobs=False)
    found = {p for m, p in every_route(app) if p.endswith("/delete") or m == "DELETE"}
    assert found == set(DELETES)
    assert {p: required_role("POST", fill(p, {})) for p in DELETES} == DELETES


def test_each_delete_for_each_role(store: Store) -> None:
    """Each /delete route tried by a viewer, an analyst and an admin: refused (403, nothing removed) below the
    role in DELETES; at or above it, refused without the confirmation (400) and done with it (the audit trail
    names who)."""
    from tests.test_web_overrides import ready

    roster_id, f1 = ready(store)
    for role in ROLES:
        store.add_account(f"{role}1", role, PASSWORD)
    app = create_app(Settings(db_url=store.url), store, start_jobs=False)

    def profiles() -> list[str]:
        return [p.name for p in store.list_profiles()]

    def accounts() -> list[str]:
        return sorted(a.name for a in store.list_accounts())

    def overrides() -> int:
        return len(store.get_mapping("desk map").overrides)

    with TestClient(app) as client:
        def as_(who: str) -> None:
            client.cookies.clear()
            assert sign_in(client, who).status_code == 303

        def add_override() -> None:  # an analyst's change, so every role's removal has one to remove
            as_("analyst1")
            r = client.post(f"/api/rosters/{roster_id}/overrides",
                            data={"departure_id": str(f1), "category": "forced", "note": "board statement"})
            assert r.status_code == 200, r.text

        for who in ROLES:
            add_override()
            store.save_profile(f"recipe {who}", headers=["Ref", "Why"], roles={"firm_id": "Ref", "reason": "Why"},
                               header_row=None, date_order="auto", fy_end=12)
            store.add_account(f"temp-{who}", "viewer", PASSWORD)
            profile = max(store.list_profiles(), key=lambda p: p.id)
            tries = [
                ("/rosters/{roster_id}/overrides/delete", f"/rosters/{roster_id}/overrides/delete", {"position": "1"},
                 overrides),
                ("/profiles/{profile_id}/delete", f"/profiles/{profile.id}/delete", {}, profiles),
                ("/accounts/{name}/delete", f"/accounts/temp-{who}/delete", {}, accounts),
            ]
            as_(f"{who}1")
            for template, path, form, state in tries:
                allowed = RANK[who] >= RANK[DELETES[template]]
                before = state()
                refused = client.post(path, data=form, follow_redirects=False, headers={"accept": "application/json"})
                if not allowed:
                    assert refused.status_code == 403, (who, path, refused.status_code)
                    assert DELETES[template] in refused.json()["error"] and state() == before
                    continue
                assert refused.status_code == 400 and state() == before, (who, path, refused.text)
                done = client.post(path, data={**form, "confirm": "yes"}, follow_redirects=False)
                assert done.status_code == 303, (who, path, done.status_code, done.text[:300])
                assert state() != before, (who, path)
            if who != "admin":
                r = client.post(f"/rosters/{roster_id}/delete", data={"confirm": "yes"}, follow_redirects=False)
                assert r.status_code == 403 and store.list_rosters(), who
        # the analyst's and the admin's removals are theirs in the audit trail; the viewer's never happened
        removals = [e.user for e in reversed(store.audit_events(action="mapping_version"))
                    if "case override removed" in str(e.detail)]
        assert removals == ["analyst1", "admin1"], [(e.user, e.detail) for e in store.audit_events()][:12]
        as_("admin1")
        r = client.post(f"/rosters/{roster_id}/delete", data={"confirm": "yes"}, follow_redirects=False)
        assert r.status_code == 303 and store.list_rosters() == []
    # what is left: no override (one record's override, set again before each role's turn: the viewer's try
    # left it, the analyst and the admin removed it), the viewer's and analyst's profiles and temporary
    # accounts (only the admin removed one)
    assert store.get_mapping("desk map").overrides == ()
    assert profiles() == ["recipe analyst", "recipe viewer"]
    assert [a for a in accounts() if a.startswith("temp-")] == ["temp-analyst", "temp-viewer"]
