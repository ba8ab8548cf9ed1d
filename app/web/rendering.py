"""Turning a page's data into HTML (Jinja2) or its JSON twin, from the same dataclass."""

from __future__ import annotations

import json
import math
from datetime import datetime
from pathlib import Path
from typing import Any
from weakref import ref

from fastapi import Request
from fastapi.responses import HTMLResponse, JSONResponse
from fastapi.templating import Jinja2Templates
from jinja2 import pass_context
from markupsafe import Markup
from starlette.datastructures import URL, URLPath

from app import __version__
from app.jsonable import jsonable

TEMPLATE_DIR = Path(__file__).resolve().parents[2] / "templates"
STATIC_DIR = Path(__file__).resolve().parents[2] / "static"

templates = Jinja2Templates(directory=str(TEMPLATE_DIR))
templates.env.autoescape = True
templates.env.globals["tool_version"] = __version__

# Starlette's ``url_for`` asks the router to find the route by name on every call, and FastAPI's router walks
# every route (and its version contexts) to do so: ~0.5 ms a call, and a Coverage page with 150 count links
# spent most of its rendering there (benchmarks/README.md, bench_pages.py). A router's routes are fixed once the
# app is built, so a name and its path parameters always give the same path: kept per router (bounded), made
# absolute against each request's own base URL exactly as ``Request.url_for`` does.
# keyed by id (FastAPI's routers are not hashable), each entry dropped when its router is collected
_PATHS: dict[int, tuple[ref[Any], dict[tuple[str, tuple[tuple[str, Any], ...]], URLPath]]] = {}
_MAX_PATHS = 20_000


@pass_context
def _url_for(context: dict[str, Any], name: str, /, **path_params: Any) -> URL:
    request: Request = context["request"]
    router = request.scope.get("router") or request.scope["app"]
    held = _PATHS.get(id(router))
    if held is None or held[0]() is not router:
        key_id = id(router)
        held = _PATHS[key_id] = (ref(router, lambda _gone: _PATHS.pop(key_id, None)), {})
    paths = held[1]
    key = (name, tuple(sorted(path_params.items())))
    path = paths.get(key)
    if path is None:
        if len(paths) >= _MAX_PATHS:
            paths.clear()
        path = paths[key] = router.url_path_for(name, **path_params)
    return path.make_absolute_url(base_url=request.base_url)


templates.env.globals["url_for"] = _url_for


def _fmt_pct(value: float | None, digits: int = 1) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    return f"{value * 100:.{digits}f}%"


def _fmt_num(value: float | None, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    return f"{value:.{digits}f}"


# One convention for every odds ratio (and rate ratio) and its interval bounds, on pages, in sentences
# (app/stats/trend_report.py, headline.py, periods.py), exports and the CLI: three decimals.
RATIO_DIGITS = 3


def _fmt_ratio(value: float | None) -> str:
    return _fmt_num(value, RATIO_DIGITS)


def _script_json(value: Any) -> Markup:
    """JSON safe to place inside a <script type="application/json"> element (no tag can close it)."""
    text = value if isinstance(value, str) else json.dumps(jsonable(value))
    for raw, escaped in (("<", "\\u003c"), (">", "\\u003e"), ("&", "\\u0026"),
                         ("\u2028", "\\u2028"), ("\u2029", "\\u2029")):
        text = text.replace(raw, escaped)
    return Markup(text)  # noqa: S704 - every character that could end the element is escaped above


def _fmt_when(value: str | None) -> str:
    """Stored ISO timestamps (UTC) as '2026-12-01 22:19 UTC'."""
    if not value:
        return ""
    try:
        return datetime.fromisoformat(value).strftime("%Y-%m-%d %H:%M UTC")
    except ValueError:
        return value


def _fmt_count(value: int | None) -> str:
    """A count with thousands separators (12,345), the one convention of every page."""
    return "n/a" if value is None else f"{int(value):,}"


def mapping_words(mapping_label: str, capital: bool = False) -> str:
    """``mapping NAME vN``, or "no mapping chosen yet" for a page's "no mapping" (never "mapping no mapping")."""
    words = "no mapping chosen yet" if mapping_label == "no mapping" else f"mapping {mapping_label}"
    return words[:1].upper() + words[1:] if capital else words


templates.env.filters["mapping_words"] = mapping_words
templates.env.filters["when"] = _fmt_when
templates.env.filters["count"] = _fmt_count
templates.env.filters["script_json"] = _script_json
templates.env.filters["pct"] = _fmt_pct
templates.env.filters["num"] = _fmt_num
templates.env.filters["ratio"] = _fmt_ratio


def context_line(mapping_label: str, window: tuple[int, int] | None = None) -> str:
    """The grey line under the navigation: the mapping and window a page works with, in words when there is
    none yet (a new roster read "mapping no mapping · window 0–0")."""
    parts = [mapping_words(mapping_label)]
    if window and all(window):
        parts.append(f"window {window[0]}–{window[1]}")
    return " · ".join(parts)


def render(request: Request, template: str, page: Any, *, status: int = 200, **extra: Any) -> HTMLResponse:
    """Render ``template`` with the page dataclass as ``page``; the CSP nonce comes from the middleware."""
    context = {"page": page, "nonce": request.scope.get("state", {}).get("csp_nonce", ""), **extra}
    return templates.TemplateResponse(request, template, context, status_code=status)


def as_json(page: Any, *, status: int = 200) -> JSONResponse:
    return JSONResponse(jsonable(page), status_code=status)
