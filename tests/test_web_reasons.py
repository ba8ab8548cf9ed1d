"""Reason codes page: suggestions, saving versions, comparing them, mapping CSV import and export."""

from __future__ import annotations

import io
from typing import Any

import pandas as pd
import pytest
from conftest import DEMO_CSV, DEMO_DIR, read_mapping

from app.intake.ingest import import_roster
from app.store import Store
from tests.test_reasons import SUGGESTION_DIFFERS_FROM_DEMO

ROSTER = 1
WINDOW = (1998, 2022)  # demo_data/README.md: full coverage


def form_for(page: Any, categories: dict[str, str]) -> dict[str, str]:
    """The Reason codes form as the browser posts it: code-i, cat-i and label-i per row."""
    data: dict[str, str] = {}
    for i, row in enumerate(page.codes, start=1):
        data[f"code-{i}"] = row.code
        data[f"cat-{i}"] = categories.get(row.code, "")
        data[f"label-{i}"] = row.label
    return data


def test_suggestions_when_no_mapping_is_chosen(empty_client: Any, store: Store,
                                               demo_truth: dict[str, Any]) -> None:
    roster_id = import_roster(store, DEMO_CSV.read_bytes(), "roster.csv").roster.id
    response = empty_client.get(f"/rosters/{roster_id}/reasons")
    assert response.status_code == 200
    assert response.template.name == "reasons.html"
    page = response.context["page"]
    assert page.using_suggestion and page.mapping is None and page.history == []
    assert "a <strong>suggestion</strong>" in response.text
    by_code = {r.code: r for r in page.codes}
    # common practice (demo_data/README.md's generator categories): the unambiguous codes
    # (death and illness: the suggestion leaves them out where the generator counts them voluntary; see
    # tests/test_reasons.py SUGGESTION_DIFFERS_FROM_DEMO)
    for code, category in (demo_truth["code_categories"] | SUGGESTION_DIFFERS_FROM_DEMO).items():
        if code not in demo_truth["ambiguous_codes"]:
            assert by_code[code].suggested == category, code
            assert by_code[code].category == category, code
    assert by_code["Merger - role eliminated"].ambiguous


def test_saving_creates_versions_and_compare_shows_the_moved_code(client: Any, demo_store: Store) -> None:
    standard = read_mapping("mapping-standard.csv")
    page = client.get(f"/rosters/{ROSTER}/reasons").context["page"]
    assert page.mapping.name == "demo standard" and page.mapping.version == 1
    saved = client.post(f"/rosters/{ROSTER}/reasons",
                        data=form_for(page, standard) | {"mapping_name": "desk view", "note": "first"},
                        follow_redirects=False)
    assert saved.status_code == 303 and "saved=1" in saved.headers["location"]
    assert [v for v, *_ in demo_store.mapping_history("desk view")] == [1]
    page = client.get(f"/rosters/{ROSTER}/reasons?saved=1").context["page"]
    assert page.mapping.name == "desk view" and page.message == "Saved as a new version."
    moved = standard | {"Retired": "excluded"}
    client.post(f"/rosters/{ROSTER}/reasons", data=form_for(page, moved) | {"mapping_name": "desk view"})
    assert [v for v, *_ in demo_store.mapping_history("desk view")] == [1, 2]
    assert demo_store.get_mapping("desk view").categories["Retired"] == "excluded"
    compare = client.get(f"/rosters/{ROSTER}/reasons?a=1&b=2")
    page = compare.context["page"]
    assert page.compare == (1, 2)
    assert list(page.diff.moved) == [("Retired", "voluntary", "excluded")]
    assert "moved <strong>Retired</strong> from voluntary to excluded" in compare.text
    api = client.get(f"/api/rosters/{ROSTER}/reasons?a=1&b=2").json()
    assert api["diff"]["moved"] == [["Retired", "voluntary", "excluded"]]


def test_a_label_typed_over_two_lines_is_saved_as_one(client: Any, demo_store: Store) -> None:
    # the label box wraps (a long label reads in full), so Enter can put a line break in it; a label is one line
    # (the mapping CSV holds one a row): the break and the spaces around it become one space
    standard = read_mapping("mapping-standard.csv")
    page = client.get(f"/rosters/{ROSTER}/reasons").context["page"]
    data = form_for(page, standard)
    merger = next(k for k, v in data.items() if k.startswith("code-") and v == "Merger - role eliminated")
    data["label-" + merger.removeprefix("code-")] = "Role ended by merger \r\n (judgement call)\n"
    assert client.post(f"/rosters/{ROSTER}/reasons", data=data | {"note": "labels"},
                       follow_redirects=False).status_code == 303
    assert demo_store.get_mapping("demo standard").labels["Merger - role eliminated"] == \
        "Role ended by merger (judgement call)"
    html = client.get(f"/rosters/{ROSTER}/reasons").text
    assert ">Role ended by merger (judgement call)</textarea>" in html


def test_unknown_category_in_the_form_is_refused(client: Any, demo_store: Store) -> None:
    page = client.get(f"/rosters/{ROSTER}/reasons").context["page"]
    before = demo_store.counts()
    response = client.post(f"/rosters/{ROSTER}/reasons", data=form_for(page, {"Retired": "gone"}))
    assert response.status_code == 400 and "forced, voluntary, excluded" in response.context["page"]["message"]
    assert demo_store.counts() == before


def test_mapping_import_with_unknown_category_names_the_line_and_saves_nothing(client: Any,
                                                                              demo_store: Store) -> None:
    before = demo_store.counts()
    data = b"code,category\nRetired,voluntary\nDismissed by board,sacked\n"
    response = client.post(f"/rosters/{ROSTER}/mapping/import", data={"mapping_name": "bad one"},
                           files={"file": ("bad.csv", data, "text/csv")})
    assert response.status_code == 400
    assert response.template.name == "reasons.html"
    message = response.context["page"].error  # shown as an error, not a success notice (issue 11)
    assert "Line 3" in message and "sacked" in message
    assert response.context["page"].message is None
    assert demo_store.counts() == before
    assert "bad one" not in dict(demo_store.list_mappings())


def test_mapping_import_keeps_and_reports_codes_not_in_the_roster(client: Any, demo_store: Store) -> None:
    text = (DEMO_DIR / "mapping-strict.csv").read_text() + "Abducted by aliens,forced,not in this roster\n"
    response = client.post(f"/rosters/{ROSTER}/mapping/import", data={"mapping_name": "strict plus"},
                           files={"file": ("m.csv", text.encode(), "text/csv")})
    assert response.status_code == 200
    page = response.context["page"]
    assert "1 code(s) do not occur in this roster" in page.message
    assert page.mapping.name == "strict plus"
    assert demo_store.get_mapping("strict plus").categories["Abducted by aliens"] == "forced"
    assert demo_store.settings(ROSTER).mapping_name == "strict plus"


def test_mapping_export_round_trips(client: Any, demo_store: Store) -> None:
    response = client.get("/mappings/demo standard.csv")
    assert response.status_code == 200 and response.headers["content-type"].startswith("text/csv")
    exported = pd.read_csv(io.StringIO(response.text), dtype=str, keep_default_na=False)
    shipped = pd.read_csv(DEMO_DIR / "mapping-standard.csv", dtype=str, keep_default_na=False)
    key = ["code", "category", "label"]
    assert exported.sort_values("code")[key].values.tolist() == shipped.sort_values("code")[key].values.tolist()
    client.post(f"/rosters/{ROSTER}/mapping/import", data={"mapping_name": "round trip"},
                files={"file": ("rt.csv", response.content, "text/csv")})
    again = demo_store.get_mapping("round trip")
    original = demo_store.get_mapping("demo standard")
    assert (again.categories, again.labels) == (original.categories, original.labels)
    assert client.get("/mappings/no such mapping.csv").status_code == 404


@pytest.mark.parametrize("code", ["Health reasons"])
def test_unmapped_codes_warn_and_are_left_out_of_the_fit(client: Any, demo_store: Store,
                                                         demo_clean: pd.DataFrame, code: str) -> None:
    full = client.get(f"/api/rosters/{ROSTER}/trend").json()["fit"]
    without = {c: k for c, k in read_mapping("mapping-standard.csv").items() if c != code}
    demo_store.save_mapping_version("demo standard", without, note="dropped one code")
    coverage = client.get(f"/rosters/{ROSTER}/coverage").context["page"]
    assert len(coverage.warnings) == 1 and "1 reason code(s)" in coverage.warnings[0]
    trend = client.get(f"/rosters/{ROSTER}/trend")
    assert trend.context["page"].warnings == coverage.warnings
    assert coverage.warnings[0] in trend.text
    # pandas on demo_data/roster.csv: departures with that code inside the window
    in_window = int(((demo_clean["Exit Reason"] == code) & demo_clean["year"].between(*WINDOW)).sum())
    assert in_window > 0
    assert f"covering {in_window} departure(s)" in coverage.warnings[0]
    fit = trend.context["page"].fit
    assert fit["departures"] == full["departures"] - in_window
    assert fit["forced"] == full["forced"]
    reasons = client.get(f"/rosters/{ROSTER}/reasons").context["page"]
    assert reasons.unmapped_codes == 1
    assert [r.code for r in reasons.codes if r.category is None] == [code]


def _spelled_roster() -> tuple[bytes, list[str]]:
    """An invented roster whose codes come in several spellings (issue 14), and the reason cells as written."""
    spellings = (["Retired"] * 5 + ["RETIRED"] * 3 + ["retired "] * 2 + ["Dismissed by board"] * 4
                 + ["dismissed  by board"] * 1 + ["Health"] * 2)
    lines = ["firm_id,fiscal_year,reason"]
    lines += [f"F{i:03d},{2000 + i % 15},{code}" for i, code in enumerate(spellings)]
    return ("\n".join(lines) + "\n").encode(), spellings


def test_each_code_lists_its_spellings_with_counts(empty_client: Any, store: Store) -> None:
    data, spellings = _spelled_roster()
    roster_id = import_roster(store, data, "spelled.csv").roster.id
    response = empty_client.get(f"/rosters/{roster_id}/reasons")
    assert response.status_code == 200
    by_code = {r.code: r for r in response.context["page"].codes}
    # expected counts straight from the cells written above (collections-free: list.count per spelling)
    assert set(by_code) == {"Retired", "Dismissed by board", "Health"}
    assert by_code["Retired"].count == 10
    assert dict(by_code["Retired"].variants) == {s: spellings.count(s) for s in ("Retired", "RETIRED", "retired ")}
    assert [n for _, n in by_code["Retired"].variants] == [5, 3, 2]  # most frequent first
    assert dict(by_code["Dismissed by board"].variants) == {"Dismissed by board": 4, "dismissed  by board": 1}
    assert by_code["Health"].variants == ()  # one spelling: nothing to expand
    html = response.text
    assert html.count("<details class=\"spellings\"") == 2
    assert "3 spellings" in html and "RETIRED" in html and "\u201cretired \u201d" in html
    api = empty_client.get(f"/api/rosters/{roster_id}/reasons").json()
    retired = next(c for c in api["codes"] if c["code"] == "Retired")
    assert retired["variants"] == [["Retired", 5], ["RETIRED", 3], ["retired ", 2]]


def test_a_mapping_in_other_spellings_covers_the_codes_and_saving_keeps_one_entry(empty_client: Any,
                                                                                  store: Store) -> None:
    data, _ = _spelled_roster()
    roster_id = import_roster(store, data, "spelled.csv").roster.id
    mapping = b"code,category,label\nretired,voluntary,Retirement\nDISMISSED BY BOARD,forced,\nhealth ,voluntary,\n"
    response = empty_client.post(f"/rosters/{roster_id}/mapping/import", data={"mapping_name": "desk"},
                                 files={"file": ("m.csv", mapping, "text/csv")})
    assert response.status_code == 200
    page = response.context["page"]
    assert "do not occur in this roster" not in page.message
    assert page.unmapped_codes == 0
    by_code = {r.code: r for r in page.codes}
    assert (by_code["Retired"].category, by_code["Retired"].label) == ("voluntary", "Retirement")
    assert by_code["Dismissed by board"].category == "forced"
    saved = empty_client.post(f"/rosters/{roster_id}/reasons",
                              data=form_for(page, {"Retired": "excluded", "Dismissed by board": "forced",
                                                   "Health": "voluntary"}) | {"mapping_name": "desk"})
    assert saved.status_code == 200  # followed the redirect
    latest = store.get_mapping("desk")
    assert latest.version == 2
    # one entry per code: the page's spelling replaced the file's, none carried over beside it
    assert latest.categories == {"Retired": "excluded", "Dismissed by board": "forced", "Health": "voluntary"}


def test_a_roster_with_hundreds_of_codes_saves_from_the_page(empty_client: Any) -> None:
    """Three fields per code (code, category, label): the form framework's default of 1,000 fields refused a
    save of more than ~330 codes with "Too many fields" (free-text reasons give rosters hundreds of codes)."""
    codes = [f"Reason {i:03d}" for i in range(450)]
    data = ("Firm ID,Fiscal Year,Reason\n" + "".join(f"F{i},{2000 + i % 20},{c}\n" for i, c in enumerate(codes))
            ).encode()
    created = empty_client.post("/api/rosters", files={"file": ("many.csv", data, "text/csv")}, data={"name": "many"})
    assert created.status_code == 201
    roster_id = created.json()["id"]
    form = {"mapping_name": "many codes", "based_on": "0"}
    for i, code in enumerate(codes):
        form |= {f"code-{i}": code, f"cat-{i}": "forced" if i % 2 else "voluntary", f"label-{i}": f"label {i}"}
    assert len(form) > 1_000
    saved = empty_client.post(f"/rosters/{roster_id}/reasons", data=form, follow_redirects=False)
    assert saved.status_code == 303, saved.text[saved.text.find("<main"):][:1500]
    listed = empty_client.get("/mappings/many codes.csv").text.splitlines()
    assert len(listed) == 1 + 450  # header + one line per code (counted above)
