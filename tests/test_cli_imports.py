"""The command line's ``fit`` path loads no web framework.

``helmshift fit --json`` runs in a fresh interpreter (a subprocess: this test process has loaded FastAPI
already) on a copy of the demo database; at exit it writes the names in ``sys.modules``. FastAPI, Starlette,
uvicorn and Jinja2 belong to the dashboard; the command line encodes its JSON with ``app.jsonable``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

from conftest import copy_database

ROOT = Path(__file__).resolve().parents[1]
WEB = ("fastapi", "starlette", "uvicorn", "jinja2")

# runs app.cli.main as the console script does, then records every module loaded (also after SystemExit)
PROGRAM = """
import json, sys
from app.cli import main
try:
    sys.exit(main(sys.argv[2:]))
finally:
    with open(sys.argv[1], "w", encoding="utf-8") as out:
        json.dump(sorted(sys.modules), out)
"""


def _loaded(argv: list[str], tmp_path: Path) -> tuple[subprocess.CompletedProcess[str], set[str]]:
    listing = tmp_path / "modules.json"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    done = subprocess.run([sys.executable, "-c", PROGRAM, str(listing), *argv], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=120, check=False)
    return done, set(json.loads(listing.read_text(encoding="utf-8")))


#: a fit the quick path leaves to the ordinary one (SQLAlchemy, pandas, statsmodels): the sector-adjusted trend
ORDINARY_FIT = ["fit", "--roster", "Demo index (invented)", "--json", "--model", "sector"]


def test_fit_json_loads_no_web_framework(shared_demo_db: Path, tmp_path: Path) -> None:
    db = copy_database(shared_demo_db, tmp_path / "cli.db")
    done, modules = _loaded([*ORDINARY_FIT, "--db", str(db)], tmp_path)
    assert done.returncode == 0, done.stderr
    payload = json.loads(done.stdout)
    assert payload["departures"] > 0 and payload["odds_ratio"] is not None  # the fit really ran
    assert {"app.cli", "app.jsonable", "app.stats.trend"} <= modules  # the listing sees what the path loads
    web = sorted(m for m in modules if m.split(".")[0] in WEB)
    assert web == [], f"helmshift fit --json imported {web[:5]}"


def test_the_check_sees_a_web_import(tmp_path: Path) -> None:
    """The same listing, for a program made to import FastAPI before ``helmshift --version``, names it."""
    program_file = tmp_path / "probe.py"
    program_file.write_text("import fastapi\n" + PROGRAM, encoding="utf-8")
    listing = tmp_path / "modules.json"
    done = subprocess.run([sys.executable, str(program_file), str(listing), "--version"], cwd=tmp_path,
                          env={**os.environ, "PYTHONPATH": str(ROOT)}, capture_output=True, text=True,
                          timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    assert "fastapi" in json.loads(listing.read_text(encoding="utf-8"))


def test_fit_opens_the_store_without_alembic_or_argon2(shared_demo_db: Path, tmp_path: Path) -> None:
    """A current store opens with one query: no Alembic (migrations only), no argon2 (sign-ins only)."""
    db = copy_database(shared_demo_db, tmp_path / "cli.db")
    done, modules = _loaded([*ORDINARY_FIT, "--db", str(db)], tmp_path)
    assert done.returncode == 0, done.stderr
    assert "app.store.accounts" in modules  # the listing sees the store's modules
    heavy = sorted(m for m in modules if m.split(".")[0] in ("alembic", "argon2"))
    assert heavy == [], f"helmshift fit --json imported {heavy[:5]}"


def test_repeated_fit_prints_the_recorded_fit_without_the_model_code(shared_demo_db: Path, tmp_path: Path) -> None:
    """A spline fit recorded by the ordinary path (statsmodels and scipy.stats loaded in this process) is
    printed again by ``helmshift fit`` (equal JSON) without loading either (app.analysis.quick_fit; issue 13:
    CLI start-up). The first fit of new counts loads neither too: tests/test_quick_fit.py."""
    from app.analysis.inputs import load_input
    from app.analysis.runs import fit_summary
    from app.jsonable import jsonable
    from app.store import Store

    db = copy_database(shared_demo_db, tmp_path / "cli.db")
    store = Store(f"sqlite:///{db}")
    first = jsonable(fit_summary(store, load_input(store, "Demo index (invented)"), model="spline", reuse=False))
    store.dispose()
    argv = ["fit", "--roster", "Demo index (invented)", "--db", str(db), "--json", "--model", "spline"]
    second, second_modules = _loaded(argv, tmp_path)
    assert second.returncode == 0, second.stderr
    model_code = sorted(m for m in second_modules if m.split(".")[0] == "statsmodels" or m.startswith("scipy.stats"))
    assert model_code == [], f"the repeated fit imported {model_code[:5]}"
    assert json.loads(second.stdout) == first  # same run id, same numbers, same sentences


def test_a_changed_statistics_engine_fits_again(shared_demo_db: Path, tmp_path: Path) -> None:
    """A recorded fit from other statistics code (another engine tag) is not printed again: it is refitted."""
    from app.analysis.inputs import load_input
    from app.analysis.runs import fit_summary, run_trend
    from app.analysis.stored_fits import stored_summary
    from app.store import Store

    db = copy_database(shared_demo_db, tmp_path / "cli.db")
    store = Store(f"sqlite:///{db}")
    inp = load_input(store, "Demo index (invented)")
    run_id = run_trend(store, inp).run_id
    stored = stored_summary(store, inp)
    assert stored is not None and stored["run"] == run_id
    assert stored == fit_summary(store, inp, reuse=False)
    run = store.get_run(run_id)
    assert run.result is not None
    store.finish_run(run_id, {**run.result, "engine": "another engine"}, seconds=0.0)
    assert stored_summary(store, inp) is None
    assert run_trend(store, inp).run_id != run_id  # recorded afresh under this engine
    store.dispose()
