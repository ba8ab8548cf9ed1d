"""Speed of the bootstrap engine against the obvious per-resample loop, measured in the same run.

Generated roster: 100,000 departures from 25,000 firms over 30 years in 10 sectors. Targets
(2-core machine): 10,000 departure resamples < 0.1 s; 10,000 firm resamples < 1.5 s; sector-adjusted
model with 10,000 firm resamples < 5 s; each >= 150x faster than the obvious loop; peak memory < 1 GB.

The obvious loop, per resample: draw departures (or firms) with replacement, gather their rows of
a pandas DataFrame, count forced / voluntary per year with pandas, fit statsmodels' GLM. It is timed
on a few hundred resamples and scaled to 10,000 (said so in the output).

Run: ``python benchmarks/bench_bootstrap.py [--resamples 10000] [--loop 200]``
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd
import statsmodels.api as sm

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from app.stats import bootstrap  # noqa: E402
from app.stats.bootstrap import draw_replicates  # noqa: E402
from app.stats.cells import build_cells  # noqa: E402
from app.stats.design import design_matrix, window_centre  # noqa: E402


def make_roster(seed: int = 1, departures: int = 100_000, firms: int = 25_000) -> pd.DataFrame:
    """Invented roster with a firm effect and a mild upward trend."""
    rng = np.random.default_rng(seed)
    firm = rng.integers(0, firms, size=departures)
    year = rng.integers(1995, 2025, size=departures)
    logit = -1.0 + 0.02 * (year - 2009.5) + rng.normal(0, 0.7, size=firms)[firm]
    forced = rng.random(departures) < 1 / (1 + np.exp(-logit))
    return pd.DataFrame({
        "firm_id": firm, "year": year, "category": np.where(forced, "forced", "voluntary"),
        "sector": np.array([f"Sector {s}" for s in range(10)])[firm % 10],
    })


def obvious_loop(records: pd.DataFrame, unit: str, n: int, seed: int) -> float:
    """Seconds per resample of the straightforward approach."""
    rng = np.random.default_rng(seed)
    years = np.arange(records["year"].min(), records["year"].max() + 1)
    centre = (years[0] + years[-1]) / 2
    by_firm = records.set_index("firm_id")
    firm_ids = records["firm_id"].unique()
    began = time.perf_counter()
    for _ in range(n):
        if unit == "departure":
            sample = records.iloc[rng.integers(0, len(records), size=len(records))]
        else:
            sample = by_firm.loc[firm_ids[rng.integers(0, firm_ids.size, size=firm_ids.size)]]
        table = pd.crosstab(sample["year"], sample["category"]).reindex(years, fill_value=0)
        table = table[table.sum(axis=1) > 0]
        X = sm.add_constant(table.index.to_numpy(dtype=float) - centre)
        sm.GLM(table[["forced", "voluntary"]].to_numpy(), X, family=sm.families.Binomial()).fit()
    return (time.perf_counter() - began) / n


def timed(cells, design, unit: str, resamples: int, workers: int | None = None) -> tuple[float, float]:
    """(wall seconds, CPU seconds of all threads) of one engine run."""
    wall, cpu = time.perf_counter(), time.process_time()
    draw_replicates(cells, design, unit=unit, resamples=resamples, seed=1, workers=workers)  # type: ignore[arg-type]
    return time.perf_counter() - wall, time.process_time() - cpu


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--resamples", type=int, default=10_000)
    parser.add_argument("--loop", type=int, default=200, help="resamples timed for the obvious loop")
    args = parser.parse_args()
    B = args.resamples
    records = make_roster()
    cells = build_cells(records)
    linear = design_matrix(cells.groups, "linear", window_centre(cells.window))
    sector_cells = build_cells(records, by_sector=True)
    sector = design_matrix(sector_cells.groups, "sector", window_centre(sector_cells.window))
    print(f"roster: {len(records):,} departures, {cells.firm_matrix.shape[0]:,} firms, "
          f"{cells.n_groups} years; {os.cpu_count()} CPUs; load average {os.getloadavg()[0]:.2f}")

    for unit in ("departure", "firm"):  # warm-up: thread pool, BLAS, page faults
        timed(cells, linear, unit, 500)
    rows = []
    for label, c, d, unit, target in [
        ("straight trend, departures", cells, linear, "departure", 0.1),
        ("straight trend, firms", cells, linear, "firm", 1.5),
        ("sector-adjusted, firms", sector_cells, sector, "firm", 5.0),
    ]:
        wall, cpu = min((timed(c, d, unit, B) for _ in range(3)), key=lambda t: t[0])
        rows.append((label, unit, wall, cpu, target))

    loop = {unit: obvious_loop(records, unit, args.loop, seed=2) for unit in ("departure", "firm")}
    print(f"\nobvious loop timed on {args.loop} resamples per unit and scaled to {B:,}: "
          f"{1000 * loop['departure']:.1f} ms per departure resample, "
          f"{1000 * loop['firm']:.1f} ms per firm resample\n")
    print(f"{'task (' + format(B, ',') + ' resamples)':<40} {'engine s':>9} {'CPU s':>7} {'target s':>9} "
          f"{'loop s':>8} {'ratio':>7}")
    for label, unit, wall, cpu, target in rows:
        scaled = loop[unit] * B
        flag = "ok" if wall < target else "SLOW"
        print(f"{label:<40} {wall:>9.3f} {cpu:>7.3f} {target:>8.1f} {flag:<1} {scaled:>7.0f} "
              f"{scaled / wall:>6.0f}x")

    single = {unit: timed(cells, linear, unit, B, workers=1)[0] for unit in ("departure", "firm")}
    print(f"\none worker: departures {single['departure']:.3f} s, firms {single['firm']:.3f} s")
    saved = bootstrap.DENSE_PER_NONZERO
    for name, value in [("dense float GEMM", 10**9), ("sparse product", 0)]:
        bootstrap.DENSE_PER_NONZERO = value
        print(f"firm counts via {name}: {timed(cells, linear, 'firm', B)[0]:.3f} s")
    bootstrap.DENSE_PER_NONZERO = saved

    tracemalloc.start()
    draw_replicates(cells, linear, unit="firm", resamples=B, seed=1)
    draw_replicates(sector_cells, sector, unit="firm", resamples=B, seed=1)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak traced allocation during firm runs {peak / 2**20:.0f} MiB; "
          f"peak resident size of the whole benchmark {rss:.0f} MiB (target < 1024)")


if __name__ == "__main__":
    main()
