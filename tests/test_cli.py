"""The command line, in-process through app.cli.main, against pandas counts of the demo files."""

from __future__ import annotations

import importlib.util
import json
import math
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from conftest import (
    DEMO_CSV,
    DEMO_DIR,
    Databases,
    read_mapping,
    statsmodels_trend,
    year_counts,
)

from app.cli import build_parser, main

ROSTER = "Demo index (invented)"
CHROMIUM = Path("/usr/bin/chromium")


@pytest.fixture
def db(shared_demo_url: str, databases: Databases) -> Iterator[str]:
    """``--db`` for a private copy of the demo store: a SQLite URL, or a PostgreSQL one with --backend."""
    url = databases.new(template=shared_demo_url)
    yield url
    databases.drop(url)


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, Any, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    payload = json.loads(out) if "--json" in argv and code == 0 else out
    return code, payload, err


def test_import_json(capsys: pytest.CaptureFixture[str], tmp_path: Path, demo_frame: pd.DataFrame,
                     demo_clean: pd.DataFrame) -> None:
    code, payload, err = run(capsys, "import", str(DEMO_CSV), "--db", str(tmp_path / "new.db"), "--name",
                             "Desk roster", "--json")
    assert code == 0 and err == ""
    assert {"roster", "rows", "accepted", "rejected", "duplicates"} <= set(payload)
    cols = [c for c in demo_frame.columns if c != "line"]
    duplicates = int(demo_frame.duplicated(subset=cols).sum())  # pandas; README: 10 duplicates, 4 rejected
    assert (payload["roster"], payload["rows"], payload["accepted"], payload["duplicates"]) == (
        "Desk roster", len(demo_frame), len(demo_clean), duplicates)
    assert payload["rejected"] == len(demo_frame) - duplicates - len(demo_clean) == 4
    code, _, err = run(capsys, "import", str(DEMO_CSV), "--db", str(tmp_path / "new.db"))
    assert code != 0 and "already imported" in err


@pytest.mark.parametrize("argv", [
    ["import", "/no/such/roster.csv"],
    ["import", str(DEMO_CSV), "--column", "boss=Executive"],
    ["import", str(DEMO_CSV), "--column", "reason=No Such Header"],
    ["fit", "--roster", "Nobody", "--json"],
    ["fit", "--roster", ROSTER, "--years", "2010-2000"],
    ["coverage", "--roster", ROSTER, "--mapping", "no such mapping"],
])
def test_errors_are_one_sentence_on_stderr(capsys: pytest.CaptureFixture[str], db: str, argv: list[str]) -> None:
    code, out, err = run(capsys, *argv, "--db", db)
    assert code != 0 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("helmshift: ") and lines[0].endswith(".")


def test_mapping_import_and_export(capsys: pytest.CaptureFixture[str], db: str, tmp_path: Path) -> None:
    code, payload, _ = run(capsys, "mapping", "import", str(DEMO_DIR / "mapping-strict.csv"), "--roster", ROSTER,
                           "--name", "desk strict", "--db", db, "--json")
    assert code == 0
    shipped = read_mapping("mapping-strict.csv")
    assert (payload["mapping"], payload["version"], payload["codes"]) == ("desk strict", 1, len(shipped))
    out_file = tmp_path / "out.csv"
    assert main(["mapping", "export", "--name", "desk strict", "--out", str(out_file), "--db", db]) == 0
    exported = pd.read_csv(out_file, dtype=str, keep_default_na=False)
    assert dict(zip(exported["code"], exported["category"], strict=True)) == shipped
    code, text, _ = run(capsys, "mapping", "export", "--name", "desk strict", "--version", "1", "--db", db)
    assert code == 0 and text.splitlines()[0] == "code,category,label"
    bad = tmp_path / "bad.csv"
    bad.write_text("code,category\nRetired,gone\n")
    code, _, err = run(capsys, "mapping", "import", str(bad), "--roster", ROSTER, "--name", "x", "--db", db)
    assert code != 0 and "Line 2" in err


def test_coverage_json(capsys: pytest.CaptureFixture[str], db: str, demo_truth: dict[str, Any],
                       demo_clean: pd.DataFrame) -> None:
    code, payload, _ = run(capsys, "coverage", "--roster", ROSTER, "--db", db, "--json")
    assert code == 0
    assert payload["suggested_window"] == list(demo_truth["full_coverage"])
    keys = {"year", "departures", "forced", "voluntary", "excluded", "unmapped"}
    assert all(set(y) >= keys for y in payload["years"])
    # pandas: the kept rows per year, but for the rows still in post (no exit date, "Still in post"), which are
    # no departure of any year and are counted apart
    in_post = (demo_clean["Exit Date"] == "") & (demo_clean["Exit Reason"] == "Still in post")
    per_year = demo_clean.loc[~in_post].groupby("year").size()
    assert {y["year"]: y["departures"] for y in payload["years"]} == per_year.to_dict()
    assert payload["still_in_post"] == int(in_post.sum()) == 132
    code, text, _ = run(capsys, "coverage", "--roster", ROSTER, "--db", db)
    assert code == 0 and "132 row(s) still in post, not departures" in text


def test_fit_json_and_by_sector(capsys: pytest.CaptureFixture[str], db: str, demo_clean: pd.DataFrame) -> None:
    code, payload, _ = run(capsys, "fit", "--roster", ROSTER, "--years", "2000-2020", "--db", db, "--json")
    assert code == 0
    assert {"odds_ratio", "conf_int", "window", "departures", "forced", "dispersion"} <= set(payload)
    assert set(payload["conf_int"]) >= {"wald", "profile"} and payload["window"] == [2000, 2020]
    counts = year_counts(demo_clean, read_mapping("mapping-standard.csv"), (2000, 2020))
    ref = statsmodels_trend(counts, (2000, 2020))  # statsmodels GLM on pandas counts
    assert math.log(payload["odds_ratio"]) == pytest.approx(float(ref.params[1]), rel=1e-8)
    assert payload["departures"] == int(counts["total"].sum())
    code, sectors, _ = run(capsys, "fit", "--roster", ROSTER, "--by", "sector", "--db", db, "--json")
    assert code == 0 and len(sectors["sectors"]) == 10
    assert set(sectors["heterogeneity"]) >= {"statistic", "df", "p"} and sectors["heterogeneity"]["p"] < 0.05
    code, text, _ = run(capsys, "fit", "--roster", ROSTER, "--db", db)
    assert code == 0 and "the fitted share of departures that were forced" in text and "odds ratio per year" in text


def test_bootstrap_json(capsys: pytest.CaptureFixture[str], db: str) -> None:
    code, payload, _ = run(capsys, "bootstrap", "--roster", ROSTER, "--resamples", "300", "--seed", "17",
                           "--unit", "departure", "--db", db, "--json")
    assert code == 0
    assert {"odds_ratio", "conf_int", "resamples", "failed", "unit", "seed", "seconds"} <= set(payload)
    assert set(payload["conf_int"]) >= {"percentile", "basic", "bca"}
    assert (payload["resamples"], payload["unit"], payload["seed"]) == (300, "departure", 17)
    lo, hi = payload["conf_int"]["bca"]
    assert lo < payload["odds_ratio"] < hi
    code, again, _ = run(capsys, "bootstrap", "--roster", ROSTER, "--resamples", "300", "--seed", "17",
                         "--unit", "departure", "--db", db, "--json")
    assert again["conf_int"] == payload["conf_int"]  # same seed, same numbers


def test_bootstrap_seed_defaults_to_the_one_the_page_offers(capsys: pytest.CaptureFixture[str], db: str) -> None:
    from app.analysis.run_params import default_seed
    from app.store import Store

    code, payload, err = run(capsys, "bootstrap", "--roster", ROSTER, "--resamples", "100", "--unit", "departure",
                           "--db", db, "--json")
    store = Store(db)
    try:
        offered = default_seed(store.get_roster(ROSTER))
    finally:
        store.dispose()
    assert code == 0, err
    assert payload["seed"] == offered != 20261201


def test_robustness_json(capsys: pytest.CaptureFixture[str], db: str) -> None:
    code, payload, _ = run(capsys, "robustness", "--roster", ROSTER, "--mapping", "demo standard",
                           "--mapping", "demo strict", "--vary", "Retired", "--db", db, "--json")
    assert code == 0
    assert {"window", "direction", "holds", "sentence", "variants"} <= set(payload)
    labels = [v["label"] for v in payload["variants"]]
    assert labels[0].startswith("demo standard v1")
    assert any(lbl.startswith("demo strict v1") for lbl in labels)
    assert "Retired as forced" in labels


def test_export_unknown_chart_is_a_clear_error(capsys: pytest.CaptureFixture[str], db: str, tmp_path: Path) -> None:
    code, _, err = run(capsys, "export", "--roster", ROSTER, "--format", "svg", "--chart", "pie",
                       "--out", str(tmp_path / "x.svg"), "--db", db)
    assert code != 0 and "chart must be one of" in err
    assert not (tmp_path / "x.svg").exists()


@pytest.mark.slow
@pytest.mark.skipif(not CHROMIUM.is_file(), reason="needs Debian's chromium at /usr/bin/chromium")
def test_export_svg(capsys: pytest.CaptureFixture[str], db: str, tmp_path: Path,
                    monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("HELMSHIFT_BROWSER", raising=False)
    monkeypatch.setenv("BROWSER_PATH", str(CHROMIUM))
    out = tmp_path / "charts" / "trend.svg"
    out.parent.mkdir()  # export refuses to create folders (issue 11)
    code, _, err = run(capsys, "export", "--roster", ROSTER, "--format", "svg", "--out", str(out), "--db", db)
    assert code == 0 and str(out) in err
    text = out.read_text()
    assert text.lstrip().startswith("<svg") and "Fiscal year" in text
    assert not out.with_name("trend.svg.part").exists()


def test_help_in_a_real_subprocess() -> None:
    exe = shutil.which("helmshift")
    assert exe, "the helmshift console script is installed by `pip install -e .`"
    done = subprocess.run([exe, "--help"], capture_output=True, text=True, timeout=60, check=False)
    assert done.returncode == 0
    for command in ("serve", "import", "mapping", "coverage", "fit", "bootstrap", "robustness", "export"):
        assert command in done.stdout
    assert set(build_parser()._subparsers._group_actions[0].choices) >= {"serve", "import", "fit"}  # type: ignore[union-attr]


# -- issue 11, point 6: every command-line error is one sentence ----------------------------------------
def one_sentence(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("helmshift: ") and lines[0].endswith("."), lines[0]
    assert "Traceback" not in err
    return lines[0]


def test_db_in_a_missing_folder(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    missing = tmp_path / "no-such-folder" / "x.db"
    code, _, err = run(capsys, "import", str(DEMO_CSV), "--db", str(missing))
    assert code != 0
    assert "folder" in one_sentence(err) and "does not exist" in err
    assert not missing.parent.exists()


def test_postgresql_url_without_its_driver(capsys: pytest.CaptureFixture[str]) -> None:
    # pg8000 is a PostgreSQL driver this project does not install (psycopg may be present in a shared venv)
    assert importlib.util.find_spec("pg8000") is None
    code, _, err = run(capsys, "coverage", "--roster", ROSTER, "--db",
                       "postgresql+pg8000://someone@127.0.0.1:1/helmshift")
    assert code != 0
    assert "driver" in one_sentence(err) and "not installed" in err


def test_database_that_cannot_be_reached_is_one_sentence(capsys: pytest.CaptureFixture[str]) -> None:
    if importlib.util.find_spec("psycopg2") is None and importlib.util.find_spec("psycopg") is None:
        pytest.skip("needs a PostgreSQL driver (psycopg or psycopg2) to get as far as connecting")
    code, _, err = run(capsys, "coverage", "--roster", ROSTER, "--db", "postgresql://someone@127.0.0.1:1/helmshift")
    assert code != 0
    assert "Could not open the database" in one_sentence(err)


@pytest.mark.parametrize("argv", [
    ["coverage", "--roster", ROSTER], ["fit", "--roster", ROSTER], ["bootstrap", "--roster", ROSTER],
    ["robustness", "--roster", ROSTER], ["mapping", "export", "--name", "demo strict"],
    ["export", "--roster", ROSTER, "--format", "svg", "--out", "x.svg"],
])
def test_read_only_commands_refuse_a_missing_database(capsys: pytest.CaptureFixture[str], tmp_path: Path,
                                                      argv: list[str]) -> None:
    typo = tmp_path / "cli-typo.db"
    code, _, err = run(capsys, *argv, "--db", str(typo))
    assert code != 0
    assert "does not exist" in one_sentence(err) and str(typo) in err
    assert not typo.exists(), "a mistyped --db must not create a new empty database"


@pytest.mark.parametrize("argv", [
    ["export", "--roster", ROSTER, "--format", "svg", "--chart", "trend"],
    ["mapping", "export", "--name", "demo strict"],
])
def test_out_into_a_missing_folder_is_refused(capsys: pytest.CaptureFixture[str], db: str, tmp_path: Path,
                                              argv: list[str]) -> None:
    out = tmp_path / "nowhere" / "file.out"
    code, _, err = run(capsys, *argv, "--out", str(out), "--db", db)
    assert code != 0
    assert "folder" in one_sentence(err) and "does not exist" in err
    assert not out.parent.exists()


def test_import_of_a_folder(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    code, _, err = run(capsys, "import", str(tmp_path), "--db", str(tmp_path / "x.db"))
    assert code != 0
    assert "is a folder" in one_sentence(err)


def test_serve_on_a_taken_port_is_one_sentence(tmp_path: Path) -> None:
    import socket
    import sys

    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        done = subprocess.run([sys.executable, "-m", "app.cli", "serve", "--db", str(tmp_path / "s.db"),
                               "--port", str(port)], capture_output=True, text=True, timeout=60, check=False,
                              cwd=tmp_path)
    assert done.returncode != 0
    line = one_sentence(done.stderr)
    assert f"port {port}" in line and "already using" in line
    assert "Helmshift" not in done.stderr, "the address was announced before the port was bound"
