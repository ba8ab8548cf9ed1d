"""The version is written once (app/__init__.py) and agrees with the changelog and everything that shows it.

References: PEP 440 (version identifiers: "0.2.0.dev0" is a development release before 0.2.0), read with
``packaging.version``; setuptools' own ``read_attr`` (the function behind ``dynamic = ["version"]`` with
``attr``) reads the version as a build would.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Any

from packaging.version import Version
from setuptools.config.expand import read_attr

import app

ROOT = Path(__file__).resolve().parents[1]


def newest_changelog_entry() -> tuple[str, bool]:
    """The first ``### X.Y.Z (...)`` heading of DEVELOPERS.md's changelog: its version and whether unreleased."""
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    changelog = text[text.index("## Changelog"):]
    match = re.search(r"^### (\d+\.\d+\.\d+) \(([^)]*)\)", changelog, re.MULTILINE)
    assert match, "DEVELOPERS.md's changelog has no version heading"
    return match.group(1), match.group(2) == "unreleased"


def test_the_version_is_the_changelogs_newest_and_marked_unreleased_until_it_is() -> None:
    version = Version(app.__version__)
    newest, unreleased = newest_changelog_entry()
    assert version.base_version == newest
    # PEP 440: an unreleased version is a development or pre-release of the changelog's version
    assert (version.is_devrelease or version.is_prerelease) == unreleased


def test_pyproject_reads_the_version_from_the_package() -> None:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    assert "version" not in project["project"] and "version" in project["project"]["dynamic"]
    attr = project["tool"]["setuptools"]["dynamic"]["version"]["attr"]
    assert read_attr(attr, root_dir=ROOT) == app.__version__


def test_footer_and_health_say_the_version(empty_client: Any) -> None:
    assert f"Helmshift {app.__version__} ·" in empty_client.get("/rosters").text
    assert empty_client.get("/api/health").json()["version"] == app.__version__
