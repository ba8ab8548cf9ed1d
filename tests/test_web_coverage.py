"""Coverage page and its JSON twin: the yearly table, the suggested window, the window control."""

from __future__ import annotations

from typing import Any

import pandas as pd
import pytest
from conftest import decode_plotly_array, figure_handoff, read_mapping

from app.store import Store

ROSTER = 1  # the demo roster is the first roster of the demo database


def test_page_context_suggests_the_demo_full_coverage(client: Any, demo_truth: dict[str, Any]) -> None:
    response = client.get(f"/rosters/{ROSTER}/coverage")
    assert response.status_code == 200
    assert response.template.name == "coverage.html"
    page = response.context["page"]
    # demo_data/README.md "Coverage": full coverage 1998-2022 (TRUTH["full_coverage"])
    assert page.suggestion.window == tuple(demo_truth["full_coverage"])
    assert page.window == tuple(demo_truth["full_coverage"])
    assert page.window_source == "suggested"
    assert page.mapping_label == "demo standard v1"
    assert page.warnings == []
    assert "Suggested: <strong>1998–2022</strong>" in response.text


def test_json_table_equals_a_pandas_crosstab_of_the_demo_csv(client: Any, demo_clean: pd.DataFrame) -> None:
    payload = client.get(f"/api/rosters/{ROSTER}/coverage").json()
    # expected: pandas crosstab of demo_data/roster.csv (kept rows) by FY x category of mapping-standard.csv,
    # without the rows still in post (no exit date, reason "Still in post": demo_data/README.md), which are no
    # departure of any year and are counted apart
    in_post = (demo_clean["Exit Date"] == "") & (demo_clean["Exit Reason"].str.lower() == "still in post")
    assert payload["still_in_post"] == int(in_post.sum()) > 0
    departures = demo_clean.loc[~in_post]
    categories = departures["Exit Reason"].map(read_mapping("mapping-standard.csv")).fillna("unmapped")
    table = pd.crosstab(departures["year"], categories)
    for cat in ("forced", "voluntary", "excluded", "unmapped"):
        if cat not in table:
            table[cat] = 0
    expected = [{"year": int(y), "departures": int(row.sum()), "forced": int(row["forced"]),
                 "voluntary": int(row["voluntary"]), "excluded": int(row["excluded"]),
                 "unmapped": int(row["unmapped"])} for y, row in table.iterrows()]
    assert payload["table"] == expected
    assert payload["suggestion"]["window"] == [1998, 2022]
    assert "figure" not in payload  # the figure is HTML-only (json_skip)


def test_figure_hand_off_holds_every_year(client: Any, demo_clean: pd.DataFrame) -> None:
    html = client.get(f"/rosters/{ROSTER}/coverage").text
    spec = figure_handoff(html, "fig-coverage")
    assert set(spec) == {"figure", "config"}
    years = set()
    for trace in spec["figure"]["data"]:
        if "x" in trace:
            years.update(int(x) for x in decode_plotly_array(trace["x"]))
    # every fiscal year of the kept demo rows (pandas) appears on the chart
    assert years == set(demo_clean["year"].unique().tolist())


def test_chosen_window_persists_and_drives_trend_and_resampling(client: Any, demo_store: Store) -> None:
    response = client.post(f"/rosters/{ROSTER}/window", data={"window_from": "2000", "window_to": "2015"},
                           follow_redirects=False)
    assert response.status_code == 303
    assert response.headers["location"].endswith(f"/rosters/{ROSTER}/coverage")
    assert demo_store.settings(ROSTER).window == (2000, 2015)
    page = client.get(f"/rosters/{ROSTER}/coverage").context["page"]
    assert (page.window, page.window_source) == ((2000, 2015), "chosen")
    trend = client.get(f"/rosters/{ROSTER}/trend").context["page"]
    assert (trend.window, trend.window_source) == ((2000, 2015), "chosen")
    assert trend.fit["window"] == [2000, 2015]
    assert client.get(f"/rosters/{ROSTER}/resampling").context["page"].window == (2000, 2015)
    # going back to the suggestion clears the choice
    client.post(f"/rosters/{ROSTER}/window", data={"reset": "1"})
    assert demo_store.settings(ROSTER).window is None
    assert client.get(f"/api/rosters/{ROSTER}/coverage").json()["window_source"] == "suggested"


@pytest.mark.parametrize(("lo", "hi", "words"), [
    ("2010", "2005", "after it ends"),
    ("1990", "2010", "within the roster's years 1995–2024"),
    ("2005", "2030", "within the roster's years 1995–2024"),
    ("2005", "2006", "at least three years"),
    ("twenty", "2010", "must be a year"),
    ("", "2010", "must be a year"),
])
def test_bad_window_is_refused_with_a_message(client: Any, demo_store: Store, lo: str, hi: str,
                                              words: str) -> None:
    response = client.post(f"/rosters/{ROSTER}/window", data={"window_from": lo, "window_to": hi})
    assert response.status_code == 400
    assert response.template.name == "error.html"
    assert words in response.context["page"]["message"]
    assert demo_store.settings(ROSTER).window is None


def test_threshold_is_validated_and_unknown_roster_is_404(client: Any) -> None:
    assert client.get(f"/rosters/{ROSTER}/coverage?threshold=abc").status_code == 400
    assert client.get(f"/api/rosters/{ROSTER}/coverage?threshold=2").status_code == 400
    # a lower threshold keeps thin years in: the suggestion can only widen
    wide = client.get(f"/api/rosters/{ROSTER}/coverage?threshold=0.1").json()["suggestion"]["window"]
    assert wide[0] <= 1998 and wide[1] >= 2022
    missing = client.get("/api/rosters/999/coverage")
    assert missing.status_code == 404 and "999" in missing.json()["error"]
    assert client.get("/rosters/999/coverage").template.name == "error.html"
