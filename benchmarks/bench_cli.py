"""Wall time of ``helmshift fit --json`` at 100,000 departures, start-up included: this tree against an earlier one.

Run: ``python benchmarks/bench_cli.py [--rows 100000] [--before REV] [--repeat 5]``

The roster is the one ``bench_pages.py`` builds (each tree imports it with its own code, cached per revision in the temp folder: ~99,400 departures, ~25,000 firms,
30 years, the demo mappings). ``--before`` (default ``7d99e8f``, main when the fit-fast work began) is written
out with ``git archive`` into a temporary folder; both trees then run as fresh processes (``python -m app.cli
fit --db ... --roster 1 --json``, ``PYTHONPATH`` = the tree) over copies of the same database, interleaved
so both see the same minute of machine load:

- **first fit**: a database copy on which no fit of these counts was recorded yet (a new copy per run);
- **repeat fit**: the same command again on a database where it already ran once (this tree prints the
  recorded fit from ``app.analysis.quick_fit``: no numpy, pandas, SQLAlchemy, scipy or statsmodels).

Since the first-fit work, this tree's first fit also imports none of them: ``app.analysis.quick_fit`` fits the
new counts with the plain-Python trend (``app.stats.trend_line``) and records the run through ``sqlite3``.

Each is the median of ``--repeat`` runs after one warm-up run (which fills the OS file cache); the load
average is printed before and after. Both trees' JSON outputs are compared apart from the run id: every
string and integer must be equal, and the largest relative difference of a float is printed (a tree whose
fit came from statsmodels differs from the plain engine in the last digits; the same engine prints the same
bytes). Target (issue 13, 2 cores): under 0.5 s wall.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_pages import tree_database  # noqa: E402

#: main when the fit-fast work began (a repeated fit printed the recorded run through SQLAlchemy and pandas);
#: 73ffe36 is main before any start-up work (every fit imported scipy.stats and statsmodels)
BEFORE = "7d99e8f"


def load() -> str:
    return "/".join(f"{x:.2f}" for x in os.getloadavg())


def _children_cpu() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def fit_once(tree: Path, db: Path) -> tuple[tuple[float, float], dict[str, object]]:
    """Wall and CPU seconds (user + system) of one ``helmshift fit --json``, and what it printed."""
    env = {**os.environ, "PYTHONPATH": str(tree)}
    cmd = [sys.executable, "-m", "app.cli", "fit", "--db", str(db), "--roster", "1", "--json"]
    cpu = _children_cpu()
    started = time.perf_counter()
    done = subprocess.run(cmd, cwd=tree, env=env, capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - started
    if done.returncode:
        raise SystemExit(f"{tree}: helmshift fit failed:\n{done.stderr[-2000:]}")
    return (seconds, _children_cpu() - cpu), json.loads(done.stdout)


def differences(a: object, b: object, where: str = "") -> tuple[list[str], float]:
    """Keys whose strings, integers or shapes differ, and the largest relative difference between floats."""
    if isinstance(a, dict) and isinstance(b, dict):
        found: list[str] = [] if list(a) == list(b) else [f"{where} keys"]
        worst = 0.0
        for key in a.keys() & b.keys():
            if key != "run":
                more, rel = differences(a[key], b[key], f"{where}.{key}")
                found, worst = found + more, max(worst, rel)
        return found, worst
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        found, worst = [], 0.0
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            more, rel = differences(x, y, f"{where}[{i}]")
            found, worst = found + more, max(worst, rel)
        return found, worst
    if isinstance(a, float) and isinstance(b, float):
        return [], abs(a - b) / max(abs(a), abs(b), 1e-300)
    return ([] if a == b and type(a) is type(b) else [where]), 0.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--before", default=BEFORE, help="git revision to compare with")
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    print(f"{os.cpu_count()} CPUs; load average at start {load()}", flush=True)
    with tempfile.TemporaryDirectory(prefix="helmshift-bench-cli-") as tmp:
        work = Path(tmp)
        before_tree = work / "before"
        before_tree.mkdir()
        archive = subprocess.run(["git", "archive", args.before], cwd=ROOT, check=True, capture_output=True)
        subprocess.run(["tar", "-x", "-C", str(before_tree)], input=archive.stdout, check=True)
        trees = {"before": before_tree, "after": ROOT}
        before_rev = subprocess.run(["git", "rev-parse", "--short", args.before], cwd=ROOT, check=True,
                                    capture_output=True, text=True).stdout.strip()
        # each tree's copy of the generated rosters, imported by its own code (bench_pages.tree_database)
        base = {label: tree_database(tree, before_rev if label == "before" else None, args.rows)
                for label, tree in trees.items()}
        times: dict[tuple[str, str], list[tuple[float, float]]] = {(t, k): [] for t in trees
                                                                   for k in ("first", "repeat")}
        outputs: dict[str, dict[str, object]] = {}
        for i in range(args.repeat + 1):  # round 0 is the warm-up
            for label, tree in trees.items():
                db = work / f"{label}-{i}.db"
                shutil.copyfile(base[label], db)
                first, outputs[label] = fit_once(tree, db)
                repeat, again = fit_once(tree, db)
                if {k: v for k, v in again.items() if k != "run"} != {k: v for k, v in outputs[label].items()
                                                                     if k != "run"}:
                    raise SystemExit(f"{label}: the repeated fit printed something else than the first")
                if i:
                    times[(label, "first")].append(first)
                    times[(label, "repeat")].append(repeat)
                for suffix in ("", "-wal", "-shm"):
                    Path(f"{db}{suffix}").unlink(missing_ok=True)
        unequal, worst = differences(outputs["before"], outputs["after"])
    print(f"load average at the end {load()}")
    print(f"\n{'helmshift fit --json':<28} {'wall before':>11} {'after':>7} {'ratio':>6} {'target':>6}   "
          f"{'CPU before':>10} {'after':>7} {'ratio':>6}")
    for kind in ("first", "repeat"):
        b, a = (statistics.median(w for w, _ in times[(t, kind)]) for t in ("before", "after"))
        bc, ac = (statistics.median(c for _, c in times[(t, kind)]) for t in ("before", "after"))
        print(f"{kind + ' fit, median of ' + str(args.repeat):<28} {b:>11.3f} {a:>7.3f} {b / a:>5.1f}x "
              f"{'ok' if a < 0.5 else 'SLOW':>6}   {bc:>10.3f} {ac:>7.3f} {bc / ac:>5.1f}x")
    print(f"keys whose strings or integers differ between the trees: {unequal or 'none'}; largest relative "
          f"difference of a float: {worst:.2e}")


if __name__ == "__main__":
    main()
