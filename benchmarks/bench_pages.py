"""Server time of every analysis page at 100,000 departures, this tree against an earlier revision, same run.

Run: ``python benchmarks/bench_pages.py [--rows 100000] [--before REV] [--resamples 20000]``

1. Builds (once, cached in the temp folder) a SQLite roster of about ``--rows`` departures by importing
   rosters drawn by ``demo_data/generate.py`` with successive seeds (firm codes prefixed by the seed, so
   the firms stay distinct: about 24,500 firms over 30 years), plus the two demo mappings.
2. Extracts ``--before`` (default: main when the fit-fast work began) with ``git archive`` into a
   temporary folder and, for that tree and for this one, in child processes over the same database:
   - the first Trend and Briefing visits of a fresh server, cold and warm, before and after a fit of these
     counts was recorded (wall and CPU of the process);
   - each page through Starlette's TestClient: one warm-up request, then the median of 5 (server time:
     the request handled in-process, no network);
   - each page again, repeatedly, while a ``--resamples`` firm bootstrap runs in the app's worker thread
     (p95 over all those requests);
   - ``helmshift fit --json`` as a fresh process (wall time, start-up included; median of 3 after one
     warm-up).
3. Prints one table with both trees and the ratio (before / after), and the load average.

Targets (issue 13, 2 cores): every page < 150 ms median, < 1 s p95 during the bootstrap; fit < 0.5 s.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
#: main when the fit-fast work began (before: the last commit before the cell store, 4944638)
BEFORE = "7d99e8f"
PAGES = ("", "/reasons", "/coverage", "/trend", "/resampling", "/sectors", "/robustness", "/briefing")
NAMES = {"": "Roster", "/reasons": "Reason codes", "/coverage": "Coverage", "/trend": "Trend",
         "/resampling": "Resampling", "/sectors": "Sectors", "/robustness": "Robustness", "/briefing": "Briefing"}


def load() -> str:
    return "/".join(f"{x:.2f}" for x in os.getloadavg())


# -- the roster ----------------------------------------------------------------------------------
def build_database(path: Path, rows: int) -> None:
    """Import generated rosters (seed 1, 2, ...) as one file of at least ``rows`` lines into ``path``, with the
    code of the tree this runs in (the current working directory)."""
    sys.path.insert(0, str(Path.cwd()))
    sys.path.insert(0, str(ROOT / "demo_data"))
    import pandas as pd
    from generate import generate_roster  # type: ignore[import-not-found]

    from app.analysis.mapping_files import import_mapping_file
    from app.demo import DEMO_MAPPINGS
    from app.intake.ingest import import_roster
    from app.store import Store

    frames, total, seed = [], 0, 0
    while total < rows:
        seed += 1
        frame = generate_roster(seed)
        frame["Issuer Code"] = f"S{seed:03d}-" + frame["Issuer Code"].astype(str)
        frames.append(frame)
        total += len(frame)
    data = pd.concat(frames, ignore_index=True).iloc[:rows].to_csv(index=False, lineterminator="\n").encode()
    store = Store(f"sqlite:///{path}")
    report = import_roster(store, data, "bench.csv", name="Bench roster (invented)")
    for name, csv in DEMO_MAPPINGS.items():
        import_mapping_file(store, csv.read_bytes(), roster=report.roster.id, name=name, author="bench")
    store.update_settings(report.roster.id, mapping_name=next(iter(DEMO_MAPPINGS)))
    print(f"built {path}: {report.roster.accepted:,} departures accepted from {seed} generated rosters", flush=True)
    store.dispose()


# -- one tree's measurements (run in a child process with PYTHONPATH = the tree) ------------------
def measure(db: Path, resamples: int) -> dict[str, object]:
    from starlette.testclient import TestClient

    from app.config import Settings
    from app.web.app import create_app

    settings = Settings(db_url=f"sqlite:///{db}")
    out: dict[str, object] = {}
    # cold first visits: a fresh server (empty memo) whose Coverage page has read the cells, then the first
    # Trend and Briefing visits (fit, profile intervals, figures) and a second, warm one; twice: first with no
    # fit of these counts recorded ("never fitted"), then in another fresh server once it is ("fitted before":
    # this tree reads the recorded profile-likelihood ends, the earlier one searches again)
    cold: dict[str, dict[str, list[float]]] = {}
    for label in ("never fitted", "fitted before"):
        with TestClient(create_app(settings)) as client:
            client.get("/rosters/1/coverage")
            for page in ("/trend", "/briefing"):
                for visit in ("cold", "warm"):
                    wall, cpu = time.perf_counter(), time.process_time()
                    response = client.get(f"/rosters/1{page}")
                    if response.status_code != 200:
                        raise SystemExit(f"{page}: {response.status_code} {response.text[:300]}")
                    cold.setdefault(f"{label}|{page}|{visit}", {})["wall"] = [time.perf_counter() - wall]
                    cold[f"{label}|{page}|{visit}"]["cpu"] = [time.process_time() - cpu]
    out["cold"] = cold
    with TestClient(create_app(settings)) as client:
        medians = {}
        for page in PAGES:
            url = f"/rosters/1{page}"
            response = client.get(url)
            if response.status_code != 200:
                raise SystemExit(f"{url}: {response.status_code} {response.text[:300]}")
            times = []
            for _ in range(5):
                started = time.perf_counter()
                client.get(url)
                times.append(time.perf_counter() - started)
            medians[page] = statistics.median(times)
        out["median"] = medians
        # pages while a firm bootstrap runs in the app's worker thread
        started = time.perf_counter()
        response = client.post("/rosters/1/resampling", follow_redirects=False,
                               data={"unit": "firm", "resamples": str(resamples), "seed": "11"})
        run_id = int(response.headers["location"].rsplit("/", 1)[1])
        during: dict[str, list[float]] = {p: [] for p in PAGES}
        for _ in range(200):  # bounded: at most 200 rounds of every page
            status = client.get(f"/api/runs/{run_id}").json()["run"]["status"]
            if status not in ("queued", "running"):
                break
            for page in PAGES:
                t0 = time.perf_counter()
                client.get(f"/rosters/1{page}")
                during[page].append(time.perf_counter() - t0)
        out["bootstrap_seconds"] = time.perf_counter() - started
        out["bootstrap_status"] = status
        out["during"] = during
    # helmshift fit as a fresh process, start-up included
    cmd = [sys.executable, "-m", "app.cli", "fit", "--db", str(db), "--roster", "1", "--json"]
    subprocess.run(cmd, check=True, capture_output=True)
    fits = []
    for _ in range(3):
        t0 = time.perf_counter()
        subprocess.run(cmd, check=True, capture_output=True)
        fits.append(time.perf_counter() - t0)
    out["fit"] = statistics.median(fits)
    return out


def p95(values: list[float]) -> float:
    if not values:
        return float("nan")
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(round(0.95 * (len(ordered) - 1))))]


def run_tree(tree: Path, db: Path, resamples: int) -> dict[str, object]:
    env = {**os.environ, "PYTHONPATH": str(tree)}
    result = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--child", str(db),
                             "--resamples", str(resamples)], cwd=tree, env=env, capture_output=True, text=True)
    if result.returncode:
        raise SystemExit(f"measuring {tree} failed:\n{result.stderr[-3000:]}")
    return dict(json.loads(result.stdout.strip().splitlines()[-1]))


def tree_database(tree: Path, revision: str | None, rows: int) -> Path:
    """The generated roster imported by ``tree``'s own code (an older tree cannot open a database at a newer
    schema): cached per revision in the temp folder; this tree's (``revision`` None) is built afresh."""
    cache = Path(tempfile.gettempdir()) / f"helmshift-bench-pages-{rows}-{revision or 'current'}.db"
    if not cache.exists() or revision is None:
        cache.unlink(missing_ok=True)
        subprocess.run([sys.executable, str(Path(__file__).resolve()), "--build", str(cache), "--rows", str(rows)],
                       cwd=tree, check=True, env={**os.environ, "PYTHONPATH": str(tree)})
    return cache


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--before", default=BEFORE, help="git revision to compare with")
    parser.add_argument("--resamples", type=int, default=20_000)
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--build", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.build:
        build_database(args.build, args.rows)
        return
    if args.child:
        print(json.dumps(measure(args.child, args.resamples)))
        return

    print(f"{os.cpu_count()} CPUs; load average at start {load()}", flush=True)
    before_rev = subprocess.run(["git", "rev-parse", "--short", args.before], cwd=ROOT, check=True,
                                capture_output=True, text=True).stdout.strip()
    with tempfile.TemporaryDirectory(prefix="helmshift-before-") as tmp:
        before_tree = Path(tmp) / "tree"
        before_tree.mkdir()
        archive = subprocess.run(["git", "archive", args.before], cwd=ROOT, check=True, capture_output=True)
        subprocess.run(["tar", "-x", "-C", str(before_tree)], input=archive.stdout, check=True)
        results = {}
        for label, tree in (("before", before_tree), ("after", ROOT)):
            # each tree imports the same generated rosters with its own code (an older tree cannot open a
            # database at a newer schema); cached per revision in the temp folder
            cache = tree_database(tree, before_rev if label == "before" else None, args.rows)
            db = Path(tmp) / f"{label}.db"
            shutil.copyfile(cache, db)
            results[label] = run_tree(tree, db, args.resamples)
            print(f"measured {label} ({args.before if label == 'before' else 'this tree'}); load {load()}",
                  flush=True)
    before, after = results["before"], results["after"]
    print(f"\n{'page':<14} {'before ms':>10} {'after ms':>9} {'ratio':>7} {'target':>7}   "
          f"{'p95 during bootstrap: before':>29} {'after':>7} {'target':>7}")
    for page in PAGES:
        b, a = before["median"][page] * 1e3, after["median"][page] * 1e3  # type: ignore[index]
        bd, ad = p95(before["during"][page]) * 1e3, p95(after["during"][page]) * 1e3  # type: ignore[index]
        print(f"{NAMES[page]:<14} {b:>10.1f} {a:>9.1f} {b / a:>6.1f}x {'ok' if a < 150 else 'SLOW':>7}   "
              f"{bd:>29.0f} {ad:>7.0f} {'ok' if ad < 1000 else 'SLOW':>7}")
    bf, af = float(before["fit"]), float(after["fit"])  # type: ignore[arg-type]
    print(f"{'helmshift fit':<14} {bf * 1e3:>10.0f} {af * 1e3:>9.0f} {bf / af:>6.1f}x "
          f"{'ok' if af < 0.5 else 'SLOW':>7}   (wall, fresh process)")
    print(f"\n{'first visits (fresh server)':<36} {'before wall ms':>14} {'CPU ms':>7} {'after wall ms':>14} "
          f"{'CPU ms':>7}")
    for key in before["cold"]:  # type: ignore[attr-defined]
        bc, ac = before["cold"][key], after["cold"][key]  # type: ignore[index]
        label, page, visit = key.split("|")
        print(f"{NAMES[page] + ', ' + visit + ', ' + label:<36} {bc['wall'][0] * 1e3:>14.0f} {bc['cpu'][0] * 1e3:>7.0f} "
              f"{ac['wall'][0] * 1e3:>14.0f} {ac['cpu'][0] * 1e3:>7.0f}")
    for label in ("before", "after"):
        r = results[label]
        rounds = len(r["during"][""])  # type: ignore[index]
        print(f"{label}: {args.resamples:,}-resample firm bootstrap {r['bootstrap_status']} in "
              f"{float(r['bootstrap_seconds']):.1f} s while {rounds} rounds of every page were served")  # type: ignore[arg-type]
    print(f"load average at the end {load()}")


if __name__ == "__main__":
    main()
