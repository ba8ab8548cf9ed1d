"""``helmshift mapping import --rules``, ``mapping export --rules`` and ``fit --model adjusted``.

References: the adjusted fit is compared with statsmodels' record-level ``GLM(...).fit(cov_type='cluster')``
on the demo roster's own records (read with pandas from demo_data/roster.csv, not through Helmshift's cells).
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import DEMO_DIR, copy_database, read_mapping

from app.cli import main
from app.store import Store


@pytest.fixture
def db(shared_demo_db: Path, tmp_path: Path) -> str:
    return str(copy_database(shared_demo_db, tmp_path / "cli.db"))


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, Any, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    try:
        return code, json.loads(out), err
    except json.JSONDecodeError:
        return code, out, err


RULES = "code,field,comparison,value,category\r\nRetired,age,below,60,forced\r\nUnknown,interim,equals,1,excluded\r\n"


def test_mapping_import_with_rules_and_export_round_trip(capsys: pytest.CaptureFixture[str], db: str,
                                                         tmp_path: Path) -> None:
    rules = tmp_path / "rules.csv"
    rules.write_text(RULES, encoding="utf-8")
    code, payload, err = run(capsys, "mapping", "import", str(DEMO_DIR / "mapping-standard.csv"), "--rules",
                             str(rules), "--roster", "1", "--name", "with rules", "--db", db, "--json")
    assert code == 0, err
    assert payload["rules"] == ["'Retired' counts as forced when age is below 60 years",
                                "'Unknown' counts as excluded when interim"]
    code, text, _ = run(capsys, "mapping", "export", "--name", "with rules", "--rules", "--db", db)
    assert code == 0 and text.replace("\r\n", "\n") == RULES.replace("\r\n", "\n")


def test_a_bad_rules_file_saves_nothing(capsys: pytest.CaptureFixture[str], db: str, tmp_path: Path) -> None:
    rules = tmp_path / "rules.csv"
    rules.write_text("code,field,comparison,value,category\nRetired,age,equals,60,forced\n", encoding="utf-8")
    code, _, err = run(capsys, "mapping", "import", str(DEMO_DIR / "mapping-standard.csv"), "--rules",
                       str(rules), "--roster", "1", "--name", "never saved", "--db", db)
    assert code != 0 and "Line 2: age compares with below or at_least" in err
    store = Store(f"sqlite:///{db}")
    try:
        assert "never saved" not in dict(store.list_mappings())
    finally:
        store.dispose()


def demo_records(demo_clean: pd.DataFrame) -> pd.DataFrame:
    """The demo's counted departures with their category under the standard mapping plus the preset rule."""
    categories = read_mapping("mapping-standard.csv")
    rows = demo_clean.copy()
    rows["category"] = rows["Exit Reason"].map(categories)
    age = pd.to_numeric(rows["Age at Exit"], errors="coerce")
    rows.loc[(rows["Exit Reason"] == "Retired") & (age < 60), "category"] = "forced"
    rows["age"] = age
    rows["tenure"] = pd.to_numeric(rows["Years in Role"], errors="coerce")
    return rows


def test_fit_adjusted_equals_statsmodels_on_the_records(capsys: pytest.CaptureFixture[str], db: str,
                                                        tmp_path: Path, demo_clean: pd.DataFrame) -> None:
    rules = tmp_path / "rules.csv"
    rules.write_text("code,field,comparison,value,category\nRetired,age,below,60,forced\n", encoding="utf-8")
    assert run(capsys, "mapping", "import", str(DEMO_DIR / "mapping-standard.csv"), "--rules", str(rules),
               "--roster", "1", "--name", "preset", "--db", db)[0] == 0
    code, payload, err = run(capsys, "fit", "--roster", "1", "--mapping", "preset", "--years", "1998-2022",
                             "--model", "adjusted", "--adjust", "age,tenure", "--db", db, "--json")
    assert code == 0, err
    rows = demo_records(demo_clean)
    rows = rows.loc[rows["category"].isin(["forced", "voluntary"]) & rows["year"].between(1998, 2022)]
    kept = rows.dropna(subset=["age", "tenure"])
    age_band = pd.cut(np.floor(kept["age"]), [-np.inf, 50, 60, 65, np.inf], right=False,
                      labels=["<50", "50-59", "60-64", "65+"])
    tenure_band = pd.cut(np.floor(kept["tenure"]), [-np.inf, 3, 7, 11, np.inf], right=False,
                         labels=["<3", "3-6", "7-10", ">10"])
    x = pd.concat([pd.Series(1.0, index=kept.index, name="const"), (kept["year"] - kept["year"].min()).rename("y"),
                   pd.get_dummies(age_band, prefix="a", drop_first=True, dtype=float),
                   pd.get_dummies(tenure_band, prefix="t", drop_first=True, dtype=float)], axis=1)
    x = x.loc[:, x.any()]  # a band with no departures is not in the design
    y = (kept["category"] == "forced").to_numpy(dtype=float)
    fit = sm.GLM(y, x, family=sm.families.Binomial()).fit(
        cov_type="cluster", cov_kwds={"groups": pd.factorize(kept["Issuer Code"])[0]})
    assert payload["departures"] == len(kept)
    assert sum(payload["dropped"].values()) == len(rows) - len(kept)
    assert payload["odds_ratio"] == pytest.approx(float(np.exp(fit.params["y"])), abs=1e-8)
    assert payload["coef"] == pytest.approx(float(fit.params["y"]), abs=1e-8)
    assert payload["cluster_se"] == pytest.approx(float(fit.bse["y"]), abs=1e-6)
    assert set(payload["conf_int"]) == {"cluster", "bootstrap"} and payload["conf_int"]["bootstrap"] is None
    assert payload["rules"] == ["'Retired' counts as forced when age is below 60 years"]
    assert isinstance(payload["run"], int)


def test_fit_adjusted_rejects_unknown_adjustments(capsys: pytest.CaptureFixture[str], db: str) -> None:
    code, _, err = run(capsys, "fit", "--roster", "1", "--model", "adjusted", "--adjust", "age,income", "--db", db)
    assert code != 0 and "adjustments are age, tenure, sector" in err


def test_fit_adjusted_with_the_firm_bootstrap_records_it(capsys: pytest.CaptureFixture[str], db: str) -> None:
    code, payload, err = run(capsys, "fit", "--roster", "1", "--model", "adjusted", "--adjust", "age",
                             "--resamples", "500", "--seed", "3", "--db", db, "--json")
    assert code == 0, err
    lo, hi = payload["conf_int"]["bootstrap"]
    assert lo < payload["odds_ratio"] < hi
    assert payload["bootstrap"]["resamples"] == 500 and payload["bootstrap"]["seed"] == 3
    store = Store(f"sqlite:///{db}")
    try:
        assert store.get_run(payload["run"]).params == {"model": "adjusted", "adjust": ["age"]}
        # the bootstrap is a bootstrap run of the adjusted_odds_ratio statistic, with its replicates
        boot = store.get_run(payload["bootstrap_run"])
        assert boot.kind == "bootstrap" and boot.params["statistic"] == "adjusted_odds_ratio"
        assert boot.params["adjust"] == ["age"] and boot.params["resamples"] == 500 and boot.params["seed"] == 3
        assert len(store.replicates(boot.id)) == 500
        assert boot.params["sampler"] == 4  # new runs draw firms with sampler 4
    finally:
        store.dispose()
    code, _, err = run(capsys, "fit", "--roster", "1", "--resamples", "500", "--db", db)
    assert code != 0 and "--resamples goes with --model adjusted" in err


def test_an_adjusted_run_exports_a_pack_with_its_cells(capsys: pytest.CaptureFixture[str], db: str,
                                                      tmp_path: Path) -> None:
    code, payload, _ = run(capsys, "fit", "--roster", "1", "--model", "adjusted", "--adjust", "age", "--db", db,
                           "--json")
    assert code == 0
    code, _, err = run(capsys, "run", "export", str(payload["run"]), "--out", str(tmp_path / "p.zip"), "--db", db)
    assert code == 0, err
    with zipfile.ZipFile(tmp_path / "p.zip") as archive:
        cells = pd.read_csv(archive.open("cells.csv"), dtype={"age_band": str}, keep_default_na=False)
        firms = pd.read_csv(archive.open("firm_cells.csv"), keep_default_na=False)
        params = json.loads(archive.read("params.json"))
    # the cells hold every departure the fit counted; the firm rows add up to them (hand sums with pandas)
    assert int((cells["forced"] + cells["voluntary"]).sum()) == payload["departures"]
    assert int(firms["forced"].sum()) == payload["forced"] and firms["firm_id"].nunique() == payload["firms"]
    assert params["measure"] == "adjusted" and params["adjust"] == ["age"]
    assert set(cells["age_band"]) <= {"<50", "50-59", "60-64", "65+"} and set(cells["tenure_band"]) == {""}
