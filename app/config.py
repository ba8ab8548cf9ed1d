"""Runtime settings: database location, upload limit, bind address."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

DEFAULT_DB_PATH = Path("helmshift.db")
DEFAULT_UPLOAD_LIMIT = 50 * 1024 * 1024
#: data rows one roster may hold (HELMSHIFT_MAX_ROWS); a 1,000,000-row CSV imports in under 1 GB of memory
DEFAULT_MAX_ROWS = 2_000_000


def _positive_int(name: str, default: int) -> int:
    """A whole-number setting from the environment, or ``default`` when it is unset or empty."""
    value = os.environ.get(name, "").strip().replace("_", "")
    if not value:
        return default
    if not value.isdecimal() or int(value) < 1:
        raise ValueError(f"{name} must be a whole number above 0; got {os.environ[name]!r}.")
    return int(value)


def upload_limit_from_env() -> int:
    """Largest roster file in bytes (HELMSHIFT_UPLOAD_LIMIT), for browser uploads and the command line alike."""
    return _positive_int("HELMSHIFT_UPLOAD_LIMIT", DEFAULT_UPLOAD_LIMIT)


def max_rows_from_env() -> int:
    """Most data rows one roster file may hold (HELMSHIFT_MAX_ROWS)."""
    return _positive_int("HELMSHIFT_MAX_ROWS", DEFAULT_MAX_ROWS)


def database_url(db: str | None = None) -> str:
    """Turn ``--db`` (a file path or a SQLAlchemy URL) or ``HELMSHIFT_DB`` into a SQLAlchemy URL."""
    value = db or os.environ.get("HELMSHIFT_DB") or str(DEFAULT_DB_PATH)
    if "://" in value:
        return value
    return f"sqlite:///{Path(value).expanduser().resolve()}"


@dataclass(frozen=True)
class Settings:
    """What the web app needs to know at start-up."""

    db_url: str
    upload_limit: int = DEFAULT_UPLOAD_LIMIT
    allowed_hosts: tuple[str, ...] = ("127.0.0.1", "localhost", "[::1]", "testserver")
    job_workers: int = 1
    #: seconds between a job worker's heartbeats, and the silence after which its runs count as interrupted
    job_heartbeat: float = 2.0
    job_stale_after: float = 30.0

    @classmethod
    def from_env(cls, db: str | None = None) -> Settings:
        limit = upload_limit_from_env()
        extra = tuple(h for h in os.environ.get("HELMSHIFT_ALLOWED_HOSTS", "").split(",") if h)
        return cls(db_url=database_url(db), upload_limit=limit,
                   allowed_hosts=cls.allowed_hosts + extra,
                   job_heartbeat=_seconds("HELMSHIFT_JOB_HEARTBEAT", cls.job_heartbeat),
                   job_stale_after=_seconds("HELMSHIFT_JOB_STALE_AFTER", cls.job_stale_after))


def _seconds(name: str, default: float) -> float:
    value = os.environ.get(name)
    if not value:
        return default
    try:
        seconds = float(value)
    except ValueError:
        raise ValueError(f"{name} must be a number of seconds; got {value!r}.") from None
    if not 0 < seconds < 86_400:
        raise ValueError(f"{name} must be between 0 and 86400 seconds; got {value!r}.")
    return seconds
