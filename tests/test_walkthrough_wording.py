"""What a new user read on the way from an awkward file to the Departures list (the polish walk-through):
the intake notes agree in number, and a roster without a mapping yet says so in words instead of printing
"Window 0–0 (none)", "mapping no mapping" or "its 0 stored run(s)".

The file is invented here; what each line is, is written beside it.
"""

from __future__ import annotations

from typing import Any

AWKWARD = (
    b"Quarterly leadership changes - desk export,,,\n"      # line 1: a title
    b"Issuer Ref,Exit,How left,Chief executive\n"            # line 2: the header
    b"ZX1,2014-03-31,Retired,Ada Quill\n"
    b"ZX2,15/07/2015,dismissed,Ben Tarrow\n"
    b"ZX3,Jun-2016,RETIRED ,Cy Ormond\n"
    b",,,\n"
    b"Source: desk records,,,\n"                              # line 7: one footer line
)


def test_a_new_rosters_pages_say_what_is_missing_in_words(empty_client: Any) -> None:
    r = empty_client.post("/api/rosters", files={"file": ("awkward.csv", AWKWARD)})
    assert r.status_code == 201, r.text
    roster_id = r.json()["id"]
    preview = empty_client.post("/rosters/upload", files={"file": ("awkward2.csv", AWKWARD + b"ZX4,,,\n")})
    notes = preview.text
    assert "line 1 above it (a title block or notes) was left out" in notes
    overview = empty_client.get(f"/rosters/{roster_id}").text
    assert "0 stored run" not in overview and "0 rejected row" not in overview
    assert "Deleting removes this roster&#39;s 3 departures and its chosen window" in overview or \
        "Deleting removes this roster's 3 departures and its chosen window" in overview
    trend = empty_client.get(f"/rosters/{roster_id}/trend").text
    assert "Window 0–0" not in trend and "No window yet" in trend
    records = empty_client.get(f"/rosters/{roster_id}/departures").text
    assert "mapping no mapping" not in records and "no mapping is chosen yet, so every code is unmapped" in records


def test_one_footer_line_is_one_line(empty_client: Any) -> None:
    from app.intake.ingest import review_roster

    review = review_roster(AWKWARD, "awkward.csv")
    notes = " ".join(review.messages)
    assert "Line 7 after the data looks like a footer (source, notes or totals) and was left out, not rejected." \
        in notes, notes


def test_a_browser_change_on_a_served_store_is_the_local_analysts(tmp_path: Any, live_server: Any) -> None:
    """`helmshift serve` runs its commands as "USER (command line)"; the pages' changes must not inherit that
    (the walk-through's first mapping read "saved by root (command line)" after a save in the browser)."""
    import httpx

    from app.store import Store

    db = tmp_path / "served.db"
    Store(f"sqlite:///{db}").dispose()
    server = live_server(db)
    r = httpx.post(f"{server.base_url}/api/rosters", files={"file": ("awkward.csv", AWKWARD)}, timeout=120)
    assert r.status_code == 201, r.text
    roster_id = r.json()["id"]
    window = httpx.post(f"{server.base_url}/rosters/{roster_id}/window", data={"window_from": "2014",
                        "window_to": "2016"}, headers={"origin": server.base_url}, timeout=60)
    assert window.status_code in (200, 303), window.text
    store = Store(f"sqlite:///{db}")
    try:
        users = {(e.action, e.user) for e in store.audit_events()}
    finally:
        store.dispose()
    assert ("import", "local analyst") in users and ("roster_settings", "local analyst") in users, users
