"""Property-based fuzzing of every operation in the app's own OpenAPI schema (schemathesis).

In-process against the ASGI app over a temporary copy of the demo database, derandomized, a bounded
number of cases per operation. Checks: no 5xx (``not_a_server_error``) and, where the app declares a
response schema, that the response conforms (``response_schema_conformance``). Most routes return a
plain JSONResponse and declare an empty schema, so conformance is only real for /api/health and the
422 validation errors; see the report to the lead for which routes should declare response models.
"""

from __future__ import annotations

import gc
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from hypothesis import HealthCheck, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import response_schema_conformance

from app.config import Settings
from app.demo import load_demo
from app.store import Store
from app.web.app import create_app

# The schema is loaded when the module is collected (schemathesis' lazy fixture loader does not work with
# this pytest), so the app sits over an empty temporary database that the fixture below fills with the
# demo roster before the first case runs, and removes afterwards.
_DB_DIR = Path(tempfile.mkdtemp(prefix="helmshift-fuzz-"))
_STORE = Store(f"sqlite:///{_DB_DIR / 'fuzz.db'}")
APP = create_app(Settings(db_url=_STORE.url), _STORE, start_jobs=False)
# deleting the demo roster early would turn every later case into a 404; the delete route gets its own
# test below (and its Origin check is in test_security)
schema = schemathesis.openapi.from_asgi("/openapi.json", APP).exclude(path="/rosters/{roster_id}/delete")


@pytest.fixture(scope="module", autouse=True)
def fuzz_store() -> Iterator[Store]:
    load_demo(_STORE)
    yield _STORE
    _STORE.dispose()
    shutil.rmtree(_DB_DIR, ignore_errors=True)


@pytest.fixture(autouse=True)
def _collect_garbage_inside_the_test() -> Iterator[None]:
    yield
    gc.collect()


@schema.parametrize()
@settings(max_examples=25, derandomize=True, database=None, deadline=None,
          suppress_health_check=list(HealthCheck))
def test_api_operation(case: Any) -> None:
    case.call_and_validate(checks=[not_a_server_error, response_schema_conformance])


def test_delete_of_missing_roster_is_a_404(fuzz_store: Store) -> None:
    from fastapi.testclient import TestClient

    app = APP
    before = fuzz_store.counts()
    with TestClient(app) as client:
        for roster_id in ("999999", "-1", "0"):
            r = client.post(f"/rosters/{roster_id}/delete")
            assert r.status_code == 404, (roster_id, r.status_code)
        assert client.post("/rosters/abc/delete").status_code == 422
    assert fuzz_store.counts() == before
