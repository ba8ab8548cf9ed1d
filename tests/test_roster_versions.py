"""Roster refreshes (issue 14, part 2): next week's file as the roster's next version, its diff, and runs that
keep reading the version they were made on.

The files are invented here; the expected counts follow from the identity rule the issue states
((firm id, executive, fiscal year), else (firm id, fiscal year, reason code)), worked out by hand beside each
check. The trend fits are checked against statsmodels' GLM on the same counts (``statsmodels_trend`` in
conftest), so "reopens with its original numbers" is checked against something outside the project.
"""

from __future__ import annotations

import io
import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import DEMO_CSV, statsmodels_trend

from app.analysis.inputs import input_for_run, load_input
from app.analysis.runs import run_trend
from app.cli import main
from app.intake.ingest import DuplicateRosterError, RosterFileError, import_roster
from app.intake.refresh import diff_versions
from app.stats.cells import assign_categories
from app.store import DepartureFilter, Store, StoreError

HEADER = "firm_id,firm_name,sector,year,date,reason,executive\n"
V1 = HEADER + (
    "F1,Alpha,Energy,2001,2001-03-01,Retired,Ann Smith\n"
    "F2,Beta,Energy,2002,2002-05-01,Dismissed,Bob Jones\n"
    "F3,Gamma,Retail,2003,2003-06-01,Retired,\n"
    "F4,Delta,Retail,2004,2004-07-01,Resigned,Dee Doe\n"
    "F5,Eps,Retail,2005,2005-07-01,Resigned,Eve Roe\n"
    "F9,Nine,Retail,2005,not a date,Resigned,Nia Poe\n"
)
# against V1: F1 same person in other case and spacing, code in other spelling -> unchanged;
# F2 gone -> removed; F3 (no executive) unchanged; F4 date moved -> changed (date);
# F5 sector moved -> changed (sector); F6 new -> added; F9 still rejected.
V2 = HEADER + (
    "F1,Alpha,Energy,2001,2001-03-01,RETIRED ,ann  smith\n"
    "F3,Gamma,Retail,2003,2003-06-01,Retired,\n"
    "F4,Delta,Retail,2004,2004-08-01,Resigned,Dee Doe\n"
    "F5,Eps,Utilities,2005,2005-07-01,Resigned,Eve Roe\n"
    "F6,Six,Energy,2006,2006-01-15,Dismissed,Sam Poe\n"
    "F9,Nine,Retail,2005,not a date,Resigned,Nia Poe\n"
)


def imported(store: Store) -> int:
    return import_roster(store, V1.encode(), "desk.csv", name="desk").roster.id


def test_a_refresh_reports_exactly_the_added_removed_and_changed_records(store: Store) -> None:
    rid = imported(store)
    report = import_roster(store, V2.encode(), "desk-week2.csv", into="desk")
    assert (report.version, report.added, report.removed, report.changed) == (2, 1, 1, 2)
    assert report.roster.id == rid and report.roster.is_latest
    assert report.as_dict()["version"] == 2 and report.as_dict()["changed"] == 2
    diff = diff_versions(store, rid, 1, 2)
    assert (diff.added, diff.removed, diff.changed, diff.unchanged) == (1, 1, 2, 2)
    assert [r["firm_id"] for r in diff.added_records] == ["F6"]
    assert [r["firm_id"] for r in diff.removed_records] == ["F2"]
    changes = {c.after["firm_id"]: c.fields for c in diff.changed_records}
    assert changes == {"F4": ("date",), "F5": ("sector",)}
    f4 = next(c for c in diff.changed_records if c.after["firm_id"] == "F4")
    assert (f4.before["date"], f4.after["date"]) == ("2004-07-01", "2004-08-01")


def test_without_an_executive_the_reason_code_is_part_of_the_identity(store: Store) -> None:
    imported(store)
    # F3 has no executive: another reason code is another departure (one removed, one added), not a change
    v2 = V1.replace("F3,Gamma,Retail,2003,2003-06-01,Retired,", "F3,Gamma,Retail,2003,2003-06-01,Dismissed,")
    report = import_roster(store, v2.encode(), "w2.csv", into="desk")
    assert (report.added, report.removed, report.changed) == (1, 1, 0)
    # with an executive, the same change of reason is a changed record
    v3 = v2.replace("F4,Delta,Retail,2004,2004-07-01,Resigned,Dee Doe", "F4,Delta,Retail,2004,2004-07-01,Dismissed,Dee Doe")
    report = import_roster(store, v3.encode(), "w3.csv", into="desk")
    assert (report.version, report.added, report.removed, report.changed) == (3, 0, 0, 1)
    assert diff_versions(store, "desk", 2, 3).changed_records[0].fields == ("reason",)


def test_repeated_identities_are_matched_occurrence_by_occurrence(store: Store) -> None:
    rows = "F1,A,Energy,2001,2001-03-01,Retired,\nF1,A,Energy,2001,2001-04-01,Retired,\n"
    import_roster(store, (HEADER + rows).encode(), "a.csv", name="twice")
    # the second occurrence disappears: one removed, the first stays unchanged
    report = import_roster(store, (HEADER + rows.splitlines()[0] + "\n").encode(), "b.csv", into="twice")
    assert (report.added, report.removed, report.changed) == (0, 1, 0)


def test_every_version_stays_stored_and_reads_default_to_the_newest(store: Store) -> None:
    rid = imported(store)
    import_roster(store, V2.encode(), "w2.csv", into=rid)
    assert [v.version for v in store.roster_versions(rid)] == [1, 2]
    assert [v.source_name for v in store.roster_versions(rid)] == ["desk.csv", "w2.csv"]
    assert len(store.departures(rid)) == 5 and len(store.departures(rid, version=1)) == 5
    assert sorted(store.departures(rid)["firm_id"]) == ["F1", "F3", "F4", "F5", "F6"]
    assert sorted(store.departures(rid, version=1)["firm_id"]) == ["F1", "F2", "F3", "F4", "F5"]
    assert int(store.cell_counts(rid)["departures"].sum()) == 5
    assert set(store.cell_counts(rid, 1)["sector"]) == {"Energy", "Retail"}
    assert "Utilities" in set(store.cell_counts(rid)["sector"])
    assert store.firm_counts(rid)[0] == 5 and "F6" in set(store.firm_cell_counts(rid)["firm_id"])
    assert "F6" not in set(store.firm_cell_counts(rid, 1)["firm_id"])
    assert len(store.rejected(rid)) == 1 and len(store.rejected(rid, version=1)) == 1
    # the record browser lists the newest version unless asked for another
    assert store.count_departures(rid, DepartureFilter()) == 5
    assert store.count_departures(rid, DepartureFilter(firm="F2")) == 0
    assert store.count_departures(rid, DepartureFilter(firm="F2", version=1)) == 1
    assert "Utilities" in store.departure_facets(rid)["sectors"]
    assert "Utilities" not in store.departure_facets(rid, 1)["sectors"]
    old = store.get_roster(rid, version=1)
    assert (old.version, old.latest_version, old.source_name, old.is_latest) == (1, 2, "desk.csv", False)
    with pytest.raises(StoreError, match="no version 3"):
        store.get_roster(rid, version=3)


def test_the_same_file_twice_into_one_roster_is_refused_and_nothing_is_stored(store: Store) -> None:
    rid = imported(store)
    with pytest.raises(RosterFileError, match="already version 1 of roster 'desk'"):
        import_roster(store, V1.encode(), "again.csv", into=rid)
    assert [v.version for v in store.roster_versions(rid)] == [1]
    # a file already stored as another roster is still named as such
    import_roster(store, V2.encode(), "other.csv", name="other")
    with pytest.raises(DuplicateRosterError, match="'other'"):
        import_roster(store, V2.encode(), "w2.csv", into=rid)
    with pytest.raises(RosterFileError, match="No roster called 'nope'"):
        import_roster(store, V2.encode(), "w2.csv", into="nope")


def test_a_refresh_keeps_the_roles_the_roster_was_imported_with(store: Store) -> None:
    # "Notes" would not be chosen as the reason by itself; the roster's first import names it explicitly
    text = "firm_id,year,Notes\nF1,2001,Retired\nF2,2002,Dismissed\n"
    rid = import_roster(store, text.encode(), "a.csv", name="r", roles={"reason": "Notes"}).roster.id
    report = import_roster(store, (text + "F3,2003,Retired\n").encode(), "b.csv", into=rid)
    assert report.roles["reason"] == "Notes" and report.added == 1


def test_deleting_a_roster_deletes_every_version_and_its_id_is_not_reused(store: Store) -> None:
    rid = imported(store)
    import_roster(store, V2.encode(), "w2.csv", into=rid)
    store.delete_roster(rid)
    with store.engine.connect() as conn:
        for table in ("roster_versions", "departures", "rejected_rows", "roster_cells", "roster_firm_cells"):
            assert conn.exec_driver_sql(f"SELECT COUNT(*) FROM {table}").scalar_one() == 0, table
    assert import_roster(store, V1.encode(), "desk.csv", name="desk").roster.id > rid


def test_audit_trail_records_the_new_version(store: Store) -> None:
    rid = imported(store)
    import_roster(store, V2.encode(), "w2.csv", into=rid)
    events = [e for e in store.audit_events() if e.target == f"roster:{rid}"]
    assert [e.action for e in events] == ["import_version", "import"]  # newest first
    assert events[0].detail["version"] == 2 and events[0].detail["source"] == "w2.csv"


# -- runs keep their version --------------------------------------------------------------------------
def refreshed_demo() -> bytes:
    """The demo roster with its first 300 rows gone and 100 rows turned into board dismissals."""
    frame = pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False).iloc[300:].reset_index(drop=True)
    frame.loc[frame.index[:100], "Exit Reason"] = "Dismissed by board"
    out = io.StringIO()
    frame.to_csv(out, index=False)
    return out.getvalue().encode()


def test_a_run_made_before_the_refresh_reopens_with_its_original_numbers(demo_store: Store) -> None:
    before = load_input(demo_store, 1)
    outcome = run_trend(demo_store, before)
    stored = demo_store.get_run(outcome.run_id)
    assert stored.roster_version == 1
    # statsmodels on the same counts (conftest.statsmodels_trend): the fit the run stored
    c = before.counts
    c = c[c["category"].isin(["forced", "voluntary"]) & c["year"].between(*before.window)]
    total = c.groupby("year")["departures"].sum()
    forced = c[c["category"] == "forced"].groupby("year")["departures"].sum().reindex(total.index, fill_value=0)
    per_year = pd.DataFrame({"year": total.index, "forced": forced.to_numpy(), "total": total.to_numpy()})
    reference = float(np.exp(statsmodels_trend(per_year, before.window).params[1]))
    assert stored.result is not None
    assert stored.result["odds_ratio"] == pytest.approx(reference, rel=1e-7)

    report = import_roster(demo_store, refreshed_demo(), "demo-week2.csv", into=1)
    assert (report.version, report.removed) == (2, 300) and report.changed >= 90

    reopened = input_for_run(demo_store, demo_store.get_run(outcome.run_id))
    assert reopened.roster.version == 1 and not reopened.roster.is_latest
    pd.testing.assert_frame_equal(reopened.counts, before.counts)
    assert run_trend(demo_store, reopened).fit.odds_ratio == pytest.approx(stored.result["odds_ratio"], rel=1e-12)
    assert len(reopened.records) == before.roster.accepted

    now = load_input(demo_store, 1, window=before.window)
    assert now.roster.version == 2
    newer = run_trend(demo_store, now)
    assert newer.run_id != outcome.run_id and demo_store.get_run(newer.run_id).roster_version == 2
    assert int(now.counts["departures"].sum()) == before.roster.accepted - 300
    records = demo_store.departures(1)
    categories = assign_categories(records["reason"], now.mapping.categories if now.mapping else {})
    assert int((categories == "forced").sum()) == int(now.counts.loc[now.counts["category"] == "forced",
                                                                     "departures"].sum())


# -- command line -------------------------------------------------------------------------------------
def cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, Any, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, json.loads(out) if out.strip().startswith("{") else out, err


def test_cli_import_into_and_roster_diff(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    db = str(tmp_path / "cli.db")
    (tmp_path / "w1.csv").write_text(V1)
    (tmp_path / "w2.csv").write_text(V2)
    code, first, _ = cli(capsys, "import", str(tmp_path / "w1.csv"), "--db", db, "--name", "desk", "--json")
    assert code == 0 and (first["version"], first["added"]) == (1, 5)
    code, second, _ = cli(capsys, "import", str(tmp_path / "w2.csv"), "--db", db, "--into", "desk", "--json")
    assert code == 0
    assert (second["roster"], second["version"], second["added"], second["removed"], second["changed"]) == (
        "desk", 2, 1, 1, 2)
    code, diff, _ = cli(capsys, "roster", "diff", "desk", "--from", "1", "--to", "2", "--db", db, "--json")
    assert code == 0 and (diff["added"], diff["removed"], diff["changed"]) == (1, 1, 2)
    assert diff["removed_records"][0]["firm_id"] == "F2"
    code, text, _ = cli(capsys, "roster", "diff", "desk", "--db", db)
    assert code == 0 and "version 1 -> 2: 1 added, 1 removed, 2 changed" in text
    code, _, err = cli(capsys, "roster", "diff", "desk", "--from", "1", "--to", "5", "--db", db)
    assert code != 0 and "no version 5" in err


# -- two processes on one store ------------------------------------------------------------------------
def _version_file(tmp_path: Path, k: int) -> Path:
    """V2 with one more invented departure per file, so each refresh differs from the one before it."""
    path = tmp_path / f"week{k}.csv"
    path.write_text(V2 + f"G{k},Extra {k},Energy,2007,2007-0{k}-01,Resigned,Exec {k}\n")
    return path


def test_refreshes_of_one_roster_from_three_processes_take_successive_versions(db_url: str, tmp_path: Path) -> None:
    import subprocess
    import sys

    first = tmp_path / "w1.csv"
    first.write_text(V1)
    base = [sys.executable, "-m", "app.cli", "import"]
    done = subprocess.run([*base, str(first), "--db", db_url, "--name", "desk", "--json"], capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    # three refreshes at once: each must become its own version (before the fix two of them read the same
    # current version and one failed with a raw UNIQUE-constraint traceback)
    procs = [subprocess.Popen([*base, str(_version_file(tmp_path, k)), "--db", db_url, "--into", "desk", "--json"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for k in (1, 2, 3)]
    reports = []
    for proc in procs:
        out, err = proc.communicate(timeout=180)
        assert proc.returncode == 0, err[-2000:]
        reports.append(json.loads(out))
    assert sorted(r["version"] for r in reports) == [2, 3, 4]
    store = Store(db_url)
    try:
        versions = store.roster_versions(store.get_roster("desk").id)
        assert [v.version for v in versions] == [1, 2, 3, 4]
        # each report's diff is against the version just before it, whichever process stored that one
        # (worked out by hand: V2 against V1 is 1 added, 1 removed, 2 changed, plus the file's extra row;
        # against another week's file: its own extra row added, the other's removed)
        for report in reports:
            expected = (2, 1, 2) if report["version"] == 2 else (1, 1, 0)
            assert (report["added"], report["removed"], report["changed"]) == expected, report
    finally:
        store.dispose()


def test_two_processes_naming_one_new_roster_alike_get_one_roster_and_one_clear_error(db_url: str,
                                                                                     tmp_path: Path) -> None:
    import subprocess
    import sys

    files = [_version_file(tmp_path, k) for k in (4, 5)]
    procs = [subprocess.Popen([sys.executable, "-m", "app.cli", "import", str(f), "--db", db_url, "--name", "same",
                               "--json"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for f in files]
    results = [(p.returncode, *p.communicate(timeout=180)) for p in procs]
    results = [(p.returncode, out, err) for p, (_, out, err) in zip(procs, results, strict=True)]
    assert sorted(code for code, _, _ in results) == [0, 1], results
    code, _, err = next(r for r in results if r[0] == 1)
    assert "A roster named 'same' already exists" in err and "Traceback" not in err
    store = Store(db_url)
    try:
        assert [r.name for r in store.list_rosters()] == ["same"]
    finally:
        store.dispose()
