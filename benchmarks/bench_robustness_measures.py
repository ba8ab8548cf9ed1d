"""Benchmark: what the rate ratio and the adjusted odds ratio of every robustness reading cost (issue 16).

Run: ``python benchmarks/bench_robustness_measures.py [--rows N]``. Imports the invented roster of
bench_import.py (default 100,000 rows, 5,000 firms) into a fresh SQLite file, derives its universe of
firm-years, saves a mapping with the rule "retirement below 60 counts as forced", and prints in the same run,
wall and CPU time, best of 3:
- a cold Robustness check (a fresh Store, so nothing memoised) without the measures (the previous code path)
  and with them, and the ratio;
- the same check with the measures fitted the obvious way, each reading reading its own firm cells (what the
  shared, once-read firm cells in ``MeasureContext`` save);
- a warm check (memoised, as a repeated page visit).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_import import make_roster  # noqa: E402

from app.analysis import robustness_measures  # noqa: E402
from app.analysis.inputs import load_input  # noqa: E402
from app.analysis.robustness import check_robustness  # noqa: E402
from app.analysis.rules import save_rules  # noqa: E402
from app.intake.ingest import import_roster  # noqa: E402
from app.intake.universe import derive_universe  # noqa: E402
from app.store import Store  # noqa: E402
from app.types import ClassificationRule  # noqa: E402


def timed(fn: Callable[[], Any], repeat: int = 3) -> tuple[float, float]:
    """Best wall and best CPU seconds of ``repeat`` calls."""
    wall, cpu = float("inf"), float("inf")
    for _ in range(repeat):
        w, c = time.perf_counter(), time.process_time()
        fn()
        wall, cpu = min(wall, time.perf_counter() - w), min(cpu, time.process_time() - c)
    return wall, cpu


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=100_000)
    args = parser.parse_args()
    print(f"load average at the start: {os.getloadavg()[0]:.1f} (2 shared cores: wall times swing with it)")
    with tempfile.TemporaryDirectory() as tmp:
        url = f"sqlite:///{tmp}/bench.db"
        setup = Store(url)
        report = import_roster(setup, make_roster(args.rows), "bench.csv")
        rid = report.roster.id
        derive_universe(setup, rid)
        base = setup.save_mapping_version("bench", {"Retired": "voluntary", "Dismissed": "forced",
                                                    "Resigned - performance": "forced", "Health": "voluntary",
                                                    "New role": "voluntary", "Still in post": "excluded"})
        save_rules(setup, base, (ClassificationRule("Retired", "age", "below", 60, "forced"),), note="b")
        setup.update_settings(rid, mapping_name="bench")
        setup.dispose()
        print(f"departures {report.accepted:,}")

        def cold(measures: bool, *, shared: bool = True) -> Callable[[], Any]:
            def run() -> Any:
                store = Store(url)  # a fresh memo: every reading is computed
                try:
                    inp = load_input(store, rid)
                    if not shared:  # the obvious way: every reading reads the firm cells itself
                        original = robustness_measures.MeasureContext.firms

                        def fresh(self: Any) -> Any:
                            self._firms = None
                            return original(self)
                        robustness_measures.MeasureContext.firms = fresh  # type: ignore[method-assign]
                        try:
                            return check_robustness(store, inp, vary=["Retired"], preset=True, measures=measures)
                        finally:
                            robustness_measures.MeasureContext.firms = original  # type: ignore[method-assign]
                    return check_robustness(store, inp, vary=["Retired"], preset=True, measures=measures)
                finally:
                    store.dispose()
            return run

        labels = [v.label for v in cold(True)().variants]
        before = timed(cold(False))
        after = timed(cold(True))
        obvious = timed(cold(True, shared=False))
        print(f"{len(labels)} readings shown (identical ones merged): {'; '.join(labels)}")
        print(f"cold check, share only (previous path): wall {before[0]:.2f} s, CPU {before[1]:.2f} s")
        print(f"cold check with rate ratio + adjusted OR per reading: wall {after[0]:.2f} s, CPU {after[1]:.2f} s "
              f"({after[0] / before[0]:.2f}x the previous path's wall)")
        print(f"same, each reading reading its own firm cells (obvious): wall {obvious[0]:.2f} s, CPU "
              f"{obvious[1]:.2f} s (shared read is {obvious[0] / after[0]:.2f}x faster)")
        store = Store(url)
        inp = load_input(store, rid)
        check_robustness(store, inp, vary=["Retired"], preset=True)
        warm = timed(lambda: check_robustness(store, inp, vary=["Retired"], preset=True), repeat=5)
        store.dispose()
        print(f"warm check (memoised readings, a repeated page): wall {warm[0] * 1000:.1f} ms, "
              f"CPU {warm[1] * 1000:.1f} ms")
    print(f"load average at the end: {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
