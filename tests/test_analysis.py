"""app.analysis (inputs, runs, mapping files): reading a roster through a mapping and a window, recording fits, mapping files."""

from __future__ import annotations

import csv
import io
from typing import Any

import pandas as pd
import pytest
from conftest import DEMO_CSV, DEMO_DIR, read_mapping

from app.analysis.inputs import load_input, parse_mapping_ref
from app.analysis.mapping_files import export_mapping_csv, import_mapping_file
from app.analysis.provenance import provenance_for
from app.analysis.runs import coverage_summary, fit_summary, run_sectors, run_trend
from app.intake.ingest import import_roster
from app.intake.reasons import MappingFileError
from app.store import Store, StoreError

ROSTER = 1


@pytest.mark.parametrize(("ref", "expected"), [
    ("demo strict", ("demo strict", None)), ("demo strict:2", ("demo strict", 2)),
    ("a:b", ("a:b", None)), ("x:y:3", ("x:y", 3)),
])
def test_parse_mapping_ref(ref: str, expected: tuple[str, int | None]) -> None:
    assert parse_mapping_ref(ref) == expected


def test_window_precedence_given_then_chosen_then_suggested(demo_store: Store,
                                                            demo_truth: dict[str, Any]) -> None:
    inp = load_input(demo_store, ROSTER)
    assert (inp.window, inp.window_source) == (tuple(demo_truth["full_coverage"]), "suggested")
    demo_store.update_settings(ROSTER, window=(2001, 2019))
    assert (load_input(demo_store, ROSTER).window, load_input(demo_store, ROSTER).window_source) == (
        (2001, 2019), "chosen")
    given = load_input(demo_store, "Demo index (invented)", window=(2005, 2010))
    assert (given.window, given.window_source) == ((2005, 2010), "given")
    with pytest.raises(StoreError, match="outside the roster's years 1995–2024"):
        load_input(demo_store, ROSTER, window=(1950, 1960))
    with pytest.raises(StoreError, match="No roster called"):
        load_input(demo_store, "nobody")


def test_mapping_choice_and_version(demo_store: Store, demo_clean: pd.DataFrame) -> None:
    inp = load_input(demo_store, ROSTER, mapping="demo strict:1")
    assert inp.mapping_label == "demo strict v1"
    # categories per record follow mapping-strict.csv (pandas)
    expected = demo_clean["Exit Reason"].map(read_mapping("mapping-strict.csv")).value_counts().to_dict()
    assert inp.records["category"].value_counts().to_dict() == expected
    assert inp.warnings() == [] and inp.unmapped_codes().empty
    with pytest.raises(StoreError, match="version 9"):
        load_input(demo_store, ROSTER, mapping="demo strict:9")


def test_roster_without_mapping(store: Store) -> None:
    roster = import_roster(store, DEMO_CSV.read_bytes(), "roster.csv").roster
    with pytest.raises(StoreError, match="no reason-code mapping"):
        load_input(store, roster.id)
    inp = load_input(store, roster.id, require_mapping=False)
    assert inp.mapping is None and inp.mapping_label == "no mapping"
    assert set(inp.records["category"]) == {"unmapped"}


def test_coverage_summary_keys(demo_store: Store, demo_truth: dict[str, Any]) -> None:
    summary = coverage_summary(load_input(demo_store, ROSTER))
    assert summary["suggested_window"] == list(demo_truth["full_coverage"])
    assert [y["year"] for y in summary["years"]] == list(range(1995, 2025))
    assert "median" in summary["rule"]


def test_import_mapping_file_reports_codes(store: Store) -> None:
    roster = import_roster(store, DEMO_CSV.read_bytes(), "roster.csv").roster
    data = b"code,category,label\nRetired,voluntary,Retirement\nFlew to the moon,excluded,\n"
    outcome = import_mapping_file(store, data, roster=roster.id, name="tiny")
    assert (outcome["mapping"], outcome["version"], outcome["codes"]) == ("tiny", 1, 2)
    assert outcome["not_in_roster"] == ["Flew to the moon"]
    standard = read_mapping("mapping-standard.csv")
    assert outcome["unmapped_in_roster"] == sorted(set(standard) - {"Retired"})
    assert store.settings(roster.id).mapping_name == "tiny"  # the first mapping becomes the roster's
    # another spelling of a roster code is that code, not a code "not in the roster"
    spelled = b"code,category\nRETIRED,voluntary\n\"died  in office \",voluntary\n"
    outcome = import_mapping_file(store, spelled, roster=roster.id, name="spelled")
    assert outcome["not_in_roster"] == []
    assert outcome["unmapped_in_roster"] == sorted(set(standard) - {"Retired", "Died in office"})
    before = store.counts()
    with pytest.raises(MappingFileError, match="Line 2"):
        import_mapping_file(store, b"code,category\nRetired,maybe\n", roster=roster.id, name="tiny")
    assert store.counts() == before


def test_export_mapping_csv_neutralises_formulas(demo_store: Store) -> None:
    demo_store.save_mapping_version("risky", {"=1+1": "forced", "Retired": "voluntary"},
                                    {"Retired": "@SUM(A1)"})
    rows = list(csv.reader(io.StringIO(export_mapping_csv(demo_store, name="risky"))))
    assert rows[0] == ["code", "category", "label"]
    cells = [c for r in rows[1:] for c in r]
    # OWASP CSV injection advice: formula triggers get a leading apostrophe
    assert "'=1+1" in cells and "'@SUM(A1)" in cells
    text = export_mapping_csv(demo_store, name="demo standard", version=1)
    assert text == export_mapping_csv(demo_store, name="demo standard")
    assert len(text.strip().splitlines()) == 1 + len(read_mapping("mapping-standard.csv"))
    assert (DEMO_DIR / "mapping-standard.csv").is_file()


def test_provenance_names_the_data(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    prov = provenance_for(inp, resamples=2000, seed=9, unit="firm")
    assert prov.roster_fingerprint == inp.cells().fingerprint()
    assert (prov.mapping_name, prov.mapping_version, prov.window) == ("demo standard", 1, (1998, 2022))
    groups = dict(prov.categories)
    standard = read_mapping("mapping-standard.csv")
    assert set(groups["forced"]) == {c for c, k in standard.items() if k == "forced"}
    assert "B = 2,000 resamples" in prov.short() and "seed 9" in prov.short()


def test_provenance_states_the_rows_used(demo_store: Store, demo_frame: pd.DataFrame,
                                        demo_clean: pd.DataFrame) -> None:
    # the counts come from pandas reading demo_data/roster.csv (conftest demo_frame/demo_clean), not from the store
    cols = [c for c in demo_frame.columns if c != "line"]
    duplicates = int(demo_frame.duplicated(subset=cols).sum())
    rejected = len(demo_frame) - duplicates - len(demo_clean)
    assert duplicates > 0 and rejected > 0  # the demo file carries both on purpose (demo_data/README.md)
    expected = (f"{len(demo_clean):,} of {len(demo_frame):,} rows ({duplicates} exact duplicates stored once); "
                f"{rejected:,} rejected, see Rosters")
    prov = provenance_for(load_input(demo_store, ROSTER))
    assert prov.rows_used == expected
    assert f"Rows used: {expected}" in prov.lines()


def test_fits_are_recorded_once_per_input(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    first = run_trend(demo_store, inp)
    assert run_trend(demo_store, inp).run_id == first.run_id
    spline = run_trend(demo_store, inp, model="spline")
    assert spline.run_id != first.run_id
    assert demo_store.get_run(spline.run_id).params == {"model": "spline", "spline_df": 3}
    _, sectors_run = run_sectors(demo_store, inp)
    assert run_sectors(demo_store, inp)[1] == sectors_run
    assert len(demo_store.list_runs(ROSTER, "fit")) == 3
    stored = demo_store.get_run(first.run_id).result
    assert stored["odds_ratio"] == pytest.approx(first.fit.odds_ratio)


def test_fit_summary_with_sectors(demo_store: Store) -> None:
    payload = fit_summary(demo_store, load_input(demo_store, ROSTER), by_sector=True)
    assert {"sentence", "warnings", "run", "sectors", "heterogeneity", "sector_messages"} <= set(payload)
    assert payload["mapping"] == "demo standard v1"
    assert {s["sector"] for s in payload["sectors"]} == set(read_sectors())


def read_sectors() -> list[str]:
    return pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False)["Industry"].replace("", pd.NA).dropna().unique().tolist()
