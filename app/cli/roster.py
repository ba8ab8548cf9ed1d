"""Roster-version commands of ``helmshift``: ``roster versions`` and ``roster diff`` (issue 14, refreshes).

A refresh itself is ``helmshift import FILE --into ROSTER`` (in :mod:`app.cli`).
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

Emit = Callable[[argparse.Namespace, dict[str, Any], Callable[[dict[str, Any]], str]], None]
StoreOf = Callable[..., Any]


def _diff_text(p: dict[str, Any]) -> str:
    lines = [f"Roster {p['roster']!r}, version {p['from']} -> {p['to']}: {p['added']} added, "
             f"{p['removed']} removed, {p['changed']} changed, {p['unchanged']} unchanged.", p["rule"]]
    lines += [f"  + line {r['line']}: {r['firm_id']} {r['year']} {r['reason']}" for r in p["added_records"]]
    lines += [f"  - line {r['line']}: {r['firm_id']} {r['year']} {r['reason']}" for r in p["removed_records"]]
    lines += [f"  ~ line {c['after']['line']}: {c['after']['firm_id']} {c['after']['year']} "
              + "; ".join(f"{f} {c['before'][f]!r} -> {c['after'][f]!r}" for f in c["fields"])
              for c in p["changed_records"]]
    return "\n".join(lines)


def register(sub: Any, common: Callable[..., None], store_of: StoreOf, emit: Emit) -> None:
    """Add ``roster versions`` and ``roster diff`` to the command line's subparsers."""

    def versions(args: argparse.Namespace) -> int:
        store = store_of(args)
        roster = store.get_roster(args.roster)
        rows = [{"version": v.version, "source_name": v.source_name, "imported_at": v.imported_at,
                 "rows": v.rows_total, "accepted": v.accepted, "rejected": v.rejected}
                for v in store.roster_versions(roster.id)]
        emit(args, {"roster": roster.name, "roster_id": roster.id, "versions": rows}, lambda p: "\n".join(
            f"v{r['version']}\t{r['imported_at']}\t{r['source_name']}\t{r['accepted']} accepted, "
            f"{r['rejected']} rejected" for r in p["versions"]))
        return 0

    def diff(args: argparse.Namespace) -> int:
        from app.intake.refresh import diff_versions

        store = store_of(args)
        roster = store.get_roster(args.roster)
        to = args.to if args.to is not None else roster.latest_version
        start = args.from_ if args.from_ is not None else max(to - 1, 1)
        result = diff_versions(store, roster.id, start, to, limit=args.limit)
        emit(args, result.as_dict(), _diff_text)
        return 0

    p = sub.add_parser("roster", help="a roster's versions (refreshes) and what changed between them")
    rsub = p.add_subparsers(dest="roster_command", required=True)
    q = rsub.add_parser("versions", help="list the stored versions of a roster")
    q.add_argument("roster", help="roster name or id")
    common(q)
    q.set_defaults(func=versions)
    q = rsub.add_parser("diff", help="departures added, removed and changed between two versions")
    q.add_argument("roster", help="roster name or id")
    q.add_argument("--from", dest="from_", type=int, metavar="N", help="older version (default: the one before --to)")
    q.add_argument("--to", type=int, metavar="N", help="newer version (default: the newest)")
    q.add_argument("--limit", type=int, default=None, metavar="N",
                   help="list at most N records of each kind (default: all; the counts are always complete)")
    common(q)
    q.set_defaults(func=diff)
