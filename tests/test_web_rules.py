"""Rules on the Reason codes page, the rule readings on Robustness, the mix and adjusted trend on Trend.

References: moved counts against pandas over demo_data/roster.csv (by hand, see tests/test_rules.py);
robustness readings against ``fit_trend`` (statsmodels inside) on cells built from the records; the
adjusted fit is checked against statsmodels in tests/test_stats_adjusted.py and tests/test_cli_rules.py.
"""

from __future__ import annotations

import re
from typing import Any

import pandas as pd
import pytest

from app.analysis.inputs import load_input
from app.analysis.provenance import provenance_for
from app.stats.cells import build_cells
from app.stats.trend import fit_trend
from app.store import Store
from tests.test_cellstore import reads, selects
from tests.test_rules import hand_count

ROSTER = 1


def test_the_preset_in_one_click_and_what_it_moved(client: Any, demo_store: Store, demo_frame: pd.DataFrame) -> None:
    page = client.get(f"/api/rosters/{ROSTER}/reasons").json()
    assert page["rules"] == [] and page["preset"] == ["'Retired' counts as forced when age is below 60 years"]
    assert "Parrino 1997" in page["preset_source"]
    before = demo_store.get_mapping("demo standard").version
    assert client.post(f"/rosters/{ROSTER}/rules/preset", follow_redirects=False).status_code == 303
    page = client.get(f"/api/rosters/{ROSTER}/reasons").json()
    assert page["mapping"]["version"] == before + 1 and page["preset"] == []
    moved = int(hand_count(demo_frame).sum())
    assert [(r["code"], r["matched"], r["moved"]) for r in page["rules"]] == [("Retired", moved, moved)]
    html = client.get(f"/rosters/{ROSTER}/reasons").text
    assert "Classification rules" in html and f"<strong>{moved}</strong>" in html
    # adding it again is refused, nothing saved
    assert client.post(f"/rosters/{ROSTER}/rules/preset", follow_redirects=False).status_code == 400
    assert demo_store.get_mapping("demo standard").version == before + 1


def test_the_rules_table_saves_in_order_drops_and_refuses_a_bad_row(client: Any, demo_store: Store) -> None:
    before = demo_store.get_mapping("demo standard").version
    rows = {"rule-1-code": "Retired", "rule-1-field": "age", "rule-1-comparison": "at_least", "rule-1-value": "70",
            "rule-1-category": "excluded",
            "rule-2-code": "Retired", "rule-2-field": "age", "rule-2-comparison": "below", "rule-2-value": "55",
            "rule-2-category": "forced",
            "rule-3-code": "Unknown", "rule-3-field": "interim", "rule-3-comparison": "equals", "rule-3-value": "1",
            "rule-3-category": "voluntary", "rule-3-drop": "1",
            "rule-4-code": "", "rule-4-field": "age", "rule-4-comparison": "below", "rule-4-value": "",
            "rule-4-category": "forced"}
    assert client.post(f"/rosters/{ROSTER}/rules", data=rows, follow_redirects=False).status_code == 303
    saved = demo_store.get_mapping("demo standard")
    assert saved.version == before + 1
    assert [(r.comparison, r.value, r.category) for r in saved.rules] == [("at_least", 70, "excluded"),
                                                                          ("below", 55, "forced")]
    bad = dict(rows, **{"rule-2-value": "fifty"})
    response = client.post(f"/rosters/{ROSTER}/rules", data=bad, follow_redirects=False)
    assert response.status_code == 400 and "Rule 2: age value must be a whole number" in response.text
    assert demo_store.get_mapping("demo standard").version == before + 1  # nothing half-written
    # saving the categories keeps the rules of the version
    codes = client.get(f"/api/rosters/{ROSTER}/reasons").json()["codes"]
    form = {f"code-{i}": c["code"] for i, c in enumerate(codes)} | {f"cat-{i}": c["category"] or ""
                                                                    for i, c in enumerate(codes)}
    assert client.post(f"/rosters/{ROSTER}/reasons", data=form, follow_redirects=False).status_code == 303
    assert demo_store.get_mapping("demo standard").rules == saved.rules


def test_rules_csv_download_and_import(client: Any, demo_store: Store) -> None:
    csv_text = "code,field,comparison,value,category\r\nRetired,tenure,below,2,forced\r\n"
    response = client.post(f"/rosters/{ROSTER}/rules/import", files={"file": ("r.csv", csv_text.encode())},
                           follow_redirects=False)
    assert response.status_code == 303
    version = demo_store.get_mapping("demo standard").version
    got = client.get(f"/mapping-rules/demo standard.csv?version={version}")
    assert got.status_code == 200 and got.text == csv_text
    bad = client.post(f"/rosters/{ROSTER}/rules/import",
                      files={"file": ("bad.csv", b"code,field,comparison,value,category\nRetired,notice_days,equals,90,forced\n")},
                      follow_redirects=False)
    assert bad.status_code == 400 and "notice_days compares with below or at_least" in bad.text
    assert "Nothing was saved" in bad.text
    assert demo_store.get_mapping("demo standard").version == version
    assert client.get("/mapping-rules/no such mapping.csv").status_code == 404


def test_robustness_reads_with_and_without_rules_and_the_preset(client: Any, demo_store: Store) -> None:
    plain = client.get(f"/api/rosters/{ROSTER}/robustness?preset=1").json()["result"]["variants"]
    preset = next(v for v in plain if v["kind"] == "rules-preset")
    assert "Parrino 1997" in preset["changes"][0]
    client.post(f"/rosters/{ROSTER}/rules/preset")
    inp = load_input(demo_store, ROSTER)
    ruled = client.get(f"/api/rosters/{ROSTER}/robustness").json()["result"]["variants"]
    reference = next(v for v in ruled if v["kind"] == "reference")
    without = next(v for v in ruled if v["kind"] == "rules-off")
    # reference with rules = the preset reading before; without rules = the plain reference before
    assert reference["odds_ratio"] == pytest.approx(preset["odds_ratio"], rel=1e-12)
    assert without["odds_ratio"] == pytest.approx(plain[0]["odds_ratio"], rel=1e-12)
    cells = build_cells(inp.records, inp.window)  # the records through the rules
    assert reference["odds_ratio"] == pytest.approx(fit_trend(cells, "linear").odds_ratio, rel=1e-12)
    assert reference["forced"] == int(cells.groups["forced"].sum())
    assert client.get(f"/api/rosters/{ROSTER}/robustness?preset=2").status_code == 400


def test_trend_shows_the_mix_and_fits_the_adjusted_trend_only_when_asked(client: Any, demo_store: Store) -> None:
    demo_store.ensure_detail_cells(ROSTER)  # once per roster version, on their first read (tests/test_cellstore.py)
    seen = selects(demo_store)
    page = client.get(f"/api/rosters/{ROSTER}/trend").json()
    assert page["adjusted"] is None and len(page["mix"]["sentences"]) == 2
    assert re.search(r"The age mix of departures (moved|did not clearly move) between", page["mix"]["sentences"][0])
    assert reads(seen, "roster_firm_cells") == 0 and reads(seen, "departures") == 0
    years = [r["year"] for r in page["mix"]["age"]]
    assert years == sorted(years) and all(abs(sum(s for s in r["shares"].values() if s) - 1) < 1e-12
                                          for r in page["mix"]["age"] if r["departures"])
    html = client.get(f"/rosters/{ROSTER}/trend").text
    assert 'id="fig-mix-age"' in html and 'id="fig-mix-tenure"' in html
    asked = client.get(f"/api/rosters/{ROSTER}/trend?adjusted=1&adjust=age&adjust=tenure").json()
    a = asked["adjusted"]
    assert asked["adjust"] == ["age", "tenure"] and set(a["conf_int"]) == {"cluster", "bootstrap"}
    assert a["odds_ratio"] > 0 and a["cluster_se"] > 0 and a["departures"] > 1000
    run = demo_store.get_run(a["run"])
    assert run.params == {"model": "adjusted", "adjust": ["age", "tenure"]}
    assert run.result is not None and run.result["odds_ratio"] == a["odds_ratio"]
    assert client.get(f"/api/rosters/{ROSTER}/trend?adjusted=1&adjust=income").status_code == 400
    # a value the schema refuses is refused without adjusted=1 too, as the schema says
    assert client.get(f"/api/rosters/{ROSTER}/trend?adjust=income").status_code == 400


def test_provenance_names_the_rules_and_the_adjustment_set(client: Any, demo_store: Store) -> None:
    client.post(f"/rosters/{ROSTER}/rules/preset")
    prov = provenance_for(load_input(demo_store, ROSTER), model="adjusted", adjust=("age", "sector"))
    assert "with 1 rule" in prov.short() and "adjusted for age, sector" in prov.short()
    assert any("classification rules, first match wins: 'Retired' counts as forced" in line for line in prov.lines())
