"""Team-mode commands of ``helmshift``: accounts (``user``) and the audit trail (``audit``).

Passwords come from ``HELMSHIFT_PASSWORD`` or a prompt, never from the command line (it would land in the
shell history and the process list).
"""

from __future__ import annotations

import argparse
import getpass
import os
import sys
from collections.abc import Callable
from typing import Any

from app.types import ACCOUNT_ROLES

Emit = Callable[[argparse.Namespace, dict[str, Any], Callable[[dict[str, Any]], str]], None]
StoreOf = Callable[..., Any]


class TeamCommandError(Exception):
    """One sentence for the analyst."""


def _password(prompt_for: str) -> str:
    value = os.environ.get("HELMSHIFT_PASSWORD")
    if value:
        return value
    if not sys.stdin.isatty():
        raise TeamCommandError("Set HELMSHIFT_PASSWORD or run this in a terminal to be asked for the password.")
    first = getpass.getpass(f"Password for {prompt_for}: ")
    if getpass.getpass("Again: ") != first:
        raise TeamCommandError("The two passwords differ; nothing was changed.")
    return first


def _account_row(account: Any) -> dict[str, Any]:
    return {"id": account.id, "name": account.name, "role": account.role, "created_at": account.created_at}


def register(sub: Any, common: Callable[..., None], store_of: StoreOf, emit: Emit) -> None:
    """Add ``user`` and ``audit`` to the command line's subparsers."""

    def user_add(args: argparse.Namespace) -> int:
        store = store_of(args, create=True)  # a desk's first step on a new store
        account = store.add_account(args.name, args.role, _password(args.name))
        emit(args, _account_row(account), lambda p: f"Added {p['name']} ({p['role']}).")
        return 0

    def user_list(args: argparse.Namespace) -> int:
        rows = [_account_row(a) for a in store_of(args).list_accounts()]
        emit(args, {"users": rows}, lambda p: "\n".join(f"{r['name']}\t{r['role']}\t{r['created_at']}"
                                                         for r in p["users"]) or "No accounts: single-analyst mode.")
        return 0

    def user_remove(args: argparse.Namespace) -> int:
        store_of(args).remove_account(args.name)
        emit(args, {"removed": args.name}, lambda p: f"Removed {p['removed']}.")
        return 0

    def user_passwd(args: argparse.Namespace) -> int:
        store = store_of(args)
        store.get_account(args.name)
        store.set_password(args.name, _password(args.name))
        emit(args, {"user": args.name}, lambda p: f"New password set for {p['user']}; their sessions are signed out.")
        return 0

    def user_token(args: argparse.Namespace) -> int:
        token = store_of(args).create_token(args.name)
        emit(args, {"user": args.name, "token": token},
             lambda p: f"{p['token']}\n(shown once; send it as 'Authorization: Bearer <token>')")
        return 0

    def audit(args: argparse.Namespace) -> int:
        events = store_of(args).audit_events(since=args.since, user=args.user, action=args.action,
                                             limit=args.limit)
        rows = [{"id": e.id, "at": e.at, "user": e.user, "action": e.action, "target": e.target,
                 "detail": e.detail} for e in events]
        emit(args, {"events": rows}, lambda p: "\n".join(
            f"{r['at']}\t{r['user']}\t{r['action']}\t{r['target']}" for r in p["events"]) or "No events.")
        return 0

    p = sub.add_parser("user", help="accounts for team mode (viewer, analyst, admin)",
                       description="Once any account exists, every page and API needs a signed-in user.")
    usub = p.add_subparsers(dest="user_command", required=True)
    q = usub.add_parser("add", help="add an account (password from HELMSHIFT_PASSWORD or a prompt)")
    q.add_argument("name", help="account name")
    q.add_argument("--role", required=True, choices=ACCOUNT_ROLES,
                   help="viewer reads and exports; analyst also imports, maps and runs; admin also deletes")
    common(q)
    q.set_defaults(func=user_add)
    q = usub.add_parser("list", help="list accounts")
    common(q)
    q.set_defaults(func=user_list)
    q = usub.add_parser("remove", help="remove an account and its API tokens")
    q.add_argument("name", help="account name")
    common(q)
    q.set_defaults(func=user_remove)
    q = usub.add_parser("passwd", help="set a new password (signs the account's sessions out)")
    q.add_argument("name", help="account name")
    common(q)
    q.set_defaults(func=user_passwd)
    q = usub.add_parser("token", help="make an API token for scripts (shown once)")
    q.add_argument("name", help="account name")
    common(q)
    q.set_defaults(func=user_token)

    p = sub.add_parser("audit", help="the audit trail: who changed what, when")
    p.add_argument("--since", help="ISO date or time, e.g. 2026-12-01")
    p.add_argument("--user", help="only this user's events")
    p.add_argument("--action", help="only this action (import, mapping_version, run_start, login_failed, ...)")
    p.add_argument("--limit", type=int, default=1000, help="at most this many events, newest first (default 1000)")
    common(p)
    p.set_defaults(func=audit)
