"""``helmshift fit --model adjusted --resamples B``: the adjusted fit and its firm bootstrap as a bootstrap run.

The bootstrap runs as the Resampling page's and the jobs' ``adjusted_odds_ratio`` statistic does
(``app.analysis.jobs.run_bootstrap_now``): a recorded bootstrap run with its replicates, so its run page,
histogram, extension and replication pack work, and the same seed gives the same numbers as the page's run.
A module of its own because the jobs read the adjusted cells from ``app.analysis.adjusted``.
"""

from __future__ import annotations

from typing import Any

from app.analysis.adjusted import adjusted_summary
from app.analysis.inputs import AnalysisInput
from app.analysis.jobs import run_bootstrap_now
from app.stats.adjusted import parse_adjust
from app.store import Store


def adjusted_fit_summary(store: Store, inp: AnalysisInput, adjust: str | tuple[str, ...], *,
                         resamples: int | None = None, seed: int = 20261201) -> dict[str, Any]:
    """``adjusted_summary``; with ``resamples``, also the firm bootstrap run: its id is ``bootstrap_run``, its
    BCa interval ``conf_int.bootstrap`` and its details ``bootstrap``."""
    payload = adjusted_summary(store, inp, adjust)
    if resamples is None:
        return payload
    boot = run_bootstrap_now(store, inp, unit="firm", resamples=resamples, seed=seed,
                             statistic="adjusted_odds_ratio", adjust=list(parse_adjust(adjust)))
    payload["conf_int"] = {**payload["conf_int"], "bootstrap": boot["conf_int"]["bca"]}
    payload["bootstrap"] = {"method": "BCa, firms resampled", "run": boot["run"], "resamples": boot["resamples"],
                            "seed": boot["seed"], "failed": boot["failed"], "sampler": boot["sampler"],
                            "percentile": boot["conf_int"]["percentile"], "seconds": boot["seconds"]}
    payload["bootstrap_run"] = boot["run"]
    return payload
