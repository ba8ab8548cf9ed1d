"""Screenshots of every page of the demo at 1440 and 390 px, into docs/screens/widths/.

Run from the project root: ``python docs/make_screens.py``. Serves a fresh demo database on a free loopback
port with ``helmshift serve --demo``, drives Debian's Chromium through Playwright (``executable_path``; no
browser download) and prints, per page and width, the status and whether the page is wider than the window.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

from playwright.sync_api import sync_playwright

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "docs" / "screens" / "widths"
WIDTHS = (1440, 390)
PAGES = {
    "rosters": "/rosters", "overview": "/rosters/1", "reason-codes": "/rosters/1/reasons",
    "coverage": "/rosters/1/coverage", "departures": "/rosters/1/departures?year=2010&category=forced",
    "trend": "/rosters/1/trend", "resampling": "/rosters/1/resampling", "sectors": "/rosters/1/sectors",
    "robustness": "/rosters/1/robustness", "briefing": "/rosters/1/briefing", "universe": "/rosters/1/universe",
    "versions": "/rosters/1/versions", "profiles": "/profiles",
}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def main() -> int:
    OUT.mkdir(parents=True, exist_ok=True)
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    with tempfile.TemporaryDirectory() as tmp:
        server = subprocess.Popen([sys.executable, "-m", "app.cli", "serve", "--demo", "--db", f"{tmp}/demo.db",
                                   "--port", str(port)], cwd=ROOT, env=dict(os.environ, PYTHONPATH=str(ROOT)),
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            for _ in range(120):
                try:
                    urllib.request.urlopen(base + "/api/health", timeout=2)
                    break
                except OSError:
                    time.sleep(1)
            too_wide = 0
            with sync_playwright() as p:
                browser = p.chromium.launch(executable_path="/usr/bin/chromium")
                for width in WIDTHS:
                    page = browser.new_page(viewport={"width": width, "height": 900})
                    for name, path in PAGES.items():
                        answer = page.goto(base + path, wait_until="networkidle", timeout=120_000)
                        wide = page.evaluate("document.documentElement.scrollWidth")
                        too_wide += wide > width
                        print(f"{name:<13} {width:>5} px  status {answer.status if answer else '?'}  "
                              f"page width {wide}{'  TOO WIDE' if wide > width else ''}")
                        page.screenshot(path=str(OUT / f"{name}-{width}.png"), full_page=True)
                browser.close()
        finally:
            server.terminate()
            server.wait(timeout=30)
    return 1 if too_wide else 0


if __name__ == "__main__":
    raise SystemExit(main())
