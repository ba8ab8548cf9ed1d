"""Imports and dry runs in a separate process, so a large file never holds this server's interpreter lock.

Reading, checking and framing a 400,000-row roster keeps pandas and the row checks busy for seconds with the
GIL held; in a thread of the server that stalls every other request (issue 11: /api/health waited up to 1.3 s).
Here the work runs in a few worker processes (each created on first use, shut down with the app) that
open their own store from the database URL and write the import in their own single transaction. The parent
thread only waits for the answer, with the GIL released.

* Who is acting travels with the task: the worker records the audit event as the signed-in user, in the
  import's own transaction, exactly as an in-process import would.
* The intake errors come back as the same exception classes with the same messages (and the rejected rows or
  the roster already holding the file), so every route answers as before. They are rebuilt here because
  ``DuplicateRosterError`` and ``NoValidRowsError`` take other arguments than their message and would not
  survive pickling as they are.
* A worker that dies (killed, out of memory) has its transaction rolled back by the database (SQLite's
  journal, PostgreSQL's closed connection); the caller gets :class:`WorkerLost` and the routes answer 503 with
  one sentence. Only that caller: each worker has an executor of its own (see "the workers" below), which is
  replaced for the next import, while an import on the other worker carries on. A worker that had died idle
  before it began the task (each counts the tasks it begins in memory shared with the server) is no loss:
  the task is handed to a fresh worker once instead.
* The start method is "forkserver" where it exists (Linux, macOS), with this module preloaded in the server
  process, so a new worker is a fork of an interpreter that has already imported pandas; "spawn" elsewhere.
  Never "fork": the server has threads (the job runner, the thread pool) that a fork would copy mid-step.
* A worker ends at once when the server process ends, even by SIGKILL, so an import nobody can be told about
  is rolled back rather than committed behind the analyst's back (as it was when imports ran in the server).
  multiprocessing's own parent sentinel cannot tell this under "forkserver" (the pipe it watches is closed
  as soon as the task is handed over), so each worker watches the server's pid itself.
* A store only this process can see (SQLite in memory) cannot be shared with a worker; its work runs in the
  calling thread instead, as before.
"""

from __future__ import annotations

import multiprocessing
import os
import queue
import select
import threading
import time
from concurrent.futures import CancelledError, Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import Any

from sqlalchemy.engine import make_url

from app.intake.ingest import (
    DuplicateRosterError,
    ImportReport,
    NoValidRowsError,
    Review,
    RosterFileError,
    import_roster,
    review_roster,
)
from app.intake.universe import UniverseReport, import_universe
from app.store import RejectedRow, Roster, Store, StoreError
from app.store.audit import acting_as, current_actor

#: worker processes at most (a second one starts only while two imports or dry runs overlap)
WORKERS = 2

LOST = ("The import stopped before it finished because its worker process ended (it may have run out of "
        "memory); nothing was stored, so try again.")


class WorkerLost(Exception):
    """The worker process ended before answering; whatever it was writing was rolled back."""

    def __init__(self, message: str = LOST) -> None:
        super().__init__(message)


@dataclass(frozen=True)
class _Failure:
    """An intake or store error raised in the worker, in a form that pickles (see the module's docstring)."""

    kind: str  # "duplicate", "no_rows", "file", "store" or "other"
    message: str
    existing: Roster | None = None
    rejected: tuple[RejectedRow, ...] = ()

    def error(self) -> Exception:
        if self.kind == "duplicate" and self.existing is not None:
            return DuplicateRosterError(self.existing)
        if self.kind == "no_rows" and self.rejected:
            return NoValidRowsError(list(self.rejected))
        if self.kind == "file":
            return RosterFileError(self.message)
        if self.kind == "store":
            return StoreError(self.message)
        return RuntimeError(self.message)  # a bug: a server error, as it would have been in-process


def _work(task: str, db_url: str | None, actor: str, args: tuple[Any, ...], kwargs: dict[str, Any]) -> Any:
    """Runs in the worker (or, for an in-memory store, in the caller): one import, universe import or dry run."""
    if _begun is not None:  # before any work: a worker that dies after this line may have written something
        with _begun.get_lock():
            _begun.value += 1
    try:
        with acting_as(actor):
            if task == "review":
                return review_roster(*args, **kwargs)
            store = Store(str(db_url))
            try:
                if task == "import":
                    return import_roster(store, *args, **kwargs)
                return import_universe(store, *args, **kwargs)
            finally:
                store.dispose()
    except DuplicateRosterError as exc:
        return _Failure("duplicate", str(exc), existing=exc.existing)
    except NoValidRowsError as exc:
        return _Failure("no_rows", str(exc), rejected=tuple(exc.rejected))
    except RosterFileError as exc:
        return _Failure("file", str(exc))
    except StoreError as exc:
        return _Failure("store", str(exc))
    except Exception as exc:  # noqa: BLE001 - any other error becomes the caller's server error, with its text
        return _Failure("other", f"{type(exc).__name__}: {exc}")


#: in a worker: its slot's count of tasks begun, shared with the server (set by :func:`_start_worker`)
_begun: Any = None


def _start_worker(server_pid: int, begun: Any) -> None:
    """The workers' initializer: count the tasks begun where the server can read it, and watch the server."""
    global _begun
    _begun = begun
    _watch_server(server_pid)


def _watch_server(server_pid: int) -> None:
    """A daemon thread that ends this worker as soon as ``server_pid`` is gone."""

    def watch() -> None:
        try:
            # Linux: a pidfd becomes readable when the process exits; no polling
            select.select([os.pidfd_open(server_pid)], [], [])
        except (AttributeError, OSError):  # no pidfd here, or the server is already gone: poll
            while True:
                try:
                    os.kill(server_pid, 0)
                except ProcessLookupError:
                    break
                except PermissionError:
                    pass
                time.sleep(0.5)
        os._exit(70)  # no clean-up on purpose: an open transaction must not commit

    threading.Thread(target=watch, name="helmshift-server-watch", daemon=True).start()


# -- the workers ----------------------------------------------------------------------------------------------
#
# Each worker process lives in its own one-process executor (a "slot"). concurrent.futures treats a pool whose
# worker died as broken as a whole: it fails every task in it and terminates the other workers. With one pool
# of two, an import killed by the out-of-memory killer took down the analyst's colleague's import running next
# to it. With a slot per worker, only the dead worker's own task fails (503); its slot gets a fresh executor
# for the next task, and a task on the other slot never notices. A caller holds a slot from submit to answer,
# so no two tasks share one; a third caller waits for a free slot (as it waited in the pool's queue before).


class _Slot:
    """One worker process at most, in an executor of its own, used by one caller at a time."""

    def __init__(self) -> None:
        # guarded by _lock (shutdown() runs in another thread): the executor and its worker's tasks-begun count
        self.executor: ProcessPoolExecutor | None = None
        self.begun: Any = None

    def ready(self) -> tuple[ProcessPoolExecutor, Any]:
        """This slot's executor and its count of tasks begun; a new one if it has none or its worker has died."""
        with _lock:
            executor = self.executor
            if executor is not None and not _alive(executor):
                self.executor = None  # died idle (killed, out of memory): nothing of anyone's was running
                executor.shutdown(wait=False, cancel_futures=True)
                executor = None
            if executor is None:
                context = _context()
                self.begun = context.Value("q", 0)
                executor = self.executor = ProcessPoolExecutor(
                    max_workers=1, mp_context=context, initializer=_start_worker,
                    initargs=(os.getpid(), self.begun))
            return executor, self.begun

    def drop(self, executor: ProcessPoolExecutor) -> None:
        """Forget a broken or shut-down executor (the next task here makes a new one)."""
        with _lock:
            if self.executor is executor:
                self.executor = None
        executor.shutdown(wait=False, cancel_futures=True)


def _alive(executor: ProcessPoolExecutor) -> bool:
    """False once the executor's worker has ended (a worker starts with the first task, so none is alive)."""
    processes = getattr(executor, "_processes", None) or {}
    return all(process.is_alive() for process in list(processes.values()))


_lock = threading.Lock()
_slots = tuple(_Slot() for _ in range(WORKERS))
# last in, first out: a lone caller keeps reusing the same warm worker; the second starts only on overlap
_free: queue.LifoQueue[_Slot] = queue.LifoQueue()
for _slot in reversed(_slots):
    _free.put(_slot)


def _context() -> Any:
    if "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload([__name__])
        return context
    return multiprocessing.get_context("spawn")


def shutdown() -> None:
    """Stop the workers (the app's shutdown): an import under way finishes first, queued ones are cancelled."""
    with _lock:
        executors = [slot.executor for slot in _slots if slot.executor is not None]
        for slot in _slots:
            slot.executor = None
    for executor in executors:
        executor.shutdown(wait=True, cancel_futures=True)


def worker_pids() -> list[int]:
    """The worker processes alive now (for tests and diagnostics)."""
    with _lock:
        executors = [slot.executor for slot in _slots if slot.executor is not None]
    processes = [item for executor in executors for item in list((getattr(executor, "_processes", None) or {}).items())]
    return [pid for pid, process in processes if process.is_alive()]


def _shared_url(url: str) -> str | None:
    """The URL as a worker process can open it (a SQLite path made absolute), or None for an in-memory store."""
    parsed = make_url(url)
    if not parsed.drivername.startswith("sqlite"):
        return url
    database = parsed.database or ""
    if database in ("", ":memory:") or "mode=memory" in url:
        return None
    if database.startswith("file:"):
        return url
    return parsed.set(database=os.path.abspath(database)).render_as_string(hide_password=False)


def _run(task: str, db_url: str | None, *args: Any, **kwargs: Any) -> Any:
    actor = current_actor()
    shared = _shared_url(db_url) if db_url is not None else None
    if db_url is not None and shared is None:
        outcome = _work(task, db_url, actor, args, kwargs)  # an in-memory store: only this process sees it
    else:
        outcome = _submit_and_wait(task, shared, actor, args, kwargs)
    if isinstance(outcome, _Failure):
        raise outcome.error()
    return outcome


def _submit_and_wait(task: str, url: str | None, actor: str, args: tuple[Any, ...], kwargs: dict[str, Any]) -> Any:
    slot = _free.get()  # waits while every worker is busy with another caller's task
    try:
        for attempt in (1, 2):
            executor, begun = slot.ready()
            before = begun.value
            try:
                future: Future[Any] = executor.submit(_work, task, url, actor, args, kwargs)
            except (BrokenProcessPool, RuntimeError):
                # its worker died idle or the app shut it down meanwhile: nothing ran yet, so a new one may try
                slot.drop(executor)
                continue
            try:
                return future.result()
            except BrokenProcessPool:
                slot.drop(executor)  # only this slot: a task on the other one runs on
                if begun.value == before and attempt == 1:
                    continue  # the worker died (idle, unnoticed yet) before it began this task: nothing ran
                raise WorkerLost() from None
            except CancelledError:  # the app is shutting down
                slot.drop(executor)
                raise WorkerLost() from None
        raise WorkerLost()
    finally:
        _free.put(slot)


# -- what the routes call --------------------------------------------------------------------------------------


def import_roster_apart(store: Store, data: bytes, filename: str, **options: Any) -> ImportReport:
    """:func:`app.intake.ingest.import_roster` in a worker process, writing to ``store``'s database."""
    report: ImportReport = _run("import", store.url, data, filename, **options)
    return report


def review_roster_apart(data: bytes, filename: str, **options: Any) -> Review:
    """:func:`app.intake.ingest.review_roster` (the dry run, storing nothing) in a worker process."""
    review: Review = _run("review", None, data, filename, **options)
    return review


def import_universe_apart(store: Store, roster_id: int, data: bytes, filename: str, **options: Any) -> UniverseReport:
    """:func:`app.intake.universe.import_universe` in a worker process, writing to ``store``'s database."""
    report: UniverseReport = _run("universe", store.url, roster_id, data, filename, **options)
    return report
