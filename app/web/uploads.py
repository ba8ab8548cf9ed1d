"""Holds an uploaded file between the preview and the confirm step, in memory, keyed by a random token.

The file's own name is kept only as a label; it never becomes a path on disk.
"""

from __future__ import annotations

import secrets
import threading
import time
from dataclasses import dataclass


@dataclass(frozen=True)
class PendingUpload:
    token: str
    filename: str
    data: bytes
    created: float


class UploadStash:
    """A small, bounded, thread-safe stash of files waiting for the analyst to confirm column roles."""

    def __init__(self, max_items: int = 4, ttl_seconds: float = 3600) -> None:
        self._items: dict[str, PendingUpload] = {}
        self._lock = threading.Lock()
        self.max_items = max_items
        self.ttl = ttl_seconds

    def put(self, filename: str, data: bytes) -> PendingUpload:
        item = PendingUpload(secrets.token_urlsafe(18), filename, data, time.monotonic())
        with self._lock:
            self._expire()
            while len(self._items) >= self.max_items:
                oldest = min(self._items.values(), key=lambda p: p.created)
                del self._items[oldest.token]
            self._items[item.token] = item
        return item

    def get(self, token: str) -> PendingUpload | None:
        with self._lock:
            self._expire()
            return self._items.get(token)

    def drop(self, token: str) -> None:
        with self._lock:
            self._items.pop(token, None)

    def _expire(self) -> None:
        now = time.monotonic()
        for token in [t for t, p in self._items.items() if now - p.created > self.ttl]:
            del self._items[token]
