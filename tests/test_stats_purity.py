"""app.stats is a pure library: importing it must not load the web, database or plotting layers."""

from __future__ import annotations

import pkgutil
import subprocess
import sys
from pathlib import Path

import app.stats

ROOT = Path(__file__).parent.parent
FORBIDDEN = ("fastapi", "sqlalchemy", "plotly", "app.store")


def test_stats_modules_exist() -> None:
    names = {m.name for m in pkgutil.iter_modules(app.stats.__path__)}
    assert {"cells", "design", "profile", "proportions", "sectors", "trend"} <= names


def test_importing_every_stats_module_loads_no_web_db_or_plotting() -> None:
    modules = sorted(f"app.stats.{m.name}" for m in pkgutil.iter_modules(app.stats.__path__))
    code = (
        "import importlib, sys\n"
        f"for name in {modules!r}:\n"
        "    importlib.import_module(name)\n"
        f"print(','.join(m for m in {FORBIDDEN!r} if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=ROOT)
    assert out.stdout.strip() == "", f"app.stats loaded {out.stdout.strip()}"
