"""Intake-profile commands of ``helmshift``: ``profile list`` and ``profile delete NAME`` (issue 14).

Profiles are saved by ``helmshift import FILE --save-profile NAME`` and applied with ``--profile NAME``.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

Emit = Callable[[argparse.Namespace, dict[str, Any], Callable[[dict[str, Any]], str]], None]
StoreOf = Callable[..., Any]


def _row(p: Any) -> dict[str, Any]:
    return {"id": p.id, "name": p.name, "headers": list(p.headers), "roles": p.roles, "header_row": p.header_row,
            "date_order": p.date_order, "fy_end": p.fy_end, "created_at": p.created_at, "updated_at": p.updated_at}


def _list_text(payload: dict[str, Any]) -> str:
    if not payload["profiles"]:
        return "No intake profile is saved; save one with helmshift import FILE --save-profile NAME."
    return "\n".join(
        f"{p['name']}\t{len(p['headers'])} columns\theader row {p['header_row'] or 'found'}\t"
        f"dates {p['date_order']}\tFY ends month {p['fy_end']}\t"
        + ", ".join(f"{role}={column}" for role, column in sorted(p["roles"].items()))
        for p in payload["profiles"])


def register(sub: Any, common: Callable[..., None], store_of: StoreOf, emit: Emit) -> None:
    """Add ``profile list`` and ``profile delete`` to the command line's subparsers."""

    def list_profiles(args: argparse.Namespace) -> int:
        emit(args, {"profiles": [_row(p) for p in store_of(args).list_profiles()]}, _list_text)
        return 0

    def delete(args: argparse.Namespace) -> int:
        gone = store_of(args).delete_profile(args.name)
        emit(args, {"deleted": gone.name, "id": gone.id},
             lambda p: f"Deleted intake profile {p['deleted']!r}; no stored roster changed.")
        return 0

    p = sub.add_parser("profile", help="saved intake profiles (how a source's files are read)")
    psub = p.add_subparsers(dest="profile_command", required=True)
    q = psub.add_parser("list", help="list the saved intake profiles")
    common(q)
    q.set_defaults(func=list_profiles)
    q = psub.add_parser("delete", help="delete a saved intake profile by name")
    q.add_argument("name", help="the profile's name")
    common(q)
    q.set_defaults(func=delete)
