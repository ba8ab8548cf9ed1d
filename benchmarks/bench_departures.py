"""Benchmark: the record browser on a 100,000-row roster (one page of a filtered, sorted list, its total).

Run: ``python benchmarks/bench_departures.py [--rows N]``. Imports the invented roster of
``bench_import.make_roster`` into a fresh SQLite file with a mapping, then times, for several filters, the
store's query (filter, category join, count, sort and the second page of 50 in SQL) against the obvious approach
measured in the same run: read every departure into pandas (``Store.departures``), map categories, filter,
sort and slice in Python. Prints median wall times of 5 repeats and the ratio. Target: a page in under
0.25 s at 100,000 rows.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_import import make_roster  # noqa: E402

from app.intake.ingest import import_roster  # noqa: E402
from app.stats.cells import assign_categories  # noqa: E402
from app.store import DepartureFilter, Store  # noqa: E402

MAPPING = {"Retired": "voluntary", "Health": "voluntary", "New role": "voluntary", "Dismissed": "forced",
           "Resigned - performance": "forced", "Still in post": "excluded"}
FILTERS = {
    "no filter": DepartureFilter(mapping=("bench", 1)),
    "year + forced": DepartureFilter(mapping=("bench", 1), year=2010, category="forced"),
    "sector + counted, window": DepartureFilter(mapping=("bench", 1), sector="Retail", category="counted",
                                                year_from=2000, year_to=2020),
    "free text": DepartureFilter(mapping=("bench", 1), q="42 holdings"),
}


def obvious(store: Store, roster_id: int, flt: DepartureFilter) -> int:
    frame = store.departures(roster_id)
    frame["category"] = assign_categories(frame["reason"], MAPPING)
    keep = frame["year"].notna()
    if flt.year is not None:
        keep &= frame["year"] == flt.year
    if flt.year_from is not None and flt.year_to is not None:
        keep &= frame["year"].between(flt.year_from, flt.year_to)
    if flt.sector is not None:
        keep &= frame["sector"] == flt.sector
    if flt.category == "counted":
        keep &= frame["category"].isin(["forced", "voluntary"])
    elif flt.category is not None:
        keep &= frame["category"] == flt.category
    if flt.q:
        text = frame[["firm_id", "firm_name", "sector", "executive", "reason", "notes"]].fillna("")
        keep &= text.apply(lambda c: c.str.lower().str.contains(flt.q or "", regex=False)).any(axis=1)
    chosen = frame.loc[keep].sort_values("line")
    _ = chosen.iloc[:50].to_dict("records")
    return len(chosen)


def timed(fn: object, repeats: int = 5) -> tuple[float, object]:
    times, result = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        result = fn()  # type: ignore[operator]
        times.append(time.perf_counter() - start)
    return statistics.median(times), result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rows", type=int, default=100_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        store = Store(f"sqlite:///{Path(folder) / 'bench.db'}")
        roster = import_roster(store, make_roster(args.rows), "bench.csv").roster
        store.save_mapping_version("bench", MAPPING)
        print(f"{roster.accepted:,} departures stored")
        print(f"{'filter':<28}{'total':>8}{'SQL page s':>12}{'obvious s':>11}{'ratio':>8}")
        for name, flt in FILTERS.items():
            fast, page = timed(lambda flt=flt: store.find_departures(roster.id, flt, page=2))
            slow, total = timed(lambda flt=flt: obvious(store, roster.id, flt), repeats=3)
            assert page.total == total, (name, page.total, total)  # type: ignore[attr-defined]
            print(f"{name:<28}{total:>8,}{fast:>12.3f}{slow:>11.3f}{slow / fast:>7.1f}x")
        store.dispose()


if __name__ == "__main__":
    main()
