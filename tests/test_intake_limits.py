"""The import's size limits are settings (issue 14): HELMSHIFT_MAX_ROWS bounds the data rows of one file and
HELMSHIFT_UPLOAD_LIMIT its bytes, for uploads and ``helmshift import`` alike; a bad value is refused in a
sentence naming the variable. Values below are the ones each test sets."""

from __future__ import annotations

import pytest

from app.config import DEFAULT_MAX_ROWS, Settings
from app.intake.ingest import RosterFileError, import_roster
from app.intake.rawtable import ReadLimits
from app.store import Store


def test_defaults_allow_a_million_rows() -> None:
    assert DEFAULT_MAX_ROWS >= 1_000_000
    assert ReadLimits().max_data_rows == DEFAULT_MAX_ROWS


def test_the_environment_sets_both_limits(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("HELMSHIFT_MAX_ROWS", "3_000_000")
    monkeypatch.setenv("HELMSHIFT_UPLOAD_LIMIT", "209715200")
    limits = ReadLimits()
    assert (limits.max_data_rows, limits.max_bytes) == (3_000_000, 209_715_200)
    assert Settings.from_env("x.db").upload_limit == 209_715_200


@pytest.mark.parametrize("value", ["lots", "-5", "0", "1.5"])
def test_a_bad_setting_is_refused_by_name(monkeypatch: pytest.MonkeyPatch, value: str) -> None:
    monkeypatch.setenv("HELMSHIFT_MAX_ROWS", value)
    with pytest.raises(ValueError, match="HELMSHIFT_MAX_ROWS must be a whole number above 0"):
        ReadLimits()


def test_a_file_over_the_row_setting_is_refused_whole(monkeypatch: pytest.MonkeyPatch, store: Store) -> None:
    monkeypatch.setenv("HELMSHIFT_MAX_ROWS", "5")
    data = ("Firm,FY,Reason\n" + "".join(f"F{i},2010,Retired\n" for i in range(6))).encode()
    with pytest.raises(RosterFileError, match="more than 5 data rows"):
        import_roster(store, data, "six.csv", limits=ReadLimits())
    assert store.counts()["rosters"] == 0 and store.counts()["departures"] == 0
