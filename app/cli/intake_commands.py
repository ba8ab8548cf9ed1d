"""Commands that bring data in or serve it: `serve`, `import`, `mapping import|export`, `universe import|derive`."""

from __future__ import annotations

import argparse
import contextlib
import errno
import socket
import sys
from pathlib import Path
from typing import Any

from app import __version__
from app.cli.common import (
    CommandError,
    _emit,
    _input_file,
    _out_path,
    _parse_columns,
    _parse_pairs,
    _store,
    open_store,
)


# -- commands ----------------------------------------------------------------------------------
def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from app.config import Settings
    from app.demo import load_demo
    from app.store.audit import LOCAL_ACTOR, acting_as
    from app.web.app import create_app

    db = args.db
    if args.demo and not db:
        path = Path("helmshift-demo.db").resolve()
        for suffix in ("", "-wal", "-shm"):
            Path(f"{path}{suffix}").unlink(missing_ok=True)
        db = str(path)
        print(f"Demo: a fresh database at {path}", file=sys.stderr)
    settings = Settings.from_env(db)
    sock = _bind(args.host, args.port)  # before any slow start-up work, so a taken port fails at once
    store = open_store(settings.db_url, create=True)
    if args.demo:
        roster = load_demo(store)
        print(f"Demo roster {roster.name!r} loaded ({roster.accepted} departures).", file=sys.stderr)
    if args.host not in ("127.0.0.1", "localhost", "::1"):
        if not store.has_accounts():
            sock.close()
            raise CommandError(
                f"Serving on {args.host} would let other machines read rosters that hold personal data, and this "
                "store has no accounts; add one first (HELMSHIFT_PASSWORD=... helmshift user add NAME --role admin "
                "--db ...) or serve on 127.0.0.1.")
        print(f"Team mode on {args.host}: every page needs a signed-in account. Requests are still refused "
              "unless their Host header is this machine or a name listed in HELMSHIFT_ALLOWED_HOSTS "
              "(comma-separated); put HTTPS in front of it on a network.", file=sys.stderr)
    app = create_app(settings, store)
    # imports and runs work in threads next to the request handlers; a shorter GIL switch interval than
    # CPython's 5 ms lets a short request get its turn sooner (bench_responsiveness.py measures it)
    sys.setswitchinterval(0.001)
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning"))
    shown = f"[{args.host}]" if ":" in args.host else args.host
    print(f"Helmshift {__version__} on http://{shown}:{args.port}/", file=sys.stderr)  # bound: announce
    # uvicorn shuts down gracefully, then re-raises Ctrl-C / SIGINT: an ordinary stop, not an error.
    # Requests inherit this context: a change made in the browser is the local analyst's (or, in team mode, the
    # signed-in account's), not "... (command line)" as the commands that ran before the server are.
    with contextlib.suppress(KeyboardInterrupt), acting_as(LOCAL_ACTOR):
        server.run(sockets=[sock])
    return 0


def _bind(host: str, port: int) -> socket.socket:
    """The listening socket, bound here so the address is announced only once it is ours."""
    try:
        family, kind, proto, _, address = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)[0]
    except socket.gaierror:
        raise CommandError(f"--host {host!r} is not an address this machine can listen on.") from None
    sock = socket.socket(family, kind, proto)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind(address)
    except OSError as exc:
        sock.close()
        if exc.errno == errno.EADDRINUSE:
            raise CommandError(f"Another program is already using port {port} on {host}; "
                               "stop it or choose another port with --port.") from None
        raise CommandError(f"Cannot listen on {host} port {port} ({exc.strerror or exc}).") from None
    sock.listen(2048)
    sock.set_inheritable(True)
    return sock


def cmd_import(args: argparse.Namespace) -> int:
    from app.intake.ingest import import_roster, review_roster
    from app.intake.profiles import proposed_profiles, resolve_options, save_profile

    path = _input_file(args.file)
    store: Any = None
    if args.dry_run or args.profile:  # neither creates a database: a dry run stores nothing
        try:
            store = _store(args)
        except CommandError:
            if args.profile:
                raise
    else:
        store = _store(args, create=True)
    # an intake profile fills what the flags leave open (app/intake/profiles.py)
    profile = store.get_profile(args.profile) if args.profile else None
    options: dict[str, Any] = {"sheet": args.sheet, "encoding": args.encoding, **resolve_options(
        profile, roles=_parse_columns(args.column), header_row=args.header_row, date_order=args.date_order,
        fy_end=args.fiscal_year_end)}
    used = {"profile": profile.name if profile else None}
    if args.dry_run:
        review = review_roster(path.read_bytes(), path.name, **options)
        proposed = {"profiles_proposed": [p.name for p in proposed_profiles(store, review.headers)] if store else []}
        _emit(args, review.as_dict() | used | proposed, lambda p: "\n".join([
            f"Dry run (nothing stored): header row {p['header_row']}; {p['rows']} rows, {p['accepted']} would be "
            f"accepted, {p['rejected']} rejected, {p['duplicates']} exact duplicates, "
            f"{p['still_in_post']} still in post.",
            *(f"  rejected {g['count']}x: {g['reason']} (e.g. line "
              f"{', '.join(str(e['line']) for e in g['examples'])})" for g in p["rejected_groups"]),
            *(f"  kept {w['count']}x: {w['reason']} (lines {', '.join(map(str, w['lines'][:10]))}"
              f"{', ...' if w['count'] > 10 else ''})" for w in p["kept_with_warnings"]),
            *(f"  fix: {f}" for f in p["fixes"]),
            *(f"  saved profile {n!r} matches these headers: --profile {n!r}" for n in p["profiles_proposed"]
              if n != p["profile"]),
        ]))
        return 0
    report = import_roster(store, path.read_bytes(), path.name, name=args.name, into=args.into, **options)
    saved = None
    if args.save_profile:
        saved = save_profile(store, args.save_profile, headers=report.headers, roles=report.roles,
                             header_row=report.header_row, date_order=options["date_order"],
                             fy_end=options["fy_end"]).name
    payload = {"roster": report.roster.name, "id": report.roster.id, "version": report.version,
               "added": report.added, "removed": report.removed, "changed": report.changed, "rows": report.rows,
               "accepted": report.accepted, "rejected": report.rejected, "duplicates": report.duplicates,
               "header_row": report.header_row, "columns": report.roles, "messages": list(report.messages),
               **used, "profile_saved": saved,
               "profiles_proposed": [p.name for p in proposed_profiles(store, report.headers)]}
    _emit(args, payload, lambda p: (
        f"Imported roster {p['roster']!r} (header row {p['header_row']}): {p['rows']} rows, {p['accepted']} "
        f"accepted, {p['rejected']} rejected, {p['duplicates']} exact duplicates stored once."
        + (f" Version {p['version']}: {p['added']} added, {p['removed']} removed, {p['changed']} changed "
           f"since version {p['version'] - 1}." if p["version"] > 1 else "")
        + (f" Read with profile {p['profile']!r}." if p["profile"] else "")
        + (f" Saved profile {p['profile_saved']!r}." if p["profile_saved"] else "")))
    return 0


def cmd_mapping_import(args: argparse.Namespace) -> int:
    from app.analysis.mapping_files import import_mapping_file

    path = _input_file(args.file)
    rules = None
    if args.rules:
        rules = _input_file(args.rules).read_bytes()
    outcome = import_mapping_file(_store(args), path.read_bytes(), roster=args.roster, name=args.name, rules=rules)
    _emit(args, outcome, lambda p: (
        f"Saved mapping {p['mapping']!r} version {p['version']} with {p['codes']} codes"
        + (f" and {len(p['rules'])} rule(s)" if p["rules"] else "")
        + (f"; {len(p['not_in_roster'])} codes do not occur in the roster (kept for other rosters)"
           if p["not_in_roster"] else "") + "."))
    return 0


def cmd_mapping_export(args: argparse.Namespace) -> int:
    from app.analysis.mapping_files import export_mapping_csv, export_rules_csv

    out = _out_path(args.out) if args.out else None
    export = export_rules_csv if args.rules else export_mapping_csv
    text = export(_store(args), name=args.name, version=args.version)
    if out:
        out.write_text(text, encoding="utf-8")
    else:
        sys.stdout.write(text)
    return 0


def cmd_universe_import(args: argparse.Namespace) -> int:
    from app.intake.universe import import_universe

    path = Path(args.file)
    if not path.is_file():
        raise CommandError(f"No file at {path}.")
    roles = _parse_pairs(args.column, ("firm_id", "year", "first_year", "last_year"))
    report = import_universe(_store(args), args.roster, path.read_bytes(), path.name, roles=roles,
                             sheet=args.sheet, encoding=args.encoding)
    _emit(args, report.as_dict(), lambda p: (
        f"Imported universe {p['universe']} ({p['shape'].replace('_', '-')} rows): {p['firms']} firms, "
        f"{p['firm_years']} firm-years, {p['years'][0]}\u2013{p['years'][1]}; {p['rejected']} rows rejected."))
    return 0


def cmd_universe_derive(args: argparse.Namespace) -> int:
    from app.intake.universe import derive_universe

    report = derive_universe(_store(args), args.roster)
    _emit(args, report.as_dict(), lambda p: (
        f"Derived universe {p['universe']} from the roster (an approximation): {p['firms']} firms, "
        f"{p['firm_years']} firm-years, {p['years'][0]}\u2013{p['years'][1]}."))
    return 0
