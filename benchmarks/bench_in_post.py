"""Benchmark: what counting rows still in post apart costs a cold Coverage read and a year-filtered list.

Run: ``python benchmarks/bench_in_post.py [--rows 200000] [--before main]``. The roster comes from
``bench_import.make_roster`` (one row in six is "Still in post" with no exit date) and is imported by each tree
into a database of its own (this tree's schema adds a partial index of the undated rows, revision 0017). Then,
for this tree and for ``--before`` (extracted with ``git archive``), each measurement in a fresh Python process
over that tree's database file (median of ``--repeat``):

1. ``load_input`` cold (a new process: nothing memoised), which now also counts the still-in-post rows per
   year, code and category in SQL (``app.analysis.browse.in_post_counts``);
2. the record browser's first page for one fiscal year (``find_departures`` through ``departure_filter``),
   whose year filter now also leaves the still-in-post rows out.

Prints wall and CPU seconds of each, the ratio after/before, and the load average before and after: on a
shared machine wall time is mostly waiting for a core, so CPU is the steadier comparison.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))


def load() -> str:
    return "/".join(f"{x:.2f}" for x in os.getloadavg())


def child(task: str, db: str) -> dict[str, float]:
    from app.analysis.browse import departure_filter
    from app.analysis.inputs import load_input
    from app.store import Store

    if task.startswith("import:"):
        from bench_import import ROLES

        from app.intake.ingest import import_roster

        report = import_roster(Store(f"sqlite:///{db}"), Path(task[7:]).read_bytes(), "bench.csv", roles=ROLES)
        assert report.roster is not None
        return {"wall": 0.0, "cpu": 0.0, "rows": float(report.roster.accepted)}
    store = Store(f"sqlite:///{db}")
    roster = store.get_roster(1)
    wall, cpu = time.perf_counter(), time.process_time()
    if task == "load_input":
        inp = load_input(store, 1, require_mapping=False)
        assert len(inp.coverage)
    else:
        flt = departure_filter(store, roster, None, (), year=2010)
        page = store.find_departures(1, flt, per_page=50)
        assert page.total
    return {"wall": time.perf_counter() - wall, "cpu": time.process_time() - cpu}


def run(tree: Path, task: str, db: Path, repeat: int) -> dict[str, float]:
    env = {**os.environ, "PYTHONPATH": str(tree)}
    script = ROOT / "benchmarks" / "bench_in_post.py"  # this script's child, importing ``app`` from ``tree``
    out = []
    for _ in range(repeat):
        done = subprocess.run([sys.executable, str(script), "--child", task, str(db)], check=True,
                              capture_output=True, text=True, env=env, cwd=tree)
        out.append(json.loads(done.stdout.strip().splitlines()[-1]))
    return {k: statistics.median(o[k] for o in out) for k in out[0]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=200_000)
    parser.add_argument("--before", default="main")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--child", nargs=2, metavar=("TASK", "DB"))
    args = parser.parse_args()
    if args.child:
        print(json.dumps(child(*args.child)))
        return
    from bench_import import _tree, make_roster

    with tempfile.TemporaryDirectory() as tmp:
        roster = Path(tmp) / "roster.csv"
        roster.write_bytes(make_roster(args.rows))
        before = _tree(args.before, Path(tmp) / "before")
        db_before, db_after = Path(tmp) / "before.db", Path(tmp) / "after.db"
        run(before, f"import:{roster}", db_before, 1)
        rows = run(ROOT, f"import:{roster}", db_after, 1)["rows"]
        print(f"roster: {rows:,.0f} rows accepted; load average before: {load()}")
        for task in ("load_input", "year_page"):
            old, new = run(before, task, db_before, args.repeat), run(ROOT, task, db_after, args.repeat)
            print(f"{task:>10}: before ({args.before}) {old['wall']:.3f} s wall, {old['cpu']:.3f} s CPU; "
                  f"this tree {new['wall']:.3f} s wall, {new['cpu']:.3f} s CPU; after/before "
                  f"{new['wall'] / old['wall']:.2f} wall, {new['cpu'] / old['cpu']:.2f} CPU")
        print(f"load average after: {load()}")


if __name__ == "__main__":
    main()
