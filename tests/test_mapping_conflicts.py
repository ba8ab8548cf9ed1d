"""Two analysts saving the same mapping at once: two versions, or a clear conflict; never a lost edit.

The Reason codes form carries the mapping and version it was filled from (``based_on_mapping``, ``based_on``);
saving it when a newer version exists answers 409 with a sentence, the analyst's own choices back in the form
and a link comparing the versions. Saves without that check (the command line, ``save_mapping_version``
without ``based_on``) from many connections at once get consecutive versions, none lost (on PostgreSQL the
mapping row is locked FOR UPDATE; SQLite serialises writers).
"""

from __future__ import annotations

import re
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import pytest
from conftest import DEMO_CSV

from app.intake.ingest import import_roster
from app.store import MappingConflict, Store

ROSTER = 1


def form_of(html: str) -> dict[str, str]:
    """The Reason codes form as a browser would send it: hidden fields, selected categories, labels."""
    form = dict(re.findall(r'<input type="hidden" name="([^"]+)" value="([^"]*)"', html))
    for name, body in re.findall(r'<select name="(cat-\d+)"[^>]*>(.*?)</select>', html, re.S):
        chosen = re.search(r'<option value="([^"]*)" selected', body)
        form[name] = chosen.group(1) if chosen else ""
    form.update(re.findall(r'<textarea class="label" name="(label-\d+)"[^>]*>([^<]*)</textarea>', html))
    return form


def code_index(form: dict[str, str], code: str) -> str:
    return next(k.removeprefix("code-") for k, v in form.items() if k.startswith("code-") and v == code)


def test_the_second_of_two_saves_of_one_version_is_a_409_that_keeps_the_edit(client: Any,
                                                                              demo_store: Store) -> None:
    name = demo_store.settings(ROSTER).mapping_name
    start = demo_store.get_mapping(name)
    html = client.get(f"/rosters/{ROSTER}/reasons").text
    first, second = form_of(html), form_of(html)  # two analysts open the page at the same version
    assert (first["based_on_mapping"], first["based_on"]) == (name, str(start.version))
    code_a, code_b = sorted(start.categories)[:2]
    first[f"cat-{code_index(first, code_a)}"] = "excluded"
    second[f"cat-{code_index(second, code_b)}"] = "excluded"
    second["note"] = "second analyst"

    saved = client.post(f"/rosters/{ROSTER}/reasons", data=first, follow_redirects=False)
    assert saved.status_code == 303
    refused = client.post(f"/rosters/{ROSTER}/reasons", data=second, follow_redirects=False)
    assert refused.status_code == 409
    assert (f"was saved as version {start.version + 1} by" in refused.text
            and "your changes were not saved" in refused.text)
    assert f'href="http://testserver/rosters/{ROSTER}/reasons?a={start.version}&amp;b={start.version + 1}"' in refused.text
    assert [v for v, *_ in demo_store.mapping_history(name)][-1] == start.version + 1  # nothing saved
    # the second analyst's choice is still in the form, now based on the newest version; the diff is shown
    again = form_of(refused.text)
    assert again[f"cat-{code_index(again, code_b)}"] == "excluded"
    assert again[f"cat-{code_index(again, code_a)}"] == start.categories[code_a]  # theirs, not the first's
    assert again["based_on"] == str(start.version + 1)
    assert refused.context["page"].diff is not None
    # saving again is now a deliberate decision, and it goes through
    again["note"] = "second analyst, after comparing"
    assert client.post(f"/rosters/{ROSTER}/reasons", data=again, follow_redirects=False).status_code == 303
    latest = demo_store.get_mapping(name)
    assert latest.version == start.version + 2 and latest.categories[code_b] == "excluded"


def test_a_script_gets_the_conflict_as_json_with_the_diff_link(client: Any, demo_store: Store) -> None:
    name = demo_store.settings(ROSTER).mapping_name
    version = demo_store.get_mapping(name).version
    demo_store.save_mapping_version(name, demo_store.get_mapping(name).categories, note="meanwhile")
    form = {"based_on_mapping": name, "based_on": str(version), "code-1": "Retired", "cat-1": "voluntary"}
    r = client.post(f"/rosters/{ROSTER}/reasons", data=form, headers={"accept": "application/json"},
                    follow_redirects=False)
    assert r.status_code == 409
    body = r.json()
    assert body["error"].startswith(f"Mapping {name!r} was saved as version {version + 1}")
    assert body["diff"].endswith(f"/rosters/{ROSTER}/reasons?a={version}&b={version + 1}")
    assert client.get(body["diff"]).status_code == 200
    # saved under another name it is a deliberate "save as": not checked
    form["mapping_name"] = "another mapping"
    assert client.post(f"/rosters/{ROSTER}/reasons", data=form, follow_redirects=False).status_code == 303
    bad = client.post(f"/rosters/{ROSTER}/reasons", data={**form, "mapping_name": name, "based_on": "v2"},
                      follow_redirects=False)
    assert bad.status_code == 400 and "based_on must be a mapping version number" in bad.text


def test_a_new_mapping_saved_twice_from_version_zero_conflicts_too(empty_client: Any, store: Store) -> None:
    roster = import_roster(store, DEMO_CSV.read_bytes(), "roster.csv").roster
    html = empty_client.get(f"/rosters/{roster.id}/reasons").text
    form = form_of(html)
    assert (form["based_on_mapping"], form["based_on"]) == (f"{roster.name} mapping", "0")
    assert empty_client.post(f"/rosters/{roster.id}/reasons", data=form, follow_redirects=False).status_code == 303
    assert empty_client.post(f"/rosters/{roster.id}/reasons", data=form, follow_redirects=False).status_code == 409


def _race(url: str, threads: int, save: Any) -> list[Any]:
    """``save(store)`` from ``threads`` threads on as many engines (as many server processes would have)."""
    stores = [Store(url) for _ in range(threads)]
    gate = threading.Barrier(threads)

    def one(store: Store) -> Any:
        gate.wait()
        try:
            return save(store)
        except MappingConflict as exc:
            return exc

    try:
        with ThreadPoolExecutor(threads) as pool:
            return list(pool.map(one, stores))
    finally:
        for s in stores:
            s.dispose()


@pytest.mark.parametrize("existing", [True, False], ids=["existing mapping", "new mapping"])
def test_simultaneous_saves_get_consecutive_versions(store: Store, existing: bool) -> None:
    if existing:
        store.save_mapping_version("desk", {"Retired": "voluntary"})
    first = 2 if existing else 1
    results = _race(store.url, 6, lambda s: s.save_mapping_version("desk", {"Retired": "forced"}).version)
    assert sorted(results) == list(range(first, first + 6))
    assert [v for v, *_ in store.mapping_history("desk")] == list(range(1, first + 6))


def test_simultaneous_saves_of_one_version_let_exactly_one_through(store: Store) -> None:
    store.save_mapping_version("desk", {"Retired": "voluntary"})
    results = _race(store.url, 6, lambda s: s.save_mapping_version("desk", {"Retired": "forced"}, based_on=1))
    saved = [r for r in results if not isinstance(r, MappingConflict)]
    conflicts = [r for r in results if isinstance(r, MappingConflict)]
    assert len(saved) == 1 and saved[0].version == 2 and len(conflicts) == 5
    assert {(c.based_on, c.latest) for c in conflicts} == {(1, 2)}
    assert [v for v, *_ in store.mapping_history("desk")] == [1, 2]
