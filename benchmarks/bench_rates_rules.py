"""Benchmark: the Rates table of a mapping version with a rule and a case override (issue 16), at 100k rows.

Run: ``python benchmarks/bench_rates_rules.py [--rows N]``. Imports the invented roster of bench_import.py into a
fresh SQLite file, derives its universe, then prints in the same run (each the best of 3, memo cleared):
- the code-only Rates counts (SQL counts by year, code and inside flag: the path of a mapping without rules);
- the counts with the rule and an override (categorised firm cells split by the SQL inside flag: this branch);
- the obvious way (read every record, categorise it, join it with every firm-year of the universe);
and checks that the last two give the same Rates table. Wall and CPU time are both printed.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import pandas as pd  # noqa: E402
from bench_import import make_roster  # noqa: E402

from app.analysis import cellstore  # noqa: E402
from app.analysis.inputs import load_input  # noqa: E402
from app.analysis.overrides import add_override  # noqa: E402
from app.analysis.rates import _rate_table, _universe_counts  # noqa: E402
from app.analysis.rules import save_rules  # noqa: E402
from app.intake.ingest import import_roster  # noqa: E402
from app.intake.universe import derive_universe  # noqa: E402
from app.stats.rates import count_rates  # noqa: E402
from app.store import Store  # noqa: E402
from app.types import ClassificationRule  # noqa: E402

CODES = {"Retired": "voluntary", "Dismissed": "forced", "Resigned - performance": "forced", "Health": "voluntary",
         "New role": "voluntary", "Still in post": "excluded"}


def timed(fn, store: Store, repeat: int = 3):  # type: ignore[no-untyped-def]
    best, cpu, value = float("inf"), float("inf"), None
    for _ in range(repeat):
        cellstore._MEMOS.pop(store, None)  # each repeat computes from the store, as a first page visit does
        start, start_cpu = time.perf_counter(), time.process_time()
        value = fn()
        best, cpu = min(best, time.perf_counter() - start), min(cpu, time.process_time() - start_cpu)
    return best, cpu, value


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=100_000)
    args = parser.parse_args()
    print(f"load average at the start: {' '.join(f'{x:.1f}' for x in os.getloadavg())} (2 shared cores)")
    with tempfile.TemporaryDirectory() as tmp:
        store = Store(f"sqlite:///{tmp}/bench.db")
        rid = import_roster(store, make_roster(args.rows), "bench.csv").roster.id
        universe = derive_universe(store, rid).universe
        plain = store.save_mapping_version("bench", CODES)
        ruled = save_rules(store, plain, (ClassificationRule("Retired", "age", "below", 60, "forced"),), note="b")
        records = store.departures(rid)
        first = int(records.loc[records["reason"] == "Dismissed", "id"].iloc[0])
        ruled = add_override(store, store.get_roster(rid), ruled, first, "voluntary", "bench")
        window = (1995, 2024)

        def rates(version: int):  # type: ignore[no-untyped-def]
            def run():  # type: ignore[no-untyped-def]
                inp = load_input(store, rid, mapping=f"bench:{version}", window=window)
                return _rate_table(_universe_counts(store, inp, universe, inp.window), inp.window)
            return run

        def obvious():  # type: ignore[no-untyped-def]
            inp = load_input(store, rid, mapping=f"bench:{ruled.version}", window=window)
            return count_rates(inp.records, store.universe_firm_years(universe.id), inp.window)

        t_plain, c_plain, _ = timed(rates(plain.version), store)
        t_ruled, c_ruled, ours = timed(rates(ruled.version), store)
        t_obv, c_obv, ref = timed(obvious, store)
        same = ours.years.equals(ref.years) and ours.outside == ref.outside
        pd.testing.assert_frame_equal(ours.years, ref.years)
        print(f"departures {len(records):,}; universe {universe.firm_years:,} firm-years")
        print(f"Rates counts, codes only (SQL):           {t_plain:.3f} s wall, {c_plain:.3f} s CPU")
        print(f"Rates counts, rule + override (firm cells): {t_ruled:.3f} s wall, {c_ruled:.3f} s CPU")
        print(f"obvious (every record x every firm-year):   {t_obv:.3f} s wall, {c_obv:.3f} s CPU; same table: {same}")
        print(f"load average at the end: {' '.join(f'{x:.1f}' for x in os.getloadavg())}")
        store.dispose()


if __name__ == "__main__":
    main()
