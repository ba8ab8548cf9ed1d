"""A roster with no mapping chosen says so in words wherever a source line names the mapping.

Before, the chart source line, the exports and the deck and brief provenance read "mapping none v0" (version
0 does not exist: saved versions count from 1). The reference is the plain wording itself.
"""

from __future__ import annotations

import json
from pathlib import Path

from conftest import DEMO_CSV, figure_handoff, make_client

from app.analysis.inputs import load_input
from app.analysis.provenance import NO_MAPPING, provenance_for
from app.briefing.exports import speaker_notes
from app.briefing.findings import coverage_finding
from app.intake.ingest import import_roster
from app.store import Store


def unmapped_roster(tmp_path: Path) -> Store:
    store = Store(f"sqlite:///{tmp_path / 'unmapped.db'}")
    report = import_roster(store, DEMO_CSV.read_bytes(), "roster.csv", name="No mapping yet")
    assert report.roster is not None and store.settings(report.roster.id).mapping_name is None
    return store


def test_provenance_without_a_mapping_says_no_mapping_chosen(tmp_path: Path) -> None:
    inp = load_input(unmapped_roster(tmp_path), 1, require_mapping=False)
    prov = provenance_for(inp, model="coverage count per fiscal year", interval_method="none")
    assert prov.mapping_version == 0 and prov.mapping_label == NO_MAPPING == "no mapping chosen"
    assert " \u00b7 no mapping chosen \u00b7 " in prov.short()
    assert "Mapping: none chosen (every reason code is unmapped, so nothing is counted)" in prov.lines()
    assert inp.mapping_words == "no mapping chosen"
    finding = coverage_finding(inp)
    notes = speaker_notes(finding, finding.takeaway)
    for text in (prov.short(), prov.text(), notes):
        assert "none v0" not in text and "mapping none" not in text and "mapping no mapping" not in text, text


def test_the_coverage_chart_and_pages_say_it_in_words(tmp_path: Path) -> None:
    client = make_client(unmapped_roster(tmp_path))
    html = client.get("/rosters/1/coverage").text
    figure = json.dumps(figure_handoff(html, "fig-coverage"))
    assert "no mapping chosen" in figure and "none v0" not in figure
    assert "No mapping chosen yet." in html and "mapping no mapping" not in html
    for page in ("", "/trend", "/resampling", "/briefing", "/departures"):
        text = client.get(f"/rosters/1{page}").text
        assert "none v0" not in text and "mapping no mapping" not in text and "Mapping no mapping" not in text, page


def test_a_chosen_mapping_is_still_named_with_its_version(tmp_path: Path) -> None:
    store = unmapped_roster(tmp_path)
    store.save_mapping_version("plain", {"Retired": "voluntary", "Dismissed by board": "forced"}, author="test")
    store.update_settings(1, mapping_name="plain")
    prov = provenance_for(load_input(store, 1), model="coverage count per fiscal year", interval_method="none")
    assert prov.mapping_label == "mapping plain v1" and " \u00b7 mapping plain v1 \u00b7 " in prov.short()
    assert "Mapping: plain, version 1" in prov.lines()
