"""Background bootstrap runs: stored before they start, run off the request path, watched, stoppable.

A run row is written (status ``queued``) before any work starts, with everything needed to replay it:
roster fingerprint, mapping version, window, model, unit, B and seed. A worker thread runs it in
chunks, appending the replicate estimates and the progress after each chunk, and checking for a cancel
request between chunks. Numpy releases the GIL in the heavy parts, so the server stays responsive.
A run found ``queued`` or ``running`` at start-up was cut short by a crash and is marked
``interrupted`` (see ``Store.mark_interrupted``); it can be started again.
"""

from __future__ import annotations

import logging
import threading
import time
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

import numpy as np

from app.analysis.inputs import AnalysisInput, input_for_run
from app.stats.bootstrap import BLOCK_SIZE, Replicates, bootstrap_to_dict, draw_statistic, summarise_statistic
from app.stats.cells import Cells
from app.stats.design import window_centre
from app.stats.periods import default_periods, parse_periods
from app.stats.sectors import fit_sector_trends
from app.stats.statistics import STATISTICS, Statistic, firm_strata, make_statistic
from app.store import Store
from app.types import UNITS, check_choice

#: resamples per stored chunk; progress and cancel are checked this often
CHUNK = 4 * BLOCK_SIZE
MAX_RESAMPLES = 200_000


logger = logging.getLogger("helmshift.jobs")


class RunCancelled(Exception):
    pass


def failure_message(exc: Exception) -> str:
    """What a failed run says: our own errors (ValueError and subclasses) carry a sentence for the analyst;
    anything else is named as an internal error, still in one sentence."""
    text = " ".join(str(exc).split()) or exc.__class__.__name__
    if isinstance(exc, ValueError | LookupError):
        return text
    return f"The run stopped on an internal error ({exc.__class__.__name__}: {text}); start it again or report it."


#: how firms are drawn: all together, or within their sector (each resample keeps each sector's firm count)
STRATIFY = ("none", "sector")
#: departures a sector needs to enter the test of equal trends (as on the Sectors page)
SECTOR_MIN_DEPARTURES = 20


def bootstrap_params(*, unit: str, resamples: int, seed: int, model: str = "linear", statistic: str = "slope",
                     sector: str | None = None, sectors: list[str] | None = None, spline_df: int | None = None,
                     periods: Any = None, stratify: str = "none") -> dict[str, Any]:
    """A bootstrap run's parameters, checked; the statistic's options are stored only for the statistic that
    uses them, and ``statistic``/``stratify`` only when not the default (older runs read the same).

    ``periods`` is ``1997-2009:2010-2022`` or two (first, last) pairs; ``sectors`` (equal-trends test) and
    default ``periods`` are filled in from the data when the run is created."""
    check_choice(unit, UNITS, "unit")
    check_choice(model, ("linear", "sector"), "model")
    check_choice(statistic, STATISTICS, "statistic")
    check_choice(stratify, STRATIFY, "stratify")
    if not 100 <= resamples <= MAX_RESAMPLES:
        raise ValueError(f"resamples must be between 100 and {MAX_RESAMPLES}; got {resamples}.")
    if not 0 <= seed < 2**63:
        raise ValueError(f"seed must be a non-negative integer below 2**63; got {seed}.")
    if stratify == "sector" and unit != "firm":
        raise ValueError("stratify sector resamples whole firms within their sector; choose unit firm.")
    params: dict[str, Any] = {"unit": unit, "resamples": int(resamples), "seed": int(seed), "model": model}
    if statistic != "slope":
        params["statistic"] = statistic
    if stratify != "none":
        params["stratify"] = stratify
    if statistic == "sector_slope":
        if not sector:
            raise ValueError("The sector_slope statistic needs a sector (--sector NAME).")
        params["sector"] = str(sector)
    if statistic == "heterogeneity" and sectors:
        params["sectors"] = sorted(str(s) for s in sectors)
    if statistic == "spline_bend":
        params["spline_df"] = check_spline_df(3 if spline_df is None else spline_df)
    if statistic == "period_difference" and periods:
        (a, b), (c, d) = parse_periods(periods) if isinstance(periods, str) else periods
        params["periods"] = [[int(a), int(b)], [int(c), int(d)]]
    return params


def check_spline_df(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 2 <= value <= 6:
        raise ValueError(f"spline_df must be a whole number from 2 to 6; got {value!r}.")
    return value


def by_sector(params: dict[str, Any]) -> bool:
    """Whether a run's statistic is computed on sector-year cells."""
    return params.get("model") == "sector" or params.get("statistic") in ("sector_slope", "heterogeneity")


def statistic_for(params: dict[str, Any], cells: Cells) -> Statistic:
    """The statistic a run's parameters name, over the run's cells."""
    periods = params.get("periods")
    return make_statistic(params.get("statistic", "slope"), cells, centre=window_centre(cells.window),
                          model=params.get("model", "linear"), sector=params.get("sector"),
                          sectors=tuple(params.get("sectors") or ()), spline_df=int(params.get("spline_df", 3)),
                          periods=None if periods is None else (tuple(periods[0]), tuple(periods[1])))


def strata_for(inp: AnalysisInput, params: dict[str, Any], cells: Cells) -> np.ndarray | None:
    """Each firm's sector when the run resamples firms within sectors (else None)."""
    if params.get("stratify", "none") != "sector":
        return None
    sectors = cells if cells.by_sector else inp.cells(by_sector=True)
    if not np.array_equal(sectors.firm_ids, cells.firm_ids):
        raise ValueError("The firms of the sector counts differ from the run's firms; cannot stratify.")
    return firm_strata(sectors)[0]


def _resolve(inp: AnalysisInput, params: dict[str, Any]) -> dict[str, Any]:
    """Fill in what a run's statistic takes from the data at creation: the sectors of the equal-trends test,
    default periods; and check the statistic can be computed on the original counts."""
    params = dict(params)
    if params.get("statistic") == "heterogeneity" and not params.get("sectors"):
        het = fit_sector_trends(inp.group_cells(by_sector=True), min_departures=SECTOR_MIN_DEPARTURES).heterogeneity
        if het is None:
            raise ValueError("Fewer than two sectors can be fitted, so equal trends cannot be tested or resampled.")
        params["sectors"] = list(het.sectors)
    if params.get("statistic") == "period_difference" and not params.get("periods"):
        first, second = default_periods(inp.window)
        params["periods"] = [list(first), list(second)]
    cells = inp.group_cells(by_sector=by_sector(params))
    statistic_for(params, cells).original(cells)
    return params


def create_bootstrap_run(store: Store, inp: AnalysisInput, params: dict[str, Any]) -> int:
    """Store a queued run with everything needed to reproduce it; return its id."""
    params = _resolve(inp, params)
    cells = inp.group_cells(by_sector=by_sector(params))
    return store.create_run(
        kind="bootstrap", roster_id=inp.roster.id, params=params, fingerprint=cells.fingerprint(),
        mapping_name=inp.mapping.name if inp.mapping else None,
        mapping_version=inp.mapping.version if inp.mapping else None, window=inp.window,
        progress_total=params["resamples"], roster_version=inp.roster.version,
    )


def execute_bootstrap(store: Store, run_id: int) -> dict[str, Any]:
    """Run (or continue) a stored bootstrap run to its requested number of resamples."""
    run = store.get_run(run_id)
    params = run.params
    inp = input_for_run(store, run)
    cells = inp.cells(by_sector=by_sector(params))
    if cells.fingerprint() != run.fingerprint:
        raise ValueError("The roster's counts no longer match this run's fingerprint; start a new run.")
    statistic = statistic_for(params, cells)
    statistic.original(cells)  # fails fast, before anything is drawn
    strata = strata_for(inp, params, cells)
    target = int(params["resamples"])
    done = len(store.replicates(run_id))
    store.set_run_status(run_id, "running")
    store.set_run_progress(run_id, done, target)
    spent = float(run.seconds or 0.0)
    while done < target:
        if store.cancel_requested(run_id):
            raise RunCancelled()
        block = draw_statistic(cells, statistic.evaluate, unit=params["unit"], resamples=min(CHUNK, target - done),
                               seed=params["seed"], start=done, strata=strata)
        spent += block.seconds
        store.append_replicates(run_id, block.estimates, block.failure.tolist(), block.standard_errors)
        done += len(block.estimates)
        store.set_run_progress(run_id, done)
    estimates, failures = store.replicates_with_failures(run_id)
    started = time.perf_counter()
    stored = Replicates(0, estimates, failures, spent, store.replicate_standard_errors(run_id))
    summary = summarise_statistic(cells, statistic, stored, unit=params["unit"], seed=params["seed"],
                                  stratified=strata is not None)
    spent += time.perf_counter() - started
    result = bootstrap_to_dict(summary)
    result["seconds"] = spent
    store.finish_run(run_id, result, seconds=spent)
    return result


def extend_run(store: Store, run_id: int, extra: int) -> None:
    """Ask for ``extra`` more resamples; the first ones are kept, the stream continues where it stopped."""
    run = store.get_run(run_id)
    params = dict(run.params)
    params["resamples"] = bootstrap_params(**{**params, "resamples": int(params["resamples"]) + int(extra)}
                                           )["resamples"]
    store.update_run_params(run_id, params, status="queued")


class JobRunner:
    """A small pool of worker threads for bootstrap runs."""

    def __init__(self, store: Store, workers: int = 1) -> None:
        self.store = store
        self.workers = max(1, workers)
        self._executor: ThreadPoolExecutor | None = None
        self._lock = threading.Lock()
        self.futures: dict[int, Future[None]] = {}

    def start(self) -> None:
        with self._lock:
            if self._executor is None:
                self._executor = ThreadPoolExecutor(self.workers, thread_name_prefix="helmshift-run")

    def submit(self, run_id: int) -> None:
        """Queue a stored run; without a started pool (tests, CLI) it runs here and now."""
        with self._lock:
            executor = self._executor
            if executor is not None:
                self.futures[run_id] = executor.submit(self._execute, run_id)
                return
        self._execute(run_id)

    def wait(self, run_id: int, timeout: float | None = None) -> None:
        future = self.futures.get(run_id)
        if future is not None:
            future.result(timeout=timeout)

    def _execute(self, run_id: int) -> None:
        try:
            execute_bootstrap(self.store, run_id)
        except RunCancelled:
            self.store.set_run_status(run_id, "cancelled", error="Stopped at the analyst's request.")
        except Exception as exc:  # a crashed run is marked with its reason, never dropped silently
            self.store.set_run_status(run_id, "failed", error=failure_message(exc))
            # one line for the server log, no traceback: the run page carries the message
            logger.warning("bootstrap run %s failed: %s", run_id, failure_message(exc))

    def shutdown(self) -> None:
        with self._lock:
            executor, self._executor = self._executor, None
        if executor is not None:
            for run_id, future in self.futures.items():
                if not future.done():
                    self.store.request_cancel(run_id)
            executor.shutdown(wait=True, cancel_futures=True)
        self.store.mark_interrupted()


def run_bootstrap_now(store: Store, inp: AnalysisInput, *, unit: str, resamples: int, seed: int,
                      model: str = "linear", **options: Any) -> dict[str, Any]:
    """The command line's synchronous bootstrap: store the run, compute it, return the JSON summary.

    ``options`` are :func:`bootstrap_params`' statistic options (statistic, sector, spline_df, periods,
    stratify)."""
    params = bootstrap_params(unit=unit, resamples=resamples, seed=seed, model=model, **options)
    run_id = create_bootstrap_run(store, inp, params)
    try:
        result = execute_bootstrap(store, run_id)
    except Exception as exc:
        store.set_run_status(run_id, "failed", error=failure_message(exc))
        raise
    result["run"] = run_id
    return result


def replicate_odds_ratios(store: Store, run_id: int) -> np.ndarray:
    """The stored bootstrap odds ratios of a run (NaN where a resample's fit failed)."""
    return np.exp(store.replicates(run_id))
