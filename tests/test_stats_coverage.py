"""Tests for app.stats.coverage: the coverage table, the suggested window and suspicious years."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from app.stats.coverage import (
    BASES,
    TABLE_COLUMNS,
    WindowSuggestion,
    YearFlag,
    basis_counts,
    coverage_table,
    flag_years,
    suggest_window,
)

DATA = Path(__file__).parent / "data"
ROOT = Path(__file__).resolve().parents[1]


def table_from_counts(counts: dict[int, int], category: str = "forced") -> pd.DataFrame:
    """A coverage table whose every record has one category, built through coverage_table."""
    years = [y for y, n in counts.items() for _ in range(n)]
    return coverage_table(pd.Series(years), pd.Series([category] * len(years)))


def test_table_counts_every_category_and_keeps_gap_years() -> None:
    years = pd.Series([2001, 2001, 2001, 2003, 2003, 2004])
    cats = pd.Series(["forced", "voluntary", "unmapped", "excluded", "forced", "voluntary"])
    table = coverage_table(years, cats)
    assert list(table.columns) == list(TABLE_COLUMNS)
    assert table["year"].tolist() == [2001, 2002, 2003, 2004]
    assert table.loc[table.year == 2002].iloc[0, 1:].tolist() == [0, 0, 0, 0, 0]
    assert table["departures"].tolist() == [3, 0, 2, 1]
    assert table["forced"].tolist() == [1, 0, 1, 0]
    assert table["unmapped"].tolist() == [1, 0, 0, 0]
    # hand count: departures is the sum of the four category columns
    assert (table["departures"] == table[["forced", "voluntary", "excluded", "unmapped"]].sum(axis=1)).all()


def test_table_rejects_unknown_category_naming_allowed_values() -> None:
    with pytest.raises(ValueError, match="forced, voluntary, excluded, unmapped.*'sacked'"):
        coverage_table(pd.Series([2000]), pd.Series(["sacked"]))
    with pytest.raises(ValueError, match="at least one record"):
        coverage_table(pd.Series([], dtype=int), pd.Series([], dtype=str))


def test_thin_first_and_last_years_are_trimmed() -> None:
    counts = {1990: 5, 1991: 12, **{y: 40 + (y % 3) for y in range(1992, 2008)}, 2008: 15, 2009: 3}
    s = suggest_window(table_from_counts(counts))
    assert isinstance(s, WindowSuggestion)
    assert s.window == (1992, 2008 - 1)
    # hand-derived: 20 yearly counts, sorted middle pair both 40 or 41 -> median of the list
    assert s.median == float(np.median(list(counts.values())))
    assert s.cutoff == pytest.approx(0.5 * s.median)
    assert s.below_cutoff == (1990, 1991, 2008, 2009)
    assert f"median {s.median:g}, so at least {s.cutoff:g}" in s.rule
    assert "50%" in s.rule and "later one" in s.rule


def test_gap_year_breaks_a_run() -> None:
    counts = {**{y: 30 for y in range(2000, 2006)}, **{y: 30 for y in range(2007, 2010)}}
    table = table_from_counts(counts)
    assert 2006 in table["year"].tolist()
    s = suggest_window(table)
    assert s.window == (2000, 2005)  # six years beat three, the empty 2006 splits them
    assert 2006 in s.below_cutoff


def test_flat_roster_keeps_everything() -> None:
    s = suggest_window(table_from_counts({y: 25 for y in range(1980, 2000)}))
    assert s.window == (1980, 1999)
    assert s.below_cutoff == ()


def test_threshold_moves_the_window() -> None:
    counts = {2000: 30, 2001: 60, **{y: 100 for y in range(2002, 2012)}, 2012: 60}
    table = table_from_counts(counts)
    assert suggest_window(table, threshold=0.5).window == (2001, 2012)
    assert suggest_window(table, threshold=0.25).window == (2000, 2012)
    assert suggest_window(table, threshold=0.7).window == (2002, 2011)
    for bad in (0, -0.1, 1.5):
        with pytest.raises(ValueError, match=r"threshold must be in \(0, 1\]"):
            suggest_window(table, threshold=bad)


def test_ties_go_to_the_larger_total_then_the_later_run() -> None:
    # two runs of three years, split by a thin year; the second has more records
    table = table_from_counts({2000: 50, 2001: 50, 2002: 50, 2003: 2, 2004: 60, 2005: 60, 2006: 60})
    assert suggest_window(table).window == (2004, 2006)
    # same lengths and totals: the later run wins
    table = table_from_counts({2000: 50, 2001: 50, 2002: 50, 2003: 2, 2004: 50, 2005: 50, 2006: 50})
    assert suggest_window(table).window == (2004, 2006)
    # the first run larger: it wins despite being earlier
    table = table_from_counts({2000: 70, 2001: 70, 2002: 70, 2003: 2, 2004: 50, 2005: 50, 2006: 50})
    assert suggest_window(table).window == (2000, 2002)


def test_basis_choices() -> None:
    years = pd.Series([2000] * 10 + [2001] * 10 + [2002] * 30)
    cats = pd.Series(["forced"] * 10 + ["voluntary"] * 10 + ["excluded"] * 26 + ["unmapped"] * 4)
    table = coverage_table(years, cats)
    assert basis_counts(table, "departures").tolist() == [10, 10, 30]
    assert basis_counts(table, "not_excluded").tolist() == [10, 10, 4]
    assert basis_counts(table, "counted").tolist() == [10, 10, 0]
    assert suggest_window(table, basis="departures").window == (2000, 2002)
    assert suggest_window(table, basis="not_excluded").window == (2000, 2001)
    assert set(BASES) == {"departures", "not_excluded", "counted"}
    with pytest.raises(ValueError, match="basis must be one of not_excluded, departures, counted"):
        suggest_window(table, basis="all")  # type: ignore[arg-type]
    only_excluded = coverage_table(pd.Series([2000, 2001]), pd.Series(["excluded", "excluded"]))
    with pytest.raises(ValueError, match="cannot suggest a window"):
        suggest_window(only_excluded)


def test_table_must_have_the_coverage_columns() -> None:
    with pytest.raises(ValueError, match="lacks column.*departures"):
        suggest_window(pd.DataFrame({"year": [2000], "forced": [3]}))


def arbuthnot_table() -> pd.DataFrame:
    # Arbuthnot (1710), Philosophical Transactions 27, 186-190, via R HistData (tests/data/README.md);
    # males and females stand in for two categories.
    raw = pd.read_csv(DATA / "arbuthnot_christenings.csv")
    return pd.DataFrame({
        "year": raw["year"], "departures": raw["males"] + raw["females"], "forced": raw["males"],
        "voluntary": raw["females"], "excluded": 0, "unmapped": 0,
    })


def test_repeat_flag_finds_arbuthnot_1704_copying_1674() -> None:
    # Known quirk of the published table (tests/data/README.md): 1704 repeats 1674's counts exactly.
    flags = flag_years(arbuthnot_table(), basis="departures")
    repeats = [f for f in flags if f.kind == "repeat"]
    assert sorted(f.year for f in repeats) == [1674, 1704]
    by_year = {f.year: f.message for f in repeats}
    assert "1674" in by_year[1704] and "1704" in by_year[1674]
    assert "6113" in by_year[1704] and "5738" in by_year[1704]


def test_repeat_needs_non_trivial_counts() -> None:
    table = table_from_counts({2000: 3, 2001: 20, 2002: 3, 2003: 20, 2004: 21})
    repeats = {f.year for f in flag_years(table, min_count=10) if f.kind == "repeat"}
    assert repeats == {2001, 2003}


def test_drop_and_spike_on_a_constructed_series() -> None:
    counts = {2000: 40, 2001: 42, 2002: 15, 2003: 41, 2004: 43, 2005: 95, 2006: 39, 2007: 44}
    flags = flag_years(table_from_counts(counts))
    kinds = {(f.year, f.kind) for f in flags}
    # hand-derived: 15 < (42 + 41) / 2 / 2 = 20.75; 95 > 2 * (43 + 39) / 2 = 82
    assert (2002, "drop") in kinds
    assert (2005, "spike") in kinds
    assert not [f for f in flags if f.year not in (2002, 2005)]
    drop = next(f for f in flags if f.kind == "drop")
    assert "less than half" in drop.message and "41.5" in drop.message
    assert all(isinstance(f, YearFlag) for f in flags)


def test_drop_and_spike_ignore_small_counts() -> None:
    # 1 against 6: less than half, but neighbours below min_count; 9 against 2: below min_count
    counts = {2000: 6, 2001: 1, 2002: 6, 2003: 2, 2004: 9, 2005: 2}
    flags = flag_years(table_from_counts(counts), threshold=0.1)
    assert [f for f in flags if f.kind in ("drop", "spike")] == []
    assert {(f.year, f.kind) for f in flag_years(table_from_counts(counts), threshold=0.1, min_count=1)} >= {
        (2001, "drop"), (2004, "spike")}


def test_below_cutoff_flags_match_the_window_rule() -> None:
    counts = {1995: 8, 1996: 12, **{y: 50 for y in range(1997, 2010)}, 2010: 9}
    table = table_from_counts(counts)
    below = [f.year for f in flag_years(table) if f.kind == "below_cutoff"]
    assert below == list(suggest_window(table).below_cutoff) == [1995, 1996, 2010]


def load_demo() -> tuple[pd.DataFrame, dict]:
    sys.path.insert(0, str(ROOT / "demo_data"))
    try:
        from generate import TRUTH
    finally:
        sys.path.pop(0)
    roster = pd.read_csv(ROOT / "demo_data" / "roster.csv", dtype=str, keep_default_na=False)
    # the minimal parse an importer would do: drop rows without a usable year or firm, and duplicates
    roster = roster.loc[roster["FY"].str.fullmatch(r"\d{4}") & (roster["Issuer Code"] != "")]
    roster = roster.drop_duplicates()
    return roster, TRUTH


@pytest.mark.parametrize("basis", BASES)
def test_demo_roster_window_is_the_true_full_coverage(basis: str) -> None:
    # Truth from the generator (demo_data/generate.py): full coverage 1998-2022 by construction.
    roster, truth = load_demo()
    cats = roster["Exit Reason"].map(truth["code_categories"]).fillna("unmapped")
    table = coverage_table(roster["FY"].astype(int), cats)
    assert suggest_window(table, basis=basis).window == tuple(truth["full_coverage"])  # type: ignore[arg-type]
    thin = [y for y in range(truth["years"][0], truth["years"][1] + 1)
            if not truth["full_coverage"][0] <= y <= truth["full_coverage"][1]]
    if basis != "departures":  # still-in-post rows fill the last year when every record counts
        assert list(suggest_window(table, basis=basis).below_cutoff) == thin  # type: ignore[arg-type]


def test_demo_roster_without_mapping_still_finds_the_window() -> None:
    roster, truth = load_demo()
    table = coverage_table(roster["FY"].astype(int), pd.Series(["unmapped"] * len(roster)))
    assert suggest_window(table).window == tuple(truth["full_coverage"])
