"""The replication pack's reproduce.py in a fresh virtual environment holding only numpy, pandas, scipy and
statsmodels (no Helmshift): every number it prints equals the run's to 1e-9, for a fit, a firm bootstrap and
a departure bootstrap of the demo roster, and for the rate (Poisson with firm-years) and the adjusted trend, each
as a fit and as a firm bootstrap of its ratio per year. The same library versions as this environment are installed, so a
difference would be the pack's fault, not a library's."""

from __future__ import annotations

import io
import json
import subprocess
import venv
import zipfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy
import statsmodels
from conftest import copy_database

from app.analysis.adjusted import run_adjusted
from app.analysis.inputs import load_input
from app.analysis.jobs import run_bootstrap_now
from app.analysis.rates import run_rates
from app.analysis.replication import build_pack
from app.analysis.runs import run_trend
from app.intake.universe import derive_universe
from app.store import Store

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def clean_python(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("clean-env") / "env"
    venv.EnvBuilder(with_pip=True, clear=True).create(folder)
    python = folder / "bin" / "python"
    wanted = [f"numpy=={np.__version__}", f"pandas=={pd.__version__}", f"scipy=={scipy.__version__}",
              f"statsmodels=={statsmodels.__version__}"]
    done = subprocess.run([str(python), "-m", "pip", "install", "--quiet", *wanted], capture_output=True, text=True,
                          timeout=900)
    if done.returncode != 0:
        reason = done.stderr.strip().splitlines()[-1:] or ["no output"]
        if any(s in done.stderr for s in ("No matching distribution", "Could not find a version",
                                          "Failed to establish", "Network is unreachable")):
            pytest.skip(f"pip cannot reach an index with these packages: {reason[0]}")
        raise AssertionError(done.stderr[-2000:])
    # no Helmshift: the clean interpreter must not find it
    probe = subprocess.run([str(python), "-c", "import app"], capture_output=True, text=True, cwd=folder,
                           env={"PATH": "/usr/bin:/bin"})
    assert probe.returncode != 0
    return python


def test_reproduce_py_in_a_clean_environment(shared_demo_db: Path, tmp_path: Path, clean_python: Path) -> None:
    store = Store(f"sqlite:///{copy_database(shared_demo_db, tmp_path / 'c.db')}")
    try:
        inp = load_input(store, 1)
        ids = [run_trend(store, inp).run_id]
        ids += [int(run_bootstrap_now(store, inp, unit=u, resamples=1000, seed=3)["run"]) for u in ("firm", "departure")]
        # the other measures: the rate (over a universe derived from the roster) and the adjusted trend, each as a
        # fit and as a firm bootstrap of its ratio per year
        derive_universe(store, 1)
        ids += [int(run_rates(store, inp).run_id or 0), run_adjusted(store, inp, "age,tenure,sector").run_id]
        ids += [int(run_bootstrap_now(store, inp, unit="firm", resamples=1000, seed=3, statistic=name)["run"])
                for name in ("rate_ratio", "adjusted_odds_ratio")]
        for run_id in ids:
            folder = tmp_path / f"pack-{run_id}"
            with zipfile.ZipFile(io.BytesIO(build_pack(store, run_id).data)) as archive:
                archive.extractall(folder)
            done = subprocess.run([str(clean_python), "reproduce.py", "--json"], cwd=folder, capture_output=True,
                                  text=True, timeout=600, env={"PATH": "/usr/bin:/bin"})
            assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
            report = json.loads(done.stdout)
            run = store.get_run(run_id)
            assert run.result is not None and report["run"] == run_id and report["ok"]
            checks = {c["name"]: c for c in report["checks"]}
            for check in checks.values():
                assert check["recomputed"] is not None and check["reported"] is not None, check
                assert abs(check["recomputed"] - check["reported"]) <= 1e-9 * max(1.0, abs(check["reported"])), check
            if run.params.get("model") == "rate":
                assert checks["forced rate: profile low"]["reported"] == run.result["forced"]["conf_int"]["profile"][0]
            elif run.params.get("model") == "adjusted":
                assert checks["firm-clustered high"]["reported"] == run.result["conf_int"]["cluster"][1]
            elif run.kind == "fit":
                assert checks["profile low, per year"]["reported"] == run.result["conf_int"]["profile"][0]
                assert checks["Wald high, per decade"]["reported"] == run.result["decade_conf_int"]["wald"][1]
            else:
                for method in ("percentile", "basic"):  # straight from the replicates: exactly equal
                    for end, name in enumerate(("low", "high")):
                        check = checks[f"{method} {name}"]
                        assert check["recomputed"] == check["reported"] == run.result["conf_int"][method][end]
                bca = checks["bca high"]
                assert bca["reported"] == run.result["conf_int"]["bca"][1]
                assert bca["recomputed"] == pytest.approx(bca["reported"], rel=1e-13, abs=0)
    finally:
        store.dispose()


def test_brief_pack_share_trend_folders_reproduce_in_a_clean_environment(shared_demo_db: Path, tmp_path: Path,
                                                                          clean_python: Path) -> None:
    """The brief pack (app.analysis.brief_pack): every run folder that holds a replication pack (the share
    trends: the fit, the sector fit, a firm bootstrap) runs its reproduce.py in the clean environment and
    matches the run to 1e-9; folders of kinds without a pack yet (rates, adjusted) hold their results."""
    from app.briefing.exports import brief_pack
    from app.intake.universe import derive_universe

    store = Store(f"sqlite:///{copy_database(shared_demo_db, tmp_path / 'b.db')}")
    try:
        derive_universe(store, 1)
        inp = load_input(store, 1)
        boot = int(run_bootstrap_now(store, inp, unit="firm", resamples=500, seed=5)["run"])
        pack = brief_pack(store, inp, ["trend", "bootstrap", "sectors", "rates", "adjusted"], run_id=boot)
        folder = tmp_path / "brief-pack"
        with zipfile.ZipFile(io.BytesIO(pack.data)) as archive:
            archive.extractall(folder)
        manifest = json.loads((folder / "manifest.json").read_text())
        entries = [r for f in manifest["findings"] for r in f["runs"]]
        packed = [r for r in entries if r["pack_sha256"] is not None]
        assert {store.get_run(r["run"]).kind for r in packed} == {"fit", "bootstrap"} and len(packed) >= 3
        for entry in packed:
            done = subprocess.run([str(clean_python), "reproduce.py", "--json"], cwd=folder / entry["folder"],
                                  capture_output=True, text=True, timeout=600, env={"PATH": "/usr/bin:/bin"})
            assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
            report = json.loads(done.stdout)
            assert report["run"] == entry["run"] and report["ok"]
            for check in report["checks"]:
                assert check["recomputed"] is not None and check["reported"] is not None, check
                assert abs(check["recomputed"] - check["reported"]) <= 1e-9 * max(1.0, abs(check["reported"])), check
        for entry in entries:
            if entry["pack_sha256"] is None:  # not yet packable: the run's stored numbers are there
                results = json.loads((folder / entry["folder"] / "results.json").read_text())
                assert results == store.get_run(entry["run"]).result
    finally:
        store.dispose()
