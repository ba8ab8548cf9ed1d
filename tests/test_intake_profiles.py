"""Intake profiles (issue 14): roles, header row, date reading and fiscal-year end saved under a name, proposed
when a later file has the same header set, and applied by ``helmshift import --profile``.

The files are invented here. Expected fiscal years are worked by hand from the stated convention (a fiscal year
is named by the calendar year in which it ends; common practice, issue 14's own example).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from app.cli import main
from app.intake.profiles import proposed_profiles, resolve_options
from app.store import Store, StoreError

ROLES = {"firm_id": "Ref", "reason": "Why", "date": "Exit"}


def awkward_file(path: Path, rows: list[tuple[str, str, str]], order: tuple[str, ...] = ("Ref", "Why", "Exit",
                                                                                           "Remarks")) -> Path:
    """A title block above the header (header on line 4) and columns named in a desk's own words."""
    lines = ["Exits register,,,", "Generated on 2026-01-05,,,", ",,,", ",".join(order)]
    for ref, why, exit_ in rows:
        cell = {"Ref": ref, "Why": why, "Exit": exit_, "Remarks": "n/a"}
        lines.append(",".join(cell[h] for h in order))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, Any, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, json.loads(out) if code == 0 else out, err


def test_store_saves_replaces_and_matches_by_header_set(store: Store) -> None:
    saved = store.save_profile("desk A", headers=["Ref", "Why", "Exit", " Remarks "], roles=ROLES, header_row=4,
                               date_order="mdy", fy_end=3)
    assert (saved.headers, saved.roles, saved.header_row, saved.date_order, saved.fy_end) == (
        ("Exit", "Ref", "Remarks", "Why"), ROLES, 4, "mdy", 3)
    assert [p.name for p in store.profiles_for_headers(["Remarks", "Exit", "Why", "Ref"])] == ["desk A"]
    assert store.profiles_for_headers(["Ref", "Why", "Exit"]) == []  # a column fewer: another source
    again = store.save_profile("desk A", headers=["Ref", "Why", "Exit", "Remarks"], roles=ROLES, header_row=None,
                               date_order="auto", fy_end=12)
    assert again.id == saved.id and (again.header_row, again.fy_end) == (None, 12)
    assert [p.name for p in store.list_profiles()] == ["desk A"]
    with pytest.raises(StoreError, match=r"No intake profile is named 'other'; saved profiles: desk A"):
        store.get_profile("other")
    with pytest.raises(StoreError, match="'Nowhere'.*not among the file's headers"):
        store.save_profile("bad", headers=["Ref"], roles={"firm_id": "Nowhere"}, header_row=None,
                           date_order="auto", fy_end=12)
    assert [p.name for p in store.list_profiles()] == ["desk A"]  # nothing half-written


def test_explicit_choices_win_over_the_profile(store: Store) -> None:
    profile = store.save_profile("desk A", headers=["Ref", "Why", "Exit"], roles=ROLES, header_row=4,
                                 date_order="mdy", fy_end=3)
    assert resolve_options(profile, roles=None, header_row=None, date_order=None, fy_end=None) == {
        "roles": ROLES, "header_row": 4, "date_order": "mdy", "fy_end": 3}
    assert resolve_options(profile, roles={"firm_id": "Why", "reason": "Ref"}, header_row=2, date_order="dmy",
                           fy_end=6) == {"roles": {"firm_id": "Why", "reason": "Ref"}, "header_row": 2,
                                         "date_order": "dmy", "fy_end": 6}
    assert resolve_options(None, roles=None, header_row=None, date_order=None, fy_end=None) == {
        "roles": None, "header_row": None, "date_order": "auto", "fy_end": 12}
    assert [p.name for p in proposed_profiles(store, ["Why", "Exit", "Ref"])] == ["desk A"]


def test_cli_saves_a_profile_then_reads_the_next_file_with_it(capsys: pytest.CaptureFixture[str],
                                                               tmp_path: Path) -> None:
    db = str(tmp_path / "p.db")
    first = awkward_file(tmp_path / "week1.csv", [("F1", "Retired", "04/03/2020"), ("F2", "Dismissed", "01/02/2019")])
    code, payload, err = run(capsys, "import", str(first), "--db", db, "--json", "--header-row", "4",
                             "--column", "firm_id=Ref", "--column", "reason=Why", "--column", "date=Exit",
                             "--date-order", "mdy", "--fiscal-year-end", "3", "--save-profile", "desk A")
    assert code == 0, err
    assert payload["profile_saved"] == "desk A" and payload["header_row"] == 4
    used = payload["columns"]
    assert used == ROLES | {"notes": "Remarks"}  # the roles given, and the one found by its header word
    store = Store(f"sqlite:///{db}")
    saved = store.get_profile("desk A")
    assert (saved.roles, saved.header_row, saved.date_order, saved.fy_end) == (used, 4, "mdy", 3)
    # next week's file: the same headers in another order; nothing but the profile says how to read it
    second = awkward_file(tmp_path / "week2.csv", [("F3", "Retired", "04/03/2020"), ("F4", "Ousted", "02/01/2021")],
                          order=("Exit", "Remarks", "Why", "Ref"))
    code, payload, err = run(capsys, "import", str(second), "--db", db, "--json", "--dry-run")
    assert code == 0, err
    assert payload["profiles_proposed"] == ["desk A"]  # proposed, not applied, without --profile
    code, payload, err = run(capsys, "import", str(second), "--db", db, "--json", "--profile", "desk A")
    assert code == 0, err
    assert (payload["profile"], payload["header_row"], payload["columns"]) == ("desk A", 4, used)
    assert (payload["accepted"], payload["rejected"]) == (2, 0)
    years = dict(zip(*(store.departures(payload["id"])[c] for c in ("firm_id", "year")), strict=True))
    # month/day/year with fiscal years ending in March: 2020-04-03 falls in FY2021, 2021-02-01 in FY2021
    assert years == {"F3": 2021, "F4": 2021}
    store.dispose()


def test_cli_unknown_profile_is_one_clear_sentence(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    path = awkward_file(tmp_path / "x.csv", [("F1", "Retired", "04/03/2020")])
    code, _, err = run(capsys, "import", str(path), "--db", str(tmp_path / "none.db"), "--profile", "nope")
    assert code != 0 and "does not exist" in err and not (tmp_path / "none.db").exists()
    store = Store(f"sqlite:///{tmp_path / 'q.db'}")
    code, _, err = run(capsys, "import", str(path), "--db", str(tmp_path / "q.db"), "--profile", "nope")
    assert code != 0 and "No intake profile is named 'nope'; none is saved yet." in err
    assert store.list_rosters() == []  # nothing stored
    store.dispose()


def test_dry_run_creates_no_database(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    path = awkward_file(tmp_path / "x.csv", [("F1", "Retired", "04/03/2020")])
    code, payload, err = run(capsys, "import", str(path), "--db", str(tmp_path / "none.db"), "--json", "--dry-run",
                             "--column", "firm_id=Ref", "--column", "reason=Why", "--column", "date=Exit")
    assert code == 0, err
    assert (payload["accepted"], payload["profiles_proposed"], payload["profile"]) == (1, [], None)
    assert not (tmp_path / "none.db").exists()
