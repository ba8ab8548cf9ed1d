"""Benchmark: the record browser on a 100,000-row roster (one page of a filtered, sorted list, its total).

Run: ``python benchmarks/bench_departures.py [--rows N]``. Imports the invented roster of
``bench_import.make_roster`` into a fresh SQLite file with a mapping, then times, for several filters, the
store's query (filter, the category CASE, count, sort and the second page of 50 in SQL) against the obvious
approach measured in the same run: read every departure into pandas (``Store.departures``), classify (codes,
then rules), filter, sort and slice in Python. Each filter runs under the plain mapping and under a version with
two classification rules (retired below 60 -> forced, dismissed below 2 years' tenure -> excluded) and 200
case overrides. Prints median wall and CPU times of 5 repeats and the ratio. Target: a page in under 0.25 s
at 100,000 rows.
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

from app.analysis.browse import departure_filter  # noqa: E402
from app.analysis.cellstore import categorise_with  # noqa: E402
from app.analysis.overrides import override_for, resolve_overrides  # noqa: E402
from app.intake.ingest import import_roster  # noqa: E402
from app.store import DepartureFilter, MappingVersion, Roster, Store  # noqa: E402
from app.types import ClassificationRule  # noqa: E402

MAPPING = {"Retired": "voluntary", "Health": "voluntary", "New role": "voluntary", "Dismissed": "forced",
           "Resigned - performance": "forced", "Still in post": "excluded"}
RULES = (ClassificationRule("Retired", "age", "below", 60, "forced"),
         ClassificationRule("Dismissed", "tenure", "below", 2, "excluded"))
OVERRIDES = 200
FILTERS: dict[str, dict[str, object]] = {
    "no filter": {},
    "year + forced": {"year": 2010, "category": "forced"},
    "sector + counted, window": {"sector": "Retail", "category": "counted", "year_from": 2000, "year_to": 2020},
    "free text": {"q": "42 holdings"},
}


def obvious(store: Store, roster_id: int, flt: DepartureFilter, mapping: MappingVersion) -> int:
    frame = store.departures(roster_id)
    frame = categorise_with(frame, mapping.categories, mapping.rules)[0]
    overridden = dict(flt.overrides)
    if overridden:
        frame.loc[frame["id"].isin(overridden), "category"] = frame["id"].map(overridden)
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


def timed(fn: object, repeats: int = 5) -> tuple[float, float, object]:
    """Median wall and CPU seconds of ``repeats`` calls, and the last result."""
    walls, cpus, result = [], [], None
    for _ in range(repeats):
        start, cpu = time.perf_counter(), time.process_time()
        result = fn()  # type: ignore[operator]
        walls.append(time.perf_counter() - start)
        cpus.append(time.process_time() - cpu)
    return statistics.median(walls), statistics.median(cpus), result


def with_overrides(store: Store, roster: Roster) -> MappingVersion:
    """The rules version plus OVERRIDES case overrides (every 400th record of the first years, set forced)."""
    records = store.departures(roster.id).sort_values("line")
    chosen = records.iloc[::400].head(OVERRIDES)
    overrides = [override_for(store, roster, int(i), "forced", "bench") for i in chosen["id"]]
    store.save_mapping_version("bench rules", MAPPING, rules=RULES, overrides=overrides)
    return store.get_mapping("bench rules", 1)


def load() -> str:
    return "load average " + " ".join(Path("/proc/loadavg").read_text().split()[:3])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rows", type=int, default=100_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        store = Store(f"sqlite:///{Path(folder) / 'bench.db'}")
        roster = import_roster(store, make_roster(args.rows), "bench.csv").roster
        store.save_mapping_version("bench", MAPPING)
        print(f"{roster.accepted:,} departures stored; {load()}")
        plain = store.get_mapping("bench", 1)
        ruled = with_overrides(store, roster)
        resolved = resolve_overrides(store, roster, ruled)
        print(f"{'mapping':<8}{'filter':<28}{'total':>8}{'SQL wall':>10}{'SQL CPU':>9}{'obvious wall':>14}"
              f"{'obvious CPU':>13}{'ratio':>8}")
        for label, mapping, found in (("plain", plain, ()), ("rules", ruled, resolved)):
            for name, values in FILTERS.items():
                flt = departure_filter(store, roster, mapping, found, **values)
                fast, fast_cpu, page = timed(lambda flt=flt: store.find_departures(roster.id, flt, page=2))
                slow, slow_cpu, total = timed(lambda flt=flt, m=mapping: obvious(store, roster.id, flt, m), repeats=3)
                assert page.total == total, (label, name, page.total, total)  # type: ignore[attr-defined]
                print(f"{label:<8}{name:<28}{total:>8,}{fast:>10.3f}{fast_cpu:>9.3f}{slow:>14.3f}{slow_cpu:>13.3f}"
                      f"{slow / fast:>7.1f}x")
        print(load())
        store.dispose()


if __name__ == "__main__":
    main()
