"""Case-level overrides: one departure counted as a chosen category by a mapping version (issue 15).

References: every expected count below is a hand count of the invented CSV text in this file (read the rows:
which year, which code, which age); the record path (``AnalysisInput.records`` through
``app.stats.cells.build_cells``, one row per departure) is the reference for the cell paths, and statsmodels'
binomial GLM (``statsmodels.api.GLM``) is the reference for the fit a run records.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from app.analysis.inputs import load_input
from app.analysis.overrides import add_override, remove_override, resolve_overrides
from app.analysis.provenance import provenance_for
from app.analysis.rules import save_rules
from app.analysis.runs import run_trend
from app.intake.ingest import import_roster
from app.stats.cells import build_cells
from app.store import CaseOverride, MappingConflict, Store, StoreError
from app.types import ClassificationRule

HEADER = "firm_id,firm_name,sector,year,date,reason,executive,age\n"
V1 = HEADER + (
    "F1,Alpha,Energy,2001,2001-03-01,Retired,Ann Smith,58\n"      # voluntary by code; forced below 60 by the rule
    "F2,Beta,Energy,2001,2001-05-01,Dismissed,Bob Jones,61\n"     # forced
    "F3,Gamma,Retail,2002,2002-06-01,Retired,,66\n"               # voluntary, no executive
    "F4,Delta,Retail,2002,2002-07-01,Resigned,Dee Doe,50\n"       # voluntary
    "F5,Eps,Retail,2003,2003-07-01,Dismissed,Eve Roe,55\n"        # forced
    "F6,Six,Energy,2003,2003-01-15,Resigned,Sam Poe,47\n"         # voluntary
    "F7,Sev,Energy,2004,2004-02-01,Resigned,Sue Low,52\n"         # voluntary
    "F8,Eig,Retail,2004,2004-03-01,Dismissed,Sid Ray,63\n"        # forced
    "F9,Nin,Retail,2005,2005-03-01,Retired,Nia Poe,67\n"          # voluntary
    "F10,Ten,Energy,2005,2005-04-01,Dismissed,Ted Fox,59\n"       # forced
    "F11,Ele,Energy,2005,2005-05-01,Resigned,Ida Kay,44\n"        # voluntary
)
# the same roster a week later: F1's executive and code in another spelling (the same departure), F4 gone
V2 = HEADER + "\n".join(line for line in V1.splitlines()[1:] if not line.startswith("F4,")).replace(
    "Retired,Ann Smith", "RETIRED ,ann  smith") + "\n"
CATEGORIES = {"Retired": "voluntary", "Dismissed": "forced", "Resigned": "voluntary"}
WINDOW = (2001, 2005)


def setup(store: Store) -> tuple[int, int]:
    """The roster's id and the id of F1's record (Ann Smith, 2001)."""
    roster_id = import_roster(store, V1.encode(), "desk.csv", name="desk").roster.id
    store.save_mapping_version("desk map", CATEGORIES)
    records = store.departures(roster_id)
    return roster_id, int(records.loc[records["firm_id"] == "F1", "id"].iloc[0])


def by_year(inp: object) -> pd.DataFrame:
    return inp.coverage.set_index("year")[["forced", "voluntary"]]  # type: ignore[attr-defined]


def test_an_override_moves_exactly_one_departure_in_every_path(store: Store) -> None:
    roster_id, f1 = setup(store)
    before = load_input(store, roster_id, mapping="desk map:1", window=WINDOW)
    # hand count of V1: forced 2001..2005 = 1,0,1,1,1; voluntary = 1,2,1,1,2
    assert by_year(before)["forced"].tolist() == [1, 0, 1, 1, 1]
    assert by_year(before)["voluntary"].tolist() == [1, 2, 1, 1, 2]
    mapping = store.get_mapping("desk map")
    roster = store.get_roster(roster_id)
    saved = add_override(store, roster, mapping, f1, "forced", "board statement of 3 May")
    assert saved.version == 2 and len(saved.overrides) == 1
    assert saved.overrides[0].executive == "Ann Smith" and saved.overrides[0].note == "board statement of 3 May"
    assert store.get_mapping("desk map", 1).overrides == ()  # a saved version never changes

    after = load_input(store, roster_id, mapping="desk map:2", window=WINDOW)
    moved = by_year(after) - by_year(before)
    # exactly one departure: 2001 gains a forced and loses a voluntary, nothing else changes
    assert moved.loc[2001].tolist() == [1, -1]
    assert (moved.drop(index=2001) == 0).all().all()
    # the cell path, the firm-cell path (firm bootstrap) and the record path count the same
    record_cells = build_cells(after.records, WINDOW)
    assert after.group_cells().fingerprint() == record_cells.fingerprint()
    pd.testing.assert_frame_equal(after.cells().groups, record_cells.groups)
    assert np.asarray(after.cells().firm_matrix.sum(axis=0)).ravel().sum() == 11  # every departure once
    assert after.records.loc[after.records["id"] == f1, "category"].item() == "forced"
    # the counts' fingerprint (what runs, stored fits and packs check) changes with the override
    assert after.group_cells().fingerprint() != before.group_cells().fingerprint()


def test_a_run_records_the_mapping_version_that_carries_the_override(store: Store) -> None:
    roster_id, f1 = setup(store)
    add_override(store, store.get_roster(roster_id), store.get_mapping("desk map"), f1, "forced", "court filing")
    inp = load_input(store, roster_id, mapping="desk map", window=WINDOW)
    outcome = run_trend(store, inp)
    run = store.get_run(outcome.run_id)
    assert (run.mapping_name, run.mapping_version) == ("desk map", 2)
    assert [o.note for o in store.get_mapping(run.mapping_name, run.mapping_version).overrides] == ["court filing"]
    # statsmodels on the hand-counted table with the override: forced 2,0,1,1,1 of 2,2,2,2,3 per year
    years = np.arange(2001, 2006)
    forced, total = np.array([2, 0, 1, 1, 1]), np.array([2, 2, 2, 2, 3])
    glm = sm.GLM(np.column_stack([forced, total - forced]), sm.add_constant(years - years.mean()),
                 family=sm.families.Binomial()).fit()
    assert outcome.fit.odds_ratio == pytest.approx(float(np.exp(glm.params[1])), rel=1e-6)


def test_overrides_take_precedence_over_rules(store: Store) -> None:
    roster_id, f1 = setup(store)
    rule = ClassificationRule("Retired", "age", "below", 60, "forced")
    with_rule = save_rules(store, store.get_mapping("desk map"), (rule,), note="young retirements")
    roster = store.get_roster(roster_id)
    ruled = load_input(store, roster_id, mapping="desk map:2", window=WINDOW)
    assert by_year(ruled).loc[2001].tolist() == [2, 0]  # F1 (58, Retired) counts as forced by the rule
    saved = add_override(store, roster, with_rule, f1, "voluntary", "stated retirement plan, see minutes")
    assert saved.rules == (rule,)  # the rules are kept in the next version
    after = load_input(store, roster_id, mapping=f"desk map:{saved.version}", window=WINDOW)
    assert by_year(after).loc[2001].tolist() == [1, 1]
    assert resolve_overrides(store, roster, saved)[0].counted_as == "forced"  # what it moved from
    assert after.group_cells().fingerprint() == build_cells(after.records, WINDOW).fingerprint()


def test_an_override_follows_its_record_into_a_refresh_and_one_whose_record_is_gone_is_reported(
        store: Store) -> None:
    roster_id, f1 = setup(store)
    roster = store.get_roster(roster_id)
    records = store.departures(roster_id)
    f4 = int(records.loc[records["firm_id"] == "F4", "id"].iloc[0])
    v2 = add_override(store, roster, store.get_mapping("desk map"), f1, "forced", "board statement")
    v3 = add_override(store, roster, v2, f4, "excluded", "acting chief, not a departure")
    import_roster(store, V2.encode(), "desk-week2.csv", into=roster_id)
    refreshed = load_input(store, roster_id, mapping=f"desk map:{v3.version}", window=WINDOW)
    resolved = refreshed.overrides
    assert [r.applied for r in resolved] == [True, False]
    assert "holds no such departure" in resolved[1].not_applied
    assert any("not applied" in w and "F4" in w for w in refreshed.warnings())
    # hand count of V2 (F4 gone, F1 moved to forced): forced 2,0,1,1,1; voluntary 0,1,1,1,2
    assert by_year(refreshed)["forced"].tolist() == [2, 0, 1, 1, 1]
    assert by_year(refreshed)["voluntary"].tolist() == [0, 1, 1, 1, 2]
    assert refreshed.group_cells().fingerprint() == build_cells(refreshed.records, WINDOW).fingerprint()


def test_saving_codes_keeps_the_overrides_and_removing_one_saves_the_next_version(store: Store) -> None:
    roster_id, f1 = setup(store)
    roster = store.get_roster(roster_id)
    v2 = add_override(store, roster, store.get_mapping("desk map"), f1, "forced", "first note")
    v3 = store.save_mapping_version("desk map", CATEGORIES | {"Resigned": "excluded"})
    assert [o.note for o in v3.overrides] == ["first note"]
    again = add_override(store, roster, v3, f1, "excluded", "second thoughts")  # the same record: replaced
    assert [(o.category, o.note) for o in again.overrides] == [("excluded", "second thoughts")]
    with pytest.raises(MappingConflict):
        add_override(store, roster, v2, f1, "voluntary", "stale edit")
    gone = remove_override(store, again, 1)
    assert gone.overrides == () and gone.version == again.version + 1
    with pytest.raises(StoreError, match="no override number 1"):
        remove_override(store, gone, 1)


def test_an_override_needs_a_note_of_bounded_length_and_a_known_category(store: Store) -> None:
    roster_id, f1 = setup(store)
    roster, mapping = store.get_roster(roster_id), store.get_mapping("desk map")
    with pytest.raises(StoreError, match="needs a note"):
        add_override(store, roster, mapping, f1, "forced", "   ")
    with pytest.raises(StoreError, match="at most 500"):
        add_override(store, roster, mapping, f1, "forced", "x" * 501)
    with pytest.raises(StoreError, match="category must be one of"):
        add_override(store, roster, mapping, f1, "sacked", "note")
    with pytest.raises(StoreError, match="not a record of the current version"):
        add_override(store, roster, mapping, 10**6, "forced", "note")
    assert store.get_mapping("desk map").version == 1  # nothing was saved
    duplicate = CaseOverride(roster_id, "F1", "Ann Smith", 2001, "Retired", "forced", "a", "me", "2026-01-01")
    with pytest.raises(StoreError, match="Two overrides name the same departure"):
        store.save_mapping_version("desk map", CATEGORIES, overrides=[duplicate, duplicate])


def test_exports_state_the_overrides(store: Store) -> None:
    roster_id, f1 = setup(store)
    add_override(store, store.get_roster(roster_id), store.get_mapping("desk map"), f1, "forced",
                 "board statement of 3 May")
    text = provenance_for(load_input(store, roster_id, mapping="desk map", window=WINDOW)).text()
    assert "Case overrides: 1 departure" in text and "voluntary \u2192 forced" in text and "board statement of 3 May" in text and "Ann Smith" in text


def test_the_brief_the_deck_and_the_pack_carry_the_overrides(store: Store) -> None:
    import io
    import shutil
    import subprocess
    import zipfile

    from pptx import Presentation

    from app.analysis.replication import build_pack
    from app.briefing.exports import brief_file, deck_file
    from app.briefing.render import export_available

    if not export_available()[0]:
        pytest.skip(export_available()[1])
    roster_id, f1 = setup(store)
    add_override(store, store.get_roster(roster_id), store.get_mapping("desk map"), f1, "forced",
                 "board statement of 3 May")
    inp = load_input(store, roster_id, mapping="desk map", window=WINDOW)
    deck = Presentation(io.BytesIO(deck_file(store, inp, ["trend"])))
    methods = " ".join(sh.text_frame.text for s in deck.slides for sh in s.shapes if sh.has_text_frame
                       and "Methods" in s.shapes.title.text_frame.text)
    assert "Case overrides: 1 departure" in methods and "board statement of 3 May" in methods
    run = run_trend(store, inp)
    with zipfile.ZipFile(io.BytesIO(build_pack(store, run.run_id).data)) as pack:
        rows = pd.read_csv(pack.open("overrides.csv"))
        assert "Ann Smith" not in pack.read("overrides.csv").decode()  # no executive without the records
    assert rows[["firm_id", "year", "counted_as", "category", "note"]].values.tolist() == [
        ["F1", 2001, "voluntary", "forced", "board statement of 3 May"]]
    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (poppler-utils) is not installed")
    text = " ".join(subprocess.run(["pdftotext", "-layout", "-", "-"], input=brief_file(store, inp),
                                   capture_output=True, check=True).stdout.decode().split())
    assert "Mapping overrides: 1 set case by case" in text and "Case overrides: 1 departure" in text


def test_robustness_reads_the_trend_with_and_without_the_overrides(store: Store) -> None:
    from app.analysis.robustness import check_robustness

    roster_id, f1 = setup(store)
    add_override(store, store.get_roster(roster_id), store.get_mapping("desk map"), f1, "forced", "court filing")
    inp = load_input(store, roster_id, mapping="desk map", window=WINDOW)
    result = check_robustness(store, inp, ambiguous_excluded=False, vary=["Resigned"])
    kinds = {v.kind: v for v in result.variants}
    # hand counts: 4 Dismissed of 11, so 5 forced with the override (F1 moved), 4 without
    assert (kinds["reference"].departures, kinds["reference"].forced) == (11, 5)
    assert (kinds["overrides-off"].departures, kinds["overrides-off"].forced) == (11, 4)
    assert "voluntary \u2192 forced" in kinds["overrides-off"].changes[0]
    # a reading derived from the mapping keeps the override: Resigned (4 departures) excluded leaves 7, 5 forced
    excluded = next(v for v in result.variants if v.label == "Resigned as excluded")
    assert (excluded.departures, excluded.forced) == (7, 5)


def test_the_command_line_adds_lists_and_removes_overrides(capsys: pytest.CaptureFixture[str], tmp_path: Path
                                                          ) -> None:
    import json

    from app.cli import main

    db = tmp_path / "cli.db"
    store = Store(f"sqlite:///{db}")
    roster_id, _ = setup(store)
    store.dispose()

    def run(*argv: str) -> tuple[int, Any, str]:
        code = main([*argv, "--db", str(db)])
        out, err = capsys.readouterr()
        return code, (json.loads(out) if code == 0 and "--json" in argv else out), err

    # line 2 of the file (after the header) is F1, Ann Smith, 2001
    code, added, _ = run("override", "add", "desk", "--line", "2", "--category", "forced", "--note",
                         "board statement of 3 May", "--mapping", "desk map", "--json")
    assert code == 0 and added["mapping"] == "desk map:2"
    assert [(o["record"], o["counted_as"], o["category"]) for o in added["overrides"]] == [
        ("firm F1, Ann Smith, FY2001", "voluntary", "forced")]
    code, coverage, _ = run("coverage", "--roster", "desk", "--mapping", "desk map", "--json")
    # hand count: 2001 holds F1 (now forced) and F2 (Dismissed)
    assert code == 0 and [(y["forced"], y["voluntary"]) for y in coverage["years"] if y["year"] == 2001] == [(2, 0)]
    code, text, _ = run("override", "list", "desk", "--mapping", "desk map")
    assert "1. firm F1, Ann Smith, FY2001: voluntary -> forced" in text
    code, _, err = run("override", "add", "desk", "--line", "99", "--category", "forced", "--note", "x",
                       "--mapping", "desk map")
    assert code == 1 and err.count("\n") == 1 and "no accepted departure on line 99" in err
    code, _, err = run("override", "add", "desk", "--line", "3", "--category", "forced", "--note", " ",
                       "--mapping", "desk map")
    assert code == 1 and "needs a note" in err
    code, _, err = run("override", "add", "desk", "--category", "forced", "--note", "x", "--mapping", "desk map")
    assert code == 2 and "--line N" in err
    code, _, err = run("override", "add", "desk", "--line", "2", "--category", "forced", "--note", "x")
    assert code == 1 and "has no reason-code mapping yet" in err
    code, removed, _ = run("override", "remove", "desk", "1", "--mapping", "desk map", "--json")
    assert code == 0 and removed["mapping"] == "desk map:3" and removed["overrides"] == []
    code, _, err = run("override", "remove", "desk", "1", "--mapping", "desk map")
    assert code == 1 and "no override number 1" in err
    assert roster_id == 1
