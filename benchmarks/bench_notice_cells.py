"""What notice days cost the detailed cell store: rows and time with and without an announcement column.

``python benchmarks/bench_notice_cells.py [--rows 100000] [--share 0.6]``

Imports the same invented roster twice (seeded; ages 35-79, tenure 0-24 years, ISO exit dates over 30 years),
once without and once with an announcement-date column filled for ``share`` of the rows (0-399 days before
the exit), and prints the rows of each cell table, the import's wall and CPU time, and one read of the
detailed cells (what a mapping version with rules reads). Results in benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import os
import random
import tempfile
import time
from datetime import date, timedelta

from app.intake.ingest import import_roster
from app.store import Store


def rosters(rows: int, share: float, seed: int = 7) -> tuple[bytes, bytes]:
    rng = random.Random(seed)
    plain = ["Ticker,Exit Reason,Exit Date,Sector,Age,Tenure"]
    dated = [plain[0] + ",Date Announced"]
    for _ in range(rows):
        exit_day = date(1995, 1, 1) + timedelta(days=rng.randrange(30 * 365))
        row = (f"F{rng.randrange(3000):04d},{rng.choice(['Retired', 'Resigned', 'Dismissed', 'Health'])},"
               f"{exit_day.isoformat()},S{rng.randrange(10)},{rng.randrange(35, 80)},{rng.randrange(25)}")
        plain.append(row)
        announced = (exit_day - timedelta(days=rng.randrange(400))).isoformat() if rng.random() < share else ""
        dated.append(f"{row},{announced}")
    return ("\n".join(plain) + "\n").encode(), ("\n".join(dated) + "\n").encode()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--share", type=float, default=0.6)
    args = parser.parse_args()
    print(f"load average {os.getloadavg()[0]:.1f} at the start")
    with tempfile.TemporaryDirectory() as folder:
        for label, data in zip(("without", "with"), rosters(args.rows, args.share), strict=True):
            store = Store(f"sqlite:///{folder}/{label}.db")
            wall, cpu = time.perf_counter(), time.process_time()
            report = import_roster(store, data, f"{label}.csv")
            imported = time.perf_counter() - wall, time.process_time() - cpu
            wall, cpu = time.perf_counter(), time.process_time()
            store.cell_counts(report.roster.id, detail=True)
            read = time.perf_counter() - wall, time.process_time() - cpu
            print(f"{label} announcements: cells {store.cell_table_rows(report.roster.id)}; import wall "
                  f"{imported[0]:.1f} s CPU {imported[1]:.1f} s; detailed read wall {read[0]:.2f} s CPU {read[1]:.2f} s")
            store.dispose()
    print(f"load average {os.getloadavg()[0]:.1f} at the end")


if __name__ == "__main__":
    main()
