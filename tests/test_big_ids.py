"""Ids beyond what a store can hold are unknown (404), on every backend: PostgreSQL's INTEGER id columns are
32-bit, and its driver refuses a larger number with a DataError (a 500) if one reaches it. The routes are
read from the app's route table, so a new route with an id in its path is checked too."""

from __future__ import annotations

import re
from typing import Any

import pytest

from app.store import MAX_ID
from app.web.app import create_app

#: just past a 32-bit signed integer (PostgreSQL's INTEGER, the limit the store guards: MAX_ID), and far past it
BIG = (2**31, 2**40)


def id_routes() -> list[str]:
    """GET paths with a roster or run id, from the route table (tests/test_hardening.py walks it the same way)."""
    from test_hardening import route_names

    from app.config import Settings

    app = create_app(Settings(db_url="sqlite://"), start_jobs=False)
    paths = sorted({path for path, methods in route_names(app).values()
                    if "GET" in methods and re.search(r"\{(roster|run)_id\}", path)})
    assert len(paths) >= 30, paths  # the pages, their JSON twins and downloads (DEVELOPERS.md lists them)
    return paths


def test_the_guard_is_the_32_bit_limit() -> None:
    assert MAX_ID == 2**31 - 1


@pytest.mark.parametrize("path", id_routes())
def test_unknown_big_ids_are_404(client: Any, path: str) -> None:
    for big in BIG:
        url = re.sub(r"\{(roster|run)_id\}", str(big), path).replace("{chart}", "trend").replace("{fmt}", "svg")
        r = client.get(url, headers={"accept": "application/json"})
        assert r.status_code == 404, (url, r.status_code, r.text[:200])


def test_big_version_numbers_are_unknown_too(client: Any) -> None:
    for big in BIG:
        assert client.get(f"/mappings/demo standard.csv?version={big}").status_code == 404
        r = client.get(f"/rosters/1/departures?mapping=demo standard:{big}")
        assert r.status_code in (400, 404), r.text[:200]
        assert client.get(f"/rosters/1/reasons?a=1&b={big}").status_code == 404


def test_a_version_that_is_not_a_version_number_is_refused(client: Any) -> None:
    # live schema fuzzing (session 5) found version=-1 answered with the latest version: the schema says 1 or more
    for bad in ("-1", "0", "abc", "²", "1.5", "-134661706707"):
        for path in ("/mappings/demo standard.csv", "/mapping-rules/demo standard.csv"):
            r = client.get(path, params={"version": bad}, headers={"accept": "application/json"})
            assert r.status_code == 400, (path, bad, r.status_code)
            assert "version number (1 or more)" in r.json()["error"]
    assert client.get("/mappings/demo standard.csv", params={"version": "1"}).status_code == 200


def id_post_routes() -> list[str]:
    """POST paths with any id in them (roster, run, profile, ...), from the route table."""
    from test_hardening import route_names

    from app.config import Settings

    app = create_app(Settings(db_url="sqlite://"), start_jobs=False)
    paths = sorted({path for path, methods in route_names(app).values()
                    if "POST" in methods and re.search(r"\{\w+_id\}", path)})
    assert any("{profile_id}" in p for p in paths), paths
    return paths


@pytest.mark.parametrize("path", id_post_routes())
def test_unknown_big_ids_are_404_on_posts_too(client: Any, path: str) -> None:
    # probe (session 7): POST /profiles/2147483648/delete reached the store and failed there (a 500:
    # "Python int too large to convert to SQLite INTEGER", past SQLite's 64-bit INTEGER); the GET test above
    # walks roster and run ids only
    for big in (*BIG, 2**63, 10**20):
        url = re.sub(r"\{\w+_id\}", str(big), path)
        r = client.post(url, data={"confirm": "yes"}, headers={"accept": "application/json"})
        assert r.status_code == 404, (url, r.status_code, r.text[:200])
