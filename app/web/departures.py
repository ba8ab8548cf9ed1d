"""Departures: the records behind every count, filtered, sorted and paged by the store; CSV and XLSX exports."""

from __future__ import annotations

import hashlib
import io
import json
import math
from collections.abc import Iterable
from dataclasses import dataclass, field, replace
from typing import Any
from urllib.parse import urlencode

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, Response

from app.analysis.browse import departure_filter
from app.analysis.inputs import parse_mapping_ref
from app.analysis.overrides import resolve_overrides
from app.intake.spreadsheet_safety import safe_csv
from app.store import MAX_ID, DepartureFilter, MappingVersion, Roster, Store, StoreError
from app.store.departure_query import (
    CATEGORY_FILTERS,
    IN_POST_FILTERS,
    LISTED_FIELDS,
    MAX_PER_PAGE,
    SORT_KEYS,
)
from app.web.deps import BadRequest, NotFound, app_store
from app.web.rendering import as_json, context_line, render
from app.web.route_docs import YEAR, api_errors, download, page_errors, query
from app.web.schemas import DepartureOut, define, list_of

router = APIRouter()

PER_PAGE = 50

#: query parameter -> DepartureFilter field, for the text filters
_TEXT_PARAMS = {"sector": "sector", "category": "category", "reason": "reason", "firm": "firm", "q": "q",
                "in_post": "in_post"}
_YEAR_PARAMS = {"year": "year", "from": "year_from", "to": "year_to"}

HEADERS = {
    "line": "Source line", "year": "Fiscal year", "date": "Date", "firm_id": "Firm id", "firm_name": "Firm",
    "sector": "Sector", "executive": "Executive", "reason": "Reason code", "category": "Category",
    "age": "Age", "tenure": "Tenure (years)", "interim": "Interim", "notes": "Notes",
}


def mapping_ref(version: MappingVersion | None) -> str | None:
    """``NAME:VERSION`` of the mapping a page counted with, for links to the departures behind its counts."""
    return f"{version.name}:{version.version}" if version else None


@dataclass(frozen=True)
class DeparturesPage:
    """One page of the departures that match the filters, and what the filters were."""

    roster: Roster
    mapping_label: str
    filters: dict[str, Any]
    sort: str
    page: int
    per_page: int
    pages: int
    total: int
    departures: list[dict[str, Any]]
    years: list[int]
    sectors: list[str]
    reasons: list[str]
    categories: tuple[str, ...] = CATEGORY_FILTERS
    query: str = ""
    #: the mapping version counted with, when it is its mapping's newest: a record's category can then be set
    #: for it ("set category for this mapping" saves the next version); None: no override form
    override_mapping: str | None = None
    override_version: int | None = None
    #: the mapping version's case overrides of this roster that name no record of its current version
    overrides_not_applied: list[str] = field(default_factory=list)
    #: rows of the roster still in post (no departure date, a code saying the executive has not left): no
    #: departure of any year, so a year filter leaves them out; ``in_post=only`` lists them
    in_post_rows: int = 0


DeparturesBody = define(DeparturesPage, "DeparturesBody", fields={
    "departures": list_of(DepartureOut), "filters": dict[str, str | int]},
    descriptions={"total": "every match, not just this page",
                  "query": "the filters and sort as a query string, for links and exports"})


@dataclass(frozen=True)
class _Request:
    roster: Roster
    mapping_label: str
    flt: DepartureFilter
    filters: dict[str, Any]
    sort: str
    version: MappingVersion | None = None
    marks: dict[int, dict[str, Any]] = field(default_factory=dict)
    missing: list[str] = field(default_factory=list)


def _int_param(request: Request, name: str, what: str, *, low: int = 0, high: int = MAX_ID) -> int | None:
    raw = request.query_params.get(name, "").strip()
    if not raw:
        return None
    if not raw.isdecimal() or not low <= int(raw) <= high:
        raise BadRequest(f"{name} must be {what}; got {raw!r}.")
    return int(raw)


def _read(store: Store, request: Request, roster_id: int) -> _Request:
    try:
        roster = store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    filters: dict[str, Any] = {}
    values: dict[str, Any] = {}
    for param, fieldname in _YEAR_PARAMS.items():
        value = _int_param(request, param, "a fiscal year such as 1998", high=9999)
        if value is not None:
            filters[param] = values[fieldname] = value
    for param, fieldname in _TEXT_PARAMS.items():
        text = request.query_params.get(param, "").strip()
        if text:
            filters[param] = values[fieldname] = text
    ref = request.query_params.get("mapping", "").strip() or store.settings(roster.id).mapping_name
    mapping: tuple[str, int] | None = None
    version: MappingVersion | None = None
    if ref:
        name, number = parse_mapping_ref(ref)
        try:
            version = store.get_mapping(name, number)
        except StoreError as exc:
            raise BadRequest(str(exc)) from exc
        mapping = (version.name, version.version)
        filters["mapping"] = f"{version.name}:{version.version}"
    sort = request.query_params.get("sort", "").strip() or "line"
    if sort.lstrip("-") not in SORT_KEYS:
        raise BadRequest(f"sort must be one of {', '.join(SORT_KEYS)} (a leading '-' sorts descending); "
                         f"got {sort!r}.")
    # case overrides count a record as the analyst set it, over its code: the list shows the same category
    resolved = resolve_overrides(store, roster, version)
    marks = {r.departure_id: {"position": r.position, "category": r.override.category, "note": r.override.note,
                              "author": r.override.author, "created_at": r.override.created_at}
             for r in resolved if r.departure_id is not None}
    try:
        # the same classification as the counts that link here: override, then rules, then code (by code key)
        flt = departure_filter(store, roster, version, resolved, **values)
    except StoreError as exc:
        raise BadRequest(str(exc)) from exc
    label = f"{mapping[0]} v{mapping[1]}" if mapping else "no mapping"
    missing = [f"{r.override.describe()} ({r.override.category})" for r in resolved if not r.applied]
    return _Request(roster, label, flt, filters, sort, version, marks, missing)


def departures_data(store: Store, request: Request, roster_id: int) -> DeparturesPage:
    asked = _read(store, request, roster_id)
    page = _int_param(request, "page", "a page number from 1", low=1, high=MAX_ID // MAX_PER_PAGE) or 1
    per_page = _int_param(request, "per_page", f"between 1 and {MAX_PER_PAGE}", low=1,
                          high=MAX_PER_PAGE) or PER_PAGE
    try:
        found = store.find_departures(asked.roster.id, asked.flt, sort=asked.sort, page=page, per_page=per_page)
    except StoreError as exc:
        raise BadRequest(str(exc)) from exc
    pages = max(1, math.ceil(found.total / per_page))
    if page > pages:
        raise BadRequest(f"page {page} is past the last page ({pages}) of {found.total} departure(s).")
    facets = store.departure_facets(asked.roster.id)
    in_post = (store.count_departures(asked.roster.id, replace(asked.flt, in_post="only", year=None, year_from=None,
                                                                year_to=None, sector=None, category=None,
                                                                reason=None, firm=None, q=None))
               if asked.flt.in_post_codes else 0)
    params = {**asked.filters, **({"sort": asked.sort} if asked.sort != "line" else {})}
    rows = [{**row, "override": asked.marks.get(row["id"])} for row in found.rows]
    newest = asked.version is not None and asked.version.version == _newest(store, asked.version.name)
    return DeparturesPage(
        roster=asked.roster, mapping_label=asked.mapping_label, filters=asked.filters, sort=asked.sort,
        page=page, per_page=per_page, pages=pages, total=found.total, departures=rows,
        years=facets["years"], sectors=facets["sectors"], reasons=facets["reasons"], query=urlencode(params),
        override_mapping=asked.version.name if newest and asked.version else None,
        override_version=asked.version.version if newest and asked.version else None,
        overrides_not_applied=asked.missing, in_post_rows=in_post,
    )


def _newest(store: Store, name: str) -> int:
    return dict(store.list_mappings()).get(name, 0)


_QUERY = query(
    ("year", YEAR, "only this fiscal year"),
    ("from", YEAR, "first fiscal year (inclusive)"),
    ("to", YEAR, "last fiscal year (inclusive)"),
    ("sector", {"type": "string"}, "only this sector; (none) finds departures without one"),
    ("category", {"type": "string", "enum": list(CATEGORY_FILTERS)},
     "category under the mapping; counted = forced or voluntary"),
    ("reason", {"type": "string"}, "only this reason code"),
    ("in_post", {"type": "string", "enum": list(IN_POST_FILTERS)},
     "rows still in post (no departure date, a code saying the executive has not left): only them, or none of "
     "them; a year filter leaves them out, as they are no departure of any year"),
    ("firm", {"type": "string"}, "firm id or firm name, exactly"),
    ("q", {"type": "string"}, "text anywhere in firm, sector, executive, reason code or notes"),
    ("mapping", {"type": "string"}, "NAME or NAME:VERSION giving codes their category; the roster's by default"),
    ("sort", {"type": "string", "enum": [p + k for k in SORT_KEYS for p in ("", "-")], "default": "line"},
     "sort key; a leading '-' sorts descending"),
    ("page", {"type": "integer", "minimum": 1, "default": 1}, "page number"),
    ("per_page", {"type": "integer", "minimum": 1, "maximum": MAX_PER_PAGE, "default": PER_PAGE},
     "departures per page"),
)


@router.get("/rosters/{roster_id}/departures", response_class=HTMLResponse, name="departures_page",
            responses=page_errors(400, 404), openapi_extra=_QUERY)
def departures_page(request: Request, roster_id: int) -> HTMLResponse:
    page = departures_data(app_store(request), request, roster_id)
    return render(request, "departures.html", page, roster=page.roster, active="departures_page",
                  context_line=context_line(page.mapping_label))


@router.get("/api/rosters/{roster_id}/departures", name="departures_api", response_model=None,
            responses={200: {"model": DeparturesBody, "description": "One page of the matching departures"},
                       **api_errors(400, 404)}, openapi_extra=_QUERY)
def departures_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(departures_data(app_store(request), request, roster_id))


def _rows(store: Store, asked: _Request) -> Iterable[list[Any]]:
    for rec in store.iter_departures(asked.roster.id, asked.flt, sort=asked.sort):
        yield [rec[f] for f in LISTED_FIELDS]


def _filename(asked: _Request, ext: str) -> str:
    """The roster, and a digest of the filters and sort: different selections never share a file name."""
    digest = hashlib.sha256(json.dumps([asked.filters, asked.sort], sort_keys=True).encode()).hexdigest()[:8]
    return f"departures-roster-{asked.roster.id}-{digest}.{ext}"


def _check_paging(request: Request) -> None:
    """Exports hold every match, so page and per_page do not narrow them; they are still checked like the
    page's, so that a link copied from the page and edited by hand fails the same way."""
    _int_param(request, "page", "a page number from 1", low=1, high=MAX_ID // MAX_PER_PAGE)
    _int_param(request, "per_page", f"between 1 and {MAX_PER_PAGE}", low=1, high=MAX_PER_PAGE)


@router.get("/rosters/{roster_id}/departures.csv", name="departures_csv", response_class=Response,
            responses={**download("Every matching departure (formula-safe CSV)", "text/csv"),
                       **page_errors(400, 404)}, openapi_extra=_QUERY)
def departures_csv(request: Request, roster_id: int) -> Response:
    store = app_store(request)
    _check_paging(request)
    asked = _read(store, request, roster_id)
    body = safe_csv(_rows(store, asked), [HEADERS[f] for f in LISTED_FIELDS])
    return Response(body, media_type="text/csv; charset=utf-8", headers={
        "content-disposition": f'attachment; filename="{_filename(asked, "csv")}"'})


XLSX = "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet"


def departures_workbook(rows: Iterable[list[Any]], *, title: str) -> bytes:
    """An XLSX of ``rows`` with every text cell stored as text.

    openpyxl would store a string that starts with ``=`` as a formula; here each text cell is forced to
    the string type, so a spreadsheet shows ``=HYPERLINK(...)`` as the characters it is and never runs it.
    Characters XML cannot hold (control characters) become U+FFFD rather than failing the whole export.
    """
    from openpyxl import Workbook
    from openpyxl.cell import WriteOnlyCell
    from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE

    wb = Workbook(write_only=True)
    ws = wb.create_sheet("Departures")
    ws.append([HEADERS[f] for f in LISTED_FIELDS])
    for row in rows:
        cells = []
        for value in row:
            if isinstance(value, str):
                cell = WriteOnlyCell(ws, value=ILLEGAL_CHARACTERS_RE.sub("\ufffd", value))
                cell.data_type = "s"
                cells.append(cell)
            else:
                cells.append(value)
        ws.append(cells)
    wb.properties.title = title
    out = io.BytesIO()
    wb.save(out)
    return out.getvalue()


@router.get("/rosters/{roster_id}/departures.xlsx", name="departures_xlsx", response_class=Response,
            responses={**download("Every matching departure (workbook; text stays text)", XLSX),
                       **page_errors(400, 404)}, openapi_extra=_QUERY)
def departures_xlsx(request: Request, roster_id: int) -> Response:
    store = app_store(request)
    _check_paging(request)
    asked = _read(store, request, roster_id)
    body = departures_workbook(_rows(store, asked), title=f"Departures of roster {asked.roster.name}")
    return Response(body, media_type=XLSX, headers={
        "content-disposition": f'attachment; filename="{_filename(asked, "xlsx")}"'})
