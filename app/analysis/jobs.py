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
from app.stats.bootstrap import BLOCK_SIZE, bootstrap_to_dict, draw_replicates, summarise_replicates
from app.stats.design import design_matrix, window_centre
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


def bootstrap_params(*, unit: str, resamples: int, seed: int, model: str = "linear") -> dict[str, Any]:
    check_choice(unit, UNITS, "unit")
    check_choice(model, ("linear", "sector"), "model")
    if not 100 <= resamples <= MAX_RESAMPLES:
        raise ValueError(f"resamples must be between 100 and {MAX_RESAMPLES}; got {resamples}.")
    if not 0 <= seed < 2**63:
        raise ValueError(f"seed must be a non-negative integer below 2**63; got {seed}.")
    return {"unit": unit, "resamples": int(resamples), "seed": int(seed), "model": model}


def create_bootstrap_run(store: Store, inp: AnalysisInput, params: dict[str, Any]) -> int:
    """Store a queued run with everything needed to reproduce it; return its id."""
    cells = inp.group_cells(by_sector=params["model"] == "sector")
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
    by_sector = params["model"] == "sector"
    cells = inp.cells(by_sector=by_sector)
    if cells.fingerprint() != run.fingerprint:
        raise ValueError("The roster's counts no longer match this run's fingerprint; start a new run.")
    design = design_matrix(cells.groups, params["model"], window_centre(inp.window))
    target = int(params["resamples"])
    done = len(store.replicates(run_id))
    store.set_run_status(run_id, "running")
    store.set_run_progress(run_id, done, target)
    spent = float(run.seconds or 0.0)
    while done < target:
        if store.cancel_requested(run_id):
            raise RunCancelled()
        block = draw_replicates(cells, design, unit=params["unit"], resamples=min(CHUNK, target - done),
                                seed=params["seed"], start=done)
        spent += block.seconds
        store.append_replicates(run_id, block.estimates, block.failure.tolist())
        done += len(block.estimates)
        store.set_run_progress(run_id, done)
    estimates, failures = store.replicates_with_failures(run_id)
    started = time.perf_counter()
    summary = summarise_replicates(cells, design, estimates, failures, unit=params["unit"], seed=params["seed"],
                                   seconds=spent)
    spent += time.perf_counter() - started
    result = bootstrap_to_dict(summary)
    result["seconds"] = spent
    store.finish_run(run_id, result, seconds=spent)
    return result


def extend_run(store: Store, run_id: int, extra: int) -> None:
    """Ask for ``extra`` more resamples; the first ones are kept, the stream continues where it stopped."""
    run = store.get_run(run_id)
    params = dict(run.params)
    params["resamples"] = bootstrap_params(
        unit=params["unit"], resamples=int(params["resamples"]) + int(extra), seed=params["seed"],
        model=params["model"])["resamples"]
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
                      model: str = "linear") -> dict[str, Any]:
    """The command line's synchronous bootstrap: store the run, compute it, return the JSON summary."""
    params = bootstrap_params(unit=unit, resamples=resamples, seed=seed, model=model)
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
