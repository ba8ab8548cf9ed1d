"""Issue 11 (hardening found by outside probing): destructive routes need a server-side confirmation, ids are
never reused (also in databases made by 0.1.0), a deleted roster's runs stay readable, heavy work does not
block the server, a mapping that excludes every code gives clear answers, not 500s.

The origin checks (foreign port and scheme on every POST route) are in test_security.py; the command-line
errors in test_cli.py; the live-server schema fuzzing in test_fuzz_live.py.
"""

from __future__ import annotations

import contextlib
import sqlite3
import threading
import time
from pathlib import Path
from typing import Any

import httpx
import pytest
from conftest import DEMO_CSV

from app.store import HEAD_REVISION, Store

SCHEMA_V1 = Path(__file__).parent / "data" / "schema_v1.sql"


def route_names(app: Any) -> dict[str, tuple[str, set[str]]]:
    """name -> (path, methods) of every route in the app's route table (included routers too)."""
    found: dict[str, tuple[str, set[str]]] = {}

    def walk(routes: Any) -> None:
        for route in routes:
            if getattr(route, "methods", None) and getattr(route, "path", None):
                found[route.name] = (route.path, set(route.methods))
            elif hasattr(route, "original_router"):
                walk(route.original_router.routes)
            elif hasattr(route, "routes"):
                walk(route.routes)

    walk(app.routes)
    return found


def destructive_routes(app: Any) -> list[str]:
    """Paths of the routes that delete something, found in the route table by their name (``*_delete``)."""
    return [path for name, (path, methods) in route_names(app).items()
            if name.endswith("_delete") and "POST" in methods]


# -- 2. server-side confirmation -------------------------------------------------------------------------
def test_bare_delete_is_refused_on_every_destructive_route(client: Any, demo_store: Store) -> None:
    paths = destructive_routes(client.app)
    assert "/rosters/{roster_id}/delete" in paths
    profile = demo_store.save_profile("kept", headers=("Ref", "Why"), roles={"firm_id": "Ref"}, header_row=None,
                                      date_order="auto", fy_end=12)
    before = demo_store.counts()
    for path in paths:
        url = path.replace("{roster_id}", "1").replace("{profile_id}", str(profile.id))
        for data in (None, {"confirm": ""}, {"confirm": "no"}):
            r = client.post(url, data=data, follow_redirects=False)
            assert r.status_code == 400, (url, data, r.status_code)
            assert "confirm" in r.text.lower()
        api = client.post(url, headers={"accept": "application/json"}, follow_redirects=False)
        assert api.status_code == 400 and "confirm" in api.json()["error"]
    assert demo_store.counts() == before and [p.name for p in demo_store.list_profiles()] == ["kept"]
    r = client.post("/rosters/1/delete", data={"confirm": "yes"}, follow_redirects=False)
    assert r.status_code == 303
    assert demo_store.counts()["rosters"] == before["rosters"] - 1


def test_delete_form_says_what_will_go(client: Any, demo_store: Store) -> None:
    roster = demo_store.get_roster(1)
    page = client.get("/rosters/1").text
    assert f"{roster.accepted:,} departures" in page
    assert roster.rejected > 1 and f"{roster.rejected:,} rejected rows" in page
    runs = len(demo_store.list_runs(roster.id))
    if runs:  # the note names the runs that outlive the roster, and says nothing of runs there are none of
        assert f"{runs} stored run" in page and "readable" in page
    else:
        assert "stored run" not in page
    assert "Mappings stay" in page


# -- 3. ids never reused --------------------------------------------------------------------------------
def test_roster_ids_are_never_reused(empty_client: Any, store: Store) -> None:
    files = {"file": ("r.csv", DEMO_CSV.read_bytes())}
    first = empty_client.post("/api/rosters", files=files, data={"name": "one"}).json()["id"]
    assert empty_client.post(f"/rosters/{first}/delete", data={"confirm": "yes"}).status_code == 200
    second = empty_client.post("/api/rosters", files={"file": ("r.csv", DEMO_CSV.read_bytes())},
                               data={"name": "two"}).json()["id"]
    assert second > first
    assert empty_client.get(f"/api/rosters/{first}").status_code == 404


@pytest.mark.sqlite_only  # reads the SQLite file itself
def test_every_named_table_uses_autoincrement(store: Store) -> None:
    con = sqlite3.connect(store.url.removeprefix("sqlite:///"))
    try:
        sql = dict(con.execute("SELECT name, sql FROM sqlite_master WHERE type = 'table'").fetchall())
    finally:
        con.close()
    for table in ("rosters", "mappings", "mapping_versions", "runs"):
        assert "AUTOINCREMENT" in sql[table], table


def test_deleted_roster_keeps_its_runs_readable(client: Any, demo_store: Store) -> None:
    r = client.post("/rosters/1/resampling", data={"unit": "departure", "resamples": "100", "seed": "5"},
                    follow_redirects=False)
    assert r.status_code == 303
    run = demo_store.list_runs(1, "bootstrap")[0]
    assert run.status == "done"
    assert client.post("/rosters/1/delete", data={"confirm": "yes"}, follow_redirects=False).status_code == 303
    page = client.get(f"/runs/{run.id}")
    assert page.status_code == 200 and "roster deleted" in page.text.lower()
    body = client.get(f"/api/runs/{run.id}").json()
    assert body["roster"] is None and body["roster_deleted"] is True
    assert body["run"]["result"]["resamples"] == 100
    assert client.get(f"/runs/{run.id}/progress").status_code == 200
    extend = client.post(f"/runs/{run.id}/extend", data={"extra": "100"}, headers={"accept": "application/json"})
    assert extend.status_code == 400 and "deleted" in extend.json()["error"]
    # the next roster does not take the deleted roster's id, so the run never points at other data
    again = client.post("/api/rosters", files={"file": ("r.csv", DEMO_CSV.read_bytes())},
                        data={"name": "again", "allow_same_file": "yes"})
    assert again.status_code == 201, again.text
    ids = [r.id for r in demo_store.list_rosters()]
    assert ids and 1 not in ids


def old_database(path: Path) -> None:
    """A database as 0.1.0 made it (its schema, committed in tests/data/schema_v1.sql), with data."""
    con = sqlite3.connect(path)
    try:
        con.executescript(SCHEMA_V1.read_text())
        con.executescript("""
            INSERT INTO schema_version VALUES (1);
            INSERT INTO rosters VALUES (1, 'kept', 'a.csv', 'aa', '2026-01-01', 2, 2, 0, 0, '{}');
            INSERT INTO rosters VALUES (3, 'later', 'b.csv', 'bb', '2026-01-02', 1, 1, 0, 0, '{}');
            INSERT INTO departures (id, roster_id, line, firm_id, year, reason, raw)
                VALUES (1, 1, 2, 'F1', 2001, 'Retired', '{}'), (2, 1, 3, 'F2', 2002, 'Fired', '{}'),
                       (3, 3, 2, 'F3', 2003, 'Fired', '{}');
            INSERT INTO roster_settings VALUES (1, 'm', 2001, 2002), (3, NULL, NULL, NULL);
            INSERT INTO mappings VALUES (1, 'm', '2026-01-01');
            INSERT INTO mapping_versions VALUES (1, 1, 1, '2026-01-01', 'a', '');
            INSERT INTO mapping_entries VALUES (1, 'Retired', 'voluntary', ''), (1, 'Fired', 'forced', '');
            INSERT INTO runs (id, kind, roster_id, status, created_at, params, fingerprint, progress_done,
                              progress_total, cancel_requested)
                VALUES (4, 'bootstrap', 3, 'done', '2026-01-02', '{}', 'f', 0, 0, 0);
            INSERT INTO run_replicates VALUES (4, 0, 0, x'00', x'00');
        """)
        con.commit()
    finally:
        con.close()


def test_old_database_is_upgraded_in_place(tmp_path: Path) -> None:
    path = tmp_path / "old.db"
    old_database(path)
    store = Store(f"sqlite:///{path}")
    try:
        assert store.schema_version() == int(HEAD_REVISION) >= 6
        assert [r.id for r in store.list_rosters()] == [1, 3]
        assert store.counts() == {"rosters": 2, "departures": 3, "rejected_rows": 0, "mappings": 1,
                                  "mapping_versions": 1, "runs": 1}
        assert store.get_mapping("m").categories == {"Fired": "forced", "Retired": "voluntary"}
        assert store.settings(1).window == (2001, 2002)
        assert store.integrity_check() == "ok"
        # deleting the newest roster keeps its run, and its id is not handed out again
        store.delete_roster(3)
        assert store.get_run(4).roster_id == 3
        con = sqlite3.connect(path)
        try:
            assert con.execute("SELECT count(*) FROM run_replicates").fetchone()[0] == 1
            assert con.execute("SELECT count(*) FROM departures").fetchone()[0] == 2
            sql = dict(con.execute("SELECT name, sql FROM sqlite_master WHERE type = 'table'").fetchall())
            assert con.execute("PRAGMA foreign_key_check").fetchall() == []
        finally:
            con.close()
        for table in ("rosters", "mappings", "mapping_versions", "runs"):
            assert "AUTOINCREMENT" in sql[table], table
        import pandas as pd

        frame = pd.DataFrame({f: [None] for f in ("line", "firm_id", "firm_name", "sector", "year", "date",
                                                  "reason", "executive", "age", "tenure", "interim", "notes",
                                                  "raw")})
        frame.loc[0, ["line", "firm_id", "year", "reason", "raw"]] = [2, "F9", 2005, "Fired", "{}"]
        new = store.save_import(name="new", source_name="c.csv", sha256="cc", rows_total=1, duplicates=0,
                                columns={}, records=frame, rejected=[])
        assert new.id == 4 > 3
    finally:
        store.dispose()
    # opening again does not migrate twice
    again = Store(f"sqlite:///{path}")
    try:
        assert again.schema_version() == int(HEAD_REVISION)
        assert [r.id for r in again.list_rosters()] == [1, 4]
    finally:
        again.dispose()


# -- 4. health answers while an import runs -------------------------------------------------------------
def big_roster(rows: int) -> bytes:
    lines = ["Issuer Code,FY,Exit Reason"]
    lines += [f"F{i % 5000},{1990 + i % 30},{'Retired' if i % 3 else 'Dismissed'}" for i in range(rows)]
    return ("\n".join(lines) + "\n").encode()


def test_health_answers_while_an_import_runs(demo_db: Path, live_server: Any) -> None:
    """Functional, not timed-tight: while a large import is in progress, /api/health still answers.

    Before the fix the import ran in the event loop, so health waited for the whole import.
    """
    server = live_server(demo_db)
    data = big_roster(250_000)
    done = threading.Event()
    outcome: dict[str, Any] = {}

    def upload() -> None:
        try:
            r = httpx.post(f"{server.base_url}/api/rosters", files={"file": ("big.csv", data)},
                           data={"name": "big"}, timeout=300)
            outcome["status"] = r.status_code
        finally:
            done.set()

    thread = threading.Thread(target=upload)
    thread.start()
    answered_during = 0
    try:
        while not done.is_set():
            r = httpx.get(f"{server.base_url}/api/health", timeout=60)
            assert r.status_code == 200
            if not done.is_set():
                answered_during += 1
            time.sleep(0.05)
    finally:
        thread.join(300)
    assert outcome.get("status") == 201
    assert answered_during >= 2, "health did not answer while the import ran"


# -- 5. a valid mapping that excludes every code ---------------------------------------------------------
@pytest.fixture
def all_excluded(client: Any, demo_store: Store) -> Any:
    codes = demo_store.reason_counts(1)["code"].tolist()
    demo_store.save_mapping_version("nothing counts", {c: "excluded" for c in codes})
    demo_store.update_settings(1, mapping_name="nothing counts", clear_window=True)
    return client


@pytest.mark.parametrize("path", [
    "/rosters/1", "/rosters/1/reasons", "/rosters/1/coverage", "/rosters/1/trend", "/rosters/1/resampling",
    "/rosters/1/sectors", "/rosters/1/robustness", "/rosters/1/briefing",
    "/api/rosters/1", "/api/rosters/1/reasons", "/api/rosters/1/coverage", "/api/rosters/1/trend",
    "/api/rosters/1/runs", "/api/rosters/1/sectors", "/api/rosters/1/robustness", "/api/rosters/1/briefing",
    "/rosters/1/briefing/deck.pptx", "/rosters/1/charts/trend.svg",
])
def test_mapping_that_excludes_every_code_answers_clearly(all_excluded: Any, path: str) -> None:
    r = all_excluded.get(path)
    # the trend API answers 422 with the reason when no trend can be fitted (declared in its schema)
    allowed = (200, 400, 422) if path == "/api/rosters/1/trend" else (200, 400)
    assert r.status_code in allowed, (path, r.status_code, r.text[:300])
    if r.status_code != 200 or path in ("/rosters/1/trend", "/rosters/1/coverage", "/api/rosters/1/trend"):
        text = r.text.lower()
        assert "forced or voluntary" in text or "no departure" in text, (path, r.text[:300])


def test_mapping_import_that_excludes_every_code_is_answered(all_excluded: Any) -> None:
    r = all_excluded.post("/rosters/1/mapping/import", data={"mapping_name": "nothing 2"},
                          files={"file": ("m.csv", b"code,category\nRetired,excluded\n")})
    assert r.status_code < 500, r.text[:300]


def test_failed_run_is_marked_with_its_message(all_excluded: Any, demo_store: Store) -> None:
    r = all_excluded.post("/rosters/1/resampling", data={"unit": "firm", "resamples": "100", "seed": "1"},
                          follow_redirects=False)
    assert r.status_code in (303, 400), r.text[:300]
    for run in demo_store.list_runs(1, "bootstrap"):
        assert run.status in ("done", "failed")
        if run.status == "failed":
            assert run.error and "Traceback" not in run.error


def test_job_failure_is_not_printed_as_a_traceback(demo_store: Store, capsys: pytest.CaptureFixture[str]) -> None:
    from app.analysis.inputs import load_input
    from app.analysis.jobs import JobRunner, bootstrap_params, create_bootstrap_run

    inp = load_input(demo_store, 1)
    run_id = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="firm", resamples=100, seed=1))
    demo_store.delete_roster(1)  # the run's data is gone before it starts
    JobRunner(demo_store).submit(run_id)
    run = demo_store.get_run(run_id)
    assert run.status == "failed" and run.error
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err + captured.out


# -- 4. workbook parsing bounded by rows and time, oversized chunked uploads refused early ---------------
def blank_rows_xlsx(blank: int, data_rows: int) -> bytes:
    """A real workbook whose sheet has ``blank`` empty rows before a header and ``data_rows`` rows."""
    import io
    import zipfile

    from openpyxl import Workbook

    wb = Workbook()
    wb.active.append(["x"])
    real = io.BytesIO()
    wb.save(real)
    src = zipfile.ZipFile(io.BytesIO(real.getvalue()))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as zf:
        for info in src.infolist():
            if not info.filename.endswith("sheet1.xml"):
                zf.writestr(info, src.read(info.filename))
                continue
            parts = [b'<?xml version="1.0"?><worksheet xmlns="http://schemas.openxmlformats.org/spreadsheetml/'
                     b'2006/main"><sheetData>']
            parts += [b'<row r="%d"/>' % (i + 1) for i in range(blank)]
            head = blank + 1
            parts.append(b'<row r="%d"><c t="inlineStr"><is><t>Issuer Code</t></is></c><c t="inlineStr"><is><t>FY'
                         b'</t></is></c><c t="inlineStr"><is><t>Exit Reason</t></is></c></row>' % head)
            parts += [b'<row r="%d"><c t="inlineStr"><is><t>A1</t></is></c><c><v>2001</v></c><c t="inlineStr">'
                      b'<is><t>Retired</t></is></c></row>' % (head + 1 + i) for i in range(data_rows)]
            parts.append(b"</sheetData></worksheet>")
            zf.writestr(info.filename, b"".join(parts))
    return out.getvalue()


def test_workbook_parsing_is_bounded_by_rows_blank_ones_included() -> None:
    from app.intake.readers import ReadLimits, RosterFileError, read_xlsx

    data = blank_rows_xlsx(3000, 10)
    assert len(read_xlsx(data).rows) == 10  # within the default bounds it reads
    with pytest.raises(RosterFileError, match="more than 2,000 rows"):
        read_xlsx(data, limits=ReadLimits(max_sheet_rows=2000))


def test_workbook_parsing_is_bounded_by_time() -> None:
    from app.intake.readers import ReadLimits, RosterFileError, read_xlsx

    data = blank_rows_xlsx(0, 5000)
    with pytest.raises(RosterFileError, match="took longer than"):
        read_xlsx(data, limits=ReadLimits(max_seconds=0.0))


def test_oversized_chunked_upload_is_refused_before_it_ends(tmp_path: Path) -> None:
    """A live server with a 1 MB limit answers 413 while a 64 MB chunked upload is still being sent."""
    import os
    import socket
    import subprocess
    import sys

    from conftest import free_port

    port = free_port()
    env = {**os.environ, "HELMSHIFT_UPLOAD_LIMIT": str(1024 * 1024)}
    proc = subprocess.Popen([sys.executable, "-m", "app.cli", "serve", "--db", str(tmp_path / "u.db"),
                             "--port", str(port)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    try:
        deadline = time.monotonic() + 40
        while time.monotonic() < deadline:
            try:
                if httpx.get(f"http://127.0.0.1:{port}/api/health", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                time.sleep(0.1)
        boundary = "b0undary"
        head = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; filename=\"big.csv\"\r\n"
                "Content-Type: text/csv\r\n\r\nIssuer Code,FY,Exit Reason\r\n").encode()
        sent, total, answer = 0, 64 * 1024 * 1024, b""
        with socket.create_connection(("127.0.0.1", port), timeout=30) as sock:
            sock.sendall(f"POST /api/rosters HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\nTransfer-Encoding: chunked\r\n"
                         f"Content-Type: multipart/form-data; boundary={boundary}\r\n\r\n".encode())
            piece = head + b"A1,2001,Retired\r\n" * 4000
            sock.settimeout(0.0)
            while sent < total:
                with contextlib.suppress(BlockingIOError):
                    answer += sock.recv(4096)
                if answer:
                    break
                chunk = b"%x\r\n%s\r\n" % (len(piece), piece)
                try:
                    sock.settimeout(5)
                    sock.sendall(chunk)
                    sock.settimeout(0.0)
                except OSError:  # the server closed the connection after answering
                    break
                sent += len(piece)
                piece = b"A1,2001,Retired\r\n" * 4000
            sock.settimeout(10)
            while b"\r\n\r\n" not in answer:
                more = sock.recv(4096)
                if not more:
                    break
                answer += more
        assert answer.startswith(b"HTTP/1.1 413"), answer[:200]
        assert sent < total // 4, f"the server let {sent:,} bytes through before refusing"
    finally:
        proc.terminate()
        proc.wait(20)


# -- 5. what the live-server fuzzer found (tests/test_fuzz_live.py), pinned ------------------------------
@pytest.mark.parametrize(("method", "path", "allowed"), [
    ("OPTIONS", "/api/rosters", {"GET", "POST"}),
    ("OPTIONS", "/rosters/1/reasons", {"GET", "POST"}),
    ("OPTIONS", "/rosters/1/resampling", {"GET", "POST"}),
    ("GET", "/rosters/upload", {"POST"}),
    ("GET", "/rosters/confirm", {"POST"}),
])
def test_wrong_method_is_a_405_naming_every_allowed_method(client: Any, method: str, path: str,
                                                           allowed: set[str]) -> None:
    r = client.request(method, path)
    assert r.status_code == 405, (method, path, r.status_code)
    assert {m.strip() for m in r.headers["allow"].split(",")} >= allowed


@pytest.mark.parametrize(("url", "data", "status"), [
    ("/rosters/1/reasons", {"note": "n" * 501}, 400),
    ("/rosters/1/reasons", {"author": "a" * 81}, 400),
    ("/rosters/1/reasons", {"cat-0": "AAA"}, 400),
    ("/rosters/1/mapping/select", {"mapping_name": "no such mapping"}, 404),
    ("/rosters/1/window", {"reset": "1", "window_from": "-3"}, 400),
])
def test_schema_violations_and_unknown_names_are_refused(client: Any, demo_store: Store, url: str,
                                                         data: dict[str, str], status: int) -> None:
    before = (demo_store.counts(), demo_store.settings(1))
    r = client.post(url, data=data, follow_redirects=False)
    assert r.status_code == status, (url, data, r.status_code)
    assert (demo_store.counts(), demo_store.settings(1)) == before


# -- 7. smaller ones ---------------------------------------------------------------------------------------
def test_failed_mapping_import_is_shown_as_an_error(client: Any) -> None:
    r = client.post("/rosters/1/mapping/import", data={"mapping_name": "broken"},
                    files={"file": ("m.csv", b"code,category\nRetired,sometimes\n")})
    assert r.status_code == 400
    assert 'class="notice error" role="alert"' in r.text and "sometimes" in r.text
    assert 'class="notice ok"' not in r.text
    ok = client.post("/rosters/1/mapping/import", data={"mapping_name": "fine"},
                     files={"file": ("m.csv", b"code,category\nRetired,voluntary\n")})
    assert ok.status_code == 200 and 'class="notice ok"' in ok.text and 'class="notice error"' not in ok.text


@pytest.mark.parametrize("cell", ["\u200b=1+1", "\ufeff=HYPERLINK(\"http://x.invalid\")", "\u200b\u200b@SUM(1)",
                                  "\ufeff\u200b+cmd|' /C calc'!A0", "\u00a0=1+1", "\u2060-2+3"])
def test_invisible_prefixes_do_not_hide_a_formula(cell: str) -> None:
    # OWASP "CSV injection": spreadsheets skip some invisible characters before looking for a formula, so a
    # zero-width space or byte-order mark in front of "=" must not slip past the check
    from app.intake.spreadsheet_safety import neutralise_formula

    assert neutralise_formula(cell).startswith("'")


def test_plain_text_and_numbers_after_invisible_characters_stay_as_they_are() -> None:
    from app.intake.spreadsheet_safety import neutralise_formula

    assert neutralise_formula("\u200bRetired") == "\u200bRetired"
    assert neutralise_formula("-3") == "-3"
