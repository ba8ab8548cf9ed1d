"""A NUL character (U+0000) typed or pasted into an address, a query parameter or a form field.

PostgreSQL text cannot hold NUL ("PostgreSQL text fields cannot contain NUL (0x00) bytes", psycopg's DataError),
so on the team desk's PostgreSQL store every such value that reached a query was a 500: a probe of a served
instance (session 7) found 18 routes, among them a mapping name on Departures, a note on the rules, a mapping
chosen on Reason codes and a file name. No field of the dashboard has a use for NUL, so the request is refused at
the door with what and where (a 400), on SQLite as on PostgreSQL, and nothing is stored. NUL bytes inside an
uploaded file are the intake's business (a row with one is rejected and listed: tests/test_ingest_bad_inputs.py).
"""

from __future__ import annotations

import html
from typing import Any

import pytest

from app.store import Store

NUL = "x\x00y"
ROSTER_CSV = b"Firm ID,Reason,Fiscal Year\nF1,Retired,2019\n"

#: (method, path, request keywords, the place the refusal names)
REQUESTS: list[tuple[str, str, dict[str, Any], str]] = [
    ("GET", "/mappings/a%00b.csv", {}, "the address"),
    ("GET", "/mapping-rules/a%00b.csv", {}, "the address"),
    ("GET", "/api/rosters/1/departures", {"params": {"mapping": NUL}}, "query parameter 'mapping'"),
    ("GET", "/api/rosters/1/departures", {"params": {"firm": NUL}}, "query parameter 'firm'"),
    ("GET", "/api/rosters/1/departures", {"params": {"reason": NUL}}, "query parameter 'reason'"),
    ("GET", "/rosters/1/departures.csv", {"params": {"sector": NUL}}, "query parameter 'sector'"),
    ("GET", "/api/rosters/1/robustness", {"params": {"mapping": NUL}}, "query parameter 'mapping'"),
    ("GET", "/api/rosters/1/briefing", {"params": {"mapping": NUL}}, "query parameter 'mapping'"),
    ("POST", "/rosters/1/mapping/select", {"data": {"mapping_name": NUL}}, "form field 'mapping_name'"),
    ("POST", "/rosters/1/rules", {"data": {"note": NUL}}, "form field 'note'"),
    ("POST", "/api/rosters/1/overrides", {"data": {"departure_id": "1", "category": "forced", "note": NUL}},
     "form field 'note'"),
    ("POST", "/rosters/1/overrides/delete",
     {"data": {"confirm": "yes", "position": "1", "mapping_name": NUL}}, "form field 'mapping_name'"),
    ("POST", "/rosters/1/resampling", {"data": {"sector": NUL, "resamples": "200"}}, "form field 'sector'"),
    # a browser (and httpx) sends a NUL in a file name as %00; a hand-made request can send the byte itself
    ("POST", "/api/rosters", {"content": b'--zz\r\nContent-Disposition: form-data; name="file"; filename="r\x00.csv"'
                                         b"\r\n\r\n" + ROSTER_CSV + b"\r\n--zz--\r\n",
                              "headers": {"content-type": "multipart/form-data; boundary=zz"}},
     "file name of form field 'file'"),
    ("POST", "/rosters/1/mapping/import",
     {"data": {"mapping_name": NUL}, "files": {"file": ("m.csv", b"code,category\nRetired,voluntary\n")}},
     "form field 'mapping_name'"),
]


@pytest.mark.parametrize(("method", "path", "kwargs", "where"), REQUESTS)
def test_a_nul_character_is_refused_with_where_it_was(client: Any, demo_store: Store, method: str, path: str,
                                                      kwargs: dict[str, Any], where: str) -> None:
    before = (demo_store.counts(), demo_store.settings(1), demo_store.list_mappings())
    headers = {"accept": "application/json", **kwargs.get("headers", {})}
    rest = {k: v for k, v in kwargs.items() if k != "headers"}
    r = client.request(method, path, headers=headers, follow_redirects=False, **rest)
    assert r.status_code == 400, (path, r.status_code, r.text[:300])
    said = html.unescape(r.text)
    assert "NUL character (U+0000)" in said and where in said, said[:300]
    assert (demo_store.counts(), demo_store.settings(1), demo_store.list_mappings()) == before


def test_the_same_requests_without_the_nul_are_answered(client: Any) -> None:
    # the refusal is for the NUL alone: a filter or a form with ordinary text is served as before
    r = client.get("/api/rosters/1/departures", params={"firm": "xy", "q": "retired"})
    assert r.status_code == 200 and r.json()["total"] == 0
    assert client.get("/api/rosters/1/departures", params={"q": "Retired"}).json()["total"] > 0
    assert client.post("/rosters/1/rules", data={"note": "no rules"}, follow_redirects=False).status_code == 303


# -- NUL bytes inside the small CSV files of the Reason codes and Universe pages ---------------------------
# (a roster file's rows with NUL are rejected and listed by the intake; these three readers stored them, and
# PostgreSQL refused the insert: a 500)
@pytest.mark.parametrize(("path", "name", "body", "line"), [
    ("/rosters/1/mapping/import", "m.csv", b"code,category,label\nRet\x00ired,voluntary,x\n", 2),
    ("/rosters/1/mapping/import", "m.csv", b"code,category,label\nRetired,voluntary,x\nDismissed,forced,a\x00b\n", 3),
    ("/rosters/1/rules/import", "r.csv", b"code,field,comparison,value,category\nRet\x00ired,age,below,60,forced\n", 2),
])
def test_a_nul_in_a_mapping_or_rules_file_is_refused_with_its_line(client: Any, demo_store: Store, path: str,
                                                                     name: str, body: bytes, line: int) -> None:
    before = (demo_store.counts(), demo_store.list_mappings())
    r = client.post(path, data={"mapping_name": "with nul"}, files={"file": (name, body)}, follow_redirects=False)
    assert r.status_code == 400, (r.status_code, r.text[:300])
    assert f"NUL character (U+0000) on line {line}" in html.unescape(r.text)
    assert (demo_store.counts(), demo_store.list_mappings()) == before


def test_a_universe_row_with_a_nul_is_rejected_and_the_rest_stored(client: Any, demo_store: Store) -> None:
    body = b"firm_id,year\nHX\x001250,2000\nHX1250,2001\n"
    r = client.post("/rosters/1/universe", files={"file": ("u.csv", body)}, follow_redirects=False)
    assert r.status_code == 303, (r.status_code, r.text[:300])
    [universe] = demo_store.list_universes(1)
    rejected = client.get("/rosters/1/universe/rejected.csv").text
    assert "line 2" in rejected.lower() or rejected.splitlines()[1].startswith("2,"), rejected[:300]
    assert "NUL byte in column 'firm_id'" in rejected
    assert universe.rows_total == 2
