"""Speed and memory of the bootstrap engine against the previous engine, measured in the same run.

The previous engine is the ``app/stats`` package as it stood at ``--baseline`` (default: the commit
before the issue-13 work), checked out of git into a temporary directory and imported under another
name, so both engines run on the same counts in the same process and the same minute of machine load.

Rosters are generated as counts (firm x cell matrices), never as rows: about 4 departures per firm
over 30 years, 10 sectors, a firm effect on the forced share and a mild upward trend.

Targets (2-core machine, issue 13): 10,000 departure resamples < 0.1 s; 10,000 firm resamples
< 1.0 s at 25,000 firms, growing no faster than the number of firms up to 250,000; peak memory of a
10,000-resample firm bootstrap (``bootstrap_trend``: original fit, draws, jackknife, intervals) at
1,000,000 departures < 600 MB. Wall and CPU seconds (all threads) are printed with the load average;
on a shared machine the CPU column and the ratio in the same run are the steadier comparison.

Optionally (``--loop N``) the obvious per-resample loop (gather DataFrame rows, ``pd.crosstab``,
statsmodels ``GLM.fit``) is timed on N resamples and scaled to 10,000.

Run: ``python benchmarks/bench_bootstrap.py [--resamples 10000] [--best 3] [--loop 0] [--pieces 3] [--no-memory]``
"""

from __future__ import annotations

import argparse
import atexit
import functools
import importlib
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from app.stats.bootstrap import bootstrap_trend, draw_replicates  # noqa: E402
from app.stats.cells import Cells  # noqa: E402
from app.stats.design import design_matrix, window_centre  # noqa: E402

#: the engine before the issue-13 work (relative IRLS rule, batched firm passes, module split)
BASELINE = "4303222"
YEARS = np.arange(1995, 2025)
SECTORS = 10


def load() -> str:
    return "/".join(f"{x:.2f}" for x in os.getloadavg())


def baseline_engine(commit: str) -> ModuleType:
    """``app.stats.bootstrap`` as of ``commit``, importable beside the current one.

    The commit's ``app/stats`` files are written to a temporary package ``baseline_stats`` with
    their ``app.stats.`` imports pointed at it; ``app.types`` (unchanged) comes from the tree.
    """
    names = subprocess.run(["git", "-C", str(ROOT), "ls-tree", "--name-only", commit, "app/stats/"],
                           check=True, capture_output=True, text=True).stdout.split()
    scratch = tempfile.mkdtemp(prefix="helmshift-baseline-")
    atexit.register(shutil.rmtree, scratch, True)
    target = Path(scratch) / "baseline_stats"
    target.mkdir()
    for name in names:
        text = subprocess.run(["git", "-C", str(ROOT), "show", f"{commit}:{name}"], check=True,
                              capture_output=True, text=True).stdout
        (target / Path(name).name).write_text(text.replace("app.stats.", "baseline_stats."))
    sys.path.insert(0, str(target.parent))
    return importlib.import_module("baseline_stats.bootstrap")


def make_cells(firms: int, seed: int = 1, *, by_sector: bool = False) -> Cells:
    """Invented counts: Poisson(3) + 1 departures per firm, a firm effect, a mild upward trend."""
    rng = np.random.default_rng(seed)
    per_firm = 1 + rng.poisson(3.0, size=firms)
    firm = np.repeat(np.arange(firms), per_firm)
    year = rng.integers(0, YEARS.size, size=firm.size)
    logit = -1.0 + 0.02 * (year - 14.5) + rng.normal(0, 0.7, size=firms)[firm]
    forced = rng.random(firm.size) < 1 / (1 + np.exp(-logit))
    sector = firm % SECTORS if by_sector else np.zeros(firm.size, dtype=np.int64)
    n_groups = (SECTORS if by_sector else 1) * YEARS.size
    group = sector * YEARS.size + year
    col = np.where(forced, group, group + n_groups)
    matrix = sparse.csr_matrix((np.ones(firm.size, dtype=np.int64), (firm, col)), shape=(firms, 2 * n_groups))
    matrix.sum_duplicates()
    totals = np.asarray(matrix.sum(axis=0)).ravel()
    groups = pd.DataFrame({
        "year": np.tile(YEARS, n_groups // YEARS.size),
        "sector": np.repeat([f"Sector {s}" for s in range(n_groups // YEARS.size)], YEARS.size)
        if by_sector else "",
        "forced": totals[:n_groups], "voluntary": totals[n_groups:],
    })
    return Cells(groups=groups, firm_ids=np.arange(firms).astype(str), firm_matrix=matrix,
                 window=(int(YEARS[0]), int(YEARS[-1])), by_sector=by_sector)


def design_for(cells: Cells) -> Any:
    return design_matrix(cells.groups, "sector" if cells.by_sector else "linear", window_centre(cells.window))


def timed(draw: Any, cells: Cells, unit: str, resamples: int, **options: Any) -> tuple[float, float]:
    """(wall seconds, CPU seconds of all threads) of one ``draw_replicates`` run."""
    design = design_for(cells)
    wall, cpu = time.perf_counter(), time.process_time()
    draw(cells, design, unit=unit, resamples=resamples, seed=1, **options)
    return time.perf_counter() - wall, time.process_time() - cpu


def best_of(runs: int, *args: Any, **options: Any) -> tuple[float, float]:
    """The fastest of ``runs`` runs by wall clock, with its CPU time."""
    return min((timed(*args, **options) for _ in range(runs)), key=lambda t: t[0])


def interleaved(runs: int, contenders: dict[str, Any]) -> dict[str, tuple[float, float]]:
    """Each contender (a no-argument callable returning (wall, CPU)) run ``runs`` times, round by round so
    that all see the same machine load; the fastest by CPU of each, with its wall time."""
    seen: dict[str, list[tuple[float, float]]] = {name: [] for name in contenders}
    for _ in range(runs):
        for name, run in contenders.items():
            seen[name].append(run())
    return {name: min(times, key=lambda t: t[1]) for name, times in seen.items()}


def obvious_loop(cells: Cells, unit: str, n: int) -> float:
    """CPU seconds per resample of draw / gather DataFrame rows / ``pd.crosstab`` / statsmodels."""
    import statsmodels.api as sm

    coo = cells.firm_matrix.tocoo()
    g = cells.n_groups
    rows = pd.DataFrame({"firm": np.repeat(coo.row, coo.data), "group": np.repeat(coo.col % g, coo.data),
                         "forced": np.repeat(coo.col < g, coo.data)})
    by_firm = rows.set_index("firm")
    years = cells.groups["year"].to_numpy(dtype=float)
    rng = np.random.default_rng(2)
    cpu = time.process_time()
    for _ in range(n):
        if unit == "departure":
            sample = rows.iloc[rng.integers(0, len(rows), size=len(rows))]
        else:
            sample = by_firm.loc[rng.integers(0, cells.firm_matrix.shape[0], size=cells.firm_matrix.shape[0])]
        table = pd.crosstab(sample["group"], sample["forced"])
        t = years[table.index.to_numpy()] - years.mean()
        sm.GLM(table[[True, False]].to_numpy(), sm.add_constant(t), family=sm.families.Binomial()).fit()
    return (time.process_time() - cpu) / n


def pieces(cells: Cells, resamples: int, runs: int) -> None:
    """CPU seconds of each piece of 10,000 firm resamples drawn and fitted in one thread, by sampler 2 and 3:
    the firm draws, their counting (bincount into the multiplicity block), the transpose of a pass (sampler 3),
    the sparse product and the batched fit. Least of ``runs`` rounds, interleaved."""
    from app.stats.draws import BLOCK_SIZE, PASS_ROWS, CellSampler, block_rng, uniform_below
    from app.stats.sampling import fit_cells

    design = design_for(cells)
    X = np.asarray(design.matrix, dtype=float)
    n = cells.firm_matrix.shape[0]
    sampler = CellSampler(cells, "firm", sampler=3)
    assert sampler.firm_t is not None and len(sampler.ranges) == 1
    blocks = max(1, resamples // BLOCK_SIZE)
    work = np.empty(n, dtype=np.int64)
    rows = np.empty((PASS_ROWS, n), dtype=sampler.dtype)
    block = np.empty((n, PASS_ROWS), dtype=sampler.dtype)
    best: dict[str, float] = {}

    def clock(name: str, since: float) -> float:
        now = time.process_time()
        best[name] = best.get(name, 0.0) + now - since
        return now

    seen: list[dict[str, float]] = []
    for _ in range(runs):
        best = {}
        for k in range(blocks):
            rng = block_rng(1, k)
            bits = np.random.SFC64(rng.bit_generator.seed_seq)
            out = np.empty((BLOCK_SIZE, sampler.counts.size))
            for lo in range(0, BLOCK_SIZE, PASS_ROWS):
                for j in range(PASS_ROWS):
                    t = time.process_time()
                    drawn = rng.integers(0, n, size=n)
                    t = clock("sampler 2: integers (PCG64, int64)", t)
                    block[:, j] = np.bincount(drawn, minlength=n)
                    t = clock("sampler 2: bincount into a column", t)
                    drawn = uniform_below(bits, n, n, work)
                    t = clock("sampler 3: uniform_below (SFC64 words)", t)
                    rows[j] = np.bincount(drawn, minlength=n)
                    clock("sampler 3: bincount into a row", t)
                t = time.process_time()
                np.copyto(block, rows.T)
                t = clock("sampler 3: transpose of the pass", t)
                out[lo:lo + PASS_ROWS] = (sampler.firm_t @ block).T
                clock("both: sparse product (float32, 25 columns)", t)
            t = time.process_time()
            fit_cells(X, out, design.slope)
            clock("both: batched IRLS fit", t)
        seen.append(best)
    print(f"\npieces of {blocks * BLOCK_SIZE:,} firm resamples at {n:,} firms, one thread, CPU s (least of {runs} "
          f"rounds; load {load()}):")
    for name in seen[0]:
        print(f"  {name:<45} {min(b[name] for b in seen):>6.3f}")


def memory_child(engine: str, firms: int, resamples: int, baseline: str) -> None:
    """Run one firm bootstrap in this (fresh) process and print its memory as JSON."""
    module = baseline_engine(baseline) if engine == "previous" else None
    run = module.bootstrap_trend if module is not None else bootstrap_trend
    cells = make_cells(firms)
    design = design_for(cells)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    tracemalloc.start()
    wall = time.perf_counter()
    run(cells, design, unit="firm", resamples=resamples, seed=1)
    seconds = time.perf_counter() - wall
    traced = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"departures": int(cells.totals.sum()), "before": before, "peak": peak,
                      "traced": traced, "seconds": seconds}))


def memory(engine: str, firms: int, resamples: int, baseline: str) -> dict[str, float]:
    out = subprocess.run([sys.executable, __file__, "--memory-child", engine, "--firms", str(firms),
                          "--resamples", str(resamples), "--baseline", baseline],
                         check=True, capture_output=True, text=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--resamples", type=int, default=10_000)
    parser.add_argument("--best", type=int, default=3, help="runs per timing; the fastest is shown")
    parser.add_argument("--loop", type=int, default=0, help="resamples timed for the obvious loop (0: skip)")
    parser.add_argument("--scale", default="25000,100000,250000", help="firm counts for the scaling table")
    parser.add_argument("--baseline", default=BASELINE, help="git commit of the previous engine")
    parser.add_argument("--no-memory", action="store_true", help="skip the memory table")
    parser.add_argument("--pieces", type=int, default=0, help="rounds of the piece-by-piece profile (0: skip)")
    parser.add_argument("--memory-child", choices=["current", "previous"], help=argparse.SUPPRESS)
    parser.add_argument("--firms", type=int, default=250_000, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.memory_child:
        memory_child(args.memory_child, args.firms, args.resamples, args.baseline)
        return
    B = args.resamples
    old = baseline_engine(args.baseline)
    engines = {"current": draw_replicates, "previous": old.draw_replicates}
    print(f"machine: {os.cpu_count()} CPUs; previous engine = app/stats at {args.baseline}; "
          f"load average (1/5/15 min) at start {load()}")

    small, sector = make_cells(25_000), make_cells(25_000, by_sector=True)
    print(f"roster: {int(small.totals.sum()):,} departures, {small.firm_matrix.shape[0]:,} firms, "
          f"{small.n_groups} years, {sector.n_groups} sector-years")
    if args.pieces:
        pieces(small, B, args.pieces)
    for draw in engines.values():  # warm-up: thread pool, BLAS, page faults
        timed(draw, small, "firm", 500)
    tasks = [("straight trend, departures", small, "departure", 0.1, {}),
             ("straight trend, firms", small, "firm", 1.0, {}),
             ("  the same by sampler 3", small, "firm", 1.0, {"sampler": 3}),
             ("sector-adjusted, firms", sector, "firm", 5.0, {})]
    print(f"\n{'task (' + format(B, ',') + ' resamples)':<30} {'wall s':>7} {'CPU s':>7} {'target':>7}    "
          f"{'prev wall':>9} {'prev CPU':>8} {'wall ratio':>10} {'CPU ratio':>9}")
    for label, cells, unit, target, options in tasks:
        wall, cpu = best_of(args.best, engines["current"], cells, unit, B, **options)
        p_wall, p_cpu = best_of(args.best, engines["previous"], cells, unit, B)
        flag = "ok" if wall < target else "SLOW"
        print(f"{label:<30} {wall:>7.3f} {cpu:>7.3f} {target:>6.1f} {flag:<4} {p_wall:>9.3f} {p_cpu:>8.3f} "
              f"{p_wall / wall:>9.2f}x {p_cpu / cpu:>8.2f}x")
    print(f"load average after the table {load()}")

    print(f"\nfirm resamples ({B:,}, straight trend) as the roster grows: the current engine with sampler 4 "
          f"(new runs), samplers 3 and 1 (runs started before it), and the previous engine, interleaved; "
          f"least CPU of {max(1, args.best - 1)}; CPU per firm relative to the first size:")
    print(f"{'firms':>8} {'departures':>11}  " + "  ".join(f"{n + ' wall/CPU s':>22} {'/firm':>6}" for n in
                                                           ("sampler 4", "sampler 3", "sampler 1", "previous")))
    first: dict[str, float] = {}
    for firms in (int(f) for f in args.scale.split(",")):
        cells = make_cells(firms)
        got = interleaved(max(1, args.best - 1), {
            "sampler 4": functools.partial(timed, engines["current"], cells, "firm", B, sampler=4),
            "sampler 3": functools.partial(timed, engines["current"], cells, "firm", B, sampler=3),
            "sampler 1": functools.partial(timed, engines["current"], cells, "firm", B, sampler=1),
            "previous": functools.partial(timed, engines["previous"], cells, "firm", B)})
        row = []
        for name, (wall, cpu) in got.items():
            first.setdefault(name, cpu / firms)
            row.append(f"{wall:>10.2f} / {cpu:>6.2f} s {cpu / firms / first[name]:>5.2f}x")
        print(f"{firms:>8,} {int(cells.totals.sum()):>11,}  " + "  ".join(row) + f"   (load {load()})")
        if not first.get("threads"):  # two workers against one at the first size (the GIL check)
            first["threads"] = 1.0
            th = interleaved(max(1, args.best - 1), {
                str(w): functools.partial(timed, engines["current"], cells, "firm", B, workers=w) for w in (1, 2)})
            print(f"{'':>21}at this size, 1 worker {th['1'][0]:.2f} s wall / {th['1'][1]:.2f} s CPU, 2 workers "
                  f"{th['2'][0]:.2f} s wall / {th['2'][1]:.2f} s CPU (wall ratio {th['1'][0] / th['2'][0]:.2f}x)")
    print(f"load average after the scaling table {load()}")
    if args.no_memory:
        return

    print(f"\nmemory of bootstrap_trend (unit firm, {B:,} resamples) at 250,000 firms, each engine in a "
          f"fresh process (target < 600 MB peak resident):")
    for engine in ("current", "previous"):
        m = memory(engine, 250_000, B, args.baseline)
        print(f"  {engine:<8} {m['departures']:,} departures: peak resident {m['peak']:.0f} MB "
              f"(before the bootstrap {m['before']:.0f} MB), peak traced allocation {m['traced']:.0f} MiB, "
              f"{m['seconds']:.1f} s")
    print(f"load average at the end {load()}")

    if args.loop:
        print(f"\nobvious loop (gather rows, pd.crosstab, statsmodels GLM.fit), CPU timed on {args.loop} "
              f"resamples and scaled to {B:,}:")
        for label, cells, unit, _, _ in tasks[:2]:
            per = obvious_loop(cells, unit, args.loop)
            cpu = best_of(1, engines["current"], cells, unit, B)[1]
            print(f"  {label:<30} {per * B:>8.0f} CPU s, {per * B / cpu:,.0f}x the current engine's CPU")


if __name__ == "__main__":
    main()
