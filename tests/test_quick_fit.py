"""The quick fit path (app.analysis.quick_fit over app.store.quick) prints what the ordinary path prints.

The reference is the ordinary path itself: ``load_input`` + ``stored_summary`` / ``fit_summary`` through
SQLAlchemy and pandas (whose fits are checked against statsmodels and published values elsewhere), and
pandas' own CSV writer for the fingerprint. Every key is compared, on the demo roster and on a roster
built by the demo generator with another seed.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from conftest import DEMO_DIR, _load_generator, copy_database

from app.analysis.cellstore import groups_from_counts
from app.analysis.inputs import load_input
from app.analysis.quick_fit import groups_csv_fingerprint, quick_summary
from app.analysis.runs import fit_summary
from app.analysis.stored_fits import stored_summary
from app.jsonable import jsonable
from app.stats.cells import groups_fingerprint
from app.store import HEAD_REVISION, MAX_ID, Store
from app.store.quick import MAX_ID as QUICK_MAX_ID
from app.store.quick import head_revision, open_quick
from app.types import ClassificationRule

ROOT = Path(__file__).resolve().parents[1]
DEMO = "Demo index (invented)"

#: (roster options, fit options): the default straight trend, a given window, the spline, quasi, another mapping
CASES: list[dict[str, Any]] = [
    {},
    {"window": (1998, 2015)},
    {"window": (1900, 2010)},  # clipped to the roster's first year, as load_input does
    {"model": "spline", "spline_df": 4},
    {"quasi": True},
    {"mapping": "demo strict"},
    {"mapping": "demo standard:1", "model": "spline"},
]


def _ordinary(store: Store, roster: str, case: dict[str, Any], *, reuse: bool) -> dict[str, Any]:
    inp = load_input(store, roster, mapping=case.get("mapping"), window=case.get("window"))
    opts = {k: case[k] for k in ("model", "spline_df", "quasi") if k in case}
    if reuse:
        stored = stored_summary(store, inp, **opts)
        assert stored is not None
        return dict(jsonable(stored))
    return dict(jsonable(fit_summary(store, inp, reuse=False, **opts)))


def _check_every_case(db: Path, roster: str) -> None:
    url = f"sqlite:///{db}"
    store = Store(url)
    try:
        for case in CASES:
            assert quick_summary(url, roster, **case) is None  # nothing recorded yet: the ordinary path fits
            fitted = _ordinary(store, roster, case, reuse=False)
            quick = quick_summary(url, roster, **case)
            assert quick is not None, case
            assert quick == _ordinary(store, roster, case, reuse=True), case
            assert list(quick) == list(fitted), case  # same keys in the same order (the printed JSON)
            assert json.dumps(quick) == json.dumps(fitted), case  # byte for byte: numbers, sentences, run id
    finally:
        store.dispose()


def test_quick_path_prints_the_recorded_fit_on_the_demo(shared_demo_db: Path, tmp_path: Path) -> None:
    _check_every_case(copy_database(shared_demo_db, tmp_path / "demo.db"), DEMO)


def generated_roster_db(tmp_path: Path) -> tuple[Path, str]:
    """Another seed of the generator, with a mapping that leaves codes out; the store and the roster's id."""
    from app.analysis.mapping_files import import_mapping_file
    from app.intake.ingest import import_roster

    frame = _load_generator().generate_roster(5)
    db = tmp_path / "built.db"
    store = Store(f"sqlite:///{db}")
    report = import_roster(store, frame.to_csv(index=False).encode(), "built.csv", name="Built (invented)")
    standard = (DEMO_DIR / "mapping-standard.csv").read_bytes()
    import_mapping_file(store, standard, roster=report.roster.id, name="demo standard")
    partial = b"\n".join(standard.splitlines()[:-3])  # the last codes stay unmapped
    import_mapping_file(store, partial, roster=report.roster.id, name="demo strict")
    store.update_settings(report.roster.id, mapping_name="demo standard")
    inp = load_input(store, report.roster.id, mapping="demo strict")
    assert inp.warnings(), "the partial mapping must leave codes unmapped for this test to check the warning"
    store.dispose()
    return db, str(report.roster.id)


def test_quick_path_on_a_generated_roster_with_unmapped_codes(tmp_path: Path) -> None:
    """Another seed of the generator, a mapping that leaves codes out (the warning must match), by id."""
    _check_every_case(*generated_roster_db(tmp_path))


def test_fingerprint_equals_pandas_csv(shared_demo_db: Path, tmp_path: Path) -> None:
    store = Store(f"sqlite:///{copy_database(shared_demo_db, tmp_path / 'demo.db')}")
    inp = load_input(store, DEMO)
    groups = groups_from_counts(inp.counts, inp.window)
    rows = [(int(y), str(s), int(f), int(v)) for y, s, f, v in groups.itertuples(index=False)]
    assert groups_csv_fingerprint(rows) == groups_fingerprint(groups)
    # awkward text (commas, quotes, line breaks) is quoted as pandas quotes it
    odd = pd.DataFrame({"year": [2001, 2002], "sector": ['a, "b"', "c\nd"], "forced": [1, 2], "voluntary": [3, 4]})
    assert groups_csv_fingerprint(list(odd.itertuples(index=False))) == groups_fingerprint(odd)
    store.dispose()


def test_quick_path_stands_aside(shared_demo_db: Path, tmp_path: Path) -> None:
    """Where it cannot be sure, it returns None and the ordinary path answers (and says what is wrong)."""
    db = copy_database(shared_demo_db, tmp_path / "demo.db")
    url = f"sqlite:///{db}"
    store = Store(url)
    fit_summary(store, load_input(store, DEMO), reuse=False)
    assert quick_summary(url, DEMO) is not None
    assert quick_summary(url, "no such roster") is None
    assert quick_summary(url, DEMO, mapping="no such mapping") is None
    assert quick_summary(url, DEMO, window=(1700, 1800)) is None
    assert quick_summary(url, DEMO, model="sector") is None
    assert quick_summary("postgresql+psycopg://nobody@127.0.0.1:1/none", DEMO) is None
    assert quick_summary(f"sqlite:///{tmp_path / 'missing.db'}", DEMO) is None
    # a mapping version with classification rules reads the detailed cells: the ordinary path
    chosen = load_input(store, DEMO).mapping
    assert chosen is not None
    store.save_mapping_version(chosen.name, chosen.categories,
                               rules=(ClassificationRule("Retired", "age", "below", 60, "forced"),))
    assert quick_summary(url, DEMO) is None
    store.dispose()
    # a store at another revision than the files' head
    conn = __import__("sqlite3").connect(db)
    conn.execute("UPDATE alembic_version SET version_num = '0001'")
    conn.commit()
    conn.close()
    assert open_quick(url) is None


def test_quick_path_stands_aside_for_case_overrides(shared_demo_db: Path, tmp_path: Path) -> None:
    """A case override moves one departure between categories, which only the ordinary path applies: with one
    on the mapping version, a fit recorded by the ordinary path is not printed again by the quick path (its
    plain cells would give other counts)."""
    from app.analysis.overrides import add_override

    db = copy_database(shared_demo_db, tmp_path / "demo.db")
    url = f"sqlite:///{db}"
    store = Store(url)
    inp = load_input(store, DEMO)
    assert inp.mapping is not None
    voluntary = {code for code, category in inp.mapping.categories.items() if category == "voluntary"}
    record = store.departures(inp.roster.id)
    departure_id = int(record.loc[record["reason"].isin(voluntary) & record["year"].between(*inp.window),
                                  "id"].iloc[0])
    add_override(store, inp.roster, inp.mapping, departure_id, "forced", "board statement of 3 May")
    overridden = fit_summary(store, load_input(store, DEMO), reuse=False)
    plain = fit_summary(store, load_input(store, DEMO, mapping=f"{inp.mapping.name}:{inp.mapping.version}"),
                        reuse=False)
    assert overridden["forced"] == plain["forced"] + 1  # counted by hand: one voluntary departure now forced
    assert quick_summary(url, DEMO) is None
    reader = open_quick(url)
    assert reader is not None
    try:  # the reason it stands aside, before any run is matched (an override not applied to this roster
        # version leaves the plain counts, whose recorded fit would otherwise be printed without its warning)
        found = [reader.mapping(inp.mapping.name, v) for v in (inp.mapping.version, inp.mapping.version + 1)]
        assert [m.has_overrides for m in found if m is not None] == [False, True]
    finally:
        reader.close()
    store.dispose()


def test_head_revision_and_limits_agree_with_the_store() -> None:
    assert head_revision() == HEAD_REVISION
    assert QUICK_MAX_ID == MAX_ID


def test_cli_fits_load_neither_pandas_nor_sqlalchemy(shared_demo_db: Path, tmp_path: Path) -> None:
    """``helmshift fit --json`` twice: the first fits the new counts and records the run, the second prints
    it again byte for byte, and neither interpreter loads numpy, pandas, SQLAlchemy, scipy or statsmodels
    (issue 13: under 0.5 s). The first prints what the ordinary path prints on another copy of the store."""
    db = copy_database(shared_demo_db, tmp_path / "cli.db")
    program = ("import json, sys\nfrom app.cli import main\ntry:\n    code = main(sys.argv[2:])\nfinally:\n"
               "    open(sys.argv[1], 'w').write(json.dumps(sorted(sys.modules)))\nsys.exit(code)\n")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    outputs, loaded = [], []
    for i in range(2):
        listing = tmp_path / f"modules-{i}.json"
        done = subprocess.run([sys.executable, "-c", program, str(listing), "fit", "--roster", DEMO, "--db", str(db),
                               "--json"], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120,
                              check=False)
        assert done.returncode == 0, done.stderr
        outputs.append(done.stdout)
        loaded.append(set(json.loads(listing.read_text())))
    heavy = ("numpy", "pandas", "sqlalchemy", "scipy", "statsmodels", "alembic")
    for modules in loaded:
        assert "app.analysis.quick_fit" in modules
        assert sorted(m for m in modules if m.split(".")[0] in heavy) == []
    assert "app.stats.trend_line" in loaded[0] and "app.stats.trend_line" not in loaded[1]  # fitted, then served
    assert outputs[1] == outputs[0]
    other = Store(f"sqlite:///{copy_database(shared_demo_db, tmp_path / 'ordinary.db')}")
    try:
        assert outputs[0] == json.dumps(_ordinary(other, DEMO, {}, reuse=False)) + "\n"
    finally:
        other.dispose()


@pytest.mark.parametrize("text", [False, True])
def test_cli_quick_and_ordinary_print_the_same(shared_demo_db: Path, tmp_path: Path, text: bool,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    from app.cli import main

    db = copy_database(shared_demo_db, tmp_path / "cli.db")
    argv = ["fit", "--roster", DEMO, "--db", str(db), "--years", "1999-2016", *([] if text else ["--json"])]
    assert main(argv) == 0
    first = capsys.readouterr().out
    assert quick_summary(f"sqlite:///{db}", DEMO, window=(1999, 2016)) is not None  # the second takes the quick path
    assert main(argv) == 0
    assert capsys.readouterr().out == first


def test_a_fit_the_trend_page_recorded_is_served(shared_demo_db: Path, tmp_path: Path) -> None:
    """An analyst who opened Trend has recorded the default fit: the next ``helmshift fit`` is the quick one,
    printing what the ordinary path prints for that run."""
    from app.web.trend import trend_data

    db = copy_database(shared_demo_db, tmp_path / "demo.db")
    url = f"sqlite:///{db}"
    store = Store(url)
    roster = store.get_roster(DEMO)
    assert quick_summary(url, DEMO) is None
    trend_data(store, roster.id)
    quick = quick_summary(url, DEMO)
    assert quick is not None
    assert quick == _ordinary(store, DEMO, {}, reuse=True)
    store.dispose()
