"""The intake-profiles page (issue 14): /profiles lists each saved profile with what it applies, /api/profiles
is its JSON twin, POST /profiles/{id}/delete needs confirm=yes, and ``helmshift profile list|delete``. Profiles
are invented here; the expected values are the ones each test saved (hand-checked, nothing computed)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from app.cli import main
from app.store import Store
from app.web.auth import required_role

HEADERS = ("Ref", "Why", "Exit", "Notes <b>")


def save(store: Store, name: str, **kw: Any) -> Any:
    options = {"headers": HEADERS, "roles": {"firm_id": "Ref", "reason": "Why", "date": "Exit"},
               "header_row": 4, "date_order": "dmy", "fy_end": 3} | kw
    return store.save_profile(name, **options)


def test_the_page_lists_each_profile_escaped(empty_client: Any, store: Store) -> None:
    save(store, "desk <script>alert(1)</script>")
    save(store, "desk B", header_row=None, date_order="auto", fy_end=12)
    html = empty_client.get("/profiles").text
    assert "desk &lt;script&gt;alert(1)&lt;/script&gt;" in html and "<script>alert(1)" not in html
    assert "Notes &lt;b&gt;" in html  # a header name is text, never markup
    # what each profile applies, in words: roles, header row, date reading, fiscal-year end
    assert "firm id: Ref" in html and "reason code: Why" in html and "departure date: Exit" in html
    assert "day/month/year" in html and "March" in html and "found in each file" in html
    assert html.count('name="confirm"') == 2
    # the Rosters page links here
    assert '/profiles"' in empty_client.get("/rosters").text


def test_the_json_twin(empty_client: Any, store: Store) -> None:
    saved = save(store, "desk A")
    body = empty_client.get("/api/profiles").json()
    assert set(body) == {"profiles", "message"}
    (p,) = body["profiles"]
    assert p["id"] == saved.id and p["name"] == "desk A"
    assert p["headers"] == sorted(HEADERS)  # stored sorted: the key a later file is recognised by
    assert p["roles"] == {"date": "Exit", "firm_id": "Ref", "reason": "Why"}
    assert (p["header_row"], p["date_order"], p["fy_end"]) == (4, "dmy", 3)
    assert p["created_at"] and p["updated_at"]
    assert empty_client.get("/api/profiles").json()["profiles"] == [p]
    schema = empty_client.get("/openapi.json").json()
    assert "/api/profiles" in schema["paths"] and "/profiles/{profile_id}/delete" in schema["paths"]


def test_delete_needs_the_confirmation(empty_client: Any, store: Store) -> None:
    saved = save(store, "desk A")
    refused = empty_client.post(f"/profiles/{saved.id}/delete", data={}, follow_redirects=False)
    assert refused.status_code == 400 and "tick the confirmation box" in refused.text
    assert [p.name for p in store.list_profiles()] == ["desk A"]
    done = empty_client.post(f"/profiles/{saved.id}/delete", data={"confirm": "yes"}, follow_redirects=False)
    assert done.status_code == 303 and done.headers["location"].endswith("/profiles")
    assert store.list_profiles() == []
    assert [e.action for e in store.audit_events(action="intake_profile_delete")] == ["intake_profile_delete"]
    # the id is not handed out again (AUTOINCREMENT): a new profile gets a new id, the old URL stays a 404
    again = save(store, "desk A")
    assert again.id != saved.id
    assert empty_client.post(f"/profiles/{saved.id}/delete", data={"confirm": "yes"}).status_code == 404


def test_unknown_profile_is_404(empty_client: Any) -> None:
    r = empty_client.post("/profiles/999/delete", data={"confirm": "yes"}, headers={"accept": "application/json"})
    assert r.status_code == 404 and "No intake profile number 999" in r.json()["error"]


def test_deleting_is_a_team_mode_admin_write_like_every_delete() -> None:
    # app/web/auth.py's ROLE_TABLE: deleting a profile (the desk's shared recipe) is an admin's
    assert required_role("POST", "/profiles/3/delete") == "admin"
    assert required_role("GET", "/profiles") == "viewer" and required_role("GET", "/api/profiles") == "viewer"


def test_cli_lists_and_deletes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db = tmp_path / "p.db"
    store = Store(f"sqlite:///{db}")
    save(store, "desk A")
    store.dispose()
    assert main(["profile", "list", "--db", str(db), "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)["profiles"]
    assert [p["name"] for p in listed] == ["desk A"] and listed[0]["fy_end"] == 3
    assert main(["profile", "delete", "desk B", "--db", str(db)]) != 0
    err = capsys.readouterr().err.strip()
    assert err == "helmshift: No intake profile is named 'desk B'; saved profiles: desk A."
    assert main(["profile", "delete", "desk A", "--db", str(db)]) == 0
    assert "Deleted intake profile 'desk A'" in capsys.readouterr().out
    assert main(["profile", "list", "--db", str(db)]) == 0
    assert "No intake profile is saved" in capsys.readouterr().out
