"""A finished run as data: its replication pack, every resample's estimate and the jackknife values.

Split from :mod:`app.web.resampling` (the page that starts and shows runs): these routes only hand out what a
stored run already holds, built by :mod:`app.analysis.replication`.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, Response

from app.analysis.replication import build_pack, jackknife_csv, replicates_csv, replicates_payload
from app.store import Store, StoreError
from app.web.deps import BadRequest, NotFound, app_store
from app.web.rendering import as_json
from app.web.route_docs import api_errors, download, page_errors, query
from app.web.schemas import ReplicatesBody

router = APIRouter()


def _run_output(store: Store, run_id: int, make: Any) -> Any:
    """Call ``make()`` for a stored run: an unknown run is 404, one that cannot give it (unfinished, a fit run
    asked for replicates, counts changed since) is 400 with the reason."""
    try:
        store.get_run(run_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    try:
        return make()
    except ValueError as exc:
        raise BadRequest(str(exc)) from exc


def _attachment(data: bytes | str, media_type: str, filename: str) -> Response:
    return Response(data, media_type=media_type, headers={"content-disposition": f'attachment; filename="{filename}"'})


@router.get("/runs/{run_id}/pack.zip", name="run_pack", response_class=Response,
            responses={**download("The run's replication pack: counts, mapping, parameters, replicates, jackknife "
                                  "values, results and a standalone reproduce.py", "application/zip"),
                       **page_errors(400, 404)},
            openapi_extra=query(("records", {"type": "string", "enum": ["0", "1"], "default": "0"},
                                 "1 adds records.csv, the departures behind the counts (personal data)")))
def run_pack(request: Request, run_id: int) -> Response:
    """Any finished run (a trend fit or a bootstrap) as a zip an outside statistician can recompute."""
    store = app_store(request)
    records = request.query_params.get("records", "0")
    if records not in ("0", "1"):
        raise BadRequest(f"records must be 0 or 1; got {records!r}.")
    pack = _run_output(store, run_id, lambda: build_pack(store, run_id, records=records == "1"))
    response = _attachment(pack.data, "application/zip", pack.filename)
    response.headers["x-pack-sha256"] = pack.sha256
    return response


@router.get("/api/runs/{run_id}/replicates", name="run_replicates_api", response_model=None,
            responses={200: {"model": ReplicatesBody, "description": "Every resample's estimate and status, and "
                                                                      "every unit's leave-one-out estimate"},
                       **api_errors(400, 404)})
def run_replicates_api(request: Request, run_id: int) -> JSONResponse:
    store = app_store(request)
    return as_json(_run_output(store, run_id, lambda: replicates_payload(store, run_id)))


@router.get("/runs/{run_id}/replicates.csv", name="run_replicates_csv", response_class=Response,
            responses={**download("index, log odds ratio, odds ratio, status and failure reason per resample",
                                  "text/csv"), **page_errors(400, 404)})
def run_replicates_csv(request: Request, run_id: int) -> Response:
    store = app_store(request)
    text = _run_output(store, run_id, lambda: replicates_csv(store, run_id))
    return _attachment(text, "text/csv; charset=utf-8", f"helmshift-run-{run_id}-replicates.csv")


@router.get("/runs/{run_id}/jackknife.csv", name="run_jackknife_csv", response_class=Response,
            responses={**download("unit id and the log odds ratio with that unit left out", "text/csv"),
                       **page_errors(400, 404)})
def run_jackknife_csv(request: Request, run_id: int) -> Response:
    store = app_store(request)
    text = _run_output(store, run_id, lambda: jackknife_csv(store, run_id))
    return _attachment(text, "text/csv; charset=utf-8", f"helmshift-run-{run_id}-jackknife.csv")
