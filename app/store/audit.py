"""The audit trail: who changed what and when, written in the same transaction as the change.

Who is acting is carried by a context variable that the web layer sets per request (the signed-in account)
and the command line sets per command (the operating-system user); with neither, the change is recorded as
the local single analyst's.
"""

from __future__ import annotations

import contextvars
import json
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import Connection, insert, select

from app.store.engine import Gateway
from app.store.records import StoreError, now_iso
from app.store.tables import audit_events

LOCAL_ACTOR = "local analyst"
_actor: contextvars.ContextVar[str] = contextvars.ContextVar("helmshift_actor", default=LOCAL_ACTOR)


def current_actor() -> str:
    return _actor.get()


@contextmanager
def acting_as(name: str) -> Iterator[None]:
    """Record every change made inside the block as ``name``'s."""
    token = _actor.set(name)
    try:
        yield
    finally:
        _actor.reset(token)


def set_actor(name: str) -> contextvars.Token[str]:
    return _actor.set(name)


def reset_actor(token: contextvars.Token[str]) -> None:
    _actor.reset(token)


def record_event(conn: Connection, action: str, target: str, detail: Mapping[str, Any] | None = None,
                 *, actor: str | None = None) -> None:
    """Write one audit event on ``conn`` (inside the caller's transaction, so it commits with the change)."""
    conn.execute(insert(audit_events).values(
        at=now_iso(), actor=actor or current_actor(), action=action, target=target,
        detail=json.dumps(dict(detail or {}), sort_keys=True, default=str),
    ))


@dataclass(frozen=True)
class AuditEvent:
    id: int
    at: str
    user: str
    action: str
    target: str
    detail: dict[str, Any]


class AuditQueries(Gateway):
    """Reading the audit trail."""

    def audit_events(self, *, since: str | None = None, user: str | None = None, action: str | None = None,
                     limit: int = 1000) -> list[AuditEvent]:
        """Events newest first, optionally since an ISO time, by one user or of one action."""
        query = select(audit_events).order_by(audit_events.c.id.desc()).limit(limit)
        if since:
            # events store UTC ISO times and are compared as text: anything else would match nothing, silently
            try:
                datetime.fromisoformat(since)
            except ValueError:
                raise StoreError(f"since must be an ISO date or time such as 2026-12-01 or 2026-12-01T09:30; "
                                 f"got {since[:40]!r}.") from None
            query = query.where(audit_events.c.at >= since)
        if user:
            query = query.where(audit_events.c.actor == user)
        if action:
            query = query.where(audit_events.c.action == action)
        with self.engine.connect() as conn:
            return [AuditEvent(r.id, r.at, r.actor, r.action, r.target, json.loads(r.detail))
                    for r in conn.execute(query)]
