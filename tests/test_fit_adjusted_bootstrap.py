"""``helmshift fit --model adjusted --resamples B`` records a bootstrap run of the adjusted odds ratio with its
replicates (issue 16): the same numbers as the Resampling page's run of that statistic with the same seed, and
its run page, replicates, extension and replication pack work.

Oracles: the page's own run (made through the web form, a separate code path into the jobs); the replicates
are checked against statsmodels' binomial GLM refitted on resampled firms in tests/test_jobs_measures.py and
tests/test_stats_measures.py, and the estimate against statsmodels' clustered logit in tests/test_cli_rules.py.
"""

from __future__ import annotations

import io
import json
import zipfile

import numpy as np
import pytest
from conftest import make_client

from app.analysis.jobs import execute_bootstrap, extend_run
from app.cli import main
from app.store import Store


def fit_json(capsys: pytest.CaptureFixture[str], store: Store, *extra: str) -> dict[str, object]:
    code = main(["fit", "--roster", "1", "--model", "adjusted", "--adjust", "age,tenure", "--db", store.url,
                 "--json", *extra])
    out, err = capsys.readouterr()
    assert code == 0, err
    return dict(json.loads(out))


def test_cli_adjusted_bootstrap_is_the_pages_run(capsys: pytest.CaptureFixture[str], demo_store: Store) -> None:
    payload = fit_json(capsys, demo_store, "--resamples", "300", "--seed", "17")
    boot_id = int(payload["bootstrap_run"])  # type: ignore[call-overload]
    run = demo_store.get_run(boot_id)
    assert run.kind == "bootstrap" and run.status == "done"
    assert run.params["statistic"] == "adjusted_odds_ratio" and run.params["adjust"] == ["age", "tenure"]
    cli_reps = demo_store.replicates(boot_id).copy()
    assert len(cli_reps) == 300 and np.isfinite(cli_reps).all()

    # the Resampling page's run of the same statistic, adjustment set and seed
    client = make_client(demo_store)
    made = client.post("/rosters/1/resampling", data={"unit": "firm", "resamples": "300", "seed": "17",
                                                      "statistic": "adjusted_odds_ratio", "adjust": "age,tenure"},
                       follow_redirects=False)
    assert made.status_code == 303, made.text
    page_id = int(made.headers["location"].rstrip("/").rsplit("/", 1)[1])
    assert page_id != boot_id
    np.testing.assert_array_equal(demo_store.replicates(page_id), cli_reps)  # same seed, same numbers
    page_result = demo_store.get_run(page_id).result
    assert page_result is not None
    assert payload["conf_int"]["bootstrap"] == page_result["conf_int"]["bca"]  # type: ignore[index]
    assert payload["bootstrap"]["percentile"] == page_result["conf_int"]["percentile"]  # type: ignore[index]
    # the fit's own point estimate is the bootstrap's original estimate
    assert page_result["odds_ratio"] == pytest.approx(payload["odds_ratio"], rel=1e-10)

    # the run page, its replicates (the histogram's data) and the replication pack work for the CLI's run
    html = client.get(f"/runs/{boot_id}").text
    assert "odds ratio per year adjusted for age, tenure" in html
    assert len(client.get(f"/api/runs/{boot_id}/replicates").json()["replicates"]) == 300
    pack = client.get(f"/runs/{boot_id}/pack.zip")
    assert pack.status_code == 200
    assert "reproduce.py" in zipfile.ZipFile(io.BytesIO(pack.content)).namelist()
    # and it extends, keeping its first replicates
    extend_run(demo_store, boot_id, 100)
    assert execute_bootstrap(demo_store, boot_id)["resamples"] == 400
    np.testing.assert_array_equal(demo_store.replicates(boot_id)[:300], cli_reps)


def test_cli_adjusted_without_resamples_records_no_bootstrap(capsys: pytest.CaptureFixture[str],
                                                             demo_store: Store) -> None:
    before = len(demo_store.list_runs(1, "bootstrap"))
    payload = fit_json(capsys, demo_store)
    assert payload["conf_int"]["bootstrap"] is None and "bootstrap_run" not in payload  # type: ignore[index]
    assert len(demo_store.list_runs(1, "bootstrap")) == before
