"""Benchmark: the cell store's detailed key (age, tenure, interim), rules and the adjusted trend at 100k rows.

Run: ``python benchmarks/bench_rules_adjusted.py [--rows N]``. Imports the invented roster of
bench_import.py into a fresh SQLite file, then prints in the same run:
- stored rows of the two cell tables against the departures (the cost of the detailed key);
- categories under a rule from the detailed cells against the obvious way (read every record, apply the rule);
- the adjusted fit with firm-clustered SEs from firm x cell counts against statsmodels on one row per record;
- the firm bootstrap of the adjusted model (2,000 resamples, target under 10 s at 100k departures) against the
  obvious loop (draw firms, gather their records, statsmodels GLM per resample), timed on a few resamples and
  scaled linearly (it says so).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import statsmodels.api as sm  # noqa: E402
from bench_import import make_roster  # noqa: E402

from app.analysis.cellstore import categorise  # noqa: E402
from app.analysis.inputs import load_input  # noqa: E402
from app.analysis.rules import save_rules  # noqa: E402
from app.intake.ingest import import_roster  # noqa: E402
from app.stats.adjusted import (  # noqa: E402
    AGE_BANDS,
    TENURE_BANDS,
    band,
    bootstrap_adjusted,
    collapse,
    fit_adjusted,
)
from app.store import Store  # noqa: E402
from app.types import ClassificationRule  # noqa: E402


def timed(fn, repeat: int = 3):  # type: ignore[no-untyped-def]
    best, value = float("inf"), None
    for _ in range(repeat):
        start = time.perf_counter()
        value = fn()
        best = min(best, time.perf_counter() - start)
    return best, value


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--resamples", type=int, default=2000)
    args = parser.parse_args()
    print(f"load average at the start: {os.getloadavg()[0]:.1f} (2 shared cores: wall times swing with it)")
    with tempfile.TemporaryDirectory() as tmp:
        store = Store(f"sqlite:///{tmp}/bench.db")
        report = import_roster(store, make_roster(args.rows), "bench.csv")
        rid = report.roster.id
        sizes = store.cell_table_rows(rid)
        plain = len(store.cell_counts(rid))
        firm_plain = len(store.firm_cell_counts(rid))
        print(f"departures {report.accepted:,}; roster_cells {sizes['roster_cells']:,} rows ({plain:,} keys); "
              f"roster_detail_cells (+ age, tenure, interim) {sizes['roster_detail_cells']:,} rows; "
              f"roster_firm_cells {sizes['roster_firm_cells']:,} rows (without the detail: {firm_plain:,} keys)")
        base = store.save_mapping_version("bench", {"Retired": "voluntary", "Dismissed": "forced",
                                                    "Resigned - performance": "forced", "Health": "voluntary",
                                                    "New role": "voluntary", "Still in post": "excluded"})
        mapping = save_rules(store, base, (ClassificationRule("Retired", "age", "below", 60, "forced"),), note="b")
        t_cells, by_cells = timed(lambda: categorise(store.cell_counts(rid, detail=True), mapping)[0])
        t_records, by_records = timed(lambda: categorise(store.departures(rid), mapping)[0])
        same = (by_cells.groupby(["year", "category"])["departures"].sum().to_dict()
                == by_records.groupby(["year", "category"]).size().to_dict())
        print(f"rule applied: detailed cells {t_cells:.3f} s, every record {t_records:.3f} s "
              f"({t_records / t_cells:.1f}x); same counts: {same}")
        inp = load_input(store, rid, mapping=f"bench:{mapping.version}", window=(1995, 2024))
        adjust = ("age", "tenure", "sector")

        def by_firm_cells():  # type: ignore[no-untyped-def]
            frame = categorise(store.firm_cell_counts(rid, detail=True), mapping)[0]
            frame = frame.loc[frame["category"].isin(["forced", "voluntary"])]
            return fit_adjusted(collapse(frame, adjust), inp.window)

        def by_records():  # type: ignore[no-untyped-def]
            rows = inp.records.loc[inp.records["category"].isin(["forced", "voluntary"])].dropna(subset=list(adjust))
            x = pd.concat([pd.Series(1.0, index=rows.index, name="const"), rows["year"] - rows["year"].min(),
                           pd.get_dummies(pd.Categorical(band(rows["age"].to_numpy(), (50, 60, 65), AGE_BANDS),
                                                         categories=AGE_BANDS), drop_first=True, dtype=float)
                           .set_index(rows.index),
                           pd.get_dummies(pd.Categorical(band(rows["tenure"].to_numpy(), (3, 7, 11), TENURE_BANDS),
                                                         categories=TENURE_BANDS), drop_first=True, dtype=float)
                           .set_index(rows.index),
                           pd.get_dummies(rows["sector"], drop_first=True, dtype=float)], axis=1)
            x = x.loc[:, x.any()]
            return sm.GLM((rows["category"] == "forced").to_numpy(dtype=float), x.to_numpy(dtype=float),
                          family=sm.families.Binomial()).fit(
                cov_type="cluster", cov_kwds={"groups": pd.factorize(rows["firm_id"])[0]})

        t_ours, ours = timed(by_firm_cells)
        t_sm, ref = timed(by_records)
        print(f"adjusted fit + clustered SE: firm x cell counts {t_ours:.3f} s, statsmodels on records "
              f"{t_sm:.3f} s ({t_sm / t_ours:.1f}x); |coef diff| {abs(ours.coef - ref.params[1]):.1e}, "
              f"|SE diff| {abs(ours.cluster_se - ref.bse[1]):.1e}")
        frame = categorise(store.firm_cell_counts(rid, detail=True), mapping)[0]
        data = collapse(frame.loc[frame["category"].isin(["forced", "voluntary"])], adjust)
        start = time.perf_counter()
        boot = bootstrap_adjusted(data, inp.window, resamples=args.resamples, seed=1)
        t_boot = time.perf_counter() - start
        rows = inp.records.loc[inp.records["category"].isin(["forced", "voluntary"])].dropna(subset=list(adjust))
        firms = pd.factorize(rows["firm_id"])[0]
        by_firm = [np.flatnonzero(firms == f) for f in range(firms.max() + 1)]
        rng = np.random.default_rng(1)
        few = 5
        start = time.perf_counter()
        for _ in range(few):
            idx = np.concatenate([by_firm[f] for f in rng.integers(0, len(by_firm), len(by_firm))])
            resample = rows.iloc[idx]
            x = pd.concat([pd.Series(1.0, index=resample.index, name="const"), resample["year"],
                           pd.get_dummies(pd.Categorical(band(resample["age"].to_numpy(), (50, 60, 65), AGE_BANDS),
                                                         categories=AGE_BANDS), drop_first=True, dtype=float)
                           .set_index(resample.index),
                           pd.get_dummies(pd.Categorical(band(resample["tenure"].to_numpy(), (3, 7, 11),
                                                              TENURE_BANDS), categories=TENURE_BANDS),
                                          drop_first=True, dtype=float).set_index(resample.index),
                           pd.get_dummies(resample["sector"], drop_first=True, dtype=float)], axis=1)
            sm.GLM((resample["category"] == "forced").to_numpy(dtype=float), x.to_numpy(dtype=float),
                   family=sm.families.Binomial()).fit()
        t_loop = (time.perf_counter() - start) / few * args.resamples
        print(f"firm bootstrap of the adjusted model, {args.resamples:,} resamples over {len(data.firm_ids):,} "
              f"firms and {len(data.cells):,} cells: {t_boot:.2f} s ({boot.failed} failed; BCa "
              f"{boot.intervals['bca'][0]:.4f}-{boot.intervals['bca'][1]:.4f}); the obvious loop, timed on {few} "
              f"resamples and scaled: {t_loop:.0f} s ({t_loop / t_boot:.0f}x)")
        store.dispose()
    print(f"load average at the end: {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    np.seterr(all="ignore")
    main()
