"""Rates classify each departure as the share does: code, then the mapping's rules, then its case overrides
(issue 16; app.analysis.rates, the rate_ratio bootstrap's cells in app.analysis.run_params, the brief's rates
finding and the pack of a rate run).

The roster and its universe are invented here by a seeded generator. Oracles: a pandas count over the generated
rows (not read back from the store), classified by ``app.stats.rules.apply_rules`` and then the overrides set by
hand; statsmodels' Poisson GLM with log firm-years as offset (tests/data/README.md "Poisson trend with an
exposure offset") and its binomial GLM for the share inside the universe; the pack's reproduce.py (statsmodels refits).
"""

from __future__ import annotations

import contextlib
import io
import json
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from app.analysis import pack_script
from app.analysis.inputs import load_input
from app.analysis.jobs import run_bootstrap_now
from app.analysis.overrides import add_override
from app.analysis.rates import rates_section, run_rates
from app.analysis.replication import build_pack
from app.analysis.rules import save_rules
from app.briefing.findings import rates_finding
from app.intake.ingest import import_roster
from app.intake.universe import import_universe
from app.stats.cells import assign_categories
from app.stats.rules import apply_rules
from app.store import Store
from app.types import ClassificationRule

YEARS = list(range(2001, 2011))
WINDOW = (2001, 2010)
CATEGORIES = {"Dismissed": "forced", "Retired": "voluntary", "Resigned": "voluntary", "Still in post": "excluded"}
#: the academic convention the issue names: a retirement below 60 counts as forced
RULE = ClassificationRule("Retired", "age", "below", 60, "forced")


def roster_rows() -> pd.DataFrame:
    """Seeded invented departures: 40 firms F00..F39, 6-11 a year, ages 44-70 (one in ten missing)."""
    rng = np.random.default_rng(16)
    rows = []
    for year in YEARS:
        for _ in range(int(rng.integers(6, 12))):
            age = None if rng.random() < 0.1 else round(float(rng.uniform(44, 70)), 1)
            rows.append({"firm_id": f"F{int(rng.integers(0, 40)):02d}", "year": year,
                         "reason": str(rng.choice(["Dismissed", "Retired", "Retired", "Resigned"])), "age": age})
    # a firm outside the universe whose only row is excluded by its code (an override will count it)
    rows.append({"firm_id": "Z99", "year": 2006, "reason": "Still in post", "age": 50.0})
    frame = pd.DataFrame(rows)
    frame["executive"] = [f"Exec {i}" for i in range(len(frame))]
    return frame


def universe_rows() -> pd.DataFrame:
    """F00..F29 in every year, F30..F34 from 2005 (a growing index); F35..F39 and Z99 never."""
    pairs = [(f"F{i:02d}", y) for i in range(35) for y in YEARS if i < 30 or y >= 2005]
    return pd.DataFrame(pairs, columns=["firm_id", "year"])


def csv_bytes(frame: pd.DataFrame) -> bytes:
    return frame.to_csv(index=False).encode()


@pytest.fixture
def built(store: Store) -> dict[str, Any]:
    """The roster, its universe, and a mapping whose newest version has the rule and three overrides."""
    rows = roster_rows()
    roster = import_roster(store, csv_bytes(rows[["firm_id", "year", "reason", "executive", "age"]]),
                           "invented.csv", name="Invented").roster
    import_universe(store, roster.id, csv_bytes(universe_rows()), "index.csv")
    plain = store.save_mapping_version("rr map", CATEGORIES)
    mapping = save_rules(store, plain, (RULE,), note="retirement below 60 counts as forced")
    records = store.departures(roster.id)
    inside = rows.merge(universe_rows().assign(u=True), on=["firm_id", "year"], how="left")["u"].eq(True)
    # the overrides: an inside dismissal in 2005 counted voluntary; an inside retirement below 60 in 2008 (forced
    # by the rule) counted voluntary, the override winning over the rule; the outside firm's excluded row forced
    chosen = {
        int(rows.index[(rows["year"] == 2005) & (rows["reason"] == "Dismissed") & inside][0]): "voluntary",
        int(rows.index[(rows["year"] == 2008) & (rows["reason"] == "Retired") & (rows["age"] < 60) & inside][0]):
            "voluntary",
        int(rows.index[rows["firm_id"] == "Z99"][0]): "forced",
    }
    for row, category in chosen.items():
        departure = int(records.loc[records["executive"] == rows.at[row, "executive"], "id"].iloc[0])
        mapping = add_override(store, store.get_roster(roster.id), mapping, departure, category, "board minutes")
    return {"roster": roster.id, "rows": rows, "overrides": chosen, "mapping": mapping}


def oracle(rows: pd.DataFrame, overrides: dict[int, str] | None) -> pd.DataFrame:
    """Each generated row's category (code; with ``overrides`` given, then the rule and the overrides) and
    whether its firm-year is in the universe."""
    categories = np.asarray(assign_categories(rows["reason"], CATEGORIES), dtype=object)
    if overrides is not None:
        categories = apply_rules(rows, categories, [RULE])[0]
        for row, category in overrides.items():
            categories[row] = category
    keys = universe_rows().assign(inside=True)
    out = rows.assign(category=categories).merge(keys, on=["firm_id", "year"], how="left")
    return out.assign(inside=out["inside"].eq(True))


def per_year(frame: pd.DataFrame, category: str) -> list[int]:
    hit = frame.loc[frame["inside"] & (frame["category"] == category)]
    return hit.groupby("year").size().reindex(YEARS, fill_value=0).tolist()


def poisson_log_rr(forced: list[int], firm_years: list[int]) -> float:
    X = sm.add_constant(np.array(YEARS, dtype=float) - 2005.5)
    fit = sm.GLM(np.array(forced, dtype=float), X, family=sm.families.Poisson(),
                 offset=np.log(np.array(firm_years, dtype=float))).fit(tol=1e-12)
    return float(fit.params[1])


def test_rates_count_rules_and_overrides_as_the_share_does(store: Store, built: dict[str, Any]) -> None:
    rows = built["rows"]
    expected = oracle(rows, built["overrides"])
    by_code = oracle(rows, None)
    firm_years = universe_rows().groupby("year").size().reindex(YEARS).tolist()  # 30 a year, 35 from 2005
    # the rule moves retirements, so a code-only count would differ (this test can fail)
    assert per_year(expected, "forced") != per_year(by_code, "forced")

    inp = load_input(store, built["roster"], mapping="rr map", window=WINDOW)
    assert inp.mapping is not None and inp.mapping.version == built["mapping"].version
    a = run_rates(store, inp)
    table = a.table.years
    assert table["year"].tolist() == YEARS and table["firm_years"].tolist() == firm_years
    assert table["forced"].tolist() == per_year(expected, "forced")  # pandas count, rules + overrides
    assert table["voluntary"].tolist() == per_year(expected, "voluntary")
    counted = expected["category"].isin(["forced", "voluntary"])
    assert a.table.outside == int((counted & ~expected["inside"]).sum())
    # firms with a counted departure and no firm-year in the universe: F35..F39 as drawn, and Z99 only
    # because its override counts it
    missing = sorted(set(expected.loc[counted & ~expected["firm_id"].isin(universe_rows()["firm_id"]), "firm_id"]))
    assert "Z99" in missing and a.flags.missing_count == len(missing)
    # the share classifies the same way: coverage counts every departure (inside the universe or not)
    cover = inp.coverage.set_index("year").loc[YEARS]
    assert cover["forced"].tolist() == expected.loc[expected["category"] == "forced"].groupby("year").size() \
        .reindex(YEARS, fill_value=0).tolist()
    # the Coverage page's Rates table (no fit) shows the same counts
    assert [r["forced"] for r in rates_section(store, inp, fit=False).years] == per_year(expected, "forced")

    # oracle: statsmodels' Poisson GLM with log firm-years as offset on the pandas counts
    log_rr = poisson_log_rr(per_year(expected, "forced"), firm_years)
    assert a.forced is not None and a.forced.log_rr == pytest.approx(log_rr, abs=1e-8)
    assert a.forced.rate_ratio == pytest.approx(float(np.exp(log_rr)), rel=1e-8)
    # oracle: statsmodels' binomial GLM of the share inside the universe
    f, v = np.array(per_year(expected, "forced")), np.array(per_year(expected, "voluntary"))
    share = sm.GLM(np.column_stack([f, v]), sm.add_constant(np.array(YEARS, dtype=float) - 2005.5),
                   family=sm.families.Binomial()).fit(tol=1e-12)
    assert a.share_odds_ratio == pytest.approx(float(np.exp(share.params[1])), rel=1e-6)

    # the rate_ratio bootstrap's original estimate is the same number (its firm x year cells classify alike)
    boot = run_bootstrap_now(store, inp, unit="firm", resamples=100, seed=5, statistic="rate_ratio")
    assert boot["log_odds_ratio"] == pytest.approx(log_rr, abs=1e-8)

    # the brief's rates finding quotes it
    finding = rates_finding(store, inp)
    assert finding.numbers["rate_ratio"] == pytest.approx(float(np.exp(log_rr)), rel=1e-8)
    assert f"Forced rate ratio {np.exp(log_rr):.3f} per year" in finding.takeaway

    # a pack of the rate fit and of the bootstrap reproduce it (reproduce.py refits with statsmodels)
    for run_id in (a.run_id, boot["run"]):
        assert run_id is not None
        report = reproduce(build_pack(store, int(run_id)).data)
        assert report["status"] == 0 and report["ok"], [c for c in report["checks"] if not c["ok"]]
        assert report["cells"]["forced"].tolist() == per_year(expected, "forced")
    checks = {c["name"]: c for c in reproduce(build_pack(store, int(a.run_id or 0)).data)["checks"]}
    assert checks["forced rate: log rate ratio per year"]["recomputed"] == pytest.approx(log_rr, abs=1e-8)


def test_a_mapping_without_rules_or_overrides_counts_by_code(store: Store, built: dict[str, Any]) -> None:
    """The plain path (version 1: codes only) is unchanged: the pandas count by code, and its Poisson fit."""
    expected = oracle(built["rows"], None)
    inp = load_input(store, built["roster"], mapping="rr map:1", window=WINDOW)
    assert not inp.reclassifies
    a = run_rates(store, inp, record=False)
    assert a.table.years["forced"].tolist() == per_year(expected, "forced")
    assert a.table.years["voluntary"].tolist() == per_year(expected, "voluntary")
    firm_years = universe_rows().groupby("year").size().reindex(YEARS).tolist()
    assert a.forced is not None
    assert a.forced.log_rr == pytest.approx(poisson_log_rr(per_year(expected, "forced"), firm_years), abs=1e-8)
    assert a.flags.missing_count == len(set(expected.loc[expected["category"].isin(["forced", "voluntary"])
                                                         & ~expected["firm_id"].isin(universe_rows()["firm_id"]),
                                                         "firm_id"]))
    assert "Z99" not in a.flags.missing_firms  # excluded by its code, and no override in this version


def reproduce(data: bytes) -> dict[str, Any]:
    """Run a pack's reproduce.py logic in process on the unpacked pack (as tests/test_replication.py does)."""
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            archive.extractall(folder)
        out = io.StringIO()
        with contextlib.redirect_stdout(out):
            status = pack_script.main([str(folder), "--json"])
        payload: dict[str, Any] = json.loads(out.getvalue())
        payload["status"] = status
        payload["cells"] = pd.read_csv(folder / "cells.csv")
    return payload


def test_pages_show_the_reclassified_rates_without_reading_the_records(store: Store, built: dict[str, Any]) -> None:
    """The Trend and Coverage pages' Rates sections (their /api twins) show the pandas count with the rule and
    the overrides, read from the cells: no whole roster and no list of the universe's firm-years is read."""
    import re

    from conftest import make_client
    from sqlalchemy import event

    from tests.test_cellstore import in_post_count

    store.update_settings(built["roster"], mapping_name="rr map", window=WINDOW)
    expected = per_year(oracle(built["rows"], built["overrides"]), "forced")
    store.ensure_detail_cells(built["roster"])  # once per roster version, on their first read (test_cellstore.py)
    seen: list[str] = []
    event.listen(store.engine, "before_cursor_execute",
                 lambda conn, cursor, statement, *args: seen.append(" ".join(statement.split())))
    client = make_client(store)
    for page in ("trend", "coverage"):
        response = client.get(f"/api/rosters/{built['roster']}/{page}")
        assert response.status_code == 200, response.text
        assert [r["forced"] for r in response.json()["rates"]["years"]] == expected, page
    # locating the overrides reads the departures of their years only (app.analysis.overrides, memoised); the
    # rows still in post are counted per year in SQL (a few rows back, tests/test_cellstore.py in_post_count)
    assert not [s for s in seen if s.startswith("SELECT") and re.search(r"\bFROM departures\b", s)
                and "departures.year IN" not in s and not in_post_count(s)]
    assert not [s for s in seen if re.search(r"SELECT universe_firm_years\.firm_id, universe_firm_years\.year", s)]
