"""Shared fixtures: a real store (SQLite in a temporary folder, or a fresh PostgreSQL database) per test.

``--backend postgresql`` runs the tests that use a store fixture against the PostgreSQL server named by
``HELMSHIFT_TEST_POSTGRES`` (a SQLAlchemy URL of a database the user may create databases from, e.g.
``postgresql+psycopg://postgres@127.0.0.1:55432/postgres``); every test gets a database of its own, dropped
afterwards. Tests that need SQLite itself (its files, WAL, PRAGMAs, server subprocesses on a file) carry
``@pytest.mark.sqlite_only`` or use no store fixture, and are left out of that run.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from app.store import Store

REFERENCES = Path(__file__).parent / "data"

#: fixtures whose store follows --backend; a test using none of them is SQLite-only by construction
BACKEND_FIXTURES = frozenset({"store", "demo_store", "client", "empty_client", "db_url", "databases"})


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--backend", choices=("sqlite", "postgresql"), default="sqlite",
                     help="database for the store fixtures (default sqlite; postgresql needs "
                          "HELMSHIFT_TEST_POSTGRES)")


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line("markers", "sqlite_only: needs SQLite itself; left out of --backend postgresql")
    if config.getoption("--backend") == "postgresql" and not os.environ.get("HELMSHIFT_TEST_POSTGRES"):
        raise pytest.UsageError("--backend postgresql needs HELMSHIFT_TEST_POSTGRES, a SQLAlchemy URL of the "
                                "server's maintenance database (see .ci/run).")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--backend") != "postgresql":
        return
    keep: list[pytest.Item] = []
    dropped: list[pytest.Item] = []
    for item in items:
        uses_store = BACKEND_FIXTURES & set(getattr(item, "fixturenames", ()))
        (keep if uses_store and item.get_closest_marker("sqlite_only") is None else dropped).append(item)
    config.hook.pytest_deselected(items=dropped)
    items[:] = keep


class Databases:
    """Creates (and drops at the end) fresh databases on the chosen backend."""

    def __init__(self, backend: str, root: Path) -> None:
        self.backend = backend
        self.root = root
        self.created: list[str] = []
        self._admin = None
        if backend == "postgresql":
            from sqlalchemy import create_engine

            self._admin = create_engine(os.environ["HELMSHIFT_TEST_POSTGRES"], isolation_level="AUTOCOMMIT")

    def new(self, *, template: str | None = None) -> str:
        """The URL of a new empty database (or a copy of ``template``, a URL this object made)."""
        if self._admin is None:
            path = self.root / f"db-{uuid.uuid4().hex[:10]}.db"
            if template is not None:
                copy_database(Path(template.removeprefix("sqlite:///")), path)
            return f"sqlite:///{path}"
        from sqlalchemy import text

        name = f"hs_{uuid.uuid4().hex[:16]}"
        clause = f" TEMPLATE {template.rpartition('/')[2]}" if template else ""
        with self._admin.connect() as conn:
            conn.execute(text(f"CREATE DATABASE {name}{clause}"))
        self.created.append(name)
        return self._admin.url.set(database=name).render_as_string(hide_password=False)

    def drop(self, url: str) -> None:
        if self._admin is None:
            return
        from sqlalchemy import text

        name = url.rpartition("/")[2]
        with self._admin.connect() as conn:
            conn.execute(text(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
        self.created.remove(name)

    def close(self) -> None:
        for name in list(self.created):
            self.drop(f"/{name}")
        if self._admin is not None:
            self._admin.dispose()


@pytest.fixture(scope="session")
def databases(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Databases]:
    dbs = Databases(request.config.getoption("--backend"), tmp_path_factory.mktemp("databases"))
    yield dbs
    dbs.close()


@pytest.fixture
def db_url(databases: Databases) -> Iterator[str]:
    """A fresh, empty database on the chosen backend."""
    url = databases.new()
    yield url
    databases.drop(url)


@pytest.fixture(scope="session")
def empty_store_url(databases: Databases) -> str:
    """An empty store at the head revision, made once per session by ``Store`` itself (create_all and the
    stamp take ~0.1 s on SQLite and ~0.7 s on PostgreSQL, a copy a tenth of that): never change it;
    ``store`` copies it. Tests of creating a store use ``db_url`` (a database with no tables)."""
    url = databases.new()
    Store(url).dispose()
    return url


@pytest.fixture
def store(empty_store_url: str, databases: Databases) -> Iterator[Store]:
    """A private, empty store at the head revision (a copy of ``empty_store_url``)."""
    url = databases.new(template=empty_store_url)
    s = Store(url)
    yield s
    s.dispose()
    databases.drop(url)


# -- live servers and demo databases (browser, security and reliability tests) ---------------------
# A real `helmshift serve` subprocess on a free loopback port: closer to what the analyst runs than an
# in-process app, and killable to test crash recovery.
import os as _os  # noqa: E402
import signal as _signal  # noqa: E402
import socket as _socket  # noqa: E402
import subprocess as _subprocess  # noqa: E402
import sys as _sys  # noqa: E402
import time as _time  # noqa: E402
from collections.abc import Callable as _Callable  # noqa: E402
from collections.abc import Iterator as _Iterator  # noqa: E402
from dataclasses import dataclass as _dataclass  # noqa: E402


def free_port() -> int:
    with _socket.socket(_socket.AF_INET, _socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@_dataclass
class LiveServer:
    """A `helmshift serve` subprocess; ``base_url`` is http://127.0.0.1:PORT."""

    proc: _subprocess.Popen[bytes]
    port: int
    db: Path | str  # a SQLite file, or the SQLAlchemy URL of a server database
    log: Path

    @property
    def base_url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def stop(self, sig: int = _signal.SIGTERM, timeout: float = 20) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
        try:
            return self.proc.wait(timeout)
        except _subprocess.TimeoutExpired:
            self.proc.kill()
            return self.proc.wait(timeout)


def start_server(db: Path | str, log: Path, *, timeout: float = 40, env: dict[str, str] | None = None) -> LiveServer:
    """Start `helmshift serve --db DB` on a free port and wait until /api/health answers. ``db`` is a SQLite
    file or a database URL (e.g. from the ``databases`` fixture); ``env`` adds environment variables."""
    import httpx

    port = free_port()
    environ = {**_os.environ, "PYTHONUNBUFFERED": "1", **(env or {})}
    with open(log, "ab") as out:
        proc = _subprocess.Popen(
            [_sys.executable, "-m", "app.cli", "serve", "--db", str(db), "--port", str(port)],
            stdout=out, stderr=_subprocess.STDOUT, env=environ, cwd=str(log.parent))
    server = LiveServer(proc, port, db, log)
    deadline = _time.monotonic() + timeout
    while _time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"server exited with {proc.returncode}: {log.read_text(errors='replace')[-2000:]}")
        try:
            if httpx.get(f"{server.base_url}/api/health", timeout=2).status_code == 200:
                return server
        except httpx.TransportError:
            pass
        _time.sleep(0.1)
    server.stop(_signal.SIGKILL)
    raise RuntimeError(f"server did not answer within {timeout} s: {log.read_text(errors='replace')[-2000:]}")


@pytest.fixture
def live_server(tmp_path: Path) -> _Iterator[_Callable[..., LiveServer]]:
    """Factory: ``live_server(db)`` starts a server on a SQLite file or a database URL (``env=`` adds
    environment variables); every one started is stopped at teardown."""
    started: list[LiveServer] = []

    def start(db: Path | str, env: dict[str, str] | None = None) -> LiveServer:
        server = start_server(db, tmp_path / f"server-{len(started)}.log", env=env)
        started.append(server)
        return server

    yield start
    for server in started:
        server.stop(_signal.SIGTERM, timeout=10)


@pytest.fixture
def demo_db(tmp_path: Path, shared_demo_db: Path) -> Path:
    """A SQLite file of its own holding the invented demo roster and its two mappings (a copy of
    ``shared_demo_db``)."""
    return copy_database(shared_demo_db, tmp_path / "demo.db")


# -- the invented demo roster, shared by the page, job and command-line tests ---------------------
import importlib.util  # noqa: E402
import sqlite3  # noqa: E402
from types import ModuleType  # noqa: E402
from typing import Any  # noqa: E402

import pandas as pd  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
DEMO_DIR = ROOT / "demo_data"
DEMO_CSV = DEMO_DIR / "roster.csv"


def _load_generator() -> ModuleType:
    spec = importlib.util.spec_from_file_location("helmshift_demo_generate", DEMO_DIR / "generate.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="session")
def demo_truth() -> dict[str, Any]:
    """The generator's own true parameters (demo_data/generate.py TRUTH, per demo_data/README.md)."""
    return dict(_load_generator().TRUTH)


@pytest.fixture(scope="session")
def demo_frame() -> pd.DataFrame:
    """demo_data/roster.csv as pandas reads it: every cell a string, one row per data line."""
    frame = pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False)
    frame["line"] = frame.index + 2  # the header is line 1 and no cell spans lines
    return frame


@pytest.fixture(scope="session")
def demo_clean(demo_frame: pd.DataFrame) -> pd.DataFrame:
    """The rows an importer should keep (README "Mess injected on purpose"), found with pandas alone."""
    cols = [c for c in demo_frame.columns if c != "line"]
    frame = demo_frame.loc[~demo_frame.duplicated(subset=cols)]
    dates = pd.to_datetime(frame["Exit Date"], format="%d/%m/%Y", errors="coerce")
    bad = (~frame["FY"].str.fullmatch(r"\d{4}") | (frame["Issuer Code"] == "") | (frame["Exit Reason"] == "")
           | ((frame["Exit Date"] != "") & dates.isna()))
    clean = frame.loc[~bad].copy()
    clean["year"] = clean["FY"].astype(int)
    return clean


def read_mapping(name: str) -> dict[str, str]:
    """code -> category of a shipped demo mapping CSV, read with pandas."""
    table = pd.read_csv(DEMO_DIR / name, dtype=str, keep_default_na=False)
    return dict(zip(table["code"], table["category"], strict=True))


@pytest.fixture(scope="session")
def shared_demo_db(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A SQLite file with the demo roster and both demo mappings, built once per session: never change it,
    copy it (``demo_store``, ``demo_db``)."""
    from app.demo import load_demo

    path = tmp_path_factory.mktemp("demo") / "demo.db"
    s = Store(f"sqlite:///{path}")
    load_demo(s)
    s.dispose()
    return path


def copy_database(source: Path, target: Path) -> Path:
    """Copy a SQLite database with sqlite3's backup API (safe whatever is left in a WAL file)."""
    src, dst = sqlite3.connect(source), sqlite3.connect(target)
    try:
        src.backup(dst)
    finally:
        src.close()
        dst.close()
    return target


@pytest.fixture(scope="session")
def shared_demo_url(databases: Databases) -> str:
    """The demo roster and both demo mappings in a database of the chosen backend, built once per session:
    never change it; ``demo_store`` copies it."""
    from app.demo import load_demo

    url = databases.new()
    s = Store(url)
    load_demo(s)
    s.dispose()
    return url


@pytest.fixture
def demo_store(shared_demo_url: str, databases: Databases) -> Iterator[Store]:
    """A private copy of the demo database: tests may change it freely."""
    url = databases.new(template=shared_demo_url)
    s = Store(url)
    yield s
    s.dispose()
    databases.drop(url)


def make_client(store: Store) -> Any:
    """A TestClient over the real app; jobs run synchronously in the request (no worker pool)."""
    from fastapi.testclient import TestClient

    from app.config import Settings
    from app.web.app import create_app

    return TestClient(create_app(Settings(db_url=store.url), store, start_jobs=False))


@pytest.fixture
def client(demo_store: Store) -> Any:
    """The dashboard over a private copy of the demo database."""
    return make_client(demo_store)


@pytest.fixture
def empty_client(store: Store) -> Any:
    """The dashboard over an empty database."""
    return make_client(store)


def year_counts(clean: pd.DataFrame, categories: dict[str, str], window: tuple[int, int],
                by: str | None = None) -> pd.DataFrame:
    """Forced and total (forced + voluntary) departures per year (and per ``by`` column), with pandas."""
    cat = clean["Exit Reason"].map(categories)
    frame = clean.assign(category=cat).loc[cat.isin(["forced", "voluntary"])
                                           & clean["year"].between(*window)]
    keys = [by, "year"] if by else ["year"]
    out = frame.groupby(keys)["category"].agg(forced=lambda s: int((s == "forced").sum()), total="size")
    return out.reset_index()


def statsmodels_trend(counts: pd.DataFrame, window: tuple[int, int], *, sectors: bool = False) -> Any:
    """The reference fit: statsmodels GLM, Binomial(logit), two-column response, year centred on the window."""
    import numpy as np
    import statsmodels.api as sm

    t = counts["year"].to_numpy(dtype=float) - (window[0] + window[1]) / 2
    if sectors:
        dummies = pd.get_dummies(counts["Industry"], dtype=float)
        exog = np.column_stack([dummies.to_numpy(), t])
    else:
        exog = np.column_stack([np.ones_like(t), t])
    endog = np.column_stack([counts["forced"], counts["total"] - counts["forced"]]).astype(float)
    return sm.GLM(endog, exog, family=sm.families.Binomial()).fit()


def profile_interval(counts: pd.DataFrame, window: tuple[int, int], level: float = 0.95) -> tuple[float, float]:
    """Profile-likelihood interval of the odds ratio per year, found here independently of the product:
    statsmodels refits the intercept with the slope fixed as an offset, scipy's brentq finds where the
    deviance rises by the chi-square(1) quantile (the textbook definition; statsmodels has none for GLMs)."""
    import math

    import numpy as np
    import statsmodels.api as sm
    from scipy import optimize, stats

    t = counts["year"].to_numpy(dtype=float) - (window[0] + window[1]) / 2
    endog = np.column_stack([counts["forced"], counts["total"] - counts["forced"]]).astype(float)
    full = statsmodels_trend(counts, window)
    b, se = float(full.params[1]), float(full.bse[1])
    cut = float(stats.chi2.ppf(level, 1))

    def excess(beta: float) -> float:
        fixed = sm.GLM(endog, np.ones((len(t), 1)), family=sm.families.Binomial(), offset=beta * t).fit()
        return float(fixed.deviance - full.deviance - cut)

    low = optimize.brentq(excess, b - 6 * se, b, xtol=1e-12)
    high = optimize.brentq(excess, b, b + 6 * se, xtol=1e-12)
    return math.exp(low), math.exp(high)


def decode_plotly_array(value: Any) -> list[Any]:
    """A plotly JSON array: a plain list, or plotly's typed-array form {"dtype", "bdata"} (base64)."""
    import base64

    import numpy as np

    if isinstance(value, dict) and "bdata" in value:
        return np.frombuffer(base64.b64decode(value["bdata"]), dtype=np.dtype(value["dtype"])).tolist()
    return list(value)


def figure_handoff(html: str, fig_id: str) -> dict[str, Any]:
    """The JSON a page hands to charts.js for ``fig_id`` (the <script type="application/json"> element)."""
    import json
    import re

    match = re.search(r'<script type="application/json" data-figure-for="' + re.escape(fig_id)
                      + r'"[^>]*>(.*?)</script>', html, re.S)
    assert match, f"no figure hand-off for {fig_id}"
    return dict(json.loads(match.group(1)))
