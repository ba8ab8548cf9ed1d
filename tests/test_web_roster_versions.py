"""Roster refreshes in the browser: "new version of" on the confirm page, the versions page with its diff,
the run page and the Trend page after a refresh.

Expected counts follow from the identity rule of issue 14 applied by hand to the files of
tests/test_roster_versions.py (V1, V2: 1 added, 1 removed, 2 changed, 2 unchanged).
"""

from __future__ import annotations

import html
import io
from typing import Any

import pandas as pd
from conftest import DEMO_CSV, make_client
from test_roster_versions import V1, V2

from app.analysis.inputs import load_input
from app.analysis.jobs import bootstrap_params, create_bootstrap_run, execute_bootstrap
from app.intake.ingest import import_roster
from app.store import Store


def upload(client: Any, data: bytes, filename: str) -> Any:
    return client.post("/rosters/upload", files={"file": (filename, data, "text/csv")})


def test_confirm_page_offers_a_new_version_and_shows_the_diff(store: Store) -> None:
    client = make_client(store)
    rid = import_roster(store, V1.encode(), "desk.csv", name="desk").roster.id
    page = upload(client, V2.encode(), "desk-week2.csv").context["page"]
    assert page.targets == ((rid, "desk"),)
    assert page.same_columns_as == (rid, "desk")  # the hint: same headers as the stored roster
    assert "new version of “desk”" in upload(client, V2.encode(), "w2.csv").text
    done = client.post("/rosters/confirm", data={"token": page.token, "name": page.name, "into": str(rid)},
                       follow_redirects=False)
    assert done.status_code == 303
    assert done.headers["location"].endswith(f"/rosters/{rid}/versions?from=1&to=2")
    shown = client.get(done.headers["location"])
    assert shown.status_code == 200
    diff = shown.context["page"].diff
    assert (diff.added, diff.removed, diff.changed, diff.unchanged) == (1, 1, 2, 2)
    assert "<del>2004-07-01</del> → <ins>2004-08-01</ins>" in shown.text
    assert [r.name for r in store.list_rosters()] == ["desk"]  # no second roster
    api = client.get(f"/api/rosters/{rid}/versions", params={"from": 1, "to": 2}).json()
    assert (api["diff"]["added"], api["diff"]["removed"], api["diff"]["changed"]) == (1, 1, 2)
    assert [v["version"] for v in api["versions"]] == [1, 2]
    assert "version 2" in client.get(f"/rosters/{rid}").text


def test_versions_page_of_a_single_version_and_bad_versions(store: Store) -> None:
    client = make_client(store)
    rid = import_roster(store, V1.encode(), "desk.csv", name="desk").roster.id
    page = client.get(f"/rosters/{rid}/versions")
    assert page.status_code == 200 and page.context["page"].diff is None
    assert "one version so far" in page.text
    bad = client.get(f"/rosters/{rid}/versions", params={"from": 1, "to": 4})
    assert bad.status_code == 400 and "no version 4" in bad.text
    assert client.get("/rosters/999/versions").status_code == 404


def test_a_bad_into_value_is_a_clear_error_and_nothing_is_stored(store: Store) -> None:
    client = make_client(store)
    import_roster(store, V1.encode(), "desk.csv", name="desk")
    page = upload(client, V2.encode(), "w2.csv").context["page"]
    for value, message in (("x1", "into must be the id of a stored roster"), ("77", "No roster called")):
        done = client.post("/rosters/confirm", data={"token": page.token, "name": "n", "into": value})
        assert done.status_code == 400 and message in done.text
    assert [v.version for v in store.roster_versions(1)] == [1]


def refreshed_demo() -> bytes:
    frame = pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False).iloc[300:].reset_index(drop=True)
    frame.loc[frame.index[:100], "Exit Reason"] = "Dismissed by board"
    out = io.StringIO()
    frame.to_csv(out, index=False)
    return out.getvalue().encode()


def test_after_a_refresh_runs_say_so_and_trend_shows_the_finding_side_by_side(demo_store: Store) -> None:
    client = make_client(demo_store)
    # the refresh drops the earliest rows, which would move the suggested window: fix it, as an analyst would
    demo_store.update_settings(1, window=load_input(demo_store, 1).window)
    before = client.get("/api/rosters/1/trend").json()
    inp = load_input(demo_store, 1)
    run_id = create_bootstrap_run(demo_store, inp, bootstrap_params(unit="firm", resamples=100, seed=3))
    execute_bootstrap(demo_store, run_id)
    import_roster(demo_store, refreshed_demo(), "demo-week2.csv", into=1)

    run_page = client.get(f"/runs/{run_id}")
    assert run_page.status_code == 200
    assert "Made on version 1 of the roster; version 2 has been imported since" in run_page.text
    assert run_page.context["page"].newer_version == 2
    # the run still reads version 1: its stored intervals are unchanged and its page redraws without error
    assert demo_store.get_run(run_id).status == "done"

    after = client.get("/api/rosters/1/trend").json()
    refresh = after["refresh"]
    assert (refresh["from_version"], refresh["to_version"]) == (1, 2)
    assert refresh["odds_ratio_before"] == before["fit"]["odds_ratio"]
    assert refresh["odds_ratio_after"] == after["fit"]["odds_ratio"] != before["fit"]["odds_ratio"]
    shown = f"{before['fit']['odds_ratio']:.3f} -> {after['fit']['odds_ratio']:.3f} after the refresh"
    assert shown in refresh["sentence"]
    assert html.escape(shown) in client.get("/rosters/1/trend").text
