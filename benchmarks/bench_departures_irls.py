"""10,000 departure resamples (issue 13 target: < 0.1 s wall on 2 cores): the batched IRLS against main's.

The previous engine is ``app/stats`` as of ``--baseline`` (default ``main``), written out of git into a
temporary package and imported beside the current one (``bench_bootstrap.baseline_engine``), so both run on
the same counts in the same process and the same minutes of machine load. The roster is
``bench_bootstrap.make_cells``: 25,000 invented firms, about 100,000 departures over 30 years (10 sectors for
the sector-year cells).

Printed, each the least CPU of ``--best`` interleaved rounds with its wall time, and the ratio previous /
current:

1. ``draw_replicates``, unit departure, 10,000 resamples: the straight trend with the default worker count
   and with one worker (do threads help at this size?), and the sector-adjusted trend;
2. the pieces, in one thread: the 40 blocks of multinomial draws alone (the same in both engines: the floor),
   and ``fit_batch`` alone on those blocks for the straight trend (one-block arrow step), the sector model
   (ten-block arrow step) and a natural-spline design (the general elimination step);
3. whether the replicates are the same numbers: bitwise, and the largest relative difference;
4. with ``--blas``: the straight trend again in a child process with ``OPENBLAS_NUM_THREADS=1``.

The load average (1/5/15 min) is printed before and after. On a shared machine wall time is mostly waiting
for a core; the CPU columns and the same-run ratios are the steadier comparison.

Run: ``python benchmarks/bench_departures_irls.py [--resamples 10000] [--best 5] [--baseline main] [--blas]``
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

from bench_bootstrap import baseline_engine, design_for, load, make_cells  # noqa: E402

from app.stats.cells import Cells  # noqa: E402
from app.stats.draws import BLOCK_SIZE, CellSampler, block_rng  # noqa: E402
from app.stats.irls import fit_batch  # noqa: E402
from app.stats.sampling import draw_replicates  # noqa: E402
from app.stats.spline import natural_spline_basis  # noqa: E402

Timing = tuple[float, float]


def clocked(run: Callable[[], Any]) -> Timing:
    """(wall seconds, CPU seconds of all threads) of one call."""
    wall, cpu = time.perf_counter(), time.process_time()
    run()
    return time.perf_counter() - wall, time.process_time() - cpu


def interleaved(rounds: int, contenders: dict[str, Callable[[], Any]]) -> dict[str, Timing]:
    """Each contender run ``rounds`` times, round by round so that all see the same load; the least CPU of
    each, with its wall time."""
    seen: dict[str, list[Timing]] = {name: [] for name in contenders}
    for _ in range(rounds):
        for name, run in contenders.items():
            seen[name].append(clocked(run))
    return {name: min(times, key=lambda t: t[1]) for name, times in seen.items()}


def blocks_of(cells: Cells, resamples: int) -> list[np.ndarray]:
    sampler = CellSampler(cells, "departure")
    return [sampler.draw(block_rng(1, k), BLOCK_SIZE) for k in range(-(-resamples // BLOCK_SIZE))]


def fit_all(fit: Callable[..., Any], X: np.ndarray, blocks: list[np.ndarray]) -> list[Any]:
    g = X.shape[0]
    return [fit(X, b[:, :g], b[:, :g] + b[:, g:]) for b in blocks]


def spline_design(cells: Cells) -> np.ndarray:
    years = cells.groups["year"].to_numpy(dtype=float)
    basis, _ = natural_spline_basis(years, 3)
    return np.column_stack([np.ones_like(years), basis])


def row(label: str, now: Timing, before: Timing, target: float | None = None) -> str:
    flag = "" if target is None else f"{target:>6.2f} {'ok' if now[0] < target else 'SLOW':<4}"
    return (f"{label:<44} {now[0]:>7.3f} {now[1]:>7.3f} {flag:<11} {before[0]:>9.3f} {before[1]:>8.3f} "
            f"{before[0] / now[0]:>9.2f}x {before[1] / now[1]:>8.2f}x")


def blas_child(resamples: int, best: int) -> None:
    """The straight trend in this process (started with a BLAS thread count): JSON (wall, CPU)."""
    cells = make_cells(25_000)
    design = design_for(cells)
    run = lambda: draw_replicates(cells, design, unit="departure", resamples=resamples, seed=1)  # noqa: E731
    run()
    print(json.dumps(interleaved(best, {"current": run})["current"]))


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--resamples", type=int, default=10_000)
    parser.add_argument("--best", type=int, default=5, help="interleaved rounds; the least CPU is shown")
    parser.add_argument("--baseline", default="main", help="git revision of the previous engine")
    parser.add_argument("--blas", action="store_true", help="also run with OPENBLAS_NUM_THREADS=1")
    parser.add_argument("--blas-child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.blas_child:
        blas_child(args.resamples, args.best)
        return
    B = args.resamples
    old_sampling = baseline_engine(args.baseline)
    old_irls = importlib.import_module("baseline_stats.irls")
    print(f"machine: {os.cpu_count()} CPUs; previous engine = app/stats at {args.baseline}; "
          f"load average (1/5/15 min) at start {load()}")
    cells, sector = make_cells(25_000), make_cells(25_000, by_sector=True)
    design, sector_design = design_for(cells), design_for(sector)
    print(f"roster: {int(cells.totals.sum()):,} departures, {cells.n_groups} years, "
          f"{sector.n_groups} sector-years; {B:,} departure resamples")

    def replicates(module: Any, c: Cells, d: Any, **options: Any) -> Callable[[], Any]:
        return lambda: module.draw_replicates(c, d, unit="departure", resamples=B, seed=1, **options)

    for run in (replicates(sys.modules["app.stats.sampling"], cells, design),
                replicates(old_sampling, cells, design)):  # warm-up: thread pool, BLAS, page faults
        run()
    got = interleaved(args.best, {
        "now": replicates(sys.modules["app.stats.sampling"], cells, design),
        "before": replicates(old_sampling, cells, design),
        "now 1": replicates(sys.modules["app.stats.sampling"], cells, design, workers=1),
        "before 1": replicates(old_sampling, cells, design, workers=1),
        "now sector": replicates(sys.modules["app.stats.sampling"], sector, sector_design),
        "before sector": replicates(old_sampling, sector, sector_design),
    })
    print(f"\n{'draw_replicates, unit departure':<44} {'wall s':>7} {'CPU s':>7} {'target':>11} "
          f"{'prev wall':>9} {'prev CPU':>8} {'wall ratio':>10} {'CPU ratio':>9}")
    print(row(f"straight trend, {min(8, os.cpu_count() or 1)} workers (default)", got["now"], got["before"], 0.1))
    print(row("straight trend, 1 worker", got["now 1"], got["before 1"]))
    print(row("sector-adjusted trend (300 sector-years)", got["now sector"], got["before sector"]))
    print(f"load average after the table {load()}")

    blocks, sector_blocks = blocks_of(cells, B), blocks_of(sector, B)
    X, XS, XN = (np.asarray(design.matrix, dtype=float), np.asarray(sector_design.matrix, dtype=float),
                 spline_design(cells))
    pieces = interleaved(args.best, {
        "draws": lambda: blocks_of(cells, B),
        "now line": lambda: fit_all(fit_batch, X, blocks), "before line": lambda: fit_all(old_irls.fit_batch, X, blocks),
        "now sector": lambda: fit_all(fit_batch, XS, sector_blocks),
        "before sector": lambda: fit_all(old_irls.fit_batch, XS, sector_blocks),
        "now spline": lambda: fit_all(fit_batch, XN, blocks),
        "before spline": lambda: fit_all(old_irls.fit_batch, XN, blocks),
    })
    print(f"\npieces of {B:,} departure resamples, one thread (least CPU of {args.best} rounds):")
    print(f"{'  multinomial draws (the same in both engines)':<44} {pieces['draws'][0]:>7.3f} {pieces['draws'][1]:>7.3f}")
    for name, label in (("line", "fit_batch, straight trend (2 parameters)"),
                        ("sector", "fit_batch, sector model (11 parameters)"),
                        ("spline", "fit_batch, spline (4 parameters, general)")):
        print(row("  " + label, pieces[f"now {name}"], pieces[f"before {name}"]))
    print(f"load average after the pieces {load()}")

    print("\nsame numbers? (every resample's estimate, deviance, iterations and failure reason)")
    for label, design_matrix, fit_blocks in (("straight trend", X, blocks), ("sector model", XS, sector_blocks),
                                             ("spline", XN, blocks)):
        now = fit_all(fit_batch, design_matrix, fit_blocks)
        before = fit_all(old_irls.fit_batch, design_matrix, fit_blocks)
        a = np.concatenate([f.beta for f in now])
        b = np.concatenate([f.beta for f in before])
        same = all(np.array_equal(p.beta, q.beta, equal_nan=True) and np.array_equal(p.deviance, q.deviance,
                   equal_nan=True) and np.array_equal(p.iterations, q.iterations)
                   and np.array_equal(p.failure, q.failure) for p, q in zip(now, before, strict=True))
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = np.nanmax(np.abs(a - b) / np.abs(b)) if np.isfinite(b).any() else 0.0
        print(f"  {label:<16} {len(a):,} fits: {'bitwise equal' if same else 'DIFFERENT'}; largest relative "
              f"difference of a coefficient {rel:.1e}")
    reps = draw_replicates(cells, design, unit="departure", resamples=B, seed=1)
    prev = old_sampling.draw_replicates(cells, design, unit="departure", resamples=B, seed=1)
    print(f"  draw_replicates, straight trend: {'bitwise equal' if np.array_equal(reps.estimates, prev.estimates, equal_nan=True) else 'DIFFERENT'} "
          f"({int(np.isnan(reps.estimates).sum())} failed resamples)")

    if args.blas:
        print("\nBLAS threads (straight trend, default workers, current engine, each in a fresh process):")
        for threads in (None, "1"):
            env = dict(os.environ)
            if threads is not None:
                env["OPENBLAS_NUM_THREADS"] = threads
            out = subprocess.run([sys.executable, __file__, "--blas-child", "--resamples", str(B), "--best",
                                  str(args.best)], check=True, capture_output=True, text=True, env=env).stdout
            wall, cpu = json.loads(out.strip().splitlines()[-1])
            print(f"  OPENBLAS_NUM_THREADS={threads or 'unset':<6} {wall:.3f} s wall, {cpu:.3f} s CPU")
    print(f"load average at the end {load()}")


if __name__ == "__main__":
    main()
