"""Stored runs (fits and bootstraps): status, progress, cancel requests, results and compressed replicates.
"""

from __future__ import annotations

import json
import zlib
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from sqlalchemy import (
    func,
    insert,
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


class RunQueries(Gateway):
    """Reads and writes of runs and their replicates."""

    def create_run(
        self, *, kind: RunKind, roster_id: int, params: Mapping[str, Any], fingerprint: str,
        mapping_name: str | None, mapping_version: int | None, window: tuple[int, int] | None,
        status: RunStatus = "queued", progress_total: int = 0, roster_version: int = 1,
    ) -> int:
        with self._tx() as conn:
            run_id = int(conn.execute(insert(runs).values(
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

    def set_run_status(self, run_id: int, status: RunStatus, *, error: str | None = None) -> None:
        values: dict[str, Any] = {"status": status}
        if status == "running":
            values["started_at"] = now_iso()
        if status in ("done", "failed", "cancelled", "interrupted"):
            values["finished_at"] = now_iso()
        if error is not None:
            values["error"] = error
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(**values))

    def set_run_progress(self, run_id: int, done: int, total: int | None = None) -> None:
        values: dict[str, Any] = {"progress_done": done}
        if total is not None:
            values["progress_total"] = total
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(**values))

    def finish_run(self, run_id: int, result: Mapping[str, Any], *, seconds: float,
                   status: RunStatus = "done") -> None:
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(
                status=status, result=json.dumps(dict(result)), seconds=seconds, finished_at=now_iso(),
            ))

    def update_run_params(self, run_id: int, params: Mapping[str, Any], *, status: RunStatus) -> None:
        """Change a run's parameters (extending B) and its status, keeping its stored replicates."""
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(
                params=json.dumps(dict(params)), status=status, cancel_requested=False, error=None,
                progress_total=int(params.get("resamples", 0)), finished_at=None,
            ))
            record_event(conn, "run_extend", f"run:{run_id}", {"resamples": params.get("resamples")})

    def request_cancel(self, run_id: int) -> None:
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.id == run_id).values(cancel_requested=True))
            record_event(conn, "run_cancel", f"run:{run_id}")

    def cancel_requested(self, run_id: int) -> bool:
        with self.engine.connect() as conn:
            return bool(conn.execute(select(runs.c.cancel_requested).where(runs.c.id == run_id)).scalar())

    def mark_interrupted(self) -> list[int]:
        """Mark every run left queued or running (by a crash or a stop) as interrupted."""
        with self._tx() as conn:
            ids = [r[0] for r in conn.execute(
                select(runs.c.id).where(runs.c.status.in_(("queued", "running"))))]
            if ids:
                conn.execute(update(runs).where(runs.c.id.in_(ids)).values(
                    status="interrupted", finished_at=now_iso(),
                    error="The server stopped while this run was in progress; start it again to finish it.",
                ))
        return ids

    def append_replicates(self, run_id: int, values: np.ndarray, failures: Sequence[str] | None = None,
                          standard_errors: np.ndarray | None = None) -> None:
        """Append a block of replicate estimates (float64), their failure reasons and (where the statistic has
        one) their standard errors to a run, compressed."""
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
