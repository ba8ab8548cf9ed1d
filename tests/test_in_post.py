"""Rows still in post (no departure date, a code saying the executive has not left) are no departure of any year.

An invented roster (written here, seeded) lists 2000-2010 departures and, as rosters often do, the sitting
chiefs with no exit date. The reference is pandas over the same CSV text, with the rule stated in plain
terms: a row is still in post when its exit date is empty and its reason reads "Still in post" or
"Incumbent" (common practice in roster compilation: the sitting chief is listed beside the departures).
Coverage, the record browser's year filters, its exports, the command line and the quick fit path must
agree with that reference and with each other.
"""

from __future__ import annotations

import csv
import io
import random
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from conftest import make_client

from app.analysis.inputs import load_input
from app.analysis.quick_fit import quick_summary
from app.intake.ingest import import_roster
from app.store import Store

HEADER = ["Firm", "FY", "Exit Date", "Reason"]
MAPPING = {"Retired": "voluntary", "Dismissed": "forced", "Still in post": "excluded", "Incumbent": "excluded"}


def roster_csv(*, in_post_year: str, seed: int = 11) -> str:
    """2000-2010 with 20-30 departures a year, but 2010 thin (4); 40 sitting chiefs filed under
    ``in_post_year`` ("" = no year: intake files them under the latest year of the file, 2010)."""
    rng = random.Random(seed)
    rows = []
    for year in range(2000, 2011):
        for i in range(4 if year == 2010 else rng.randrange(20, 31)):
            reason = "Dismissed" if rng.random() < 0.3 else "Retired"
            rows.append([f"F{year}{i:03d}", str(year), f"15/06/{year}", reason])
    for i in range(40):
        rows.append([f"S{i:03d}", in_post_year, "", "Still in post" if i % 4 else "Incumbent"])
    rng.shuffle(rows)
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows([HEADER, *rows])
    return out.getvalue()


def reference(text: str) -> tuple[pd.DataFrame, int]:
    """pandas alone: per year, every departure and each category; and the rows still in post."""
    frame = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False)
    in_post = (frame["Exit Date"] == "") & frame["Reason"].isin(["Still in post", "Incumbent"])
    departures = frame.loc[~in_post].assign(year=lambda f: f["FY"].astype(int))
    table = pd.crosstab(departures["year"], departures["Reason"].map(MAPPING))
    return table, int(in_post.sum())


def build(tmp_path: Path, text: str, *, mapping: dict[str, str] | None = MAPPING) -> Store:
    store = Store(f"sqlite:///{tmp_path / 'in_post.db'}")
    report = import_roster(store, text.encode(), "sitting.csv", name="Sitting chiefs")
    assert report.roster is not None
    if mapping is not None:
        store.save_mapping_version("plain", mapping, author="test")
        store.update_settings(report.roster.id, mapping_name="plain")
    return store


@pytest.mark.parametrize("in_post_year", ["", "2011"])
def test_coverage_leaves_the_rows_still_in_post_out_of_every_year(tmp_path: Path, in_post_year: str) -> None:
    text = roster_csv(in_post_year=in_post_year)
    expected, in_post = reference(text)
    inp = load_input(build(tmp_path, text), 1)
    assert inp.in_post == in_post == 40
    # the span is the departures' (2011 holds only sitting chiefs: it is no year of the table)
    assert inp.coverage["year"].tolist() == expected.index.tolist() == list(range(2000, 2011))
    assert inp.coverage["departures"].tolist() == expected.sum(axis=1).tolist()
    for category in ("forced", "voluntary"):
        assert inp.coverage[category].tolist() == expected[category].tolist()
    assert inp.coverage["excluded"].sum() == 0
    # 2010 has 4 departures: it is thin, whatever the sitting chiefs filed under it
    assert 2010 in inp.suggestion.below_cutoff and inp.suggestion.window == (2000, 2009)


def test_without_a_mapping_the_sitting_chiefs_do_not_hide_a_thin_year(tmp_path: Path) -> None:
    # before any mapping every code is unmapped, so the coverage basis (all but excluded) would have counted
    # the 40 sitting chiefs as 2010's records, and 2010 (4 departures) would have passed the rule
    inp = load_input(build(tmp_path, roster_csv(in_post_year=""), mapping=None), 1, require_mapping=False)
    assert int(inp.coverage.loc[inp.coverage["year"] == 2010, "departures"].iloc[0]) == 4
    assert any(f.year == 2010 and f.kind == "below_cutoff" for f in inp.flags)


def test_the_record_browser_and_its_exports_agree_with_coverage(tmp_path: Path) -> None:
    text = roster_csv(in_post_year="")
    expected, in_post = reference(text)
    store = build(tmp_path, text)
    client = make_client(store)
    coverage = client.get("/api/rosters/1/coverage").json()
    assert coverage["still_in_post"] == in_post
    for year in (2009, 2010):
        row = next(r for r in coverage["table"] if r["year"] == year)
        listed = client.get(f"/api/rosters/1/departures?year={year}").json()
        assert listed["total"] == row["departures"] == int(expected.loc[year].sum())
        assert listed["in_post_rows"] == in_post
        exported = pd.read_csv(io.StringIO(client.get(f"/rosters/1/departures.csv?year={year}").text))
        assert len(exported) == row["departures"]
        assert not exported["Reason code"].isin(["Still in post", "Incumbent"]).any()
    between = client.get("/api/rosters/1/departures?from=2005&to=2010").json()
    assert between["total"] == int(expected.loc[2005:2010].to_numpy().sum())
    only = client.get("/api/rosters/1/departures?in_post=only&per_page=100").json()
    assert only["total"] == in_post and {d["reason"] for d in only["departures"]} == {"Still in post", "Incumbent"}
    assert all(d["date"] is None for d in only["departures"])
    everything = client.get("/api/rosters/1/departures").json()
    assert everything["total"] == int(expected.to_numpy().sum()) + in_post  # no filter: every accepted row
    assert client.get("/api/rosters/1/departures?in_post=none").json()["total"] == int(expected.to_numpy().sum())
    refused = client.get("/api/rosters/1/departures?in_post=some")
    assert refused.status_code == 400 and "in_post must be one of only, none" in refused.json()["error"]
    # the page says so, and Coverage links the rows still in post to their list
    html = client.get("/rosters/1/coverage").text
    assert "40</a> rows are still in post, not departures" in html and "in_post=only" in html
    assert "left out here" in client.get("/rosters/1/departures?year=2010").text


def test_rows_the_mapping_counts_are_departures_after_all(tmp_path: Path) -> None:
    # the analyst's mapping counts "Still in post" as voluntary (a case override could do the same for one row):
    # those 30 rows are then departures of the year they are filed under, on Coverage, in the list and in the
    # models alike; the ten "Incumbent" rows stay apart
    text = roster_csv(in_post_year="")
    counted = {**MAPPING, "Still in post": "voluntary"}
    store = build(tmp_path, text, mapping=counted)
    inp = load_input(store, 1)
    assert inp.in_post == 10
    frame = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False)
    kept = frame.loc[frame["Reason"] != "Incumbent"].assign(year=lambda f: f["FY"].replace("", "2010").astype(int))
    expected = pd.crosstab(kept["year"], kept["Reason"].map(counted))
    assert inp.coverage["voluntary"].tolist() == expected["voluntary"].tolist()
    assert int(inp.coverage.loc[inp.coverage["year"] == 2010, "departures"].iloc[0]) == 4 + 30
    client = make_client(store)
    assert client.get("/api/rosters/1/departures?year=2010").json()["total"] == 34
    assert client.get("/api/rosters/1/departures?in_post=only").json()["total"] == 10
    payload = quick_summary(store.url, 1, fit_new=True)
    assert payload is not None and tuple(payload["window"]) == inp.window


def test_the_quick_fit_suggests_the_window_coverage_suggests(tmp_path: Path) -> None:
    for in_post_year in ("", "2011"):
        folder = tmp_path / (in_post_year or "none")
        folder.mkdir()
        store = build(folder, roster_csv(in_post_year=in_post_year))
        payload: dict[str, Any] | None = quick_summary(store.url, 1, fit_new=True)
        assert payload is not None
        assert tuple(payload["window"]) == load_input(store, 1).window == (2000, 2009)


def test_unmapped_codes_count_departures_only(tmp_path: Path) -> None:
    # before a mapping every code is unmapped: the warning names the departures' codes, not the sitting chiefs'
    text = roster_csv(in_post_year="")
    expected, _ = reference(text)
    inp = load_input(build(tmp_path, text, mapping=None), 1, require_mapping=False)
    unmapped = dict(zip(inp.unmapped_codes()["code"], inp.unmapped_codes()["count"], strict=True))
    lo, hi = inp.window
    assert sum(unmapped.values()) == int(expected.loc[lo:hi].to_numpy().sum())
    assert set(unmapped) == {"Retired", "Dismissed"}


def test_the_quick_fit_warns_of_the_same_unmapped_codes(tmp_path: Path) -> None:
    # the sitting chiefs' codes left unmapped: no departure has them, so neither path warns of them
    store = build(tmp_path, roster_csv(in_post_year=""), mapping={"Retired": "voluntary", "Dismissed": "forced"})
    inp = load_input(store, 1)
    assert inp.in_post == 40 and inp.unmapped_codes().empty and inp.warnings() == []
    payload = quick_summary(store.url, 1, fit_new=True)
    assert payload is not None and payload["warnings"] == inp.warnings() == []
    assert tuple(payload["window"]) == inp.window
