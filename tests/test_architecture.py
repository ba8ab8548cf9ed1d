"""The house's layers: one-way imports inside ``app/`` and a pure statistics package.

An import inside a function counts as an import: deferring one to dodge a cycle hides the cycle but does
not remove it.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

APP = Path(__file__).resolve().parents[1] / "app"

#: layer -> the layers it may import (besides itself); ``base`` is app/__init__, types, config, jsonable
ALLOWED: dict[str, set[str]] = {
    "base": set(),
    "stats": {"base"},
    "store": {"base"},
    "intake": {"base", "store", "stats"},
    "analysis": {"base", "store", "stats", "intake"},
    "briefing": {"base", "store", "stats", "intake", "analysis"},
    "web": {"base", "store", "stats", "intake", "analysis", "briefing"},
    "entry": {"base", "store", "stats", "intake", "analysis", "briefing", "web"},
}
ENTRY_MODULES = {"app.demo"}  # and the app.cli package
#: modules of one idea: the house aims at ~400 lines; the test fails above this many
MAX_MODULE_LINES = 450
#: modules allowed to be longer, each with its reason; an entry goes when its module is back under the limit
LONG_MODULES: dict[str, str] = {
    # the standalone script shipped in replication packs as reproduce.py: it must stay ONE file that
    # imports nothing of Helmshift, so that a reader can check a run with numpy, pandas, scipy and statsmodels
    "app/analysis/pack_script.py": "standalone replication script; one file by design",
}
WEB_AND_DRAWING = ("fastapi", "starlette", "uvicorn", "plotly", "sqlalchemy", "kaleido", "jinja2")


def module_name(path: Path) -> str:
    parts = list(path.relative_to(APP.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def modules() -> dict[str, Path]:
    return {module_name(p): p for p in sorted(APP.rglob("*.py"))}


def imports_of(name: str, path: Path, known: set[str]) -> set[str]:
    """Modules inside app/ that ``name`` imports anywhere in its body (``from a import b`` may name a module)."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            targets = [base] + [f"{base}.{alias.name}" for alias in node.names]
        else:
            continue
        found |= {t for t in targets if t in known and t != name}
    return found


def external_imports(path: Path) -> set[str]:
    out: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            out |= {alias.name.split(".")[0] for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and not node.level and node.module:
            out.add(node.module.split(".")[0])
    return out


def layer(name: str) -> str:
    if name in ENTRY_MODULES or name == "app.cli" or name.startswith("app.cli."):
        return "entry"
    parts = name.split(".")
    if len(parts) >= 2 and parts[1] in ALLOWED and parts[1] != "base":
        return parts[1]
    return "base"


def graph() -> dict[str, set[str]]:
    mods = modules()
    return {name: imports_of(name, path, set(mods)) for name, path in mods.items()}


def cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in edges[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in edges:
        if v not in index:
            visit(v)
    return found


def test_the_graph_sees_the_layers() -> None:
    edges = graph()
    # a sanity check on the parser itself, so the tests below cannot pass on an empty graph
    assert len(edges) > 40
    assert "app.store" in edges["app.analysis.inputs"]
    assert "app.analysis.inputs" in edges["app.web.trend"]


def test_cycle_finder_finds_a_cycle() -> None:
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": set()}) == [["a", "b", "c"]]


def test_no_import_cycle_inside_app() -> None:
    assert cycles(graph()) == []


def test_imports_run_down_the_layers() -> None:
    edges = graph()
    upward = [(a, b) for a, targets in edges.items() for b in sorted(targets)
              if layer(b) != layer(a) and layer(b) not in ALLOWED[layer(a)]]
    assert upward == []


@pytest.mark.parametrize("package", ["stats"])
def test_statistics_import_no_web_database_or_drawing_library(package: str) -> None:
    offenders = {str(p.relative_to(APP)): sorted(external_imports(p) & set(WEB_AND_DRAWING))
                 for p in (APP / package).rglob("*.py")}
    assert len(offenders) >= 5
    assert {k: v for k, v in offenders.items() if v} == {}


def test_the_store_and_analysis_load_no_web_framework() -> None:
    for package in ("store", "intake", "analysis"):
        for p in (APP / package).rglob("*.py"):
            assert not external_imports(p) & {"fastapi", "starlette", "uvicorn"}, p


def module_lines() -> dict[str, int]:
    return {str(p.relative_to(APP.parent)): len(p.read_text(encoding="utf-8").splitlines())
            for p in sorted(APP.rglob("*.py"))}


def test_no_module_is_longer_than_the_limit() -> None:
    lines = module_lines()
    assert len(lines) > 40  # the walk found the package, so the check below cannot pass on nothing
    too_long = {path: n for path, n in lines.items() if n > MAX_MODULE_LINES and path not in LONG_MODULES}
    assert too_long == {}, f"split these into modules of one idea (limit {MAX_MODULE_LINES} lines)"


def test_every_long_module_exemption_is_still_needed() -> None:
    # a stale entry would let its module grow back unnoticed: drop it once the module is short again
    lines = module_lines()
    assert {path: lines.get(path, 0) for path in LONG_MODULES
            if lines.get(path, 0) <= MAX_MODULE_LINES} == {}


def _blocking_async_handlers(source: str) -> list[str]:
    """``async def`` routes whose body does more than read the request and hand the work to the threadpool:
    anything touching the store (``app_store``, ``request.app.state``) before ``return await
    run_in_threadpool(...)`` runs on the event loop and stalls every other request."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if not isinstance(node, ast.AsyncFunctionDef) or not any(
                isinstance(d, ast.Call) and isinstance(d.func, ast.Attribute) and isinstance(d.func.value, ast.Name)
                and d.func.value.id == "router" for d in node.decorator_list):
            continue
        body = [s for s in node.body if not (isinstance(s, ast.Expr) and isinstance(s.value, ast.Constant))]
        last = body[-1] if body else None
        hands_over = (isinstance(last, ast.Return) and isinstance(last.value, ast.Await)
                      and isinstance(last.value.value, ast.Call)
                      and getattr(last.value.value.func, "id", "") == "run_in_threadpool")
        names = {n.id for s in body[:-1] for n in ast.walk(s) if isinstance(n, ast.Name)}
        attrs = {n.attr for s in body[:-1] for n in ast.walk(s) if isinstance(n, ast.Attribute)}
        if not hands_over or names & {"app_store", "store"} or "state" in attrs:
            found.append(node.name)
    return found


def test_the_blocking_handler_finder_finds_one() -> None:
    blocking = ("@router.post('/x')\nasync def bad(request):\n    store = app_store(request)\n"
                "    form = await read_form(request)\n    return await run_in_threadpool(f, store, form)\n")
    fine = ("@router.post('/y')\nasync def good(request):\n    '''doc'''\n    form = await read_form(request)\n"
            "    return await run_in_threadpool(f, request, form)\n")
    assert _blocking_async_handlers(blocking) == ["bad"]
    assert _blocking_async_handlers(fine) == []


def test_async_routes_only_read_the_request_then_use_the_threadpool() -> None:
    """Every ``async def`` route reads its form and hands the work to the threadpool (DEVELOPERS.md: Seams)."""
    offenders = {path.name: names for path in sorted((APP / "web").glob("*.py"))
                 if (names := _blocking_async_handlers(path.read_text(encoding="utf-8")))}
    assert offenders == {}
