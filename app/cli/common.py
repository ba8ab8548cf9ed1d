"""What every `helmshift` command shares: opening the store, one-sentence errors, JSON output, argument parsing helpers."""

from __future__ import annotations

import argparse
import json
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from app.config import database_url

EXIT_USAGE = 2


EXIT_FAILED = 1


#: stores opened by this command, disposed when it ends (open connections warn on PostgreSQL)
_OPENED: list[Any] = []


class CommandError(Exception):
    """A failure worth one sentence to the analyst (bad input, unknown roster, ...)."""


def _store(args: argparse.Namespace, *, create: bool = False) -> Any:
    """Open the database ``--db`` names; only ``create`` commands (serve, import) may make a new file."""
    return open_store(database_url(args.db), create=create)


def open_store(url: str, *, create: bool) -> Any:
    """The store at ``url``, or a one-sentence ``CommandError`` saying why it cannot be opened."""
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError, NoSuchModuleError, SQLAlchemyError

    from app.store import Store

    try:
        parsed = make_url(url)
    except ArgumentError:
        raise CommandError(f"--db {url!r} is neither a file path nor a database URL.") from None
    if parsed.get_backend_name() == "sqlite" and parsed.database not in (None, "", ":memory:"):
        path = Path(parsed.database)
        if not path.parent.is_dir():
            raise CommandError(f"The folder {path.parent} for the database does not exist; create it or check --db.")
        if path.is_dir():
            raise CommandError(f"--db names the folder {path}; give a database file inside it.")
        if not create and not path.exists():
            raise CommandError(f"The database {path} does not exist; check --db (importing a roster creates one).")
    try:
        store = Store(url)
        _OPENED.append(store)
        return store
    except (ModuleNotFoundError, NoSuchModuleError) as exc:
        driver = getattr(exc, "name", None) or str(exc).rsplit(":", 1)[-1].strip()
        raise CommandError(
            f"The database URL needs the driver {driver!r}, which is not installed; install it into this "
            "environment (for PostgreSQL: pip install psycopg2-binary) or use a SQLite file.") from None
    except SQLAlchemyError as exc:
        reason = " ".join(str(getattr(exc, "orig", None) or exc).split()).rstrip(".?! ")
        raise CommandError(f"Could not open the database {parsed.render_as_string(hide_password=True)}: "
                           f"{reason}.") from None


def _out_path(value: str, flag: str = "--out") -> Path:
    """An output file whose folder must already exist (we never create folders on a typo)."""
    out = Path(value).expanduser()
    if out.is_dir():
        raise CommandError(f"{flag} names the folder {out}; give a file name inside it.")
    if not out.parent.is_dir():
        raise CommandError(f"The folder {out.parent} for {flag} does not exist; create it first or check the path.")
    return out


def _input_file(value: str) -> Path:
    path = Path(value)
    if path.is_dir():
        raise CommandError(f"{path} is a folder; give the roster or mapping file inside it.")
    if not path.is_file():
        raise CommandError(f"No file at {path}.")
    return path


def _emit(args: argparse.Namespace, payload: dict[str, Any], human: Callable[[dict[str, Any]], str]) -> None:
    from app.jsonable import jsonable

    if args.json:
        print(json.dumps(jsonable(payload)))
    else:
        print(human(payload))


def _parse_years(value: str | None) -> tuple[int, int] | None:
    if not value:
        return None
    try:
        a, b = (int(x) for x in value.replace("..", "-").split("-", 1))
    except ValueError:
        raise CommandError(f"--years takes FROM-TO, e.g. 1998-2022; got {value!r}.") from None
    if a > b:
        raise CommandError(f"--years runs backwards ({value}); write the earlier year first.")
    return a, b


def _parse_columns(pairs: Sequence[str] | None) -> dict[str, str] | None:
    from app.types import ROLES

    return _parse_pairs(pairs, ROLES)


def _parse_pairs(pairs: Sequence[str] | None, allowed: Sequence[str]) -> dict[str, str] | None:
    if not pairs:
        return None
    roles: dict[str, str] = {}
    for pair in pairs:
        role, sep, header = pair.partition("=")
        if not sep or role not in allowed:
            raise CommandError(f"--column takes ROLE=HEADER with ROLE one of {', '.join(allowed)}; got {pair!r}.")
        roles[role] = header
    return roles
