"""Benchmark: what the first page visits cost after an import, this tree against an earlier revision.

Run: ``python benchmarks/bench_first_visit.py [--rows 100000] [--before main]``

Since revision 0016 the import no longer stores the detailed and firm cells; the first read that needs them
builds them (``Store.ensure_detail_cells``). This script shows where that cost lands. For each tree (this one
and ``--before``, extracted with ``git archive``), in fresh processes: ``import_roster`` of the invented roster
of bench_import.py into a new SQLite file with a saved mapping, then a fresh server process (Starlette's
TestClient, in-process) that asks, in order, the roster page, Trend and Coverage twice each. It prints wall and
CPU seconds of the import and of each request, and the load average.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_import import ROLES, _tree, make_roster  # noqa: E402

PAGES = ("", "/trend", "/coverage")
CATEGORIES = {"Retired": "voluntary", "Dismissed": "forced", "Resigned - performance": "forced",
              "Health": "excluded", "New role": "voluntary", "Still in post": "excluded"}


def child(task: str, csv: str, db: str) -> dict[str, object]:
    import dataclasses

    from app.store import Store

    store = Store(f"sqlite:///{db}")
    if task == "import":
        from app.intake.ingest import import_roster
        from app.intake.rawtable import DEFAULT_LIMITS

        data = Path(csv).read_bytes()
        limits = dataclasses.replace(DEFAULT_LIMITS, max_bytes=max(DEFAULT_LIMITS.max_bytes, len(data)))
        start, cpu = time.perf_counter(), time.process_time()
        roster = import_roster(store, data, "bench.csv", roles=ROLES, limits=limits).roster
        out: dict[str, object] = {"import": (time.perf_counter() - start, time.process_time() - cpu)}
        store.save_mapping_version("bench map", CATEGORIES)
        store.update_settings(roster.id, mapping_name="bench map")
        return out
    from starlette.testclient import TestClient

    from app.config import Settings
    from app.web.app import create_app

    out = {}
    with TestClient(create_app(Settings(db_url=store.url), store, start_jobs=False)) as client:
        for visit in (1, 2):
            for page in PAGES:
                start, cpu = time.perf_counter(), time.process_time()
                status = client.get(f"/rosters/1{page}").status_code
                assert status == 200, (page, status)
                out[f"{page or '/roster'} {visit}"] = (time.perf_counter() - start, time.process_time() - cpu)
    return out


def _run(tree: Path, task: str, csv: Path, db: Path) -> dict[str, list[float]]:
    script = tree / "benchmarks" / "bench_first_visit.py"
    if not script.exists():  # an older tree: run this script against its code
        script = Path(__file__).resolve()
    done = subprocess.run([sys.executable, str(script), "--child", task, str(csv), str(db)], check=True,
                          capture_output=True, text=True, env={**os.environ, "PYTHONPATH": str(tree)})
    return json.loads(done.stdout.strip().splitlines()[-1])  # type: ignore[no-any-return]


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--before", default="main")
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(child(*args.child)))
        return
    with tempfile.TemporaryDirectory() as tmp:
        csv = Path(tmp) / "roster.csv"
        csv.write_bytes(make_roster(args.rows))
        print(f"roster: {args.rows:,} rows; load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
        trees = {"this tree": Path(__file__).resolve().parents[1],
                 args.before: _tree(args.before, Path(tmp) / "before")}
        for label, tree in trees.items():
            db = Path(tmp) / f"{label.replace(' ', '_')}.db"
            times = _run(tree, "import", csv, db) | _run(tree, "visit", csv, db)
            print(f"  {label}: " + "; ".join(f"{k} {w:.2f} s wall {c:.2f} s CPU" for k, (w, c) in times.items()))
        print(f"  load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")


if __name__ == "__main__":
    main()
