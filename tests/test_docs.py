"""The README and the contributor guide stay true to the code (house style point 15)."""

from __future__ import annotations

import argparse
import re
from pathlib import Path
from typing import Any

import pytest
from fastapi.responses import HTMLResponse
from fastapi.routing import APIRoute

from app.cli import build_parser
from app.config import Settings
from app.store import Store
from app.web.app import create_app

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
DEVELOPERS = ROOT / "DEVELOPERS.md"


def _text(path: Path) -> str:
    assert path.is_file(), f"{path.name} is missing"
    return path.read_text(encoding="utf-8")


def _commands(parser: argparse.ArgumentParser, prefix: str = "") -> list[str]:
    """Every subcommand, nested ones as 'mapping import'."""
    out: list[str] = []
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                out.append(f"{prefix}{name}")
                out += _commands(sub, f"{prefix}{name} ")
    return out


def test_readme_opens_with_a_paragraph_about_the_job() -> None:
    lines = _text(README).splitlines()
    assert lines[0].startswith("# ")
    first = next(line for line in lines[1:] if line.strip())
    assert not first.startswith(("#", "```", "-", "*", "1.")), "the README should open with a paragraph"
    paragraph = " ".join(lines[lines.index(first):]).split("  ")[0]
    assert "departure" in paragraph.lower() and "forced" in paragraph.lower()


def test_readme_has_exactly_two_set_up_commands() -> None:
    text = _text(README)
    match = re.search(r"^##+ [^\n]*Set up[^\n]*\n(.*?)(?=^##? )", text, re.S | re.M | re.I)
    assert match, "no section whose heading contains 'Set up'"
    blocks = re.findall(r"^```(\w*)\n(.*?)^```", match.group(1), re.S | re.M)
    assert len(blocks) == 2
    assert [lang for lang, _ in blocks] == ["sh", "sh"]
    assert "helmshift serve" in blocks[0][1] and "pytest" in blocks[1][1]


def test_set_up_commands_work_without_python3_venv() -> None:
    """A bare Debian has no python3-venv: each command installs it (as root) before it makes the venv."""
    text = _text(README)
    section = re.search(r"^##+ [^\n]*Set up[^\n]*\n(.*?)(?=^##? )", text, re.S | re.M | re.I)
    assert section
    blocks = [body for _, body in re.findall(r"^```(\w*)\n(.*?)^```", section.group(1), re.S | re.M)]
    assert len(blocks) == 2
    for body in blocks:
        install = re.search(r"apt-get update && apt-get install -y [^&]*\bpython3-venv\b", body)
        assert install, body
        assert install.start() < body.index("python3 -m venv"), body


def test_readme_states_the_upload_limits() -> None:
    from app.intake.readers import ReadLimits

    limits = ReadLimits()
    text = re.sub(r"\s+", " ", _text(README))
    assert f"{limits.max_data_rows:,} data rows" in text
    assert f"{limits.max_zip_entries:,} entries" in text
    assert f"{limits.max_sheet_rows:,} rows" in text


def test_tests_cite_only_files_in_the_repository() -> None:
    """Check values are cited from tests/data/README.md, which is in the repository (not a shared file)."""
    tests = ROOT / "tests"
    offenders = [f.name for f in tests.glob("test_*.py") if "REFERENCES.md" in f.read_text(encoding="utf-8")
                 and f.name != "test_docs.py"]
    assert not offenders, offenders
    cited = _text(tests / "data" / "README.md")
    for source in ("Dobson", "Venables", "Newcombe", "Arbuthnot", "Crowder", "Efron", "test_bootstrap_against_R"):
        assert source in cited, source


@pytest.mark.parametrize("command", _commands(build_parser()))
def test_every_cli_command_is_in_the_readme(command: str) -> None:
    flat = re.sub(r"[ \t]+", " ", _text(README))  # usage blocks align columns with extra spaces
    assert f"helmshift {command}" in flat, f"`helmshift {command}` is not documented"


def _api_routes(routes: list[Any]) -> list[APIRoute]:
    """Every APIRoute, looking inside included routers (FastAPI >= 0.16x wraps them)."""
    out: list[APIRoute] = []
    for route in routes:
        if isinstance(route, APIRoute):
            out.append(route)
        elif (inner := getattr(route, "original_router", None)) is not None:
            out += _api_routes(list(inner.routes))
    return out


def _page_routes(tmp_path: Path) -> list[str]:
    store = Store(f"sqlite:///{tmp_path / 'docs.db'}")
    try:
        app = create_app(Settings(db_url=store.url), store, start_jobs=False)
        return [r.name for r in _api_routes(app.routes) if "GET" in r.methods
                and isinstance(r.response_class, type) and issubclass(r.response_class, HTMLResponse)]
    finally:
        store.dispose()


def test_every_page_route_is_in_the_contributor_guide(tmp_path: Path) -> None:
    names = _page_routes(tmp_path)
    assert {"rosters_page", "trend_page", "run_progress"} <= set(names)
    text = _text(DEVELOPERS)
    missing = [n for n in names if f"`{n}`" not in text]
    assert not missing, f"page routes not in DEVELOPERS.md: {missing}"
