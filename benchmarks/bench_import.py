"""Benchmark: import a 100,000-row roster (demo headers) into a fresh SQLite file.

Run: ``python benchmarks/bench_import.py [--rows N]``. Prints the time of each phase, the peak
resident memory (ru_maxrss) and the ratio against the obvious approach (pandas.read_csv, then one
INSERT statement per row inside one transaction), which is measured on a slice of the same file and
scaled linearly to the full size (it says so). Targets: under 5 s and under 1 GB for 100,000 rows.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import random
import resource
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import pandas as pd  # noqa: E402
from sqlalchemy import insert  # noqa: E402

from app.intake.ingest import import_roster, validate  # noqa: E402
from app.intake.readers import read_table  # noqa: E402
from app.store import DEPARTURE_FIELDS, Store, departures  # noqa: E402

HEADER = ("Issuer Code,Issuer Name,Industry,FY,Exit Date,Exit Reason,Executive,Age at Exit,"
          "Years in Role,Interim?,Comment")
REASONS = ("Retired", "Dismissed", "Resigned - performance", "Health", "New role", "Still in post")
SECTORS = ("Utilities", "Mining", "Retail", "Media", "Banking", "Software")


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


def obvious_import(store: Store, data: bytes) -> tuple[float, float]:
    """pandas.read_csv, a Python loop per row, one INSERT statement per row; (wall, CPU) seconds."""
    start, cpu = time.perf_counter(), time.process_time()
    frame = pd.read_csv(io.BytesIO(data), dtype=str, keep_default_na=False)
    roster = store.save_import(name="obvious", source_name="x", sha256="0" * 64, rows_total=len(frame),
                               duplicates=0, columns={}, records=pd.DataFrame(columns=[
                                   "line", "firm_id", "firm_name", "sector", "year", "date", "reason",
                                   "executive", "age", "tenure", "interim", "notes", "raw"]), rejected=[])
    with store.engine.begin() as conn:
        for line, row in enumerate(frame.to_dict("records"), start=2):
            try:
                age = float(row["Age at Exit"]) if row["Age at Exit"] else None
            except ValueError:
                continue
            when = row["Exit Date"]
            iso = f"{when[6:10]}-{when[3:5]}-{when[0:2]}" if when else None
            conn.execute(insert(departures).values(
                roster_id=roster.id, line=line, firm_id=row["Issuer Code"], firm_name=row["Issuer Name"],
                sector=row["Industry"], year=int(row["FY"]), date=iso, reason=row["Exit Reason"],
                executive=row["Executive"], age=age, tenure=float(row["Years in Role"]),
                interim={"yes": True, "no": False}.get(row["Interim?"]), notes=row["Comment"],
                raw=json.dumps(row),
            ))
    return time.perf_counter() - start, time.process_time() - cpu


def driver_executemany(store: Store, records: pd.DataFrame) -> float:
    """CPU seconds to insert ``records`` as tuples through the DBAPI's executemany in one transaction.

    This is the change suggested for ``Store.save_import`` (which today goes through
    ``DataFrame.to_dict("records")`` and SQLAlchemy's per-row parameter processing).
    """
    cpu = time.process_time()
    roster = store.save_import(name="direct", source_name="x", sha256="1" * 64, rows_total=0, duplicates=0,
                               columns={}, records=records.iloc[:0], rejected=[])
    frame = records.loc[:, list(DEPARTURE_FIELDS)].astype(object)
    frame = frame.where(pd.notna(frame), None)
    frame.insert(0, "roster_id", roster.id)
    sql = (f"INSERT INTO departures ({', '.join(frame.columns)}) "
           f"VALUES ({', '.join('?' * len(frame.columns))})")
    with store.engine.begin() as conn:
        conn.exec_driver_sql(sql, list(frame.itertuples(index=False, name=None)))
    return time.process_time() - cpu


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--slice", type=int, default=10_000, help="rows for the obvious approach")
    args = parser.parse_args()
    data = make_roster(args.rows)
    print(f"roster: {args.rows:,} rows, {len(data) / 1e6:.1f} MB")
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        table = read_table(data, "bench.csv")
        t1 = time.perf_counter()
        roles = {"firm_id": "Issuer Code", "year": "FY", "date": "Exit Date", "reason": "Exit Reason",
                 "firm_name": "Issuer Name", "sector": "Industry", "executive": "Executive",
                 "age": "Age at Exit", "tenure": "Years in Role", "interim": "Interim?", "notes": "Comment"}
        records, rejected, dups, _ = validate(table, roles)
        t2 = time.perf_counter()
        print(f"  read (decode + csv parse): {t1 - t0:.2f} s; validate: {t2 - t1:.2f} s "
              f"({len(records):,} accepted, {len(rejected):,} rejected, {dups:,} duplicates)")
        direct_store = Store(f"sqlite:///{Path(tmp) / 'direct.db'}")
        print(f"  for comparison, inserting the same records as tuples via DBAPI executemany: "
              f"{driver_executemany(direct_store, records):.2f} s CPU")
        direct_store.dispose()
        del table, records, rejected

        store = Store(f"sqlite:///{Path(tmp) / 'bench.db'}")
        start, cpu = time.perf_counter(), time.process_time()
        report = import_roster(store, data, "bench.csv")
        total, cpu = time.perf_counter() - start, time.process_time() - cpu
        print(f"  import_roster end to end: {total:.2f} s wall, {cpu:.2f} s CPU (so Store.save_import "
              f"took about {total - (t2 - t0):.2f} s wall)")
        print(f"  machine load average while running: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores "
              "(other work inflates wall time; CPU time is the steadier figure)")
        print(f"  accepted {report.accepted:,}, rejected {report.rejected:,}, duplicates {report.duplicates:,}")

        lines = data.split(b"\r\n")
        part = b"\r\n".join(lines[: args.slice + 1]) + b"\r\n"
        slow_store = Store(f"sqlite:///{Path(tmp) / 'obvious.db'}")
        scale = args.rows / args.slice
        slow, slow_cpu = (v * scale for v in obvious_import(slow_store, part))
        print(f"  obvious approach: {slow:.2f} s wall, {slow_cpu:.2f} s CPU (measured on the first "
              f"{args.slice:,} rows, scaled linearly to {args.rows:,})")
        print(f"  ratio obvious / import_roster: {slow / total:.1f}x wall, {slow_cpu / cpu:.1f}x CPU")
        store.dispose()
        slow_store.dispose()
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"  peak memory (ru_maxrss, whole process): {peak:.0f} MB")
    print(f"  targets: < 5 s -> {'met' if total < 5 else 'MISSED'} (wall), "
          f"{'met' if cpu < 5 else 'MISSED'} (CPU); < 1 GB -> {'met' if peak < 1024 else 'MISSED'}")


if __name__ == "__main__":
    main()
