"""The cell store: pages read counts, never the records, and get exactly what counting the records gives.

The reference throughout is the record path as it was before the cell store: ``Store.departures`` (every
record) through ``app.stats.cells.build_cells`` and ``app.stats.coverage.coverage_table``, and
``Store.reason_counts`` (SQL GROUP BY over the records); plus statsmodels through ``fit_trend``.
"""

from __future__ import annotations

import re
import sqlite3
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import event

from app.analysis.cellstore import (
    cells_from_counts,
    code_counts,
    code_counts_apart,
    coverage_from_counts,
    unmapped_codes,
)
from app.analysis.inputs import load_input
from app.analysis.jobs import run_bootstrap_now
from app.analysis.runs import run_trend
from app.stats.cells import assign_categories, build_cells
from app.stats.coverage import coverage_table
from app.stats.trend import fit_trend
from app.stats.trend_report import fit_to_dict
from app.store import HEAD_REVISION, Store
from tests.conftest import make_client

ROSTER = 1
PAGES = ("", "/reasons", "/coverage", "/trend", "/resampling", "/sectors", "/robustness", "/briefing")


def records_through(store: Store, categories: dict[str, str]) -> pd.DataFrame:
    records = store.departures(ROSTER)
    records["category"] = assign_categories(records["reason"], categories)
    return records


@pytest.mark.parametrize("mapping", ["demo standard:1", "demo strict:1"])
@pytest.mark.parametrize("by_sector", [False, True])
@pytest.mark.parametrize("window", [None, (2001, 2010)])
def test_cells_equal_counting_the_records(demo_store: Store, mapping: str, by_sector: bool,
                                          window: tuple[int, int] | None) -> None:
    inp = load_input(demo_store, ROSTER, mapping=mapping, window=window)
    assert inp.mapping is not None
    records = records_through(demo_store, inp.mapping.categories)
    expected = build_cells(records, inp.window, by_sector=by_sector)
    for cells in (inp.group_cells(by_sector=by_sector), inp.cells(by_sector=by_sector)):
        pd.testing.assert_frame_equal(cells.groups, expected.groups)
        assert cells.fingerprint() == expected.fingerprint()
        assert cells.window == expected.window
    firm = inp.cells(by_sector=by_sector)
    assert list(firm.firm_ids) == list(expected.firm_ids)
    assert (firm.firm_matrix != expected.firm_matrix).nnz == 0 and firm.firm_matrix.shape == expected.firm_matrix.shape
    assert inp.group_cells(by_sector=by_sector).firm_matrix.shape[0] == 0  # fits only: no firm rows


def test_default_window_of_counts_is_build_cells_default(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    expected = build_cells(inp.records)  # every year with a counted departure
    got = cells_from_counts(inp.counts)
    assert got.window == expected.window and got.fingerprint() == expected.fingerprint()


@pytest.mark.parametrize("mapping", ["demo standard:1", "demo strict:1", "partial"])
def test_coverage_and_code_tables_equal_the_record_path(demo_store: Store, mapping: str) -> None:
    if mapping == "partial":  # every other code of the standard mapping: the rest are unmapped
        standard = sorted(demo_store.get_mapping("demo standard", 1).categories.items())
        demo_store.save_mapping_version("partial", dict(standard[::2]), author="test")
    inp = load_input(demo_store, ROSTER, mapping=mapping)
    assert inp.mapping is not None
    records = records_through(demo_store, inp.mapping.categories)
    # rows still in post (no date, the demo's "Still in post" code) are no departure of any year: the table
    # counts the others (the span stays 1995-2024: 2024 holds departures too)
    in_post = records["date"].isna() & (records["reason"].str.lower() == "still in post")
    assert inp.in_post == int(in_post.sum()) > 0
    kept = records.loc[~in_post]
    pd.testing.assert_frame_equal(inp.coverage, coverage_table(kept["year"], kept["category"]))
    pd.testing.assert_frame_equal(coverage_from_counts(inp.counts),
                                  coverage_table(records["year"], records["category"]))
    # Store.reason_counts: one SQL GROUP BY over the records, ordered by count then code
    sql = demo_store.reason_counts(ROSTER).astype({"count": np.int64, "first_year": np.int64,
                                                   "last_year": np.int64})
    pd.testing.assert_frame_equal(code_counts(inp.counts), sql)
    # apart: per code its departures (the records less those still in post, years of the departures) and the
    # rows still in post, counted from the records with pandas
    apart = code_counts_apart(inp.counts, inp.in_post_rows).set_index("code")
    for code, rows in kept.groupby("reason"):
        assert (apart.loc[code, "count"], apart.loc[code, "first_year"], apart.loc[code, "last_year"]) == (
            len(rows), rows["year"].min(), rows["year"].max()), code
    assert apart["in_post"].to_dict() == records.loc[in_post, "reason"].value_counts().reindex(
        apart.index, fill_value=0).to_dict()
    assert apart["count"].sum() == len(kept) and apart["in_post"].sum() == inp.in_post
    inside = inp.in_window()
    from_records = inside.loc[inside["category"] == "unmapped", "reason"].value_counts()
    got = unmapped_codes(inp.counts, inp.window)
    assert dict(zip(got["code"], got["count"], strict=True)) == from_records.to_dict()
    assert list(got["count"]) == sorted(got["count"], reverse=True)
    if mapping == "partial":
        assert len(got) > 1  # codes were left unmapped: the checks above compared something


def test_trend_fit_and_run_fingerprint_equal_the_record_path(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    outcome = run_trend(demo_store, inp)
    reference = build_cells(inp.records, inp.window)
    assert demo_store.get_run(outcome.run_id).fingerprint == reference.fingerprint()
    assert fit_to_dict(outcome.fit) == fit_to_dict(fit_trend(reference, "linear"))
    # asked again: the memoised fit, and the same stored run
    again = run_trend(demo_store, load_input(demo_store, ROSTER))
    assert again.run_id == outcome.run_id and fit_to_dict(again.fit) == fit_to_dict(outcome.fit)


def selects(store: Store) -> list[str]:
    """Every SQL statement the store's engine runs from now on (observed, nothing replaced)."""
    seen: list[str] = []
    event.listen(store.engine, "before_cursor_execute",
                 lambda conn, cursor, statement, *args: seen.append(" ".join(statement.split())))
    return seen


def in_post_count(statement: str) -> bool:
    """The count of a roster's rows still in post per year and category (app.analysis.browse.in_post_counts):
    grouped in SQL over the undated rows, a few rows back; not a read of the records."""
    return "GROUP BY" in statement and "departures.date IS NULL" in statement


def reads(statements: list[str], table: str) -> int:
    """How many statements read ``table`` (the still-in-post counts aside)."""
    return sum(1 for s in statements if s.startswith("SELECT") and re.search(rf"\bFROM {table}\b", s)
               and not in_post_count(s))


def test_no_page_reads_the_records(demo_store: Store) -> None:
    client = make_client(demo_store)
    seen = selects(demo_store)
    for page in PAGES:
        assert client.get(f"/rosters/{ROSTER}{page}").status_code == 200, page
        assert client.get(f"/api/rosters/{ROSTER}{page}").status_code in (200, 404), page
    assert reads(seen, "roster_cells") >= 1  # the pages did read the cell store
    # the records are read once: the first page that needs the detailed or firm cells builds them
    # (revision 0016: not stored by the import), in one transaction with their mark
    assert reads(seen, "departures") == 1
    assert sum(map(in_post_count, seen)) >= 1  # Coverage counted the demo's rows still in post apart
    assert reads(seen, "roster_cell_builds") >= 1
    # the roster page's distinct firms (in all and per sector): two queries, once, then memoised; and the
    # Briefing preview's robustness finding, whose readings carry the adjusted odds ratio (issue 16): the firm
    # cells once per check, the readings' measures memoised (the Robustness page reads them only with measures=1)
    assert reads(seen, "roster_firm_cells") == 3
    assert client.get(f"/rosters/{ROSTER}/briefing").status_code == 200
    assert reads(seen, "roster_firm_cells") == 3  # a second visit: memoised
    seen.clear()
    for page in PAGES:  # built: no page reads the records again
        assert client.get(f"/rosters/{ROSTER}{page}").status_code == 200, page
    assert reads(seen, "departures") == 0


def test_the_command_line_bootstrap_reads_the_firm_counts_once(demo_store: Store) -> None:
    demo_store.ensure_detail_cells(ROSTER)  # built once per roster version (their first read), not per job
    seen = selects(demo_store)
    result = run_bootstrap_now(demo_store, load_input(demo_store, ROSTER), unit="firm", resamples=300, seed=5)
    assert result["resamples"] == 300
    assert reads(seen, "roster_firm_cells") == 1 and reads(seen, "departures") == 0
    assert reads(seen, "roster_cells") == 1  # the second load_input (the stored run's) hits the memo


def test_a_new_mapping_version_is_not_served_stale(demo_store: Store) -> None:
    client = make_client(demo_store)
    before = client.get(f"/api/rosters/{ROSTER}/coverage").json()
    mapping = demo_store.get_mapping("demo standard")
    moved = {code: ("excluded" if cat == "forced" else cat) for code, cat in mapping.categories.items()}
    demo_store.save_mapping_version("demo standard", moved, author="test")
    after = client.get(f"/api/rosters/{ROSTER}/coverage").json()
    assert sum(y["forced"] for y in before["table"]) > 0
    assert sum(y["forced"] for y in after["table"]) == 0
    assert after["mapping_label"] == f"demo standard v{mapping.version + 1}"


@pytest.mark.sqlite_only  # reads the SQLite file itself
def test_the_migration_fills_the_cells_of_rosters_stored_before(tmp_path: Path) -> None:
    """A database written by Helmshift 0.1 (tests/data/store-0.1.sql) gets its cells on upgrade, equal to
    counting its departures with pandas."""
    old = tmp_path / "old.db"
    with sqlite3.connect(old) as conn:
        conn.executescript((Path(__file__).parent / "data" / "store-0.1.sql").read_text(encoding="utf-8"))
    store = Store(f"sqlite:///{old}")
    try:
        assert store.schema_version() == int(HEAD_REVISION)
        roster = store.get_roster("Legacy roster")
        records = store.departures(roster.id)
        expected = (records.groupby(["year", "sector", "reason"]).size().rename("departures").reset_index()
                    .sort_values(["year", "sector", "reason"], ignore_index=True))
        cells = store.cell_counts(roster.id)
        got = cells[["year", "sector", "reason", "departures"]].sort_values(["year", "sector", "reason"],
                                                                           ignore_index=True)
        pd.testing.assert_frame_equal(got, expected, check_dtype=False)
        firms = store.firm_cell_counts(roster.id)
        assert int(firms["departures"].sum()) == len(records) == roster.accepted
        assert sorted(firms["firm_id"].unique()) == sorted(records["firm_id"].unique())
    finally:
        store.dispose()


def test_a_roster_without_cells_is_repaired_on_first_read(demo_store: Store) -> None:
    expected = demo_store.cell_counts(ROSTER)
    with demo_store.engine.begin() as conn:
        conn.exec_driver_sql("DELETE FROM roster_cells")
        conn.exec_driver_sql("DELETE FROM roster_firm_cells")
    pd.testing.assert_frame_equal(demo_store.cell_counts(ROSTER), expected)
    assert len(demo_store.firm_cell_counts(ROSTER)) > 0


def test_deleting_a_roster_deletes_its_cells(demo_store: Store) -> None:
    demo_store.delete_roster(ROSTER)
    with demo_store.engine.connect() as conn:
        left: Any = [conn.exec_driver_sql(f"SELECT COUNT(*) FROM {t}").scalar_one()
                     for t in ("roster_cells", "roster_firm_cells")]
    assert left == [0, 0]


# -- rates over a universe, from the firm cells (issue 13: no page reads the departures) ------------------------
@pytest.fixture
def partial_universe(demo_store: Store) -> int:
    """A universe that misses every third firm of the roster, misses two years, and adds years without rows."""
    from app.intake.universe import import_universe

    records = demo_store.departures(ROSTER)
    firms = sorted(records["firm_id"].astype(str).unique())
    first, last = int(records["year"].min()), int(records["year"].max())
    lines = ["firm,year"] + [f"{firm},{year}" for i, firm in enumerate(firms) if i % 3
                             for year in range(first - 1, last + 3) if year not in (first + 4, first + 5)]
    report = import_universe(demo_store, ROSTER, ("\n".join(lines) + "\n").encode(), "partial.csv")
    return report.universe.id


def test_rates_from_cells_equal_joining_every_record(demo_store: Store, partial_universe: int) -> None:
    """Reference: app.stats.rates.count_rates and universe_flags over every record and every firm-year (the
    path the pages took before), and fit_trend over the cells of the records inside the universe."""
    from app.analysis.rates import run_rates, universe_flags, universe_overview
    from app.stats.rates import count_rates

    inp = load_input(demo_store, ROSTER)
    firm_years = demo_store.universe_firm_years(partial_universe)
    records = inp.records
    analysis = run_rates(demo_store, inp, record=False)
    expected = count_rates(records, firm_years, inp.window)
    pd.testing.assert_frame_equal(analysis.table.years, expected.years)
    assert analysis.table.outside == expected.outside > 0
    assert analysis.table.no_universe_years == expected.no_universe_years
    window_years = firm_years.loc[firm_years["year"].between(*inp.window)]
    flags = universe_flags(inp.in_window(), window_years)
    assert analysis.flags == flags and flags.missing_count > 0
    keys = pd.MultiIndex.from_frame(firm_years[["firm_id", "year"]].astype({"firm_id": str, "year": "int64"}))
    inside = records.loc[pd.MultiIndex.from_arrays([records["firm_id"].astype(str),
                                                    records["year"].astype("int64")]).isin(keys)]
    share = fit_trend(build_cells(inside, inp.window))
    assert analysis.share_odds_ratio == share.odds_ratio
    # the Universe page, over every year
    universe = demo_store.get_universe(partial_universe)
    years, overview_flags = universe_overview(demo_store, inp, universe)
    assert overview_flags == universe_flags(records, firm_years) and overview_flags.empty_years
    per_year = firm_years.groupby("year").size()
    rows = records.groupby("year").size().reindex(per_year.index, fill_value=0)
    assert years == [{"year": int(y), "firms": int(n), "roster_rows": int(k)}
                     for y, n, k in zip(per_year.index, per_year, rows, strict=True)]


def test_no_page_reads_the_records_with_a_universe(demo_store: Store, partial_universe: int) -> None:
    client = make_client(demo_store)
    seen = selects(demo_store)
    for page in (*PAGES, "/universe"):
        assert client.get(f"/rosters/{ROSTER}{page}").status_code == 200, page
        assert client.get(f"/api/rosters/{ROSTER}{page}").status_code in (200, 404), page
    assert reads(seen, "departures") == 1  # the one build of the detailed and firm cells (their first read)
    assert reads(seen, "roster_firm_cells") >= 1  # the rates were counted from the firm cells
    # the firm-years are counted in SQL, never read as a list
    assert not [s for s in seen if re.search(r"SELECT universe_firm_years\.firm_id, universe_firm_years\.year", s)]


def test_cells_read_missing_values_last_on_every_backend(store: Store, tmp_path: Path) -> None:
    """SQLite sorts NULL first and PostgreSQL last; the cell reads ask for NULLS LAST so both backends hand the
    analyses the same order (run with ``--backend postgresql`` as well)."""
    from app.intake.ingest import import_roster

    csv = (b"firm_id,sector,year,reason\nA,Energy,2001,Dismissed\nB,,2001,Retired\nC,Banks,2001,Retired\n"
           b"D,,2002,Dismissed\n")
    roster = import_roster(store, csv, "sectors.csv", name="missing sectors").roster
    for frame in (store.cell_counts(roster.id), store.cell_counts(roster.id, detail=True)):
        sectors = list(frame.loc[frame["year"] == 2001, "sector"])
        assert sectors[:2] == ["Banks", "Energy"] and pd.isna(sectors[2]), sectors


def test_cells_filled_at_import_equal_the_databases_own_group_by(store: Store) -> None:
    """The import counts its cells in pandas, and so does the first read of the detailed and firm cells (from
    the stored records); the reference is the database's GROUP BY over the stored departures (``fill_cells``,
    the migration's path). Ages and tenures with fractions, missing values, a
    missing sector, interim flags and several spellings of one code all take part."""
    from sqlalchemy import select

    from app.intake.ingest import import_roster
    from app.store.cells import fill_cells
    from app.store.tables import (
        roster_cell_builds,
        roster_cells,
        roster_detail_cells,
        roster_firm_cells,
        roster_spellings,
    )

    rng = np.random.default_rng(5)
    lines = ["Firm,FY,Reason,Sector,Age,Tenure,Interim"]
    for i in range(600):
        age = "" if i % 7 == 0 else f"{rng.uniform(30, 80):.1f}"
        tenure = "" if i % 5 == 0 else str(rng.choice(["0.5", "3", "3.99", "12", "7.25"]))
        lines.append(f"F{rng.integers(40)},{rng.integers(2000, 2010)},"
                     f"{rng.choice(['Retired', 'retired ', 'Dismissed', 'Health'])},"
                     f"{rng.choice(['', 'Mining', 'Retail'])},{age},{tenure},{rng.choice(['yes', 'no', ''])}")
    report = import_roster(store, "\n".join(lines).encode(), "cells.csv")
    store.ensure_detail_cells(report.roster.id)  # the detailed and firm cells: counted from the stored records
    tables = (roster_cells, roster_detail_cells, roster_spellings, roster_firm_cells)

    def rows() -> dict[str, list[tuple[Any, ...]]]:
        with store.engine.connect() as conn:
            return {t.name: sorted((tuple(r) for r in conn.execute(select(*[c for c in t.c if c.name != "id"]))),
                                   key=repr) for t in tables}

    from_import = rows()
    assert all(from_import.values())
    with store.engine.begin() as conn:
        for t in (*tables, roster_cell_builds):
            conn.execute(t.delete())
        fill_cells(conn, report.roster.id, report.version)
    assert rows() == from_import
