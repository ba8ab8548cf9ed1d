"""The Accounts page (team mode): admins list, add, re-role and remove accounts; others may not; every change
is in the audit trail under the admin's name; the last admin cannot be demoted or removed. Role names and the
403 for a signed-in account without the role follow common practice (RFC 9110 section 15.5.4)."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from app.config import Settings
from app.store import Store
from app.web.app import create_app

PASSWORD = "correct horse battery"
SAME = {"origin": "http://testserver"}


@pytest.fixture
def team(store: Store) -> Iterator[TestClient]:
    store.add_account("ada", "admin", PASSWORD)
    store.add_account("vic", "viewer", PASSWORD)
    with TestClient(create_app(Settings(db_url=store.url), store, start_jobs=False)) as client:
        yield client


def sign_in(client: TestClient, name: str) -> None:
    client.cookies.clear()
    r = client.post("/login", data={"username": name, "password": PASSWORD}, headers=SAME, follow_redirects=False)
    assert r.status_code == 303


def post(client: TestClient, path: str, data: dict[str, str]) -> Any:
    return client.post(path, data=data, headers=SAME, follow_redirects=False)


def test_an_admin_manages_accounts_and_each_change_is_audited(team: TestClient, store: Store) -> None:
    sign_in(team, "ada")
    page = team.get("/accounts")
    assert page.status_code == 200 and "ada" in page.text and "vic" in page.text
    assert post(team, "/accounts", {"username": "bea", "role": "analyst", "password": PASSWORD}).status_code == 303
    assert store.get_account("bea").role == "analyst"
    assert post(team, "/accounts/bea/role", {"role": "admin"}).status_code == 303
    assert store.get_account("bea").role == "admin"
    assert post(team, "/accounts/vic/delete", {}).status_code == 400  # the confirmation box, checked by the server
    assert post(team, "/accounts/vic/delete", {"confirm": "yes"}).status_code == 303
    assert [a.name for a in store.list_accounts()] == ["ada", "bea"]
    events = [(e.user, e.action, e.target) for e in store.audit_events() if e.action.startswith("account_")]
    assert events[:3] == [("ada", "account_remove", "account:vic"), ("ada", "account_role", "account:bea"),
                          ("ada", "account_add", "account:bea")]
    assert "Account removed." in team.get("/accounts?done=removed").text


def test_bad_input_and_the_last_admin_are_refused_with_a_sentence(team: TestClient, store: Store) -> None:
    sign_in(team, "ada")
    short = post(team, "/accounts", {"username": "bea", "role": "analyst", "password": "short"})
    assert short.status_code == 400 and "at least 10 characters" in short.text and "Nothing was added" in short.text
    role = post(team, "/accounts", {"username": "bea", "role": "owner", "password": PASSWORD})
    assert role.status_code == 400 and "role must be one of" in role.text
    twice = post(team, "/accounts", {"username": "vic", "role": "viewer", "password": PASSWORD})
    assert twice.status_code == 400 and "already exists" in twice.text
    demote = post(team, "/accounts/ada/role", {"role": "viewer"})
    assert demote.status_code == 400 and "last admin" in demote.text
    remove = post(team, "/accounts/ada/delete", {"confirm": "yes"})
    assert remove.status_code == 400 and "last admin" in remove.text
    assert [(a.name, a.role) for a in store.list_accounts()] == [("ada", "admin"), ("vic", "viewer")]


def test_other_roles_may_not_touch_accounts(team: TestClient, store: Store) -> None:
    sign_in(team, "vic")
    assert team.get("/accounts", headers={"accept": "application/json"}).status_code == 403
    r = post(team, "/accounts", {"username": "eve", "role": "admin", "password": PASSWORD})
    assert r.status_code == 403 and "needs admin" in r.json()["error"]
    assert post(team, "/accounts/vic/role", {"role": "admin"}).status_code == 403
    assert store.get_account("vic").role == "viewer"
    team.cookies.clear()
    assert team.get("/accounts", headers={"accept": "application/json"}).status_code == 401


def test_without_accounts_the_page_points_to_the_command_line(empty_client: Any, store: Store) -> None:
    page = empty_client.get("/accounts")
    assert page.status_code == 200 and "helmshift user add NAME --role admin" in page.text
    r = empty_client.post("/accounts", data={"username": "eve", "role": "admin", "password": PASSWORD},
                          headers=SAME, follow_redirects=False)
    assert r.status_code == 400 and not store.has_accounts()
