"""Shared fixtures: a real SQLite store in a temporary folder."""

from __future__ import annotations

from pathlib import Path

import pytest

from app.store import Store

REFERENCES = Path(__file__).parent / "data"


@pytest.fixture
def store(tmp_path: Path) -> Store:
    s = Store(f"sqlite:///{tmp_path / 'helmshift.db'}")
    yield s
    s.dispose()
