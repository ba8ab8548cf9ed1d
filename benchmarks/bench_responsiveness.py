"""Benchmark: does the server stay responsive while a large import and a large firm bootstrap run?

Run: ``python benchmarks/bench_responsiveness.py [--rows 400000] [--resamples 20000] [--baseline REV]``.

Starts a real ``helmshift serve --demo`` on 127.0.0.1 (a free port, a fresh database in a temporary
folder), imports a second invented roster, then at the same time
  * starts a firm bootstrap of ``--resamples`` resamples on the demo roster (the job worker thread), and
  * uploads a ``--rows``-row invented roster through ``POST /api/rosters``,
and meanwhile asks for ``/api/health`` and the Trend page of the second roster every 0.2 s until the
import has answered. It prints the latencies (median, 95th percentile, maximum) of both.

The same measurement runs first against ``--baseline`` (default: the commit before the hardening of
issue 11, where upload handlers did the import inside the event loop), exported with ``git archive``
into a temporary folder, and then against this working tree, and prints the ratio. Goal: health and the
Trend page answer in under 1 s throughout.
"""

from __future__ import annotations

import argparse
import os
import re
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import httpx

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

from bench_import import make_roster  # noqa: E402

#: the last commit of 0.1.0 before issue 11's changes
DEFAULT_BASELINE = "4303222"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start(tree: Path, work: Path) -> tuple[subprocess.Popen[bytes], str]:
    port = free_port()
    env = {**os.environ, "PYTHONPATH": str(tree), "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([sys.executable, "-m", "app.cli", "serve", "--demo", "--port", str(port)],
                            cwd=work, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 90
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"the server in {tree} exited with {proc.returncode}")
        try:
            if httpx.get(f"{base}/api/health", timeout=2).status_code == 200:
                return proc, base
        except httpx.TransportError:
            pass
        time.sleep(0.2)
    proc.kill()
    raise RuntimeError("the server did not start within 90 s")


def tree_cpu(pid: int) -> float | None:
    """CPU seconds (user + system) of ``pid`` and every process below it (the import workers, the
    forkserver), read from /proc; None where there is no /proc."""
    try:
        parents: dict[int, int] = {}
        times: dict[int, float] = {}
        tick = os.sysconf("SC_CLK_TCK")
        for entry in Path("/proc").iterdir():
            if not entry.name.isdigit():
                continue
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            parents[int(entry.name)] = int(fields[1])
            times[int(entry.name)] = (int(fields[11]) + int(fields[12])) / tick
    except OSError:
        return None
    tree, frontier = {pid}, [pid]
    while frontier:
        parent = frontier.pop()
        for child, ppid in parents.items():
            if ppid == parent and child not in tree:
                tree.add(child)
                frontier.append(child)
    return sum(times.get(p, 0.0) for p in tree)


def stats(values: list[float]) -> str:
    if not values:
        return "no answers"
    ordered = sorted(values)
    p95 = ordered[min(len(ordered) - 1, int(0.95 * len(ordered)))]
    return (f"{len(values):3d} answers, median {statistics.median(values):6.3f} s, p95 {p95:6.3f} s, "
            f"max {max(values):6.3f} s")


def measure(tree: Path, label: str, big: bytes, other: bytes, resamples: int, via: str = "api"
            ) -> dict[str, Any]:
    with tempfile.TemporaryDirectory(prefix="helmshift-bench-") as tmp:
        proc, base = start(tree, Path(tmp))
        try:
            with httpx.Client(base_url=base, timeout=600) as client:
                r = client.post("/api/rosters", files={"file": ("second.csv", other)}, data={"name": "second"})
                assert r.status_code == 201, r.text[:300]
                second = r.json()["id"]
                # the first view of a roster's Trend page fits and draws it (then memoised and recorded as a run):
                # a cost of that page, not of the import, so it is paid (and printed) before the import starts
                t0 = time.perf_counter()
                assert client.get(f"/rosters/{second}/trend").status_code == 200
                cold = time.perf_counter() - t0
                r = client.post("/rosters/1/resampling", follow_redirects=False,
                                data={"unit": "firm", "resamples": str(resamples), "seed": "11"})
                assert r.status_code == 303, r.text[:300]
                done = threading.Event()
                outcome: dict[str, Any] = {}

                def upload() -> None:
                    started = time.perf_counter()
                    try:
                        with httpx.Client(base_url=base, timeout=900) as own:
                            if via == "web":  # the browser's steps: upload (preview + dry run), then confirm
                                page = own.post("/rosters/upload", files={"file": ("big.csv", big)})
                                found = re.search(r'name="token" value="([^"]+)"', page.text)
                                assert page.status_code == 200 and found, page.text[:300]
                                res = own.post("/rosters/confirm", data={"token": found.group(1), "name": "big"},
                                               follow_redirects=False)
                            else:
                                res = own.post("/api/rosters", files={"file": ("big.csv", big)},
                                               data={"name": "big"})
                        outcome["status"] = res.status_code
                    finally:
                        outcome["seconds"] = time.perf_counter() - started
                        done.set()

                thread = threading.Thread(target=upload)
                cpu_before = tree_cpu(proc.pid)
                thread.start()
                health: list[float] = []
                trend: list[float] = []
                sent: dict[str, list[float]] = {"health": [], "trend": []}  # seconds after the upload started
                started = time.perf_counter()
                while not done.is_set():
                    for url, into, what in (("/api/health", health, "health"),
                                            (f"/rosters/{second}/trend", trend, "trend")):
                        # every request sent while the import runs counts, including one that waits for its end
                        t0 = time.perf_counter()
                        answer = client.get(url)
                        assert answer.status_code == 200, (url, answer.status_code)
                        into.append(time.perf_counter() - t0)
                        sent[what].append(t0 - started)
                        if done.is_set():
                            break
                    time.sleep(0.2)
                thread.join()
                cpu_after = tree_cpu(proc.pid)
                run = client.get("/api/rosters/1/runs").json()["runs"][0]
        finally:
            proc.terminate()
            proc.wait(30)
    print(f"{label} (load average now {os.getloadavg()[0]:.2f}): import of {len(big) / 1e6:.1f} MB answered {outcome.get('status')} in "
          f"{outcome['seconds']:.1f} s; bootstrap run {run['id']} {run['status']} "
          f"({run['progress_done']:,}/{run['progress_total']:,} resamples when the import ended)")
    if cpu_before is not None and cpu_after is not None:
        print(f"  server CPU time while the import ran (all its processes, bootstrap included): "
              f"{cpu_after - cpu_before:.1f} s over {outcome['seconds']:.1f} s wall")
    print(f"  Trend page before the import (cold: fitted and drawn once): {cold:.3f} s")
    for label_, what, values in (("/api/health         ", "health", health), ("Trend (other roster)", "trend", trend)):
        worst = max(range(len(values)), key=values.__getitem__) if values else None
        where = f" (worst sent {sent[what][worst]:.1f} s into the import)" if worst is not None else ""
        print(f"  {label_} {stats(values)}{where}")
    return {"health": health, "trend": trend}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=400_000)
    parser.add_argument("--resamples", type=int, default=20_000)
    parser.add_argument("--baseline", default=DEFAULT_BASELINE, help="git revision measured as 'before'")
    parser.add_argument("--via", choices=("api", "web"), default="api",
                        help="upload through POST /api/rosters (default) or the browser's upload + confirm steps")
    parser.add_argument("--skip-before", action="store_true", help="measure this tree only")
    args = parser.parse_args()
    print(f"load average at start: {os.getloadavg()[0]:.2f}")
    big = make_roster(args.rows, seed=3)
    other = make_roster(5_000, seed=4)
    results: dict[str, dict[str, Any]] = {}
    steps = "the browser's steps (/rosters/upload, /rosters/confirm)" if args.via == "web" else "POST /api/rosters"
    print(f"uploads through {steps}")
    if not args.skip_before:
        with tempfile.TemporaryDirectory(prefix="helmshift-baseline-") as old:
            archive = subprocess.run(["git", "archive", args.baseline], cwd=ROOT, check=True, capture_output=True)
            subprocess.run(["tar", "-x", "-C", old], input=archive.stdout, check=True)
            results["before"] = measure(Path(old), f"before ({args.baseline})", big, other, args.resamples, args.via)
    results["after"] = measure(ROOT, "after (this tree)", big, other, args.resamples, args.via)
    for what in ("health", "trend") if "before" in results else ():
        before, after = results["before"][what], results["after"][what]
        if before and after:
            print(f"{what}: worst answer {max(before):.3f} s before, {max(after):.3f} s after "
                  f"({max(before) / max(after):.1f}x); goal < 1 s: {'met' if max(after) < 1 else 'NOT met'}")
    if "before" not in results:
        for what in ("health", "trend"):
            after = results["after"][what]
            if after:
                print(f"{what}: worst answer {max(after):.3f} s; goal < 1 s: {'met' if max(after) < 1 else 'NOT met'}")
    print(f"load average at end: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
