"""Speed of the bootstrap engine against the obvious per-resample loop, measured in the same run.

Generated roster: 100,000 departures from 25,000 firms over 30 years in 10 sectors. Targets
(2-core machine): 10,000 departure resamples < 0.1 s; 10,000 firm resamples < 1.5 s; sector-adjusted
model with 10,000 firm resamples < 5 s; each >= 150x faster than the obvious loop; peak memory < 1 GB.

The obvious loop, per resample: draw departures (or firms) with replacement, gather their rows of
a pandas DataFrame, count forced / voluntary per year (per sector-year for the sector model) with
pandas, fit statsmodels' GLM. It is timed on a few hundred resamples and scaled to 10,000 (said so in
the output). Wall and CPU seconds (all threads) are both printed, with the load average: on a shared
machine the CPU ratio is the steadier comparison.

Run: ``python benchmarks/bench_bootstrap.py [--resamples 10000] [--loop 200]``
"""

from __future__ import annotations

import argparse
import functools
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


def obvious_loop(records: pd.DataFrame, unit: str, model: str, n: int, seed: int) -> tuple[float, float]:
    """(wall, CPU) seconds per resample of the straightforward approach for one unit and model."""
    rng = np.random.default_rng(seed)
    years = np.arange(records["year"].min(), records["year"].max() + 1)
    centre = (years[0] + years[-1]) / 2
    by_firm = records.set_index("firm_id")
    firm_ids = records["firm_id"].unique()
    keys = ["sector", "year"] if model == "sector" else ["year"]
    wall, cpu = time.perf_counter(), time.process_time()
    for _ in range(n):
        if unit == "departure":
            sample = records.iloc[rng.integers(0, len(records), size=len(records))]
        else:
            sample = by_firm.loc[firm_ids[rng.integers(0, firm_ids.size, size=firm_ids.size)]]
        table = pd.crosstab([sample[k] for k in keys], sample["category"])
        table = table[table.sum(axis=1) > 0].reset_index()
        t = table["year"].to_numpy(dtype=float) - centre
        if model == "sector":
            X = np.column_stack([pd.get_dummies(table["sector"]).to_numpy(dtype=float), t])
        else:
            X = sm.add_constant(t)
        sm.GLM(table[["forced", "voluntary"]].to_numpy(), X, family=sm.families.Binomial()).fit()
    return (time.perf_counter() - wall) / n, (time.process_time() - cpu) / n


def timed(cells, design, unit: str, resamples: int, workers: int | None = None) -> tuple[float, float]:
    """(wall seconds, CPU seconds of all threads) of one engine run."""
    wall, cpu = time.perf_counter(), time.process_time()
    draw_replicates(cells, design, unit=unit, resamples=resamples, seed=1, workers=workers)  # type: ignore[arg-type]
    return time.perf_counter() - wall, time.process_time() - cpu


def best_of(runs: int, *args, **kwargs) -> tuple[float, float]:
    """The fastest of ``runs`` engine runs by wall clock, with its CPU time."""
    return min((timed(*args, **kwargs) for _ in range(runs)), key=lambda t: t[0])


def load() -> str:
    return "/".join(f"{x:.2f}" for x in os.getloadavg())


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
          f"{cells.n_groups} years, {sector_cells.n_groups} sector-years; {os.cpu_count()} CPUs; "
          f"load average (1/5/15 min) at start {load()}")

    for unit in ("departure", "firm"):  # warm-up: thread pool, BLAS, page faults
        timed(cells, linear, unit, 500)
    tasks = [
        ("straight trend, departures", cells, linear, "departure", "linear", 0.1),
        ("straight trend, firms", cells, linear, "firm", "linear", 1.5),
        ("sector-adjusted, firms", sector_cells, sector, "firm", "sector", 5.0),
    ]
    rows = [(label, unit, model, *best_of(5, c, d, unit, B), target)
            for label, c, d, unit, model, target in tasks]

    loop = {(unit, model): obvious_loop(records, unit, model, args.loop, seed=2)
            for _, _, _, unit, model, _ in tasks}
    print(f"\nobvious loop (draw, gather DataFrame rows, pd.crosstab, statsmodels GLM.fit) timed on "
          f"{args.loop} resamples per task and scaled to {B:,}\n")
    print(f"{'task (' + format(B, ',') + ' resamples)':<34} {'wall s':>7} {'CPU s':>7} {'target':>7}    "
          f"{'loop wall s':>11} {'loop CPU s':>10} {'wall ratio':>10} {'CPU ratio':>9}")
    for label, unit, model, wall, cpu, target in rows:
        loop_wall, loop_cpu = (B * x for x in loop[(unit, model)])
        flag = "ok" if wall < target else "SLOW"
        print(f"{label:<34} {wall:>7.3f} {cpu:>7.3f} {target:>6.1f} {flag:<4} {loop_wall:>11.0f} "
              f"{loop_cpu:>10.0f} {loop_wall / wall:>9.0f}x {loop_cpu / cpu:>8.0f}x")
    print(f"load average after the table {load()}")

    print("\nvariants (best of 3, wall / CPU seconds):")
    for unit in ("departure", "firm"):
        wall, cpu = best_of(3, cells, linear, unit, B, workers=1)
        print(f"  straight trend, {unit}s, one worker: {wall:.3f} / {cpu:.3f}")
    saved_pass = bootstrap.PASS_COUNTS
    bootstrap.PASS_COUNTS = 10**6  # the earlier pass size: 40 resamples of 25,000 firms
    wall, cpu = best_of(3, cells, linear, "firm", B)
    print(f"  straight trend, firms, passes of 10**6 counts (earlier engine): {wall:.3f} / {cpu:.3f}")
    bootstrap.PASS_COUNTS = saved_pass
    saved_fit = bootstrap.fit_batch
    bootstrap.fit_batch = functools.partial(saved_fit, solver="general")
    wall, cpu = best_of(3, sector_cells, sector, "firm", B)
    print(f"  sector-adjusted, firms, general p x p solver (earlier engine): {wall:.3f} / {cpu:.3f}")
    bootstrap.fit_batch = saved_fit
    saved_dense = bootstrap.DENSE_PER_NONZERO
    for name, value in [("dense float GEMM", 10**9), ("sparse product", 0)]:
        bootstrap.DENSE_PER_NONZERO = value
        wall, cpu = best_of(3, cells, linear, "firm", B)
        print(f"  straight trend, firms, counts via {name}: {wall:.3f} / {cpu:.3f}")
    bootstrap.DENSE_PER_NONZERO = saved_dense

    tracemalloc.start()
    draw_replicates(cells, linear, unit="firm", resamples=B, seed=1)
    draw_replicates(sector_cells, sector, unit="firm", resamples=B, seed=1)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"\npeak traced allocation during firm runs {peak / 2**20:.0f} MiB; "
          f"peak resident size of the whole benchmark {rss:.0f} MiB (target < 1024); load average {load()}")


if __name__ == "__main__":
    main()
