"""Stored runs (fits and bootstraps): status, progress, cancel requests, results and compressed replicates.
"""

from __future__ import annotations

import json
import zlib
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from sqlalchemy import (
    ColumnElement,
    Connection,
    Float,
    func,
    insert,
    literal,
    literal_column,
    or_,
    select,
    update,
)

from app.store.audit import current_actor, record_event
from app.store.engine import Gateway
from app.store.records import (
    MAX_ID,
    Run,
    StoreError,
    now_iso,
)
from app.store.tables import (
    run_replicates,
    runs,
)
from app.types import RunKind, RunStatus

#: what a run cut short by a stopped or vanished server says; ``extend`` with 0 more resamples finishes it
INTERRUPTED = "The server stopped while this run was in progress; start it again to finish it."


class RunClaimLost(StoreError):
    """The worker no longer holds the run (another server found its heartbeat stale): it must stop writing."""


def db_clock(conn: Connection) -> ColumnElement[float]:
    """The database's own clock in seconds since 1970: every server judges heartbeats by one clock, so the
    servers' own clocks may disagree. SQLAlchemy has no portable "now as a number", hence one per dialect."""
    if conn.dialect.name == "sqlite":
        return literal_column("((julianday('now') - 2440587.5) * 86400.0)", Float)
    if conn.dialect.name == "postgresql":
        return literal_column("CAST(EXTRACT(EPOCH FROM clock_timestamp()) AS DOUBLE PRECISION)", Float)
    import time  # another server database: the app's clock is the best there is

    return literal(time.time(), Float)


class RunQueries(Gateway):
    """Reads and writes of runs and their replicates."""

    def create_run(
        self, *, kind: RunKind, roster_id: int, params: Mapping[str, Any], fingerprint: str,
        mapping_name: str | None, mapping_version: int | None, window: tuple[int, int] | None,
        status: RunStatus = "queued", progress_total: int = 0, roster_version: int = 1,
        claimed_by: str | None = None,
    ) -> int:
        """Store a run; with ``claimed_by`` it is born running and held by that worker (the command line's
        synchronous runs), so no server on the same store can claim it in between."""
        claim: dict[str, Any] = {}
        with self._tx() as conn:
            if claimed_by is not None:
                status = "running"
                claim = {"claimed_by": claimed_by, "heartbeat_at": db_clock(conn), "started_at": now_iso()}
            run_id = int(conn.execute(insert(runs).values(**claim,
                kind=kind, roster_id=roster_id, status=status, created_at=now_iso(),
                mapping_name=mapping_name, mapping_version=mapping_version,
                window_from=window[0] if window else None, window_to=window[1] if window else None,
                params=json.dumps(dict(params)), fingerprint=fingerprint, progress_done=0,
                progress_total=progress_total, cancel_requested=False, author=current_actor(),
                roster_version=roster_version,
            )).inserted_primary_key[0])  # type: ignore[index]
            record_event(conn, "run_start", f"run:{run_id}", {"kind": kind, "roster": roster_id, **params})
            return run_id

    def _run_from_row(self, row: Any) -> Run:
        m = row._mapping
        window = (m["window_from"], m["window_to"]) if m["window_from"] is not None else None
        return Run(
            id=m["id"], kind=m["kind"], roster_id=m["roster_id"], status=m["status"],
            created_at=m["created_at"], started_at=m["started_at"], finished_at=m["finished_at"],
            mapping_name=m["mapping_name"], mapping_version=m["mapping_version"], window=window,
            params=json.loads(m["params"]), fingerprint=m["fingerprint"],
            progress_done=m["progress_done"], progress_total=m["progress_total"],
            cancel_requested=bool(m["cancel_requested"]), author=m["author"],
            roster_version=int(m["roster_version"] or 1),
            result=json.loads(m["result"]) if m["result"] else None, error=m["error"], seconds=m["seconds"],
        )

    def get_run(self, run_id: int) -> Run:
        if not 0 < run_id <= MAX_ID:
            raise StoreError(f"No run number {run_id} is stored.")
        with self.engine.connect() as conn:
            row = conn.execute(select(runs).where(runs.c.id == run_id)).first()
        if row is None:
            raise StoreError(f"No run number {run_id} is stored.")
        return self._run_from_row(row)

    def list_runs(self, roster_id: int | None = None, kind: RunKind | None = None) -> list[Run]:
        q = select(runs).order_by(runs.c.id.desc())
        if roster_id is not None:
            q = q.where(runs.c.roster_id == roster_id)
        if kind is not None:
            q = q.where(runs.c.kind == kind)
        with self.engine.connect() as conn:
            return [self._run_from_row(r) for r in conn.execute(q)]

    def set_run_status(self, run_id: int, status: RunStatus, *, error: str | None = None,
                       worker: str | None = None) -> bool:
        """Set a run's status; with ``worker``, only while that worker holds it (False when it does not)."""
        values: dict[str, Any] = {"status": status}
        if status == "running":
            values["started_at"] = now_iso()
        if status in ("done", "failed", "cancelled", "interrupted"):
            values["finished_at"] = now_iso()
        if error is not None:
            values["error"] = error
        with self._tx() as conn:
            return bool(conn.execute(self._held(run_id, worker).values(**values)).rowcount)

    @staticmethod
    def _held(run_id: int, worker: str | None) -> Any:
        """UPDATE of one run, restricted to the worker's claim when one is named."""
        stmt = update(runs).where(runs.c.id == run_id)
        if worker is not None:
            stmt = stmt.where(runs.c.claimed_by == worker, runs.c.status == "running")
        return stmt

    def claim_run(self, worker: str, run_id: int | None = None) -> int | None:
        """Claim one queued run (``run_id``, or the oldest) for ``worker``: mark it running and held by it.
        Exactly one worker wins a run, whichever process it lives in; None when there is nothing to claim.
        PostgreSQL: the candidate row is locked with SELECT ... FOR UPDATE SKIP LOCKED, so workers never wait
        on each other; SQLite: one UPDATE whose ``status = 'queued'`` condition is the claim (a SELECT first
        would make the transaction a reader that cannot become the writer once another claim has committed)."""
        pick = select(runs.c.id).where(runs.c.status == "queued").order_by(runs.c.id).limit(1)
        if run_id is not None:
            pick = pick.where(runs.c.id == run_id)
        if not self._any(pick):
            return None
        with self._tx() as conn:
            if conn.dialect.name == "postgresql":
                found = conn.execute(pick.with_for_update(skip_locked=True)).scalar()
                if found is None:
                    return None
                target: Any = runs.c.id == found
            else:
                target = runs.c.id == pick.scalar_subquery()
            claimed = conn.execute(update(runs).where(target, runs.c.status == "queued").values(
                status="running", claimed_by=worker, heartbeat_at=db_clock(conn), started_at=now_iso(),
                finished_at=None, error=None).returning(runs.c.id)).scalar()
        return None if claimed is None else int(claimed)

    def _any(self, query: Any) -> bool:
        """Whether ``query`` finds a row, read outside any write: every server polls the queue every second,
        and on SQLite an UPDATE takes the database's one write lock even when it changes nothing."""
        with self.engine.connect() as conn:
            return conn.execute(query).first() is not None

    def heartbeat(self, worker: str, run_ids: Sequence[int]) -> list[int]:
        """Record that ``worker`` is alive and working on ``run_ids``; the ids it still holds."""
        if not run_ids:
            return []
        with self._tx() as conn:
            held = conn.execute(update(runs).where(
                runs.c.id.in_(list(run_ids)), runs.c.claimed_by == worker, runs.c.status == "running",
            ).values(heartbeat_at=db_clock(conn)).returning(runs.c.id)).scalars().all()
        return sorted(int(i) for i in held)

    def reap_stale_runs(self, stale_after: float) -> list[int]:
        """Mark interrupted every running run whose worker has not beaten for ``stale_after`` seconds (by the
        database clock), or that no worker holds (left by a version without heartbeats); their ids."""
        if not self._any(select(runs.c.id).where(runs.c.status == "running").limit(1)):
            return []
        with self._tx() as conn:
            if conn.dialect.name == "postgresql":
                # a worker frozen inside its own write holds that run's row lock: do not wait on it for ever
                conn.exec_driver_sql("SET LOCAL lock_timeout = '5s'")
            stale = or_(runs.c.heartbeat_at.is_(None), runs.c.claimed_by.is_(None),
                        runs.c.heartbeat_at < db_clock(conn) - float(stale_after))
            ids = conn.execute(update(runs).where(runs.c.status == "running", stale).values(
                status="interrupted", finished_at=now_iso(), error=INTERRUPTED,
            ).returning(runs.c.id)).scalars().all()
        return sorted(int(i) for i in ids)

    def running_workers(self) -> set[str]:
        """The workers holding running runs."""
        with self.engine.connect() as conn:
            return {w for w in conn.execute(select(runs.c.claimed_by).where(
                runs.c.status == "running", runs.c.claimed_by.is_not(None)).distinct()).scalars()}

    def release_runs(self, *workers: str) -> list[int]:
        """Mark interrupted the runs these workers still hold (stopping, or known dead); their ids."""
        if not workers:
            return []
        with self._tx() as conn:
            ids = conn.execute(update(runs).where(
                runs.c.claimed_by.in_(workers), runs.c.status == "running",
            ).values(status="interrupted", finished_at=now_iso(), error=INTERRUPTED).returning(runs.c.id)).scalars().all()
        return sorted(int(i) for i in ids)

    def set_run_progress(self, run_id: int, done: int, total: int | None = None) -> None:
        values: dict[str, Any] = {"progress_done": done}
        if total is not None:
            values["progress_total"] = total
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(**values))

    def finish_run(self, run_id: int, result: Mapping[str, Any], *, seconds: float,
                   status: RunStatus = "done", worker: str | None = None) -> None:
        """Store a run's result; with ``worker``, only while it holds the run (RunClaimLost otherwise)."""
        with self._tx() as conn:
            if not conn.execute(self._held(run_id, worker).values(
                status=status, result=json.dumps(dict(result)), seconds=seconds, finished_at=now_iso(),
            )).rowcount and worker is not None:
                raise RunClaimLost(f"Run {run_id} is no longer held by {worker}.")

    def update_run_params(self, run_id: int, params: Mapping[str, Any], *, status: RunStatus,
                          was: Run | None = None) -> None:
        """Change a run's parameters (extending B) and its status, keeping its stored replicates.

        With ``was`` (the run as read before the change) the change is made only while the run still has that
        status and resample count: two processes extending one run from the same reading would otherwise both
        write, the later replacing the earlier (StoreError for the later one instead)."""
        where = [runs.c.id == run_id]
        if was is not None:
            where += [runs.c.status == was.status, runs.c.progress_total == was.progress_total]
        with self._tx() as conn:
            changed = conn.execute(update(runs).where(*where).values(
                params=json.dumps(dict(params)), status=status, cancel_requested=False, error=None,
                progress_total=int(params.get("resamples", 0)), finished_at=None,
            )).rowcount
            if was is not None and not changed:
                raise StoreError(f"Run {run_id} changed while you were extending it (another page or server "
                                 "extended or finished it); reload its page and extend it again if needed.")
            record_event(conn, "run_extend", f"run:{run_id}", {"resamples": params.get("resamples")})

    def request_cancel(self, run_id: int) -> None:
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(cancel_requested=True))
            record_event(conn, "run_cancel", f"run:{run_id}")

    def cancel_requested(self, run_id: int) -> bool:
        with self.engine.connect() as conn:
            return bool(conn.execute(select(runs.c.cancel_requested).where(runs.c.id == run_id)).scalar())

    def append_replicates(self, run_id: int, values: np.ndarray, failures: Sequence[str] | None = None,
                          standard_errors: np.ndarray | None = None, *,
                          worker: str | None = None, progress: int | None = None) -> None:
        """Append a block of replicate estimates (float64), their failure reasons and (where the statistic has
        one) their standard errors to a run, compressed. With ``worker`` the block is written only while that
        worker holds the run (RunClaimLost otherwise: nothing is written), in one transaction with its
        ``progress`` and a heartbeat."""
        data = zlib.compress(np.ascontiguousarray(values, dtype="<f8").tobytes(), 6)
        errors = None
        if standard_errors is not None:
            if len(standard_errors) != len(values):
                raise StoreError("one standard error per replicate is needed")
            errors = zlib.compress(np.ascontiguousarray(standard_errors, dtype="<f8").tobytes(), 6)
        reasons = list(failures) if failures is not None else [""] * len(values)
        if len(reasons) != len(values):
            raise StoreError("one failure reason per replicate is needed")
        packed = zlib.compress("\n".join(str(r) for r in reasons).encode(), 6)
        with self._tx() as conn:
            if worker is not None:
                values_now: dict[str, Any] = {"heartbeat_at": db_clock(conn)}
                if progress is not None:
                    values_now["progress_done"] = progress
                # first, so that on PostgreSQL the row lock is held before any replicate is written
                if not conn.execute(self._held(run_id, worker).values(**values_now)).rowcount:
                    raise RunClaimLost(f"Run {run_id} is no longer held by {worker}.")
            seq = conn.execute(
                select(func.coalesce(func.max(run_replicates.c.seq), -1)).where(run_replicates.c.run_id == run_id)
            ).scalar_one() + 1
            conn.execute(insert(run_replicates).values(run_id=run_id, seq=seq, count=len(values), data=data,
                                                       failures=packed, standard_errors=errors))

    def replicates(self, run_id: int) -> np.ndarray:
        """All stored replicate estimates of a run, in resample order."""
        return self.replicates_with_failures(run_id)[0]

    def replicates_with_failures(self, run_id: int) -> tuple[np.ndarray, np.ndarray]:
        """(estimates, failure reasons) of a run, in resample order; reason "" means the fit worked."""
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(run_replicates.c.data, run_replicates.c.failures, run_replicates.c.count)
                .where(run_replicates.c.run_id == run_id).order_by(run_replicates.c.seq)).fetchall()
        if not rows:
            return np.empty(0), np.empty(0, dtype=object)
        values = np.concatenate([np.frombuffer(zlib.decompress(r[0]), dtype="<f8") for r in rows])
        reasons: list[str] = []
        for r in rows:
            part = zlib.decompress(r[1]).decode().split("\n")
            reasons.extend(part if r[2] else [])
        return values, np.array(reasons, dtype=object)

    def replicate_standard_errors(self, run_id: int) -> np.ndarray | None:
        """Each stored resample's standard error, in resample order; None unless every chunk has them."""
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(run_replicates.c.standard_errors).where(run_replicates.c.run_id == run_id)
                .order_by(run_replicates.c.seq)).fetchall()
        if not rows or any(r[0] is None for r in rows):
            return None
        return np.concatenate([np.frombuffer(zlib.decompress(r[0]), dtype="<f8") for r in rows])
