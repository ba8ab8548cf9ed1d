"""The OpenAPI schema the app serves describes what the app really returns.

Every JSON route is called on the demo roster and its body is checked twice: against its pydantic model
(generated from the page dataclass, app/web/schema_gen.py) and against the schema served at /openapi.json for
that path, method and status (JSON Schema 2020-12, the dialect of OpenAPI 3.1, with jsonschema_rs, the
validator schemathesis uses). Error bodies (400, 404, 409, 422) are held to the same, and every served body
has exactly the fields of its dataclass. The last tests are regressions for what the schemathesis fuzz test
(test_fuzz_api.py) found.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import jsonschema_rs
import pytest
from conftest import DEMO_CSV, Databases, make_client
from fastapi.testclient import TestClient
from pydantic import BaseModel

from app.stats.trend import TrendFit
from app.store import Roster, Run, Store
from app.web import schemas as S
from app.web.briefing import BriefingBody, BriefingPage
from app.web.coverage import CoverageBody, CoveragePage
from app.web.reasons import ReasonsBody, ReasonsPage
from app.web.resampling import ResamplingPage, RunBody, RunPage, RunsBody
from app.web.rosters import RosterDetailBody, RosterDetailPage, RostersBody, RostersPage
from app.web.sectors import RobustnessBody, RobustnessPage, SectorsBody, SectorsPage
from app.web.trend import TrendBody, TrendPage, TrendUnfitBody

JSON = {"accept": "application/json"}


@pytest.fixture(scope="module")
def api(shared_demo_url: str, databases: Databases) -> Iterator[TestClient]:
    """The app over a copy of the demo database (on the chosen backend) with one finished bootstrap run per
    unit (B = 200)."""
    url = databases.new(template=shared_demo_url)
    store = Store(url)
    client = make_client(store)
    for unit in ("firm", "departure"):
        r = client.post("/rosters/1/resampling", data={"unit": unit, "resamples": "200", "seed": "7"},
                        follow_redirects=False)
        assert r.status_code == 303, r.text
    yield client
    client.close()
    store.dispose()
    databases.drop(url)


@pytest.fixture(scope="module")
def openapi(api: TestClient) -> dict[str, Any]:
    served: dict[str, Any] = api.get("/openapi.json").json()
    return served


def declared(openapi: dict[str, Any], template: str, method: str, status: int, media: str) -> dict[str, Any]:
    operation = openapi["paths"][template][method]
    assert str(status) in operation["responses"], f"{method.upper()} {template} does not declare {status}"
    content = operation["responses"][str(status)].get("content", {})
    assert media in content, f"{method.upper()} {template} {status} does not declare {media}"
    schema: dict[str, Any] = content[media]["schema"]
    return schema


def assert_conforms(openapi: dict[str, Any], template: str, method: str, response: Any) -> None:
    media = response.headers["content-type"].split(";")[0]
    schema = declared(openapi, template, method, response.status_code, media)
    assert schema, f"{method.upper()} {template} {response.status_code} declares an empty schema"
    validator = jsonschema_rs.Draft202012Validator({**schema, "components": openapi["components"]})
    errors = [f"{e.instance_path}: {e.message}" for e in validator.iter_errors(response.json())]
    assert not errors, errors[:5]


# (template, url, status, model): every JSON route, with its errors
CASES: list[tuple[str, str, int, type[BaseModel]]] = [
    ("/api/health", "/api/health", 200, S.HealthBody),
    ("/api/rosters", "/api/rosters", 200, RostersBody),
    ("/api/rosters/{roster_id}", "/api/rosters/1", 200, RosterDetailBody),
    ("/api/rosters/{roster_id}", "/api/rosters/99", 404, S.ErrorBody),
    ("/api/rosters/{roster_id}", "/api/rosters/x", 422, S.ValidationErrorBody),
    ("/api/rosters/{roster_id}/reasons", "/api/rosters/1/reasons", 200, ReasonsBody),
    ("/api/rosters/{roster_id}/reasons", "/api/rosters/1/reasons?a=1&b=1", 200, ReasonsBody),
    ("/api/rosters/{roster_id}/reasons", "/api/rosters/1/reasons?a=1&b=7", 404, S.ErrorBody),
    ("/api/rosters/{roster_id}/coverage", "/api/rosters/1/coverage", 200, CoverageBody),
    ("/api/rosters/{roster_id}/coverage", "/api/rosters/1/coverage?threshold=0.9", 200, CoverageBody),
    ("/api/rosters/{roster_id}/coverage", "/api/rosters/1/coverage?threshold=x", 400, S.ErrorBody),
    ("/api/rosters/{roster_id}/trend", "/api/rosters/1/trend", 200, TrendBody),
    ("/api/rosters/{roster_id}/trend", "/api/rosters/1/trend?model=spline&spline_df=4", 200, TrendBody),
    ("/api/rosters/{roster_id}/trend", "/api/rosters/1/trend?model=sector", 200, TrendBody),
    ("/api/rosters/{roster_id}/trend", "/api/rosters/1/trend?model=quadratic", 400, S.ErrorBody),
    ("/api/rosters/{roster_id}/trend", "/api/rosters/1/trend?from=1990&to=1991", 422, TrendUnfitBody),
    ("/api/rosters/{roster_id}/trend", "/api/rosters/x/trend", 422, S.ValidationErrorBody),
    ("/api/rosters/{roster_id}/runs", "/api/rosters/1/runs", 200, RunsBody),
    ("/api/runs/{run_id}", "/api/runs/{bootstrap}", 200, RunBody),
    ("/api/runs/{run_id}", "/api/runs/{bootstrap}?method=basic", 200, RunBody),
    ("/api/runs/{run_id}", "/api/runs/{bootstrap}?method=median", 400, S.ErrorBody),
    ("/api/runs/{run_id}", "/api/runs/99999", 404, S.ErrorBody),
    ("/api/runs/{run_id}/replicates", "/api/runs/{bootstrap}/replicates", 200, S.ReplicatesBody),
    ("/api/runs/{run_id}/replicates", "/api/runs/99999/replicates", 404, S.ErrorBody),
    ("/api/rosters/{roster_id}/sectors", "/api/rosters/1/sectors", 200, SectorsBody),
    ("/api/rosters/{roster_id}/sectors", "/api/rosters/1/sectors?min_departures=0", 400, S.ErrorBody),
    ("/api/rosters/{roster_id}/robustness", "/api/rosters/1/robustness", 200, RobustnessBody),
    ("/api/rosters/{roster_id}/robustness", "/api/rosters/1/robustness?vary=Retired", 200, RobustnessBody),
    ("/api/rosters/{roster_id}/briefing", "/api/rosters/1/briefing?chart=coverage&chart=trend&chart=bootstrap"
     "&chart=sectors&chart=robustness", 200, BriefingBody),
    ("/api/rosters/{roster_id}/briefing", "/api/rosters/1/briefing?chart=pie", 400, S.ErrorBody),
]


def _bootstrap_run(api: TestClient) -> int:
    runs = api.get("/api/rosters/1/runs").json()["runs"]
    return int(runs[0]["id"])


@pytest.mark.parametrize(("template", "url", "status", "model"), CASES, ids=[c[1] for c in CASES])
def test_json_route_matches_its_model_and_the_served_schema(
        api: TestClient, openapi: dict[str, Any], template: str, url: str, status: int,
        model: type[BaseModel]) -> None:
    r = api.get(url.replace("{bootstrap}", str(_bootstrap_run(api))))
    assert r.status_code == status, r.text[:300]
    model.model_validate(r.json())
    assert_conforms(openapi, template, "get", r)


def test_finished_runs_carry_intervals_in_the_documented_shape(api: TestClient) -> None:
    body = RunBody.model_validate(api.get(f"/api/runs/{_bootstrap_run(api)}").json())
    assert body.run.status == "done" and body.run.result is not None
    assert set(body.run.result.conf_int) == {"percentile", "basic", "bca", "normal", "studentized"}
    assert body.comparison_found  # one run per unit with the same settings


def test_roster_import_api_201_400_409(api: TestClient, openapi: dict[str, Any], tmp_path: Path) -> None:
    lines = DEMO_CSV.read_text(encoding="utf-8").splitlines(keepends=True)
    part = "".join(lines[:60]).encode()
    r = api.post("/api/rosters", files={"file": ("part.csv", part, "text/csv")}, data={"name": "first rows"})
    assert r.status_code == 201, r.text
    S.RosterImportBody.model_validate(r.json())
    assert_conforms(openapi, "/api/rosters", "post", r)
    again = api.post("/api/rosters", files={"file": ("part.csv", part, "text/csv")}, data={"name": "again"})
    assert again.status_code == 409
    assert_conforms(openapi, "/api/rosters", "post", again)
    missing = api.post("/api/rosters", data={"name": "no file"})
    assert missing.status_code == 400
    assert_conforms(openapi, "/api/rosters", "post", missing)


def test_page_errors_are_html_or_json_as_declared(api: TestClient, openapi: dict[str, Any]) -> None:
    as_html = api.get("/rosters/99/coverage")
    assert as_html.status_code == 404 and as_html.headers["content-type"].startswith("text/html")
    declared(openapi, "/rosters/{roster_id}/coverage", "get", 404, "text/html")
    as_json = api.get("/rosters/99/coverage", headers=JSON)
    assert as_json.status_code == 404
    assert_conforms(openapi, "/rosters/{roster_id}/coverage", "get", as_json)


def test_no_json_response_is_declared_without_a_schema(openapi: dict[str, Any]) -> None:
    """An empty schema accepts anything: the conformance check would prove nothing for that response."""
    empty = [(method, path, status) for path, ops in openapi["paths"].items() for method, op in ops.items()
             for status, response in op["responses"].items()
             for media, content in response.get("content", {}).items()
             if media == "application/json" and not content.get("schema")]
    assert not empty


def test_every_form_post_declares_its_body_redirect_and_refusals(openapi: dict[str, Any]) -> None:
    bodiless = {"/runs/{run_id}/cancel", "/rosters/{roster_id}/universe/derive"}
    for path, ops in openapi["paths"].items():
        op = ops.get("post")
        if op is None:
            continue
        assert {"403", "413"} <= op["responses"].keys(), path
        if path not in bodiless:
            assert op["requestBody"]["content"], path
        if "303" in op["responses"]:
            assert "Location" in op["responses"]["303"]["headers"], path
            assert "200" not in op["responses"], path


@pytest.mark.parametrize(("url", "form", "template"), [
    ("/rosters/1/window", {"reset": "1"}, "/rosters/{roster_id}/window"),
    ("/rosters/1/mapping/select", {"mapping_name": "demo strict"}, "/rosters/{roster_id}/mapping/select"),
    ("/runs/{bootstrap}/cancel", {}, "/runs/{run_id}/cancel"),
])
def test_form_posts_answer_303_with_a_location(api: TestClient, openapi: dict[str, Any], url: str,
                                               form: dict[str, str], template: str) -> None:
    r = api.post(url.replace("{bootstrap}", str(_bootstrap_run(api))), data=form, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"]
    assert "303" in openapi["paths"][template]["post"]["responses"]
    api.post("/rosters/1/mapping/select", data={"mapping_name": "demo standard"})


def test_served_resampling_form_states_the_limits_the_app_enforces(api: TestClient,
                                                                    openapi: dict[str, Any]) -> None:
    from app.analysis.run_params import MAX_RESAMPLES

    form = (openapi["paths"]["/rosters/{roster_id}/resampling"]["post"]["requestBody"]["content"]
            ["application/x-www-form-urlencoded"]["schema"]["properties"])
    low, high = form["resamples"]["minimum"], form["resamples"]["maximum"]
    assert (low, high) == (100, MAX_RESAMPLES)
    for b in (low - 1, high + 1):
        r = api.post("/rosters/1/resampling", data={"resamples": str(b)}, follow_redirects=False)
        assert r.status_code == 400, b


def test_downloads_have_the_declared_media_types(api: TestClient, openapi: dict[str, Any]) -> None:
    for url, template in [("/rosters/1/rejected.csv", "/rosters/{roster_id}/rejected.csv"),
                          ("/mappings/demo standard.csv", "/mappings/{name}.csv")]:
        r = api.get(url)
        assert r.status_code == 200, url
        media = r.headers["content-type"].split(";")[0]
        assert media in openapi["paths"][template]["get"]["responses"]["200"]["content"], url


@pytest.mark.slow
def test_exports_have_the_declared_media_types(api: TestClient, openapi: dict[str, Any]) -> None:
    """Drawn by the headless browser: seconds each, the first one more while the browser starts."""
    for url, template in [("/rosters/1/charts/coverage.svg", "/rosters/{roster_id}/charts/{chart}.{fmt}"),
                          ("/rosters/1/charts/trend.png", "/rosters/{roster_id}/charts/{chart}.{fmt}"),
                          ("/rosters/1/briefing/deck.pptx", "/rosters/{roster_id}/briefing/deck.pptx"),
                          ("/rosters/1/briefing/brief.pdf", "/rosters/{roster_id}/briefing/brief.pdf")]:
        r = api.get(url)
        assert r.status_code == 200, url
        assert r.headers["content-type"] in openapi["paths"][template]["get"]["responses"]["200"]["content"]


# -- every body is made from its dataclass (the generator itself: test_schema_gen.py) ---------------


def json_fields(cls: type) -> set[str]:
    return {f.name for f in dataclasses.fields(cls) if not f.metadata.get("json_skip")}


# every JSON body and the dataclass it is made from
BODIES: list[tuple[type[BaseModel], type]] = [
    (RostersBody, RostersPage), (RosterDetailBody, RosterDetailPage), (ReasonsBody, ReasonsPage),
    (CoverageBody, CoveragePage), (TrendBody, TrendPage), (TrendUnfitBody, TrendPage),
    (RunsBody, ResamplingPage), (RunBody, RunPage), (SectorsBody, SectorsPage),
    (RobustnessBody, RobustnessPage), (BriefingBody, BriefingPage), (S.RosterOut, Roster), (S.RunOut, Run),
    (S.BootstrapRunOut, Run), (S.TrendFitOut, TrendFit),
]


@pytest.mark.parametrize(("model", "cls"), BODIES, ids=[m.__name__ for m, _ in BODIES])
def test_each_served_body_has_exactly_the_fields_of_its_dataclass(openapi: dict[str, Any],
                                                                   model: type[BaseModel], cls: type) -> None:
    assert set(model.model_fields) == json_fields(cls)
    served = openapi["components"]["schemas"][model.__name__]
    assert set(served["properties"]) == json_fields(cls)
    exact = cls.__module__.startswith(("app.web", "app.store"))  # page bodies and stored records
    assert served.get("additionalProperties") is (not exact)


def test_the_fit_summary_is_the_fit_less_its_covariance_plus_its_sentence() -> None:
    # fit_to_dict is written by hand; its model is derived from TrendFit, so a new TrendFit field shows here
    assert set(S.TrendFitSummary.model_fields) == json_fields(TrendFit) - {"covariance"} | {"sentence"}


# -- what the fuzz test found ---------------------------------------------------------------------


@pytest.mark.parametrize("query", ["a=1&b=9", "a=9223372036854775808&b=1"])
def test_comparing_a_mapping_version_that_does_not_exist_is_a_404(api: TestClient, query: str) -> None:
    # was a 500 (StoreError from the store's lookup), then a 400; a version that is not stored is not found
    r = api.get(f"/api/rosters/1/reasons?{query}")
    assert r.status_code == 404
    assert "no version" in r.json()["error"]
    assert api.get(f"/rosters/1/reasons?{query}").status_code == 404


@pytest.mark.parametrize("query", ["a=0&b=0", "a=-1&b=2", "a=x&b=1", "a=1&b=0"])
def test_a_version_number_below_one_is_a_400(api: TestClient, query: str) -> None:
    # the schema says minimum 1; the live-server fuzzer found negative numbers silently ignored
    r = api.get(f"/api/rosters/1/reasons?{query}")
    assert r.status_code == 400
    assert "version number" in r.json()["error"]


def test_sectors_page_when_no_sector_can_be_fitted(api: TestClient, openapi: dict[str, Any]) -> None:
    # was a 500: the forest chart had no row to draw
    r = api.get("/api/rosters/1/sectors?min_departures=10000")
    assert r.status_code == 200
    body = SectorsBody.model_validate(r.json())
    assert body.error and body.result is not None
    assert body.result.sectors, "no sector listed: the check below would pass on nothing"
    assert all(t.status == "skipped" for t in body.result.sectors)
    assert_conforms(openapi, "/api/rosters/{roster_id}/sectors", "get", r)
    page = api.get("/rosters/1/sectors?min_departures=10000")
    assert page.status_code == 200 and "No sector could be fitted" in page.text


def test_an_encoding_name_with_a_nul_character_is_refused(api: TestClient, openapi: dict[str, Any]) -> None:
    # was a 500: codecs.lookup raises ValueError ("embedded null character"), not LookupError; since session 7
    # every form field with a NUL is refused before a route reads it, naming the field (app/web/forms.py)
    upload = {"file": ("r.csv", b"a,b\n1,2\n", "text/csv")}
    page = api.post("/rosters/upload", files=upload, data={"encoding": "\x00"})
    assert page.status_code == 400 and "NUL character" in page.text and "encoding" in page.text
    r = api.post("/api/rosters", files=upload, data={"encoding": "utf\x00-8"})
    assert r.status_code == 400 and "form field 'encoding'" in r.json()["error"]
    assert_conforms(openapi, "/api/rosters", "post", r)


def test_a_mapping_version_beyond_sqlite_integers_is_a_404(api: TestClient) -> None:
    # was a 500: OverflowError from the SQLite driver
    assert api.get("/mappings/demo standard.csv?version=9223372036854775808").status_code == 404
    assert api.get("/mappings/demo standard.csv?version=9223372036854775807").status_code == 404


def test_addresses_no_route_matches_answer_like_the_app(api: TestClient, openapi: dict[str, Any]) -> None:
    # was {"detail": "Not Found"}: a mapping name with a line break matches no route (the path converter
    # stops at newlines), and that body is not the declared ErrorBody
    r = api.get("/mappings/a%0Ab.csv", headers=JSON)
    assert r.status_code == 404
    assert_conforms(openapi, "/mappings/{name}.csv", "get", r)
    assert api.get("/api/no-such-thing").json() == {"error": "There is no page at /api/no-such-thing."}
    assert api.get("/no-such-page").headers["content-type"].startswith("text/html")
    wrong = api.delete("/api/health")
    assert wrong.status_code == 405 and wrong.headers["allow"] == "GET" and "error" in wrong.json()


def test_every_reference_in_the_served_schema_resolves(openapi: dict[str, Any]) -> None:
    def refs(node: Any) -> Iterator[str]:
        if isinstance(node, dict):
            for key, value in node.items():
                if key == "$ref":
                    yield value
                else:
                    yield from refs(value)
        elif isinstance(node, list):
            for value in node:
                yield from refs(value)

    names = set(openapi["components"]["schemas"])
    found = set(refs(openapi["paths"])) | set(refs(openapi["components"]))
    assert found and {r.removeprefix("#/components/schemas/") for r in found} <= names
