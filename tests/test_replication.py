"""Replication packs, replicates and jackknife values as data, and the fit options that were hidden.

Checks run against scipy and statsmodels, never against Helmshift's own numbers alone:
- the percentile, basic and BCa endpoints equal ``scipy.stats.bootstrap`` (scipy's own formulas, fed the
  run's replicates through ``bootstrap_result`` and its jackknife values through the statistic);
- each jackknife value equals a statsmodels GLM refit with that unit left out;
- the pack's reproduce.py (numpy, pandas, scipy, statsmodels only) agrees with the run to 1e-9.
"""

from __future__ import annotations

import contextlib
import io
import json
import zipfile
from collections.abc import Iterator
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import Databases, make_client
from scipy import stats

from app.analysis import pack_script
from app.analysis.inputs import load_input
from app.analysis.jobs import run_bootstrap_now
from app.analysis.replication import build_pack, replicates_payload
from app.analysis.runs import run_sectors, run_trend
from app.cli import main
from app.store import Store, StoreError

B = 400
SEED = 11


@pytest.fixture(scope="module")
def runs(shared_demo_url: str, databases: Databases) -> Iterator[tuple[Store, dict[str, int]]]:
    """The demo roster (on the chosen backend) with a fit, a spline fit with quasi intervals asked for, the
    sector trends, and a firm and a departure bootstrap (B = 400)."""
    url = databases.new(template=shared_demo_url)
    store = Store(url)
    inp = load_input(store, 1)
    ids = {"fit": run_trend(store, inp).run_id,
           "spline": run_trend(store, inp, model="spline", spline_df=5, quasi=True).run_id,
           "sectors": run_sectors(store, inp)[1]}
    for unit in ("firm", "departure"):
        ids[unit] = int(run_bootstrap_now(store, inp, unit=unit, resamples=B, seed=SEED)["run"])
    ids["sector_firm"] = int(run_bootstrap_now(store, inp, unit="firm", resamples=200, seed=SEED,
                                               model="sector")["run"])
    yield store, ids
    store.dispose()
    databases.drop(url)


def unpack(data: bytes, folder: Path) -> Path:
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        archive.extractall(folder)
    return folder


def reproduce_json(folder: Path) -> dict[str, Any]:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        status = pack_script.main([str(folder), "--json"])
    payload: dict[str, Any] = json.loads(out.getvalue())
    payload["status"] = status
    return payload


# ---------------------------------------------------------------- the pack


def test_pack_holds_the_documented_files_and_is_the_same_bytes_each_time(runs: tuple[Store, dict[str, int]]) -> None:
    store, ids = runs
    firm = build_pack(store, ids["firm"])
    assert firm.files == ("README.txt", "cells.csv", "firm_cells.csv", "mapping.csv", "params.json",
                          "replicates.csv", "jackknife.csv", "results.json", "reproduce.py")
    assert build_pack(store, ids["firm"]).sha256 == firm.sha256  # deterministic: the brief can quote it
    fit = build_pack(store, ids["fit"])
    assert fit.files == ("README.txt", "cells.csv", "mapping.csv", "params.json", "results.json", "reproduce.py")
    assert "records.csv" in build_pack(store, ids["fit"], records=True).files
    with zipfile.ZipFile(io.BytesIO(firm.data)) as archive:
        readme = archive.read("README.txt").decode()
        params = json.loads(archive.read("params.json"))
        cells = pd.read_csv(archive.open("cells.csv"))
        firms = pd.read_csv(archive.open("firm_cells.csv"))
        replicates = pd.read_csv(archive.open("replicates.csv"))
    for name in firm.files:
        assert name in readme
    assert params["unit"] == "firm" and params["resamples"] == B and params["seed"] == SEED
    assert params["block_size"] == 250 and set(params["libraries"]) >= {"numpy", "pandas", "scipy", "statsmodels"}
    assert params["mapping"]["csv_sha256"] and params["roster"]["file_sha256"]
    run = store.get_run(ids["firm"])
    assert run.result is not None
    # the counts add up (pandas alone): firm rows to the cells, the cells to what the fit counted
    summed = firms.groupby("year")[["forced", "voluntary"]].sum().reset_index()
    assert summed["forced"].tolist() == cells["forced"].tolist()
    assert summed["voluntary"].tolist() == cells["voluntary"].tolist()
    assert len(replicates) == B and replicates["index"].tolist() == list(range(B))
    fit_result = store.get_run(ids["fit"]).result
    assert fit_result is not None and int(cells["forced"].sum()) == fit_result["forced"]


def test_records_are_the_counted_departures(runs: tuple[Store, dict[str, int]]) -> None:
    store, ids = runs
    pack = build_pack(store, ids["departure"], records=True)
    with zipfile.ZipFile(io.BytesIO(pack.data)) as archive:
        records = pd.read_csv(archive.open("records.csv"), dtype=str, keep_default_na=False)
        cells = pd.read_csv(archive.open("cells.csv"))
        jackknife = pd.read_csv(archive.open("jackknife.csv"))
    assert set(records["category"]) == {"forced", "voluntary"}
    assert len(records) == int(cells[["forced", "voluntary"]].to_numpy().sum()) == len(jackknife)
    assert sorted(jackknife["unit_id"].astype(str)) == sorted(records["line"])


def test_unfinished_or_unknown_runs_are_refused(runs: tuple[Store, dict[str, int]]) -> None:
    store, ids = runs
    with pytest.raises(ValueError, match="only bootstrap runs have replicates"):
        replicates_payload(store, ids["fit"])
    with pytest.raises(StoreError, match="No run number 9999"):
        build_pack(store, 9999)


# ---------------------------------------------------------------- independent checks


def _scipy_intervals(estimate: float, replicates: np.ndarray, jackknife: np.ndarray, method: str) -> tuple[float, float]:
    """scipy.stats.bootstrap's interval from these replicates; its jackknife calls the statistic on each
    leave-one-out sample of unit indices, and the index missing from the sample picks that unit's value."""
    n = len(jackknife)
    full = n * (n - 1) // 2

    def statistic(idx: np.ndarray, axis: int = -1) -> np.ndarray | float:
        if idx.shape[axis] == n:
            return estimate
        return np.asarray(jackknife)[full - idx.sum(axis=axis)]

    previous = SimpleNamespace(bootstrap_distribution=replicates)  # all scipy reads of `bootstrap_result`
    result = stats.bootstrap((np.arange(n),), statistic, n_resamples=0, bootstrap_result=previous,
                             vectorized=True, method=method, confidence_level=0.95)
    return float(result.confidence_interval.low), float(result.confidence_interval.high)


@pytest.mark.parametrize("unit", ["firm", "departure"])
def test_intervals_equal_scipy_bootstrap_on_the_exported_values(runs: tuple[Store, dict[str, int]], unit: str) -> None:
    store, ids = runs
    payload = replicates_payload(store, ids[unit])
    run = store.get_run(ids[unit])
    assert run.result is not None
    theta = np.array([r["log_odds_ratio"] for r in payload["replicates"] if r["status"] == "ok"], dtype=float)
    jack = np.array([r["log_odds_ratio"] for r in payload["jackknife"]], dtype=float)
    assert len(theta) == B - run.result["failed"]
    for method, scipy_name in (("percentile", "percentile"), ("basic", "basic"), ("bca", "BCa")):
        low, high = _scipy_intervals(payload["log_odds_ratio"], theta, jack, scipy_name)
        # scipy reads quantiles with np.percentile; equal to rounding of the last digits
        assert run.result["conf_int"][method] == pytest.approx([np.exp(low), np.exp(high)], rel=1e-12, abs=0)


def test_jackknife_values_equal_statsmodels_refits(runs: tuple[Store, dict[str, int]]) -> None:
    store, ids = runs
    with zipfile.ZipFile(io.BytesIO(build_pack(store, ids["firm"]).data)) as archive:
        cells = pd.read_csv(archive.open("cells.csv"))
        firms = pd.read_csv(archive.open("firm_cells.csv"), dtype={"firm_id": str})
        jackknife = pd.read_csv(archive.open("jackknife.csv"), dtype={"unit_id": str})
        params = json.loads(archive.read("params.json"))
    t = cells["year"].to_numpy(dtype=float) - params["centre"]
    X = np.column_stack([np.ones_like(t), t])
    for firm in jackknife["unit_id"].iloc[::25]:  # every 25th firm: statsmodels on each is the slow part
        own = firms.loc[firms["firm_id"] == firm].set_index("year")[["forced", "voluntary"]]
        left = cells.set_index("year")[["forced", "voluntary"]].sub(own, fill_value=0)
        endog = left.to_numpy(dtype=float)
        refit = sm.GLM(endog, X, family=sm.families.Binomial()).fit(tol=1e-12)
        value = float(jackknife.loc[jackknife["unit_id"] == firm, "log_odds_ratio"].iloc[0])
        assert value == pytest.approx(float(refit.params[1]), abs=1e-10)


@pytest.mark.parametrize("kind", ["fit", "spline", "sectors", "firm", "departure", "sector_firm"])
def test_reproduce_script_agrees_with_the_run(runs: tuple[Store, dict[str, int]], kind: str, tmp_path: Path) -> None:
    store, ids = runs
    run = store.get_run(ids[kind])
    report = reproduce_json(unpack(build_pack(store, run.id).data, tmp_path))
    assert report["status"] == 0 and report["ok"], [c for c in report["checks"] if not c["ok"]]
    assert len(report["checks"]) >= 10
    for check in report["checks"]:
        if check["reported"] is not None and check["recomputed"] is not None:
            assert abs(check["recomputed"] - check["reported"]) <= 1e-9 * max(1.0, abs(check["reported"])), check
    names = {c["name"] for c in report["checks"]}
    if kind in ("firm", "departure"):
        assert {"percentile low", "basic high", "bca low", "bca high: Monte Carlo error"} <= names
        assert run.result is not None
        reported = {c["name"]: c["reported"] for c in report["checks"]}
        assert reported["bca low"] == run.result["conf_int"]["bca"][0]
    if kind == "spline":
        assert {"quasi-binomial profile high", "bend test LR statistic"} <= names


def test_reproduce_script_flags_a_changed_number(runs: tuple[Store, dict[str, int]], tmp_path: Path) -> None:
    store, ids = runs
    folder = unpack(build_pack(store, ids["fit"]).data, tmp_path)
    results = json.loads((folder / "results.json").read_text())
    results["conf_int"]["profile"][1] += 1e-6
    (folder / "results.json").write_text(json.dumps(results))
    report = reproduce_json(folder)
    assert report["status"] == 1
    assert [c["name"] for c in report["checks"] if not c["ok"]] == ["profile high, per year"]


# ---------------------------------------------------------------- command line


def test_cli_run_export_and_fit_options(runs: tuple[Store, dict[str, int]], tmp_path: Path,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    store, ids = runs
    db = store.url
    out = tmp_path / "pack.zip"
    assert main(["run", "export", str(ids["departure"]), "--db", db, "--out", str(out), "--records", "--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert "records.csv" in printed["files"] and zipfile.ZipFile(out).namelist() == printed["files"]
    assert main(["run", "export", "9999", "--db", db, "--out", str(tmp_path / "no.zip")]) == 1
    assert "No run number 9999" in capsys.readouterr().err and not (tmp_path / "no.zip").exists()

    assert main(["fit", "--db", db, "--roster", "1", "--quasi", "--json"]) == 0
    fit = json.loads(capsys.readouterr().out)
    assert fit["dispersion"] < 1.5 and fit["quasi"] is not None  # shown although dispersion is low
    assert fit["quasi"]["se"] == pytest.approx(fit["se"] * fit["dispersion"] ** 0.5, rel=1e-12)
    assert main(["fit", "--db", db, "--roster", "1", "--model", "spline", "--spline-df", "6", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["curvature"]["df"] == 5
    with pytest.raises(SystemExit):
        main(["fit", "--db", db, "--roster", "1", "--spline-df", "7"])
    assert "--spline-df" in capsys.readouterr().err


# ---------------------------------------------------------------- pages and downloads


@pytest.fixture
def web(runs: tuple[Store, dict[str, int]]) -> Iterator[Any]:
    client = make_client(runs[0])
    yield client
    client.close()


def test_pack_download_equals_the_command_lines_pack(web: Any, runs: tuple[Store, dict[str, int]]) -> None:
    store, ids = runs
    r = web.get(f"/runs/{ids['firm']}/pack.zip")
    assert r.status_code == 200 and r.headers["content-type"] == "application/zip"
    assert f'filename="helmshift-run-{ids["firm"]}-pack.zip"' in r.headers["content-disposition"]
    assert r.content == build_pack(store, ids["firm"]).data
    with_records = web.get(f"/runs/{ids['fit']}/pack.zip?records=1")
    assert "records.csv" in zipfile.ZipFile(io.BytesIO(with_records.content)).namelist()
    assert web.get(f"/runs/{ids['fit']}/pack.zip?records=yes").status_code == 400
    assert web.get("/runs/9999/pack.zip").status_code == 404


def test_replicates_as_json_and_csv(web: Any, runs: tuple[Store, dict[str, int]]) -> None:
    store, ids = runs
    body = web.get(f"/api/runs/{ids['departure']}/replicates").json()
    stored = store.replicates(ids["departure"])
    assert [r["log_odds_ratio"] for r in body["replicates"]] == stored.tolist()
    csv = pd.read_csv(io.StringIO(web.get(f"/runs/{ids['departure']}/replicates.csv").text))
    assert csv["log_odds_ratio"].tolist() == pytest.approx(stored.tolist(), rel=1e-15)
    jack = pd.read_csv(io.StringIO(web.get(f"/runs/{ids['firm']}/jackknife.csv").text), dtype={"unit_id": str})
    firm_jack = replicates_payload(store, ids["firm"])["jackknife"]
    assert jack["unit_id"].tolist() == [r["unit_id"] for r in firm_jack]
    assert jack["log_odds_ratio"].tolist() == pytest.approx([r["log_odds_ratio"] for r in firm_jack], rel=1e-15)
    assert web.get(f"/api/runs/{ids['fit']}/replicates").status_code == 400
    assert web.get("/api/runs/9999/replicates").status_code == 404


def test_pages_offer_the_pack(web: Any, runs: tuple[Store, dict[str, int]]) -> None:
    _, ids = runs
    run_page = web.get(f"/runs/{ids['firm']}").text
    assert f"/runs/{ids['firm']}/pack.zip" in run_page and "personal data" in run_page
    assert f"/runs/{ids['firm']}/replicates.csv" in run_page
    trend = web.get("/rosters/1/trend?quasi=1")
    assert trend.status_code == 200
    assert "quasi-binomial" in trend.text and '/pack.zip"' in trend.text
    assert "per year, quasi-binomial" in trend.text
    assert web.get("/rosters/1/trend?quasi=2").status_code == 400
    assert web.get("/rosters/1/trend?model=spline&spline_df=6").status_code == 200
    briefing = web.get(f"/rosters/1/briefing?run={ids['firm']}").text
    assert f"/runs/{ids['firm']}/pack.zip" in briefing and briefing.count("/pack.zip") == 2


def test_brief_footer_names_each_packs_sha256(runs: tuple[Store, dict[str, int]], tmp_path: Path) -> None:
    from test_export import AVAILABLE, WHY, pdf_text  # the export tests' browser check and PDF text reader

    from app.briefing.exports import brief_file

    if not AVAILABLE:
        pytest.skip(WHY)
    store, ids = runs
    inp = load_input(store, 1)
    text = " ".join(pdf_text(brief_file(store, inp, run_id=ids["firm"]), tmp_path).split())
    for run_id in (run_trend(store, inp).run_id, ids["firm"]):
        sha = build_pack(store, run_id).sha256
        assert f"Replication pack of run {run_id}: sha256 {sha}" in text.replace("- ", "-")


STATISTIC_RUNS = {  # statistic -> (unit, options): every statistic a run can bootstrap, through its pack
    "decade_odds_ratio": ("departure", {}),
    "sector_slope": ("firm", {"sector": "Energy"}),
    "heterogeneity": ("departure", {}),
    "spline_bend": ("firm", {"spline_df": 4}),
    "period_difference": ("firm", {"stratify": "sector"}),
}


@pytest.mark.parametrize("statistic", list(STATISTIC_RUNS))
def test_reproduce_script_recomputes_every_statistic(runs: tuple[Store, dict[str, int]], statistic: str,
                                                     tmp_path: Path) -> None:
    # oracle: the pack's reproduce.py (statsmodels refits of the statistic and of every leave-one-out case;
    # the interval formulas written out with numpy/scipy) against the run's stored numbers, to 1e-9
    store, _ = runs
    unit, options = STATISTIC_RUNS[statistic]
    inp = load_input(store, 1)
    run_id = int(run_bootstrap_now(store, inp, unit=unit, resamples=250, seed=SEED, statistic=statistic,
                                   **options)["run"])
    pack = build_pack(store, run_id)
    report = reproduce_json(unpack(pack.data, tmp_path))
    assert report["status"] == 0 and report["ok"], [c for c in report["checks"] if not c["ok"]]
    names = {c["name"] for c in report["checks"]}
    assert {"percentile low", "normal high", "normal low: Monte Carlo error",
            "jackknife: largest difference over all units"} <= names
    has_se = statistic in ("decade_odds_ratio", "sector_slope", "period_difference")
    assert ({"studentized low", "studentized high: Monte Carlo error"} <= names) and has_se == any(
        c["name"] == "studentized low" and c["recomputed"] is not None for c in report["checks"])
    params = json.loads(zipfile.ZipFile(io.BytesIO(pack.data)).read("params.json"))
    assert params["statistic"] == statistic and params["stratify"] == options.get("stratify", "none")
