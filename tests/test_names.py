"""Names an analyst types for a roster or a mapping: shown on every page, in exports and in the audit trail, so
one that is very long or carries control or direction-changing characters is refused with the rule, and nothing
is stored. A probe of a served instance (session 7) stored a 100,000-character roster name, a mapping named
with a NUL byte and a right-to-left override (U+202E, which reverses the text shown after it), both accepted.
"""

from __future__ import annotations

from typing import Any

import pytest

from app.analysis.mapping_files import import_mapping_file
from app.intake.ingest import RosterFileError, import_roster
from app.store import Store, StoreError
from app.store.records import NAME_MAX

ROSTER_CSV = b"Firm ID,Reason,Fiscal Year\nF1,Retired,2019\nF2,Dismissed,2020\n"
MAPPING_CSV = b"code,category\nRetired,voluntary\nDismissed,forced\n"

#: (name, what the refusal says); the limit is NAME_MAX characters, stated here by hand as 120
BAD_NAMES = [
    ("n" * 121, "121 characters"),
    ("n" * 100_000, "100,000 characters"),
    ("with\x00nul", "control or invisible character U+0000"),
    ("tab\there", "control or invisible character U+0009"),
    ("abc\u202edcba", "control or invisible character U+202E"),
    ("zero\u200bwidth", "control or invisible character U+200B"),
]
#: through the web a NUL is refused before the name is read (the form check: tests/test_nul_bytes.py)
WEB_BAD_NAMES = [(name, message) for name, message in BAD_NAMES if "\x00" not in name]
#: accents, other scripts, emoji and punctuation are names like any other
GOOD_NAMES = ["Indice des départs 2026", "名前 roster", "Desk ✓ (v2)", "n" * 120]


def test_the_limit_is_120() -> None:
    assert NAME_MAX == 120


@pytest.mark.parametrize(("name", "message"), BAD_NAMES)
def test_a_bad_roster_name_is_refused_before_anything_is_stored(store: Store, name: str, message: str) -> None:
    before = store.counts()
    with pytest.raises(RosterFileError, match="roster name") as caught:
        import_roster(store, ROSTER_CSV, "r.csv", name=name)
    assert message in str(caught.value)
    assert store.counts() == before


@pytest.mark.parametrize(("name", "message"), WEB_BAD_NAMES)
def test_a_bad_roster_name_is_a_400_through_the_api(client: Any, demo_store: Store, name: str,
                                                    message: str) -> None:
    before = demo_store.counts()
    r = client.post("/api/rosters", files={"file": ("r.csv", ROSTER_CSV)}, data={"name": name})
    assert r.status_code == 400, r.text[:300]
    assert "roster name" in r.json()["error"] and message in r.json()["error"]
    assert demo_store.counts() == before


@pytest.mark.parametrize("name", GOOD_NAMES)
def test_names_in_any_script_are_kept_as_typed(store: Store, name: str) -> None:
    report = import_roster(store, ROSTER_CSV, "r.csv", name=name)
    assert store.get_roster(report.roster.id).name == name
    saved = import_mapping_file(store, MAPPING_CSV, roster=report.roster.id, name=name)
    assert store.get_mapping(name).version == saved["version"] == 1


@pytest.mark.parametrize(("name", "message"), BAD_NAMES)
def test_a_bad_mapping_name_is_refused_before_anything_is_stored(demo_store: Store, name: str,
                                                                 message: str) -> None:
    before = demo_store.counts()
    with pytest.raises(StoreError, match="mapping name") as caught:
        import_mapping_file(demo_store, MAPPING_CSV, roster=1, name=name)
    assert message in str(caught.value)
    assert demo_store.counts() == before


@pytest.mark.parametrize(("name", "message"), WEB_BAD_NAMES[1:3])
def test_a_bad_mapping_name_is_a_400_on_the_reason_codes_page(client: Any, demo_store: Store, name: str,
                                                              message: str) -> None:
    before = (demo_store.counts(), demo_store.settings(1))
    r = client.post("/rosters/1/mapping/import", data={"mapping_name": name},
                    files={"file": ("m.csv", MAPPING_CSV)})
    assert r.status_code == 400
    assert "mapping name" in r.text and message in r.text
    assert (demo_store.counts(), demo_store.settings(1)) == before


@pytest.mark.parametrize(("name", "message"), BAD_NAMES)
def test_a_bad_new_mapping_name_is_refused_by_the_store_itself(demo_store: Store, name: str, message: str) -> None:
    """save_mapping_version is the one door every mapping save goes through (page, rules table, CLI)."""
    before = demo_store.counts()
    with pytest.raises(StoreError, match="mapping name") as caught:
        demo_store.save_mapping_version(name, {"Retired": "voluntary"})
    assert message in str(caught.value)
    assert demo_store.counts() == before


@pytest.mark.parametrize(("name", "message"), WEB_BAD_NAMES[1:3])
def test_a_bad_mapping_name_typed_on_the_save_form_is_a_400(client: Any, demo_store: Store, name: str,
                                                            message: str) -> None:
    before = (demo_store.counts(), demo_store.settings(1))
    r = client.post("/rosters/1/reasons", data={"mapping_name": name, "code-0": "Retired",
                                                "cat-0": "voluntary"})
    assert r.status_code == 400
    assert "mapping name" in r.text and message in r.text and "Nothing was saved" in r.text
    assert (demo_store.counts(), demo_store.settings(1)) == before


def test_a_save_without_any_code_is_refused(client: Any, demo_store: Store) -> None:
    """A bare POST (no code-N field) would have saved a version that unmaps every code of the roster (found by
    probing a served instance, session 7); the page's form always sends every code."""
    before = (demo_store.counts(), demo_store.settings(1))
    r = client.post("/rosters/1/reasons", data={"note": "nothing else"})
    assert r.status_code == 400
    assert "no reason codes" in r.text
    assert (demo_store.counts(), demo_store.settings(1)) == before


def test_an_existing_mapping_keeps_saving_under_its_name(demo_store: Store) -> None:
    """The rule binds new names: a mapping already stored stays editable (its next version saves)."""
    latest = demo_store.get_mapping("demo standard")
    assert latest is not None
    saved = demo_store.save_mapping_version("demo standard", dict(latest.categories), note="again")
    assert saved.version == latest.version + 1
