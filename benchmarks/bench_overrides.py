"""Case overrides applied to 100,000 detailed cells: the look-up by key (app.analysis.overrides.apply_overrides)
against the obvious approach, one boolean mask over every cell per override, in the same run.

Run: PYTHONPATH=. python benchmarks/bench_overrides.py   (invented cells from a seeded generator)
"""

from __future__ import annotations

import os
import time

import numpy as np
import pandas as pd

from app.analysis.overrides import CELL_KEY, ResolvedOverride, apply_overrides
from app.store import CaseOverride

N = 100_000


def cells(seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "year": rng.integers(1990, 2024, N).astype(np.int64),
        "sector": rng.choice(["A", "B", "C"], N).astype(object),
        "reason": rng.choice(["Retired", "Dismissed", "Resigned"], N).astype(object),
        "age": pd.array(rng.integers(40, 70, N), dtype="Int64"),
        "tenure": pd.array(rng.integers(0, 20, N), dtype="Int64"),
        "interim": pd.array(rng.random(N) < 0.1, dtype="boolean"),
        "departures": np.ones(N, dtype=np.int64)})
    frame["category"] = np.where(frame["reason"] == "Dismissed", "forced", "voluntary").astype(object)
    return frame


def masked(frame: pd.DataFrame, moves: list[ResolvedOverride]) -> pd.DataFrame:
    """The obvious way: a mask over every cell for each override."""
    counts = frame["departures"].to_numpy(dtype=np.int64).copy()
    taken, to = [], []
    for m in moves:
        assert m.key is not None
        hit = counts > 0
        for i, c in enumerate(CELL_KEY):
            if c in frame:
                col = frame[c]
                same = col.isna() if m.key[i] is None else (col == m.key[i])
                hit &= np.asarray(pd.Series(same).fillna(False), dtype=bool)
        rows = np.flatnonzero(hit)
        if len(rows):
            counts[rows[0]] -= 1
            taken.append(int(rows[0]))
            to.append(m.override.category)
    out = pd.concat([frame.assign(departures=counts),
                     frame.iloc[taken].assign(departures=1, category=np.asarray(to, dtype=object))], ignore_index=True)
    return out.loc[out["departures"] > 0].reset_index(drop=True)


def moves(frame: pd.DataFrame, k: int) -> list[ResolvedOverride]:
    rows = frame.sample(k, random_state=2)
    return [ResolvedOverride(CaseOverride(1, "F", None, int(r.year), str(r.reason), "excluded", "n", "a", "2026"),
                             i + 1, i + 1, i + 1,
                             ("F", int(r.year), r.sector, r.reason, int(r.age), int(r.tenure), bool(r.interim)))
            for i, r in enumerate(rows.itertuples())]


def timed(fn, *args):  # type: ignore[no-untyped-def]
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn(*args)
    return out, time.perf_counter() - wall, time.process_time() - cpu


def main() -> None:
    frame = cells()
    print(f"load average before: {os.getloadavg()}")
    for k in (10, 100, 1000):
        chosen = moves(frame, k)
        new, w1, c1 = timed(apply_overrides, frame, chosen)
        old, w2, c2 = timed(masked, frame, chosen) if k <= 100 else (None, float("nan"), float("nan"))
        if old is not None:
            assert int(new.loc[new["category"] == "excluded", "departures"].sum()) == k
            assert int(old.loc[old["category"] == "excluded", "departures"].sum()) == k
        print(f"{k:>5} overrides: look-up {w1:.3f} s wall / {c1:.3f} s CPU; masks {w2:.3f} s wall / {c2:.3f} s CPU")
    print(f"load average after: {os.getloadavg()}")


if __name__ == "__main__":
    main()
