"""Benchmark: import a 1,000,000-row roster (demo headers) into a fresh SQLite file, against a bare read_csv.

Run: ``python benchmarks/bench_import.py [--rows 1000000]``. The roster is written to a temporary file by
``make_roster`` (this script's own seeded generator); then, each in a fresh Python process so that one's
memory does not count for the other, and in the same run:

1. a bare ``pandas.read_csv`` of the file (all columns as text): the reference;
2. ``import_roster`` end to end (read, header and roles, validate, store in one transaction, cells);
3. ``review_roster``, the dry run (everything but storing);
4. with ``--before REV``: ``import_roster`` of that revision's tree (``git archive``), in a fresh process too;
5. the first read of the detailed and firm cells of the imported roster (built on first read since
   revision 0016, ``Store.ensure_detail_cells``): what the first Trend, rules, roster-page or bootstrap visit
   after an import pays once.

Each prints wall and CPU seconds and the process's peak resident memory (``VmHWM`` from /proc/self/status;
the file's bytes, held by the caller as a web upload is, included). Targets (issue 14): the import under
1 GB peak and under 10x the read_csv time. The load average is printed before and after: on a shared
machine wall time is mostly waiting for a core, so the CPU ratio is the steadier comparison.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

HEADER = ("Issuer Code,Issuer Name,Industry,FY,Exit Date,Exit Reason,Executive,Age at Exit,"
          "Years in Role,Interim?,Comment")
REASONS = ("Retired", "Dismissed", "Resigned - performance", "Health", "New role", "Still in post")
SECTORS = ("Utilities", "Mining", "Retail", "Media", "Banking", "Software")
ROLES = {"firm_id": "Issuer Code", "year": "FY", "date": "Exit Date", "reason": "Exit Reason",
         "firm_name": "Issuer Name", "sector": "Industry", "executive": "Executive",
         "age": "Age at Exit", "tenure": "Years in Role", "interim": "Interim?", "notes": "Comment"}


def make_roster(n: int, seed: int = 7) -> bytes:
    """An invented roster; about 1% of rows carry a fault and 0.5% repeat an earlier row."""
    rng = random.Random(seed)
    lines = [HEADER]
    for i in range(n):
        if i and rng.random() < 0.005:
            lines.append(lines[rng.randrange(1, len(lines))])
            continue
        year = rng.randrange(1995, 2025)
        day, month = rng.randrange(1, 29), rng.randrange(1, 13)
        reason = rng.choice(REASONS)
        when = "" if reason == "Still in post" else f"{day:02d}/{month:02d}/{year}"
        age = str(rng.randrange(35, 80)) if rng.random() > 0.01 else "unknown"
        lines.append(
            f"F{rng.randrange(5000):05d},Firm {i % 5000} Holdings,{rng.choice(SECTORS)},{year},{when},"
            f"{reason},Exec {i},{age},{rng.randrange(1, 25)},{rng.choice(('yes', 'no', ''))},"
            f"\"note {i}, invented\""
        )
    return ("\r\n".join(lines) + "\r\n").encode()


def _peak_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def child(task: str, path: str, db: str) -> dict[str, object]:
    """One measured task in this (fresh) process."""
    import dataclasses

    data = Path(path).read_bytes()
    start, cpu = time.perf_counter(), time.process_time()
    out: dict[str, object] = {}
    if task == "read_csv":
        import pandas as pd

        frame = pd.read_csv(path, dtype=str, keep_default_na=False)
        out["rows"] = len(frame)
    else:
        from app.intake.ingest import import_roster, review_roster
        from app.intake.rawtable import DEFAULT_LIMITS
        from app.store import Store

        # the file is ~100 MB: above the default 50 MB upload limit, as a desk's setting would raise it
        limits = dataclasses.replace(DEFAULT_LIMITS, max_bytes=max(DEFAULT_LIMITS.max_bytes, len(data)))
        if task == "review":
            review = review_roster(data, "bench.csv", roles=ROLES, limits=limits)
            out.update(accepted=review.accepted, rejected=review.rejected, duplicates=review.duplicates)
        else:
            store = Store(f"sqlite:///{db}")
            start, cpu = time.perf_counter(), time.process_time()  # the store's creation is not the import
            report = import_roster(store, data, "bench.csv", roles=ROLES, limits=limits)
            out.update(accepted=report.accepted, rejected=report.rejected, duplicates=report.duplicates)
    out.update(wall=time.perf_counter() - start, cpu=time.process_time() - cpu, peak_mb=_peak_mb())
    return out


def first_read(db: str) -> dict[str, object]:
    """The first read of the detailed and firm cells of the roster just imported into ``db`` (fresh process)."""
    from app.store import Store

    store = Store(f"sqlite:///{db}")
    start, cpu = time.perf_counter(), time.process_time()
    store.ensure_detail_cells(1)
    out: dict[str, object] = dict(store.cell_table_rows(1))
    out.update(wall=time.perf_counter() - start, cpu=time.process_time() - cpu, peak_mb=_peak_mb())
    return out


def _run(task: str, path: Path, db: Path, tree: Path | None = None) -> dict[str, float]:
    script = Path(__file__) if tree is None else tree / "benchmarks" / "bench_import.py"
    env = {**os.environ, "PYTHONPATH": str(script.parents[1])}
    if db.exists() and task != "first_read":
        db.unlink()
    done = subprocess.run([sys.executable, str(script), "--child", task, str(path), str(db)],
                          check=True, capture_output=True, text=True, env=env)
    return json.loads(done.stdout.strip().splitlines()[-1])  # type: ignore[no-any-return]


def _tree(rev: str, into: Path) -> Path:
    """The files of revision ``rev`` of this repository, extracted under ``into``."""
    root = Path(__file__).resolve().parents[1]
    archive = subprocess.run(["git", "-C", str(root), "archive", "--format=tar", rev], check=True,
                             capture_output=True).stdout
    into.mkdir()
    subprocess.run(["tar", "-x", "-C", str(into)], input=archive, check=True)
    return into


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--before", metavar="REV", help="also time that revision's import_roster (git archive)")
    parser.add_argument("--child", nargs=3, metavar=("TASK", "FILE", "DB"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(first_read(args.child[2]) if args.child[0] == "first_read" else child(*args.child)))
        return
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "roster.csv"
        path.write_bytes(make_roster(args.rows))
        print(f"roster: {args.rows:,} rows, {path.stat().st_size / 1e6:.1f} MB; load average before: "
              f"{' '.join(f'{x:.2f}' for x in os.getloadavg())} on {os.cpu_count()} cores")
        db = Path(tmp) / "bench.db"
        results = {task: _run(task, path, db) for task in ("read_csv", "import", "first_read", "review")}
        if args.before:
            results["before"] = _run("import", path, db, _tree(args.before, Path(tmp) / "before"))
        base = results["read_csv"]
        cells = results.pop("first_read")
        for task, r in results.items():
            counts = "" if task == "read_csv" else (
                f"; {r['accepted']:,} accepted, {r['rejected']:,} rejected, {r['duplicates']:,} duplicates")
            ratio = "" if task == "read_csv" else (
                f"; {r['wall'] / base['wall']:.1f}x read_csv wall, {r['cpu'] / base['cpu']:.1f}x CPU")
            print(f"  {task:<8} {r['wall']:7.2f} s wall {r['cpu']:7.2f} s CPU  peak {r['peak_mb']:6.0f} MB{ratio}"
                  f"{counts}")
        print(f"  first read of the detailed and firm cells after the import: {cells['wall']:.2f} s wall "
              f"{cells['cpu']:.2f} s CPU, peak {cells['peak_mb']:.0f} MB; rows "
              f"{ {k: v for k, v in cells.items() if k.startswith('roster_')} }")
        print(f"  load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
        imp = results["import"]
        if "before" in results:
            print(f"  import CPU against {args.before}'s: {imp['cpu'] / results['before']['cpu']:.2f}x")
        print(f"  targets: peak < 1024 MB -> {'met' if imp['peak_mb'] < 1024 else 'MISSED'}; "
              f"< 10x read_csv -> {'met' if imp['cpu'] < 10 * base['cpu'] else 'MISSED'} (CPU), "
              f"{'met' if imp['wall'] < 10 * base['wall'] else 'MISSED'} (wall)")


if __name__ == "__main__":
    main()
