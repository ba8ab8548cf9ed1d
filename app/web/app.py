"""The FastAPI application: services on ``app.state``, routers per page, security middleware."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path

from fastapi import Depends, FastAPI, Request
from fastapi.responses import FileResponse, HTMLResponse, JSONResponse, RedirectResponse, Response
from fastapi.staticfiles import StaticFiles
from starlette.exceptions import HTTPException

from app import __version__
from app.config import Settings
from app.store import Store
from app.web import (
    accounts,
    auth,
    briefing,
    coverage,
    departures,
    import_worker,
    overrides,
    profiles,
    reason_mappings,
    reason_rules,
    reasons,
    resampling,
    roster_upload,
    roster_versions,
    rosters,
    run_files,
    sectors,
    trend,
    universe,
)
from app.web.deps import BadRequest, NotFound
from app.web.forms import refuse_nul_in_address
from app.web.rendering import STATIC_DIR, render, templates
from app.web.schemas import HealthBody
from app.web.security import SecurityMiddleware
from app.web.uploads import UploadStash

#: per-roster pages shown in the navigation after Roster / Reason codes / Coverage, in order
NAV_PAGES: list[tuple[str, str]] = [
    ("departures_page", "Departures"),
    ("trend_page", "Trend"),
    ("resampling_page", "Resampling"),
    ("sectors_page", "Sectors"),
    ("robustness_page", "Robustness"),
    ("briefing_page", "Briefing"),
    ("universe_page", "Universe"),
]


def plotly_js_path() -> Path:
    """plotly.js as shipped inside the plotly package, so the dashboard works offline."""
    import plotly

    return Path(plotly.__file__).parent / "package_data" / "plotly.min.js"


def plotly_js_version() -> str:
    from plotly.offline import get_plotlyjs_version

    return str(get_plotlyjs_version())


def create_app(settings: Settings, store: Store | None = None, *, start_jobs: bool = True) -> FastAPI:
    """Build the app over ``store`` (opened from ``settings.db_url`` when not given)."""
    from app.analysis.jobs import JobRunner, reap_lost_runs

    store = store or Store(settings.db_url)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        if start_jobs:
            app.state.jobs.start()
        yield
        app.state.jobs.shutdown()
        import_worker.shutdown()  # the import processes (started on the first upload)

    app = FastAPI(
        title="Helmshift", version=__version__, lifespan=lifespan,
        dependencies=[Depends(refuse_nul_in_address)],
        description="Local dashboard for forced chief-executive turnover: rosters, mappings, "
                    "coverage, trend models and bootstrap runs. Every page has a JSON twin under /api.",
    )
    app.state.settings = settings
    app.state.store = store
    app.state.uploads = UploadStash()
    app.state.jobs = JobRunner(store, workers=settings.job_workers, heartbeat=settings.job_heartbeat,
                               stale_after=settings.job_stale_after)
    # runs whose worker (in this or another server process) is gone; queued runs wait for a worker
    app.state.interrupted_at_start = reap_lost_runs(store, settings.job_stale_after)

    # added first, so it runs inside the Host/Origin checks of SecurityMiddleware
    app.add_middleware(auth.AuthMiddleware, store=store)
    app.add_middleware(SecurityMiddleware, allowed_hosts=settings.allowed_hosts,
                       upload_limit=settings.upload_limit)
    app.mount("/static", StaticFiles(directory=str(STATIC_DIR)), name="static")
    templates.env.globals["nav_extra"] = NAV_PAGES
    templates.env.globals["plotly_js_url"] = f"/vendor/plotly-{plotly_js_version()}.min.js"

    @app.get(f"/vendor/plotly-{plotly_js_version()}.min.js", include_in_schema=False)
    def plotly_bundle() -> FileResponse:
        return FileResponse(plotly_js_path(), media_type="text/javascript",
                            headers={"cache-control": "public, max-age=86400"})

    @app.get("/", include_in_schema=False)
    def home(request: Request) -> RedirectResponse:
        return RedirectResponse(request.url_for("rosters_page"), status_code=303)

    @app.get("/api/health", name="health", response_model=None,
             responses={200: {"model": HealthBody, "description": "The app answers; its version and schema"}})
    async def health() -> dict[str, object]:
        # async: answered on the event loop without waiting for a worker thread (a one-row read)
        return {"status": "ok", "version": __version__, "schema": store.schema_version()}

    for module in (auth, accounts, rosters, roster_upload, roster_versions, reasons, reason_mappings, reason_rules,
                   coverage, departures, trend, resampling, run_files, sectors, briefing, universe, profiles,
                   overrides):
        app.include_router(module.router)

    @app.exception_handler(NotFound)
    def not_found(request: Request, exc: NotFound) -> Response:
        return _error(request, 404, str(exc))

    @app.exception_handler(BadRequest)
    def bad_request(request: Request, exc: BadRequest) -> Response:
        return _error(request, 400, str(exc))

    @app.exception_handler(HTTPException)
    def framework_error(request: Request, exc: HTTPException) -> Response:
        # an address no route matches (e.g. a mapping name with a line break), a wrong method: the same
        # error page or {"error": ...} body as the app's own errors, not the framework's {"detail": ...}
        message = f"There is no page at {request.url.path}." if exc.status_code == 404 else str(exc.detail)
        response = _error(request, exc.status_code, message)
        response.headers.update(exc.headers or {})
        if exc.status_code == 405:
            # Starlette names only the first route matching the path; GET and POST of one path are two routes
            response.headers["allow"] = ", ".join(_allowed_methods(app, request))
        return response

    return app


def _allowed_methods(app: FastAPI, request: Request) -> list[str]:
    """Every method some route accepts at this request's path (our routers are included without a prefix)."""
    from starlette.routing import BaseRoute, Match

    methods: set[str] = set()
    probe = {**request.scope, "method": "GET"}

    def walk(routes: list[BaseRoute]) -> None:
        for route in routes:
            included = getattr(route, "original_router", None)
            if included is not None:
                walk(included.routes)
                continue
            accepted: set[str] | None = getattr(route, "methods", None)
            if accepted and route.matches(probe)[0] != Match.NONE:
                methods.update(accepted)

    walk(app.router.routes)
    return sorted(methods)


def _error(request: Request, status: int, message: str) -> Response:
    if request.url.path.startswith("/api/") or "application/json" in request.headers.get("accept", ""):
        return JSONResponse({"error": message}, status_code=status)
    response: HTMLResponse = render(request, "error.html", {"status": status, "message": message},
                                    status=status)
    return response
