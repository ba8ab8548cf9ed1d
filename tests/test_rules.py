"""Classification rules: the rule table, its CSV file, and its effect counted by hand on invented rosters.

References: the hand counts below are made with pandas on demo_data/roster.csv itself (not through
Helmshift); the record path (``AnalysisInput.records`` through ``app.stats.cells.build_cells``) is the
reference for the cell path. The preset is the academic convention of Parrino (1997), Journal of
Financial Economics 46(2), 165-197 (cited in tests/data/README.md).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from app.analysis.cellstore import cells_from_counts, coverage_from_counts
from app.analysis.inputs import load_input
from app.analysis.rules import preset_rules, rules_to_list, save_rules
from app.analysis.runs import run_trend
from app.intake.ingest import import_roster
from app.intake.reasons import MappingFileError
from app.intake.rule_files import parse_rules_csv, rules_csv
from app.stats.cells import build_cells
from app.stats.rules import RuleError, make_rule
from app.store import Store
from app.types import ClassificationRule

ROSTER = 1


def test_make_rule_checks_every_part() -> None:
    assert make_rule("Retired", "Age", "at least", "65", "excluded") == ClassificationRule(
        "Retired", "age", "at_least", 65, "excluded")
    assert make_rule("X", "interim", "equals", "yes", "excluded").value == 1
    assert make_rule("Retired", "notice_days", "below", "183", "forced") == ClassificationRule(
        "Retired", "notice_days", "below", 183, "forced")
    with pytest.raises(RuleError, match="notice_days compares with below or at_least"):
        make_rule("Retired", "notice_days", "equals", 0, "forced")
    with pytest.raises(RuleError, match="whole days"):
        make_rule("Retired", "notice_days", "below", "182.5", "forced")
    with pytest.raises(RuleError, match="age compares with below or at_least"):
        make_rule("Retired", "age", "equals", 60, "forced")
    with pytest.raises(RuleError, match="whole number"):
        make_rule("Retired", "age", "below", "59.5", "forced")
    with pytest.raises(RuleError, match="category must be one of"):
        make_rule("Retired", "age", "below", 60, "sacked")
    with pytest.raises(RuleError, match="field must be one of age, tenure, interim, notice_days"):
        make_rule("Retired", "salary", "below", 60, "forced")


def test_rules_csv_round_trips_and_rejects_the_whole_file_at_a_bad_line() -> None:
    rules = (ClassificationRule("=Retired", "age", "below", 60, "forced"),
             ClassificationRule("Left, for another post", "interim", "equals", 1, "excluded"))
    text = rules_csv(rules)
    assert text.splitlines()[0] == "code,field,comparison,value,category"
    assert "'=Retired" in text  # a formula trigger is neutralised for spreadsheets
    assert parse_rules_csv(text.encode()) == rules
    bad = b"code,field,comparison,value,category\nRetired,age,below,60,forced\nRetired,age,below,sixty,forced\n"
    with pytest.raises(MappingFileError, match="Line 3: age value must be a whole number"):
        parse_rules_csv(bad)
    with pytest.raises(MappingFileError, match="must start with the header"):
        parse_rules_csv(b"Retired,age,below,60,forced\n")


def hand_count(demo_frame: pd.DataFrame) -> pd.DataFrame:
    """Demo rows with reason Retired and a stated age under 60, per year (pandas on the CSV only)."""
    cols = [c for c in demo_frame.columns if c != "line"]
    rows = demo_frame.loc[~demo_frame.duplicated(subset=cols)]
    age = pd.to_numeric(rows["Age at Exit"], errors="coerce")
    hit = rows.loc[(rows["Exit Reason"] == "Retired") & (age < 60)]
    return hit.groupby(hit["FY"].astype(int)).size()


def test_retirement_below_60_moves_exactly_the_records_it_should(demo_store: Store, demo_frame: pd.DataFrame) -> None:
    expected = hand_count(demo_frame)
    assert expected.sum() > 50  # the demo has young retirements to move
    before = load_input(demo_store, ROSTER, mapping="demo standard:1", window=(1995, 2024))
    preset = preset_rules(before.mapping, before.counts["reason"].unique())
    assert preset == (ClassificationRule("Retired", "age", "below", 60, "forced"),)
    assert before.mapping is not None
    saved = save_rules(demo_store, before.mapping, preset, note="academic preset")
    after = load_input(demo_store, ROSTER, mapping=f"demo standard:{saved.version}", window=(1995, 2024))
    moved = (after.coverage.set_index("year")["forced"] - before.coverage.set_index("year")["forced"])
    pd.testing.assert_series_equal(moved[moved != 0], expected.rename("forced").rename_axis("year"),
                                   check_dtype=False, check_names=False)
    left = (before.coverage.set_index("year")["voluntary"] - after.coverage.set_index("year")["voluntary"])
    assert left.equals(moved)  # every moved departure left the voluntary column
    effects = rules_to_list(demo_store, after.roster, after.mapping)
    assert [(e["matched"], e["moved"]) for e in effects] == [(int(expected.sum()), int(expected.sum()))]
    # Retired rows without a stated age keep their category and are counted
    cols = [c for c in demo_frame.columns if c != "line"]
    rows = demo_frame.loc[~demo_frame.duplicated(subset=cols)]
    assert effects[0]["missing"] == int(((rows["Exit Reason"] == "Retired") & (rows["Age at Exit"] == "")).sum())
    # the record path agrees with the cell path, firm matrix included
    reference = build_cells(after.records, after.window)
    for cells in (after.group_cells(), after.cells()):
        pd.testing.assert_frame_equal(cells.groups, reference.groups)
        assert cells.fingerprint() == reference.fingerprint()
    assert (after.cells().firm_matrix != reference.firm_matrix).nnz == 0
    # a run records the mapping version, which pins the rules
    run = demo_store.get_run(run_trend(demo_store, after).run_id)
    assert (run.mapping_name, run.mapping_version) == ("demo standard", saved.version)
    assert demo_store.get_mapping("demo standard", run.mapping_version).rules == preset


FRACTIONAL = """firm,year,reason,age,tenure,interim,sector
A,2001,Retired,59.5,2.9,N,Energy
A,2002,Retired,60.0,3.0,N,Energy
B,2001,Retired,59.99,10.5,Y,Retail
B,2003,Retired,,11,N,Retail
C,2002,Retired,45,,,Retail
C,2003,Fired,61.2,7,Y,
D,2001,Fired,58,0.5,N,Energy
D,2003,Retired,64.9,6.99,,Energy
"""


@pytest.mark.parametrize("rules", [
    (ClassificationRule("Retired", "age", "below", 60, "forced"),),
    (ClassificationRule("Retired", "tenure", "at_least", 3, "excluded"),
     ClassificationRule("Retired", "age", "below", 60, "forced")),
    (ClassificationRule("Fired", "interim", "equals", 1, "excluded"),
     ClassificationRule("Retired", "interim", "equals", 0, "forced"),
     ClassificationRule("Retired", "tenure", "below", 11, "voluntary")),
])
def test_cell_path_equals_applying_the_rules_to_records_with_fractional_years(
        store: Store, rules: tuple[ClassificationRule, ...]) -> None:
    import_roster(store, FRACTIONAL.encode(), "fractional.csv")
    base = store.save_mapping_version("m", {"Retired": "voluntary", "Fired": "forced"})
    version = save_rules(store, base, rules, note="rules")
    inp = load_input(store, "fractional", mapping=f"m:{version.version}", window=(2001, 2003))
    records = inp.records
    # by hand: the first matching rule decides, on completed years; a missing field never matches
    expected = []
    for r in records.itertuples():
        category = {"Retired": "voluntary", "Fired": "forced"}[r.reason]
        for rule in rules:
            value = getattr(r, rule.field)
            if rule.code != r.reason or value is None or (isinstance(value, float) and np.isnan(value)):
                continue
            v = float(np.floor(value)) if rule.field != "interim" else float(value)
            if {"below": v < rule.value, "at_least": v >= rule.value, "equals": v == rule.value}[rule.comparison]:
                category = rule.category
                break
        expected.append(category)
    assert list(records["category"]) == expected
    pd.testing.assert_frame_equal(inp.group_cells(by_sector=True).groups,
                                  build_cells(records, inp.window, by_sector=True).groups)
    counted = inp.counts.groupby(["year", "category"])["departures"].sum()
    assert counted.to_dict() == records.groupby(["year", "category"]).size().to_dict()
    assert coverage_from_counts(inp.counts).equals(coverage_from_counts(
        records.assign(departures=1)[["year", "sector", "reason", "category", "departures"]]))
    assert cells_from_counts(inp.counts, inp.window).fingerprint() == build_cells(records, inp.window).fingerprint()
