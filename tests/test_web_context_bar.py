"""The context bar under the navigation names the roster, the mapping version and (where the page has one)
the window on every analysis page, so a number is never read without what it was counted with."""

from __future__ import annotations

import re
from typing import Any

import pytest


@pytest.mark.parametrize(("path", "window"), [
    ("reasons", True), ("coverage", True), ("departures", False), ("trend", True), ("resampling", True),
    ("sectors", True), ("robustness", False), ("briefing", True),
])
def test_context_bar_names_mapping_and_window(client: Any, path: str, window: bool) -> None:
    text = client.get(f"/rosters/1/{path}").text
    match = re.search(r'<div class="context-bar">(.*?)</div>', text, re.S)
    assert match, path
    bar = " ".join(re.sub(r"<[^>]+>", "", match.group(1)).split())
    assert bar.startswith("Roster Demo index (invented) · mapping demo standard v1"), bar
    # demo_data/README.md: the suggested window of full coverage is 1998-2022
    assert ("window 1998–2022" in bar) is window, bar
