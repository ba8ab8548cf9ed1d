"""Briefing: pick the findings for the board paper, preview them, download charts, deck and brief."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any
from urllib.parse import parse_qsl, urlencode

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.analysis.inputs import AnalysisInput, load_input
from app.analysis.runs import run_trend
from app.briefing.exports import MEDIA_TYPES, brief_file, brief_pack, chart_file, deck_file, default_charts
from app.briefing.findings import CHART_NAMES, build_finding, latest_bootstrap
from app.briefing.render import ExportError, export_available
from app.briefing.signature import (
    LIMITS,
    SignatureError,
    clean_date,
    clean_takeaways,
    clean_text,
    default_title,
)
from app.stats.trend import TrendError
from app.store import BriefingSettings, Roster, Run, Store, StoreError
from app.web.deps import BadRequest, NotFound, app_store, window_query
from app.web.figures import FigureSpec, figure_spec, page_memo
from app.web.forms import Upload, read_form
from app.web.rendering import as_json, render
from app.web.route_docs import WINDOW_QUERY, api_errors, download, form_body, page_errors, query, redirect
from app.web.run_numbers import ordinals, trend_fits
from app.web.schemas import BootstrapRunOut, define, list_of

router = APIRouter()

CHART_LABELS = {"coverage": "Coverage by year", "trend": "Trend in the forced share",
                "bootstrap": "Bootstrap odds ratios", "sectors": "Sector trends", "robustness": "Other mappings",
                "rates": "Turnover rates per 100 firm-years (needs a universe)",
                "adjusted": "Trend adjusted for age, tenure and sector"}


@dataclass(frozen=True)
class PreviewItem:
    name: str
    label: str
    takeaway: str
    error: str | None = None
    figure: FigureSpec | None = field(default=None, metadata={"json_skip": True})


@dataclass(frozen=True)
class BriefingPage:
    """The chosen findings with previews, the runs to choose from, and whether static export works."""

    roster: Roster
    mapping_label: str
    window: tuple[int, int] | None
    chosen: list[str]
    run_id: int | None
    fit_run_id: int | None
    runs: list[Run]
    items: list[PreviewItem]
    export_ok: bool
    export_message: str
    error: str | None = None
    warnings: list[str] = field(default_factory=list)
    chart_labels: dict[str, str] = field(default_factory=lambda: dict(CHART_LABELS))
    #: what the brief and deck are signed with (saved per roster; blank fields use the defaults)
    settings: BriefingSettings | None = None
    default_title: str = ""
    limits: dict[str, int] = field(default_factory=lambda: dict(LIMITS))
    #: run id -> its number among the roster's bootstrap runs ("Bootstrap N"; links keep the run id)
    run_numbers: dict[int, int] = field(default_factory=dict)
    #: "Fit N": the quoted trend fit's number among the roster's trend fits
    fit_number: int | None = None


BriefingBody = define(BriefingPage, "BriefingBody", fields={"runs": list_of(BootstrapRunOut)})


def _roster(store: Store, roster_id: int) -> Roster:
    try:
        return store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc


def briefing_data(store: Store, roster_id: int, *, chosen: list[str] | None, run_id: int | None) -> BriefingPage:
    """``chosen`` None: nothing ticked yet, so the standard deck of every finding that can be shown now."""
    roster = _roster(store, roster_id)
    ok, message = export_available()
    every_run = store.list_runs(roster.id, "bootstrap")
    numbers = ordinals(every_run)
    runs = [r for r in every_run if r.status == "done"]
    settings = store.briefing_settings(roster.id)
    try:
        inp = load_input(store, roster.id)
    except StoreError as exc:
        return BriefingPage(roster, "no mapping", None, chosen or [], run_id, None, runs, [], ok, message, str(exc),
                            settings=settings, default_title=default_title(roster.name), run_numbers=numbers)
    if chosen is None:
        chosen = default_charts(store, inp, run_id)
    if run_id is None:
        latest = latest_bootstrap(store, inp)
        run_id = latest.id if latest else None
    # findings read finished bootstrap runs only (the chosen one; robustness every one): a run in progress
    # must not invalidate the memo at every chunk
    state = tuple((r.id, r.finished_at) for r in runs if r.status == "done")
    items = [page_memo(store, ("briefing", *inp.key, name, run_id, state),
                       lambda name=name: _preview(store, inp, name, run_id)) for name in chosen]  # type: ignore[misc]
    try:
        fit_run_id: int | None = run_trend(store, inp).run_id  # the fit the brief and deck quote
    except TrendError:
        fit_run_id = None
    fit_number = ordinals(trend_fits(store, roster.id)).get(fit_run_id) if fit_run_id is not None else None
    return BriefingPage(roster, inp.mapping_label, inp.window, chosen, run_id, fit_run_id, runs, items, ok, message,
                        warnings=inp.warnings(), settings=settings, default_title=default_title(roster.name),
                        run_numbers=numbers, fit_number=fit_number)


def _preview(store: Store, inp: AnalysisInput, name: str, run_id: int | None) -> PreviewItem:
    try:
        finding = build_finding(store, inp, name, run_id=run_id if name == "bootstrap" else None)
    except (StoreError, ValueError, TrendError) as exc:
        return PreviewItem(name, CHART_LABELS[name], "", error=str(exc))
    return PreviewItem(name, CHART_LABELS[name], finding.takeaway, figure=figure_spec(finding.figure))


def _chosen(request: Request) -> list[str] | None:
    """The ticked findings in order (each once), or None when nothing was ticked."""
    picked = list(dict.fromkeys(c for c in request.query_params.getlist("chart") if c))
    bad = [c for c in picked if c not in CHART_NAMES]
    if bad:
        raise BadRequest(f"chart must be one of {', '.join(CHART_NAMES)}; got {', '.join(bad)}.")
    return picked or None


def _run_arg(request: Request) -> int | None:
    raw = request.query_params.get("run")
    if not raw:
        return None
    if not raw.isdecimal():
        raise BadRequest(f"run must be a run number; got {raw!r}.")
    return int(raw)


_CHART = ("chart", {"type": "array", "items": {"type": "string", "enum": list(CHART_NAMES)}},
          "findings to include (repeatable; default: the standard deck)")
_RUN = ("run", {"type": "integer", "minimum": 0}, "bootstrap run to use (default: the latest that fits)")


@router.get("/rosters/{roster_id}/briefing", response_class=HTMLResponse, name="briefing_page",
            responses=page_errors(400, 404), openapi_extra=query(_CHART, _RUN))
def briefing_page(request: Request, roster_id: int) -> HTMLResponse:
    page = briefing_data(app_store(request), roster_id, chosen=_chosen(request), run_id=_run_arg(request))
    return render(request, "briefing.html", page, roster=page.roster, active="briefing_page",
                  cautions_open=True)


@router.get("/api/rosters/{roster_id}/briefing", name="briefing_api", response_model=None,
            responses={200: {"model": BriefingBody, "description": "The chosen findings with takeaways"},
                       **api_errors(400, 404)}, openapi_extra=query(_CHART, _RUN))
def briefing_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(briefing_data(app_store(request), roster_id, chosen=_chosen(request), run_id=_run_arg(request)))


def _input(store: Store, roster_id: int, request: Request) -> AnalysisInput:
    roster = _roster(store, roster_id)
    try:
        return load_input(store, roster.id, window=window_query(request))
    except StoreError as exc:
        raise BadRequest(str(exc)) from exc


def _download(data: bytes, fmt: str, filename: str) -> Response:
    return Response(data, media_type=MEDIA_TYPES[fmt],
                    headers={"content-disposition": f'attachment; filename="{filename}"'})


def _export(make: Any) -> bytes:
    try:
        data: bytes = make()
    except ExportError as exc:
        raise BadRequest(f"Export is not available: {exc}") from exc
    except (StoreError, ValueError) as exc:
        raise BadRequest(str(exc)) from exc
    return data


@router.get("/rosters/{roster_id}/charts/{chart}.{fmt}", name="chart_export", response_class=Response,
            responses={**download("One chart as a file", *(MEDIA_TYPES[f] for f in ("png", "svg", "pdf"))),
                       **page_errors(400, 404)},
            openapi_extra=query(_RUN, *WINDOW_QUERY,
                                ("method", {"type": "string", "enum": ["percentile", "basic", "bca"]},
                                 "bootstrap interval marked"),
                                ("model", {"type": "string", "enum": ["linear", "spline", "sector"]}, "trend model")))
def chart_export(request: Request, roster_id: int, chart: str, fmt: str) -> Response:
    if chart not in CHART_NAMES or fmt not in ("png", "svg", "pdf"):
        raise NotFound(f"No chart {chart}.{fmt}; charts: {', '.join(CHART_NAMES)}; formats: png, svg, pdf.")
    store = app_store(request)
    inp = _input(store, roster_id, request)
    data = _export(lambda: chart_file(store, inp, chart, fmt, run_id=_run_arg(request),
                                      method=request.query_params.get("method", "bca"),
                                      model=request.query_params.get("model", "linear")))
    return _download(data, fmt, f"helmshift-{chart}-{roster_id}.{fmt}")


@router.get("/rosters/{roster_id}/briefing/deck.pptx", name="deck_export", response_class=Response,
            responses={**download("The findings as a slide deck", MEDIA_TYPES["pptx"]), **page_errors(400, 404)},
            openapi_extra=query(_CHART, _RUN, *WINDOW_QUERY))
def deck_export(request: Request, roster_id: int) -> Response:
    store = app_store(request)
    inp = _input(store, roster_id, request)
    data = _export(lambda: deck_file(store, inp, _chosen(request), run_id=_run_arg(request)))
    return _download(data, "pptx", f"helmshift-deck-{roster_id}.pptx")


@router.get("/rosters/{roster_id}/briefing/brief.pdf", name="brief_export", response_class=Response,
            responses={**download("The brief: one page for up to two findings, a page per two more", MEDIA_TYPES["brief"]), **page_errors(400, 404)},
            openapi_extra=query(_CHART, _RUN, *WINDOW_QUERY))
def brief_export(request: Request, roster_id: int) -> Response:
    store = app_store(request)
    inp = _input(store, roster_id, request)
    data = _export(lambda: brief_file(store, inp, _chosen(request), run_id=_run_arg(request)))
    return _download(data, "brief", f"helmshift-brief-{roster_id}.pdf")


@router.get("/rosters/{roster_id}/briefing/brief-pack.zip", name="brief_pack_export", response_class=Response,
            responses={**download("The brief pack: the replication pack of every run the brief and deck of these "
                                  "findings quote, with a manifest of sha256s", "application/zip"),
                       **page_errors(400, 404)},
            openapi_extra=query(_CHART, _RUN, *WINDOW_QUERY))
def brief_pack_export(request: Request, roster_id: int) -> Response:
    """The zip whose sha256 the brief's and deck's footers name, for the same ticked findings."""
    store = app_store(request)
    inp = _input(store, roster_id, request)
    try:
        pack = brief_pack(store, inp, _chosen(request), run_id=_run_arg(request))
    except (StoreError, ValueError) as exc:
        raise BadRequest(str(exc)) from exc
    response = Response(pack.data, media_type="application/zip",
                        headers={"content-disposition": f'attachment; filename="helmshift-brief-pack-{roster_id}.zip"'})
    response.headers["x-pack-sha256"] = pack.sha256
    return response


@router.post("/rosters/{roster_id}/briefing/settings", name="briefing_settings_save", status_code=303,
             response_class=RedirectResponse, responses=redirect("the Briefing page", page_errors(400, 404)),
             openapi_extra=form_body({
                 "title": {"type": "string", "maxLength": LIMITS["title"],
                           "description": "title of the brief and deck (empty: the default title)"},
                 "author": {"type": "string", "maxLength": LIMITS["author"]},
                 "marking": {"type": "string", "maxLength": LIMITS["marking"],
                             "description": "confidentiality marking, e.g. CONFIDENTIAL: on every page and slide"},
                 "date": {"type": "string", "description": "YYYY-MM-DD (empty: the day of each export)"},
                 "back": {"type": "string", "description": "the Briefing page's query to return to"},
             }, pattern_properties={"^takeaway-[a-z]+$": {
                 "type": "string", "maxLength": LIMITS["takeaway"],
                 "description": "the takeaway sentence of one finding (empty: the computed one)"}}))
async def briefing_settings_save(request: Request, roster_id: int) -> RedirectResponse:
    """Save the title, author, date, marking and takeaways the roster's brief and deck carry."""
    form = await read_form(request)
    return await run_in_threadpool(_briefing_settings_save, request, roster_id, form)


def _briefing_settings_save(request: Request, roster_id: int, form: dict[str, str | Upload]) -> RedirectResponse:
    store = app_store(request)
    roster = _roster(store, roster_id)
    try:
        takeaways = clean_takeaways({k.removeprefix("takeaway-"): v for k, v in form.items()
                                     if k.startswith("takeaway-")}, tuple(CHART_NAMES))
        # takeaways of findings not on the form this time are kept
        kept = {k: v for k, v in (store.briefing_settings(roster.id).takeaways or {}).items()
                if f"takeaway-{k}" not in form}
        store.save_briefing_settings(
            roster.id, title=clean_text(form.get("title"), "title", LIMITS["title"]),
            author=clean_text(form.get("author"), "author", LIMITS["author"]),
            marking=clean_text(form.get("marking"), "marking", LIMITS["marking"]),
            date=clean_date(form.get("date")), takeaways=kept | takeaways)
    except (SignatureError, StoreError) as exc:
        raise BadRequest(f"The briefing settings were not saved: {exc}") from exc
    # back to the same ticks and run: rebuilt from known values only, never followed as an address
    back = parse_qsl(str(form.get("back") or ""))
    params = [(k, v) for k, v in back if (k == "chart" and v in CHART_NAMES) or (k == "run" and v.isdecimal())]
    url = request.url_for("briefing_page", roster_id=roster.id)
    return RedirectResponse(f"{url}?{urlencode([*params, ('saved', '1')])}", status_code=303)
