"""Page links: the cached ``url_for`` of the templates gives exactly what Starlette's ``Request.url_for`` gives.

The templates' ``url_for`` keeps each router's resolved paths (app/web/rendering.py); these tests hold it to
Starlette's own resolver for every named route the pages link to, with the request's own host, and check
that a count link on Coverage still lands on a Departures list whose total equals the count.
"""

from __future__ import annotations

import re
from html import unescape
from typing import Any

from starlette.requests import Request

from app.web.rendering import templates

ROSTER = 1


def _request(app: Any, host: str) -> Request:
    scope = {"type": "http", "method": "GET", "path": "/", "root_path": "", "query_string": b"",
             "headers": [(b"host", host.encode())], "scheme": "http", "server": (host, 80), "app": app,
             "router": app.router}
    return Request(scope)


def _named_routes(routes: list[Any]) -> list[Any]:
    """Every route with a name, through FastAPI's included routers."""
    found = []
    for route in routes:
        inner = getattr(route, "original_router", None)
        if inner is not None:
            found += _named_routes(inner.routes)
        elif getattr(route, "name", None) and hasattr(route, "param_convertors"):
            found.append(route)
    return found


def test_cached_paths_equal_starlettes_resolver_for_every_route(client: Any) -> None:
    app = client.app
    url_for = templates.env.globals["url_for"]
    routes = _named_routes(app.router.routes)
    checked = 0
    # other hosts and other ids: a cache that kept a host or ignored a parameter would fail here
    for host, value in (("127.0.0.1:8000", 7), ("localhost:8011", 11), ("127.0.0.1:8000", 11)):
        request = _request(app, host)
        for route in routes:
            params = {name: value for name in route.param_convertors}
            if "path" in params:  # the static mount
                continue
            for _ in range(2):  # the second answer comes from the cache
                got = url_for({"request": request}, route.name, **params)
                assert str(got) == str(request.url_for(route.name, **params)), route.name
                checked += 1
    assert {"departures_page", "coverage_page", "run_page"} <= {r.name for r in routes}
    assert checked > 100


def test_coverage_count_links_still_list_their_departures(client: Any) -> None:
    html = client.get(f"/rosters/{ROSTER}/coverage").text
    links = re.findall(r'<a class="count" href="([^"]+)"[^>]*>([0-9,]+)</a>', html)
    assert len(links) > 20
    for href, shown in links[:6]:
        url = unescape(href)
        assert url.startswith(f"http://testserver/rosters/{ROSTER}/departures?")
        api = url.replace("http://testserver/rosters/", "/api/rosters/")
        assert client.get(api).json()["total"] == int(shown.replace(",", ""))


def test_trend_period_comparison_is_the_same_on_a_repeated_visit(client: Any) -> None:
    # the comparison is memoised per roster version, mapping version, window and periods: a second visit and
    # other periods must give the values a fresh computation gives
    first = client.get(f"/api/rosters/{ROSTER}/trend").json()["periods"]
    again = client.get(f"/api/rosters/{ROSTER}/trend").json()["periods"]
    assert first == again
    other = client.get(f"/api/rosters/{ROSTER}/trend?first=1998-2005&second=2006-2022").json()["periods"]
    assert other != first
    assert [other["first"]["years"], other["second"]["years"]] == [[1998, 2005], [2006, 2022]]
