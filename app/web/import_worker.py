"""Imports and dry runs in a separate process, so a large file never holds this server's interpreter lock.

Reading, checking and framing a 400,000-row roster keeps pandas and the row checks busy for seconds with the
GIL held; in a thread of the server that stalls every other request (issue 11: /api/health waited up to 1.3 s).
Here the work runs in a small pool of worker processes (created on first use, shut down with the app) that
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
  one sentence. The broken pool is dropped and the next import gets a fresh one.
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


def _watch_server(server_pid: int) -> None:
    """The workers' initializer: a daemon thread that ends this worker as soon as ``server_pid`` is gone."""

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


# -- the pool ------------------------------------------------------------------------------------------------

_lock = threading.Lock()
_pool: ProcessPoolExecutor | None = None


def _context() -> Any:
    if "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload([__name__])
        return context
    return multiprocessing.get_context("spawn")


def _current_pool() -> ProcessPoolExecutor:
    global _pool
    with _lock:
        if _pool is None:
            _pool = ProcessPoolExecutor(max_workers=WORKERS, mp_context=_context(), initializer=_watch_server,
                                        initargs=(os.getpid(),))
        return _pool


def _drop(pool: ProcessPoolExecutor) -> None:
    """Forget a broken pool (the next task makes a new one)."""
    global _pool
    with _lock:
        if _pool is pool:
            _pool = None
    pool.shutdown(wait=False, cancel_futures=True)


def shutdown() -> None:
    """Stop the workers (the app's shutdown): an import under way finishes first, queued ones are cancelled."""
    global _pool
    with _lock:
        pool, _pool = _pool, None
    if pool is not None:
        pool.shutdown(wait=True, cancel_futures=True)


def worker_pids() -> list[int]:
    """The worker processes alive now (for tests and diagnostics)."""
    with _lock:
        pool = _pool
    processes = getattr(pool, "_processes", None) or {}
    return [pid for pid, process in list(processes.items()) if process.is_alive()]


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
    for attempt in (1, 2):
        pool = _current_pool()
        try:
            future: Future[Any] = pool.submit(_work, task, url, actor, args, kwargs)
        except (BrokenProcessPool, RuntimeError):
            # broken by another task's worker, or shut down meanwhile: nothing ran yet, so a new pool may try
            _drop(pool)
            if attempt == 2:
                raise WorkerLost() from None
            continue
        try:
            return future.result()
        except (BrokenProcessPool, CancelledError):
            _drop(pool)
            raise WorkerLost() from None
    raise WorkerLost()  # not reached: the loop returns or raises


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
