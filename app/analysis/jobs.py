"""Background bootstrap runs: stored before they start, run off the request path, watched, stoppable.

A run row is written (status ``queued``) before any work starts, with everything needed to replay it:
roster fingerprint, mapping version, window, model, unit, B and seed. Any server process on the
store may run it: each one's :class:`JobRunner` claims queued runs (``Store.claim_run``: exactly one worker
wins a run) and runs them in worker threads in chunks, appending the replicate estimates and the progress
after each chunk (only while it still holds the claim) and checking for a cancel request between chunks.
Numpy releases the GIL in the heavy parts, so the server stays responsive. A worker beats a heartbeat into
each run it holds; a running run whose heartbeat is older than the stale limit lost its worker (a crash, a
killed process) and is marked ``interrupted`` by any server on the store (``Store.reap_stale_runs``); it can
be started again and continues from its stored replicates.
"""

from __future__ import annotations

import functools
import logging
import os
import socket
import threading
import time
import uuid
from collections.abc import Callable, Collection
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np

from app.analysis.inputs import AnalysisInput, input_for_run
from app.analysis.run_params import (
    MAX_RESAMPLES,
    _resolve,
    bootstrap_params,
    cells_for,
    statistic_for,
    strata_for,
)
from app.stats.bootstrap import BLOCK_SIZE, Replicates, bootstrap_to_dict, draw_statistic, summarise_statistic
from app.stats.cells import Cells
from app.stats.statistics import Statistic
from app.store import INTERRUPTED, Run, RunClaimLost, Store, StoreError

#: resamples per stored chunk; progress and cancel are checked this often
CHUNK = 4 * BLOCK_SIZE
#: seconds between a worker's heartbeats, and the age after which another server treats a heartbeat as a dead
#: worker's (``helmshift serve`` reads HELMSHIFT_JOB_HEARTBEAT and HELMSHIFT_JOB_STALE_AFTER)
HEARTBEAT_SECONDS = 2.0
STALE_AFTER_SECONDS = 30.0
#: how often an idle runner looks for runs queued by another process
POLL_SECONDS = 1.0


logger = logging.getLogger("helmshift.jobs")


class RunCancelled(Exception):
    pass


class RunStopped(Exception):
    """The server is shutting down: the run is left ``interrupted``, to be finished later."""


@functools.cache
def _machine() -> str:
    """This machine and process namespace: host name, boot id and pid namespace (Linux), so that two
    containers with one host name never take each other's process ids for their own."""
    parts = [socket.gethostname()]
    try:
        parts.append(Path("/proc/sys/kernel/random/boot_id").read_text().strip()[:8])
        parts.append(os.readlink("/proc/self/ns/pid").strip("pid:[]"))
    except OSError:
        pass
    return "/".join(parts)


def worker_name() -> str:
    """A name for one runner that no other process on any machine shares: machine, process id, random part."""
    return f"{_machine()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"


def _dead_here(worker: str) -> bool:
    """True when ``worker`` ran on this machine in a process that no longer exists."""
    parts = worker.rsplit(":", 2)  # host names, boot ids and namespace numbers hold no colon
    if len(parts) != 3 or parts[0] != _machine() or not parts[1].isdecimal():
        return False
    pid = parts[1]
    if int(pid) == os.getpid():  # this very process: its runs are alive, or handled by its own shutdown
        return False
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return True
    except OSError:  # it exists but belongs to someone else
        return False
    return False


def reap_lost_runs(store: Store, stale_after: float) -> list[int]:
    """Mark interrupted the running runs whose worker is gone: silent for ``stale_after`` seconds, or (at once)
    a process of this machine that no longer exists, such as a server killed and started again."""
    dead = [w for w in store.running_workers() if _dead_here(w)]
    return sorted(set(store.release_runs(*dead)) | set(store.reap_stale_runs(stale_after)))


class Heartbeat:
    """A thread that tells the store, every ``interval`` seconds, that ``worker`` is alive and working on the
    runs ``runs()`` names (``with Heartbeat(...):`` around the work)."""

    def __init__(self, store: Store, worker: str, runs: Callable[[], Collection[int]],
                 interval: float = HEARTBEAT_SECONDS) -> None:
        self.store, self.worker, self.runs, self.interval = store, worker, runs, interval
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._beat, name="helmshift-heartbeat", daemon=True)

    def _beat(self) -> None:
        while not self._stop.wait(self.interval):
            try:
                self.store.heartbeat(self.worker, list(self.runs()))
            except Exception as exc:  # a database hiccup: the next beat tries again; a dead worker stops beating
                logger.warning("heartbeat of %s failed: %s", self.worker, failure_message(exc))

    def __enter__(self) -> Heartbeat:
        self._thread.start()
        return self

    def __exit__(self, *exc: type[BaseException] | BaseException | TracebackType | None) -> None:
        self._stop.set()
        self._thread.join()


def failure_message(exc: Exception) -> str:
    """What a failed run says: our own errors (ValueError and subclasses) carry a sentence for the analyst;
    anything else is named as an internal error, still in one sentence."""
    text = " ".join(str(exc).split()) or exc.__class__.__name__
    if isinstance(exc, ValueError | LookupError):
        return text
    return f"The run stopped on an internal error ({exc.__class__.__name__}: {text}); start it again or report it."


def create_bootstrap_run(store: Store, inp: AnalysisInput, params: dict[str, Any], *,
                         claimed_by: str | None = None) -> int:
    """Store a queued run (or one already running and held by ``claimed_by``) with everything needed to
    reproduce it; return its id."""
    params = _resolve(inp, params)
    cells = cells_for(inp, params, firms=False)
    return store.create_run(
        kind="bootstrap", roster_id=inp.roster.id, params=params, fingerprint=cells.fingerprint(),
        mapping_name=inp.mapping.name if inp.mapping else None,
        mapping_version=inp.mapping.version if inp.mapping else None, window=inp.window,
        progress_total=params["resamples"], roster_version=inp.roster.version, claimed_by=claimed_by,
    )


def execute_bootstrap(store: Store, run_id: int, *, worker: str | None = None,
                      stopping: Callable[[], bool] | None = None) -> dict[str, Any]:
    """Run (or continue) a stored bootstrap run to its requested number of resamples. ``worker`` holds the
    run's claim and beats its heartbeat; without one, the queued run is claimed here and beaten here."""
    if worker is None:
        worker = worker_name()
        if store.claim_run(worker, run_id) is None:
            raise StoreError(f"Run {run_id} is not waiting to run (it is {store.get_run(run_id).status}).")
        with Heartbeat(store, worker, lambda: (run_id,)):
            return _execute_claimed(store, run_id, worker, stopping)
    return _execute_claimed(store, run_id, worker, stopping)


@dataclass(frozen=True)
class RunDraw:
    """What a stored bootstrap run draws from and how: its cells (as its fingerprint says), statistic, strata
    and parameters. The job and ``app.analysis.run_check`` draw and summarise through it, so a redraw is the
    job's draw."""

    cells: Cells
    statistic: Statistic
    strata: np.ndarray | None
    params: dict[str, Any]

    @classmethod
    def of(cls, store: Store, run: Run) -> RunDraw:
        params = run.params
        inp = input_for_run(store, run)
        cells = cells_for(inp, params)
        if cells.fingerprint() != run.fingerprint:
            raise ValueError("The roster's counts no longer match this run's fingerprint; start a new run.")
        statistic = statistic_for(params, cells)
        return cls(cells, statistic, strata_for(inp, params, cells), params)

    @property
    def sampler(self) -> int:
        return int(self.params.get("sampler", 1))  # runs stored before samplers were recorded drew with sampler 1

    def chunk(self, start: int) -> Replicates:
        """The stored chunk of resamples that begins at ``start`` (a stream's draws depend on where it begins)."""
        return draw_statistic(self.cells, self.statistic.evaluate, unit=self.params["unit"],
                              resamples=min(CHUNK, int(self.params["resamples"]) - start), seed=self.params["seed"],
                              start=start, strata=self.strata, sampler=self.sampler)

    def summary(self, replicates: Replicates) -> dict[str, Any]:
        """The run's result (intervals, Monte Carlo errors, jackknife) from its replicates."""
        return bootstrap_to_dict(summarise_statistic(
            self.cells, self.statistic, replicates, unit=self.params["unit"], seed=self.params["seed"],
            stratified=self.strata is not None, sampler=self.sampler))


def _execute_claimed(store: Store, run_id: int, worker: str, stopping: Callable[[], bool] | None) -> dict[str, Any]:
    run = store.get_run(run_id)
    draw = RunDraw.of(store, run)
    draw.statistic.original(draw.cells)  # fails fast, before anything is drawn
    target = int(draw.params["resamples"])
    done = len(store.replicates(run_id))
    store.set_run_progress(run_id, done, target)
    spent = float(run.seconds or 0.0)
    while done < target:
        if store.cancel_requested(run_id):
            raise RunCancelled()
        if stopping is not None and stopping():
            raise RunStopped()
        block = draw.chunk(done)
        spent += block.seconds
        # written only while this worker still holds the run, with the progress, in one transaction
        store.append_replicates(run_id, block.estimates, block.failure.tolist(), block.standard_errors,
                                worker=worker, progress=done + len(block.estimates))
        done += len(block.estimates)
    estimates, failures = store.replicates_with_failures(run_id)
    started = time.perf_counter()
    result = draw.summary(Replicates(0, estimates, failures, spent, store.replicate_standard_errors(run_id)))
    spent += time.perf_counter() - started
    result["seconds"] = spent
    store.finish_run(run_id, result, seconds=spent, worker=worker)
    return result


def extend_run(store: Store, run_id: int, extra: int) -> None:
    """Ask for ``extra`` more resamples; the first ones are kept, the stream continues where it stopped."""
    run = store.get_run(run_id)
    if run.status in ("queued", "running"):
        raise StoreError(f"Run {run_id} is still going; wait for it to end before extending it.")
    params = dict(run.params)
    left = MAX_RESAMPLES - int(params["resamples"])
    if not 0 <= extra <= left:
        raise ValueError(f"extra can add 0 to {left:,} resamples to this run (it has {int(params['resamples']):,} of "
                         f"at most {MAX_RESAMPLES:,}); got {extra:,}.")
    # the options bootstrap_params checks; what the run filled in at creation (its universe) stays as it is
    options = {k: v for k, v in params.items() if k not in ("universe_id", "universe_fingerprint")}
    params["resamples"] = bootstrap_params(**{**options, "resamples": int(params["resamples"]) + int(extra)}
                                           )["resamples"]
    store.update_run_params(run_id, params, status="queued", was=run)


class JobRunner:
    """One server process's bootstrap worker threads, sharing the store's queue with every other process.

    Started (``start``), a dispatcher thread claims queued runs while a worker thread is free (woken at once
    by ``submit``, otherwise every ``poll`` seconds, so runs queued by another process are found too), a
    heartbeat thread beats for the runs held here, and every ``heartbeat`` seconds the dispatcher marks
    interrupted the runs of workers (in any process) silent for ``stale_after`` seconds. Not started (tests,
    command line), ``submit`` claims the run and runs it in the caller's thread.
    """

    def __init__(self, store: Store, workers: int = 1, *, heartbeat: float = HEARTBEAT_SECONDS,
                 stale_after: float = STALE_AFTER_SECONDS, poll: float = POLL_SECONDS) -> None:
        if not 0 < heartbeat < stale_after:
            raise ValueError(f"The heartbeat ({heartbeat} s) must be positive and shorter than the stale limit "
                             f"({stale_after} s).")
        self.store = store
        self.workers = max(1, workers)
        self.worker = worker_name()
        self.heartbeat, self.stale_after, self.poll = heartbeat, stale_after, poll
        self._executor: ThreadPoolExecutor | None = None
        self._lock = threading.Lock()
        self._active: set[int] = set()
        self._wake = threading.Event()
        self._stopping = threading.Event()
        self._dispatcher: threading.Thread | None = None
        self._beats: Heartbeat | None = None

    def start(self) -> None:
        with self._lock:
            if self._executor is not None:
                return
            self._executor = ThreadPoolExecutor(self.workers, thread_name_prefix="helmshift-run")
            self._beats = Heartbeat(self.store, self.worker, self._held, self.heartbeat).__enter__()
            self._dispatcher = threading.Thread(target=self._dispatch, name="helmshift-dispatch", daemon=True)
            self._dispatcher.start()

    def _held(self) -> list[int]:
        with self._lock:
            return sorted(self._active)

    def submit(self, run_id: int) -> None:
        """A run was queued: wake the dispatcher; without a started pool, claim it and run it here and now."""
        if self._executor is not None:
            self._wake.set()
            return
        if self.store.claim_run(self.worker, run_id) is None:
            return  # another worker has it (or it is not queued): that one reports its end
        with self._lock:
            self._active.add(run_id)
        with Heartbeat(self.store, self.worker, self._held, self.heartbeat):
            self._execute(run_id)

    def wait(self, run_id: int, timeout: float | None = None) -> None:
        """Wait until the run has ended, whichever process ran it (TimeoutError after ``timeout`` seconds)."""
        deadline = None if timeout is None else time.monotonic() + timeout
        while self.store.get_run(run_id).status in ("queued", "running"):
            if deadline is not None and time.monotonic() > deadline:
                raise TimeoutError(f"Run {run_id} did not end within {timeout} s.")
            time.sleep(0.05)

    def _dispatch(self) -> None:
        next_reap = 0.0
        while not self._stopping.is_set():
            try:
                if time.monotonic() >= next_reap:
                    for run_id in reap_lost_runs(self.store, self.stale_after):
                        logger.warning("bootstrap run %s lost its worker (no heartbeat for %s s); marked "
                                       "interrupted", run_id, self.stale_after)
                    next_reap = time.monotonic() + self.heartbeat
                self._claim_while_free()
            except Exception as exc:  # the database went away for a moment: try again at the next poll
                logger.warning("job dispatcher of %s: %s", self.worker, failure_message(exc))
            self._wake.wait(min(self.poll, self.heartbeat))
            self._wake.clear()

    def _claim_while_free(self) -> None:
        while not self._stopping.is_set():
            with self._lock:
                executor = self._executor
                if executor is None or len(self._active) >= self.workers:
                    return
            run_id = self.store.claim_run(self.worker)  # only this thread claims: the room cannot shrink
            if run_id is None:
                return
            with self._lock:
                self._active.add(run_id)
            logger.info("bootstrap run %s claimed by %s", run_id, self.worker)
            executor.submit(self._execute, run_id)

    def _execute(self, run_id: int) -> None:
        try:
            execute_bootstrap(self.store, run_id, worker=self.worker, stopping=self._stopping.is_set)
        except RunCancelled:
            self.store.set_run_status(run_id, "cancelled", error="Stopped at the analyst's request.",
                                      worker=self.worker)
        except RunStopped:
            self.store.set_run_status(run_id, "interrupted", error=INTERRUPTED, worker=self.worker)
        except RunClaimLost:  # another server found this worker silent and took the run over: leave it be
            logger.warning("bootstrap run %s was taken from %s after a missed heartbeat", run_id, self.worker)
        except Exception as exc:  # a crashed run is marked with its reason, never dropped silently
            self.store.set_run_status(run_id, "failed", error=failure_message(exc), worker=self.worker)
            # one line for the server log, no traceback: the run page carries the message
            logger.warning("bootstrap run %s failed: %s", run_id, failure_message(exc))
        finally:
            with self._lock:
                self._active.discard(run_id)
            self._wake.set()  # a worker thread is free: claim the next queued run

    def shutdown(self) -> None:
        """Stop claiming; runs held here stop at their next chunk and are left interrupted (resumable)."""
        self._stopping.set()
        self._wake.set()
        with self._lock:
            executor, self._executor = self._executor, None
            dispatcher, self._dispatcher = self._dispatcher, None
            beats, self._beats = self._beats, None
        if dispatcher is not None:
            dispatcher.join()
        if executor is not None:
            executor.shutdown(wait=True)
        if beats is not None:
            beats.__exit__(None, None, None)
        self.store.release_runs(self.worker)


def run_bootstrap_now(store: Store, inp: AnalysisInput, *, unit: str, resamples: int, seed: int,
                      model: str = "linear", **options: Any) -> dict[str, Any]:
    """The command line's synchronous bootstrap: store the run, compute it, return the JSON summary.

    ``options`` are :func:`bootstrap_params`' statistic options (statistic, sector, spline_df, periods,
    stratify, adjust)."""
    params = bootstrap_params(unit=unit, resamples=resamples, seed=seed, model=model, **options)
    worker = worker_name()
    # born held by this process, so a server on the same store cannot claim it between creation and start
    run_id = create_bootstrap_run(store, inp, params, claimed_by=worker)
    try:
        with Heartbeat(store, worker, lambda: (run_id,)):
            result = execute_bootstrap(store, run_id, worker=worker)
    except Exception as exc:
        store.set_run_status(run_id, "failed", error=failure_message(exc), worker=worker)
        raise
    result["run"] = run_id
    return result


def replicate_odds_ratios(store: Store, run_id: int) -> np.ndarray:
    """The stored bootstrap odds ratios of a run (NaN where a resample's fit failed)."""
    return np.exp(store.replicates(run_id))
