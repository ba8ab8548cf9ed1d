"""``helmshift override add|list|remove``: case-level overrides of a roster's mapping (issue 15).

Each add or remove saves the next version of the mapping (app/analysis/overrides.py).
"""

from __future__ import annotations

import argparse
import getpass
from collections.abc import Callable
from typing import Any

from app.cli.common import CommandError

Emit = Callable[[argparse.Namespace, dict[str, Any], Callable[[dict[str, Any]], str]], None]
StoreOf = Callable[..., Any]


def _listed(p: dict[str, Any]) -> str:
    if not p["overrides"]:
        return f"Mapping {p['mapping']} has no case overrides of roster {p['roster']!r}."
    lines = [f"Mapping {p['mapping']}: {len(p['overrides'])} case override(s) of roster {p['roster']!r} "
             "(they take precedence over codes and rules)"]
    for o in p["overrides"]:
        moved = (f"{o['counted_as']} -> {o['category']}" if o["applied"]
                 else f"-> {o['category']} ({o['not_applied']})")
        lines.append(f"  {o['position']}. {o['record']}: {moved}; \"{o['note']}\" ({o['author']}, "
                     f"{o['created_at'][:10]})")
    return "\n".join(lines)


def register(sub: Any, common: Callable[..., None], store_of: StoreOf, emit: Emit) -> None:
    """Add ``override add``, ``override list`` and ``override remove`` to the command line's subparsers.

    The analysis modules (numpy, pandas) are imported when a command runs, not when the parser is built, so
    every other command (``helmshift fit``'s quick path above all) starts without them."""

    def payload(store: Any, roster: Any, mapping: Any) -> dict[str, Any]:
        from app.analysis import overrides as ov

        resolved = ov.resolve_overrides(store, roster, mapping)
        return {"roster": roster.name, "roster_id": roster.id, "mapping": f"{mapping.name}:{mapping.version}",
                "overrides": ov.overrides_to_list(resolved, mapping)}

    def add(args: argparse.Namespace) -> int:
        from app.analysis import overrides as ov
        from app.analysis.inputs import current_mapping

        if (args.id is None) == (args.line is None):
            raise CommandError("Name the record with --line N (its line in the roster file) or --id N, not both.")
        store = store_of(args)
        roster = store.get_roster(args.roster)
        mapping = current_mapping(store, roster, args.mapping)
        record = args.id if args.id is not None else ov.departure_at_line(store, roster, args.line)
        saved = ov.add_override(store, roster, mapping, record, args.category, args.note,
                                author=args.author or getpass.getuser())
        emit(args, payload(store, roster, saved), _listed)
        return 0

    def listing(args: argparse.Namespace) -> int:
        from app.analysis.inputs import current_mapping

        store = store_of(args)
        roster = store.get_roster(args.roster)
        emit(args, payload(store, roster, current_mapping(store, roster, args.mapping)), _listed)
        return 0

    def remove(args: argparse.Namespace) -> int:
        from app.analysis import overrides as ov
        from app.analysis.inputs import current_mapping

        store = store_of(args)
        roster = store.get_roster(args.roster)
        saved = ov.remove_override(store, current_mapping(store, roster, args.mapping), args.number,
                                   author=getpass.getuser(), roster=roster)
        emit(args, payload(store, roster, saved), _listed)
        return 0

    p = sub.add_parser("override", help="count one departure as a chosen category (case-level overrides)")
    osub = p.add_subparsers(dest="override_command", required=True)
    mapping_help = "mapping NAME (default: the roster's current mapping); the change saves its next version"
    q = osub.add_parser("add", help="count one record of a roster as a category, with a note saying why")
    q.add_argument("roster", help="roster name or id")
    q.add_argument("--line", type=int, help="the record's line in the roster's current file")
    q.add_argument("--id", type=int, help="the record's id (as the Departures page and its JSON show it)")
    q.add_argument("--category", required=True, choices=["forced", "voluntary", "excluded"],
                   help="what the record counts as (required)")
    q.add_argument("--note", required=True, help="why, e.g. 'board statement of 3 May' (required, at most 500 "
                                                 "characters)")
    q.add_argument("--author", help="who decided (default: the operating-system user)")
    q.add_argument("--mapping", help=mapping_help)
    common(q)
    q.set_defaults(func=add)
    q = osub.add_parser("list", help="the overrides of a roster in its mapping's newest version")
    q.add_argument("roster", help="roster name or id")
    q.add_argument("--mapping", help="mapping NAME or NAME:VERSION (default: the roster's current mapping)")
    common(q)
    q.set_defaults(func=listing)
    q = osub.add_parser("remove", help="drop an override (by its number in 'override list')")
    q.add_argument("roster", help="roster name or id")
    q.add_argument("number", type=int, help="the override's number in 'override list'")
    q.add_argument("--mapping", help=mapping_help)
    common(q)
    q.set_defaults(func=remove)
