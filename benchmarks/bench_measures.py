"""Benchmark: the firm bootstrap of the rate ratio (universe firms with their firm-years) against the obvious loop.

Run: ``python benchmarks/bench_measures.py [--firms 25000] [--resamples 10000] [--loop 200]``. An invented
universe of ``--firms`` firms over 30 fiscal years (each in the index for a span of years, with its own
forced-departure rate) is collapsed to the engine's cells (firm x (forced per year, firm-years per year)); then,
in the same run:

- the engine: ``--resamples`` firm resamples drawn in seeded blocks and refitted by the batched Poisson IRLS
  (``app.stats.sampling.draw_statistic`` with the ``rate_ratio`` statistic, one worker and the default pool),
  then the leave-one-firm-out jackknife (what a run adds for BCa);
- the obvious loop: draw firms, add up the drawn firms' firm-years and forced departures per year, fit
  statsmodels' Poisson GLM with offset log(firm-years) per resample; timed on ``--loop`` resamples and scaled
  linearly to ``--resamples`` (it says so).

Wall and CPU seconds are printed with the load average beside each number (2 shared cores).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import statsmodels.api as sm  # noqa: E402

from app.stats.bootstrap import jackknife_statistic  # noqa: E402
from app.stats.measures import rate_cells, rate_ratio_statistic  # noqa: E402
from app.stats.sampling import draw_statistic  # noqa: E402

FIRST, LAST = 1995, 2024


def invented(firms: int, seed: int = 1) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    first = rng.integers(FIRST - 10, LAST, firms)
    last = np.minimum(LAST, first + rng.integers(2, 30, firms))
    first = np.maximum(first, FIRST)
    last = np.maximum(last, first)  # a firm that left before the window starts: one firm-year, in the first year
    lengths = last - first + 1
    firm = np.repeat(np.arange(firms), lengths)
    year = np.repeat(first, lengths) + (np.arange(lengths.sum()) - np.repeat(np.cumsum(lengths) - lengths, lengths))
    ids = np.array([f"B{i:06d}" for i in range(firms)], dtype=object)
    frailty = rng.gamma(2.0, 0.5, firms)[firm]
    k = rng.poisson(0.03 * frailty * np.exp(0.01 * (year - 2010)))
    fy = pd.DataFrame({"firm_id": ids[firm], "year": year})
    dep = pd.DataFrame({"firm_id": ids[firm], "year": year, "departures": k}).loc[k > 0]
    return fy, dep


def clocks() -> tuple[float, float]:
    return time.perf_counter(), time.process_time()


def since(start: tuple[float, float]) -> tuple[float, float]:
    return time.perf_counter() - start[0], time.process_time() - start[1]


def load() -> str:
    return f"load {os.getloadavg()[0]:.1f}"


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--firms", type=int, default=25_000)
    parser.add_argument("--resamples", type=int, default=10_000)
    parser.add_argument("--loop", type=int, default=200)
    args = parser.parse_args()
    fy, dep = invented(args.firms)
    cells = rate_cells(fy, dep, (FIRST, LAST))
    years = cells.groups["year"].to_numpy()
    print(f"{args.firms:,} universe firms, {len(fy):,} firm-years, {int(dep['departures'].sum()):,} forced "
          f"departures, {len(years)} years; {load()}")
    statistic = rate_ratio_statistic(cells, (FIRST + LAST) / 2)
    results = {}
    for workers in (1, None):
        start = clocks()
        reps = draw_statistic(cells, statistic.evaluate, unit="firm", resamples=args.resamples, seed=7,
                              workers=workers)
        wall, cpu = since(start)
        results[workers] = wall
        print(f"engine, {args.resamples:,} resamples, workers={workers or 'default'}: {wall:.2f} s wall, "
              f"{cpu:.2f} s CPU ({load()}); failed {int((reps.failure != '').sum())}")
    start = clocks()
    values, weights = jackknife_statistic(cells, statistic, unit="firm")
    wall, cpu = since(start)
    print(f"leave-one-firm-out jackknife ({values.size:,} distinct cases of {int(weights.sum()):,} firms): "
          f"{wall:.2f} s wall, {cpu:.2f} s CPU ({load()})")

    # the obvious loop: per-firm vectors gathered once, then a statsmodels fit per resample
    matrix = cells.firm_matrix.toarray().astype(float)
    n = len(years)
    X = sm.add_constant(years - (FIRST + LAST) / 2)
    rng = np.random.default_rng(99)
    start = clocks()
    loop = []
    for _ in range(args.loop):
        drawn = matrix[rng.integers(0, matrix.shape[0], matrix.shape[0])].sum(axis=0)
        events, exposure = drawn[:n], drawn[n:]
        keep = exposure > 0
        fit = sm.GLM(events[keep], X[keep], family=sm.families.Poisson(), offset=np.log(exposure[keep])).fit()
        loop.append(fit.params[1])
    wall, cpu = since(start)
    scale = args.resamples / args.loop
    print(f"obvious loop (draw, sum drawn firms, statsmodels GLM), {args.loop} resamples: {wall:.2f} s wall, "
          f"{cpu:.2f} s CPU ({load()}); scaled to {args.resamples:,}: {wall * scale:.1f} s wall, {cpu * scale:.1f} s "
          f"CPU; ratio to the engine (1 worker): {wall * scale / results[1]:.1f}x wall")
    print(f"sd of the slope: engine {np.nanstd(reps.estimates, ddof=1):.5f}, loop {np.std(loop, ddof=1):.5f} "
          "(same distribution, different draws)")


if __name__ == "__main__":
    main()
