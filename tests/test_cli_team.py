"""`helmshift user ...` and `helmshift audit`: accounts and the audit trail from the command line."""

from __future__ import annotations

import getpass
import json
from typing import Any

import pytest

from app.cli import main
from app.store import Store


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, Any, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, (json.loads(out) if "--json" in argv and code == 0 else out), err


def test_accounts_from_the_command_line(db_url: str, capsys: pytest.CaptureFixture[str],
                                        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("HELMSHIFT_PASSWORD", "a long enough password")
    code, out, _ = run(capsys, "user", "add", "dana", "--role", "admin", "--db", db_url, "--json")
    assert code == 0 and out["name"] == "dana" and out["role"] == "admin"
    run(capsys, "user", "add", "eli", "--role", "viewer", "--db", db_url, "--json")
    code, out, _ = run(capsys, "user", "list", "--db", db_url, "--json")
    assert [(u["name"], u["role"]) for u in out["users"]] == [("dana", "admin"), ("eli", "viewer")]
    code, out, _ = run(capsys, "user", "token", "eli", "--db", db_url, "--json")
    token = out["token"]
    store = Store(db_url)
    try:
        assert store.account_for_token(token).name == "eli"  # type: ignore[union-attr]
        assert store.check_password("eli", "a long enough password") is not None
        monkeypatch.setenv("HELMSHIFT_PASSWORD", "a different password")
        assert run(capsys, "user", "passwd", "eli", "--db", db_url)[0] == 0
        assert store.check_password("eli", "a different password") is not None
        assert run(capsys, "user", "remove", "eli", "--db", db_url)[0] == 0
        assert store.account_for_token(token) is None
    finally:
        store.dispose()
    code, out, _ = run(capsys, "audit", "--db", db_url, "--json")
    actions = [(e["action"], e["target"]) for e in out["events"]]
    assert ("account_add", "account:dana") in actions and ("account_remove", "account:eli") in actions
    assert {e["user"] for e in out["events"] if e["action"] != "login_failed"} == {
        f"{getpass.getuser()} (command line)"}
    code, out, _ = run(capsys, "audit", "--db", db_url, "--action", "token_create", "--json")
    assert [e["target"] for e in out["events"]] == ["account:eli"]


def test_account_errors_are_one_sentence(db_url: str, capsys: pytest.CaptureFixture[str],
                                         monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("HELMSHIFT_PASSWORD", "short")
    code, _, err = run(capsys, "user", "add", "fay", "--role", "analyst", "--db", db_url)
    assert code == 1 and err.strip() == "helmshift: A password needs at least 10 characters."
    monkeypatch.setenv("HELMSHIFT_PASSWORD", "long enough, surely")
    run(capsys, "user", "add", "fay", "--role", "analyst", "--db", db_url)
    code, _, err = run(capsys, "user", "add", "fay", "--role", "viewer", "--db", db_url)
    assert code == 1 and "already exists" in err and err.count("\n") == 1
    code, _, err = run(capsys, "user", "remove", "nobody", "--db", db_url)
    assert code == 1 and "no account 'nobody'" in err
    monkeypatch.delenv("HELMSHIFT_PASSWORD")
    code, _, err = run(capsys, "user", "add", "gus", "--role", "viewer", "--db", db_url)
    assert code == 2 and "HELMSHIFT_PASSWORD" in err
