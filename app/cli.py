"""The ``helmshift`` command line, over the same functions the dashboard uses.

Every command takes ``--db`` (a file path or SQLAlchemy URL; ``HELMSHIFT_DB`` likewise). With ``--json`` it
prints one JSON object on stdout. Errors are one clear sentence on stderr and a non-zero exit status.
"""

from __future__ import annotations

import argparse
import contextlib
import errno
import getpass
import json
import socket
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from app import __version__
from app.config import database_url

EXIT_USAGE = 2
EXIT_FAILED = 1


class CommandError(Exception):
    """A failure worth one sentence to the analyst (bad input, unknown roster, ...)."""


def _store(args: argparse.Namespace, *, create: bool = False) -> Any:
    """Open the database ``--db`` names; only ``create`` commands (serve, import) may make a new file."""
    return open_store(database_url(args.db), create=create)


#: stores a command opened; ``main`` closes them when the command ends, whatever its outcome (a server database
#: would otherwise keep a connection until the interpreter exits and warn about it)
_OPENED: list[Any] = []


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


def _out_path(value: str) -> Path:
    """An output file whose folder must already exist (we never create folders on a typo)."""
    out = Path(value).expanduser()
    if out.is_dir():
        raise CommandError(f"--out names the folder {out}; give a file name inside it.")
    if not out.parent.is_dir():
        raise CommandError(f"The folder {out.parent} for --out does not exist; create it first or check the path.")
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


# -- commands ----------------------------------------------------------------------------------
def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from app.config import Settings
    from app.demo import load_demo
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
    # uvicorn shuts down gracefully, then re-raises Ctrl-C / SIGINT: an ordinary stop, not an error
    with contextlib.suppress(KeyboardInterrupt):
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


def cmd_coverage(args: argparse.Namespace) -> int:
    from app.analysis.inputs import load_input
    from app.analysis.runs import coverage_summary

    inp = load_input(_store(args), args.roster, mapping=args.mapping, require_mapping=False)
    payload = coverage_summary(inp, threshold=args.threshold)
    _emit(args, payload, lambda p: "\n".join(
        [f"{'year':>6} {'all':>5} {'forced':>7} {'volunt.':>7} {'excl.':>6} {'unmap.':>6}"]
        + [f"{y['year']:>6} {y['departures']:>5} {y['forced']:>7} {y['voluntary']:>7} {y['excluded']:>6} "
           f"{y['unmapped']:>6}" for y in p["years"]]
        + [f"Suggested window: {p['suggested_window'][0]}\u2013{p['suggested_window'][1]} ({p['rule']})"]))
    return 0


def cmd_fit(args: argparse.Namespace) -> int:
    from app.analysis.inputs import load_input

    store = _store(args)
    if args.resamples is not None and args.model != "adjusted":
        raise CommandError("--resamples goes with --model adjusted; bootstrap the other models with "
                           "`helmshift bootstrap`.")
    inp = load_input(store, args.roster, mapping=args.mapping, window=_parse_years(args.years))
    if args.measure == "rate":
        from app.analysis.rates import rate_summary

        if args.by or args.model != "linear" or args.compare:
            raise CommandError("--measure rate fits the straight Poisson trend only; drop --by, --model and --compare.")
        _emit(args, rate_summary(store, inp), lambda p: f"{p['sentence']}\n{p['caution']}")
        return 0
    if args.model == "adjusted":
        from app.analysis.adjusted import adjusted_summary

        if args.by or args.compare:
            raise CommandError("--model adjusted adjusts for sector itself (--adjust); drop --by and --compare.")
        adjusted_payload = adjusted_summary(store, inp, args.adjust, resamples=args.resamples, seed=args.seed)
        _emit(args, adjusted_payload, lambda p: p["sentence"])
        return 0
    payload: dict[str, Any] | None = None
    if not args.compare and args.by != "sector":
        # a fit already recorded for these counts is printed again without importing the model code
        # (scipy.stats and statsmodels are most of a cold start: issue 13)
        from app.analysis.stored_fits import stored_summary

        payload = stored_summary(store, inp, model=args.model, spline_df=args.spline_df, quasi=args.quasi)
    if payload is None:
        from app.analysis.runs import fit_summary

        periods = None
        if args.compare:
            from app.stats.periods import parse_periods

            periods = parse_periods(args.compare)
        payload = fit_summary(store, inp, model=args.model, by_sector=args.by == "sector",
                              spline_df=args.spline_df, quasi=args.quasi, periods=periods, reuse=False)
    _emit(args, payload, lambda p: "\n".join([p["headline"], *([p["periods"]["sentence"]] if "periods" in p else [])]))
    return 0


def cmd_run_export(args: argparse.Namespace) -> int:
    from app.analysis.replication import write_pack

    pack = write_pack(_store(args), args.run_id, Path(args.out), records=args.records)
    _emit(args, {"run": pack.run_id, "out": args.out, "sha256": pack.sha256, "files": list(pack.files)},
          lambda p: f"Wrote {p['out']} (run {p['run']}, sha256 {p['sha256']}): {', '.join(p['files'])}")
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


def cmd_bootstrap(args: argparse.Namespace) -> int:
    from app.analysis.inputs import load_input
    from app.analysis.jobs import run_bootstrap_now

    store = _store(args)
    inp = load_input(store, args.roster, mapping=args.mapping, window=_parse_years(args.years))
    payload = run_bootstrap_now(store, inp, unit=args.unit, resamples=args.resamples, seed=args.seed,
                                model=args.model, statistic=args.statistic, sector=args.sector,
                                spline_df=args.spline_df, periods=args.periods, stratify=args.stratify)

    def bound(v: float | None) -> str:
        return "n/a" if v is None else f"{v:.3f}"  # three decimals, as every page and export

    _emit(args, payload, lambda p: (
        f"Bootstrap ({p['unit']} resampling{', firms within sector' if p.get('stratified') else ''}, "
        f"B={p['resamples']}, seed {p['seed']}): {p.get('label', 'odds ratio per year')} {bound(p['odds_ratio'])}; "
        + "; ".join(f"{m} 95% {bound(p['conf_int'][m][0])} to {bound(p['conf_int'][m][1])}"
                    for m in ("bca", "studentized")) + f"; {p['failed']} failed resamples; {p['seconds']:.2f} s."))
    return 0


def cmd_robustness(args: argparse.Namespace) -> int:
    from app.analysis.inputs import load_input
    from app.analysis.runs import robustness_summary

    store = _store(args)
    mappings = args.mapping or []
    inp = load_input(store, args.roster, mapping=mappings[0] if mappings else None,
                     window=_parse_years(args.years))
    payload = robustness_summary(store, inp, extra_mappings=mappings[1:], vary=args.vary or [], preset=args.preset)
    _emit(args, payload, lambda p: p["sentence"])
    return 0


def cmd_export(args: argparse.Namespace) -> int:
    from app.analysis.inputs import load_input
    from app.briefing.exports import export_to_file
    from app.briefing.signature import resolve_signature

    out = _out_path(args.out)
    store = _store(args)
    inp = load_input(store, args.roster, mapping=args.mapping, window=_parse_years(args.years))
    signature = resolve_signature(store.briefing_settings(inp.roster.id), inp.roster.name, title=args.title,
                                  author=args.author, marking=args.marking, when=args.date)
    charts = None
    if args.format == "pptx" and args.chart is not None:
        charts = [c.strip() for c in args.chart.split(",") if c.strip()]
    path = export_to_file(store, inp, fmt=args.format, out=out, chart=args.chart or "trend",
                          run_id=args.run, signature=signature, charts=charts)
    print(f"Wrote {path}", file=sys.stderr)
    return 0


# -- parser ------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    # plain words here: argparse prints the description as it is, so the docstring's markup stays out
    parser = argparse.ArgumentParser(
        prog="helmshift", description="Helmshift on the command line: the same functions the dashboard uses.",
        epilog="Every command takes --db (a database file or SQLAlchemy URL; the HELMSHIFT_DB variable likewise). "
               "With --json it prints one JSON object. Errors are one sentence on stderr and a non-zero exit "
               "status. 'helmshift COMMAND --help' lists a command's options and their defaults.")
    parser.add_argument("--version", action="version", version=f"helmshift {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    def common(p: argparse.ArgumentParser, json_flag: bool = True) -> None:
        p.add_argument("--db", help="database file or SQLAlchemy URL (default: HELMSHIFT_DB or ./helmshift.db)")
        if json_flag:
            p.add_argument("--json", action="store_true", help="print one JSON object")

    p = sub.add_parser("serve", help="start the dashboard")
    common(p, json_flag=False)
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default: 127.0.0.1, this machine only)")
    p.add_argument("--port", type=int, default=8000, help="port to listen on (default: 8000)")
    p.add_argument("--demo", action="store_true", help="load the invented demo roster (fresh database)")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("import", help="import a roster file (CSV or XLSX)")
    p.add_argument("file", help="the roster file, CSV or XLSX")
    common(p)
    p.add_argument("--name", help="roster name (default: the file name)")
    p.add_argument("--column", action="append", metavar="ROLE=HEADER", help="set a column role explicitly")
    p.add_argument("--sheet", help="XLSX sheet (default: the first)")
    p.add_argument("--encoding", help="text encoding (default: detect)")
    p.add_argument("--header-row", type=int, metavar="N", help="1-based line (or sheet row) of the header "
                   "(default: found by scoring the first 30 rows)")
    p.add_argument("--date-order", choices=("auto", "dmy", "mdy"),
                   help="day/month or month/day text dates (default: the profile's, else decided over the "
                        "whole column)")
    p.add_argument("--fiscal-year-end", type=int, metavar="MONTH", choices=range(1, 13),
                   help="month in which fiscal years end, 1-12 (default: the profile's, else 12); a fiscal year "
                        "is named by the calendar year in which it ends")
    p.add_argument("--profile", metavar="NAME", help="read the file with this saved intake profile (column roles, "
                   "header row, date reading, fiscal-year end); flags given here win over it")
    p.add_argument("--save-profile", metavar="NAME", help="after the import, save how this file was read as an "
                   "intake profile (replacing one of that name)")
    p.add_argument("--dry-run", action="store_true", help="report what would be accepted and rejected; store nothing")
    p.add_argument("--into", metavar="ROSTER", help="store the file as the next version of this roster (a refresh: "
                   "next week's file for the same roster); reports what was added, removed and changed")
    p.set_defaults(func=cmd_import)

    p = sub.add_parser("mapping", help="import or export a reason-code mapping")
    msub = p.add_subparsers(dest="mapping_command", required=True)
    q = msub.add_parser("import", help="save a CSV (code,category[,label]) as a new mapping version")
    q.add_argument("file", help="mapping CSV with columns code, category and optionally label")
    q.add_argument("--roster", required=True, help="roster id or name (required)")
    q.add_argument("--name", required=True, help="mapping name; an existing name gets its next version (required)")
    q.add_argument("--rules", metavar="RULES.csv",
                   help="classification rules (code,field,comparison,value,category) saved with this version")
    common(q)
    q.set_defaults(func=cmd_mapping_import)
    q = msub.add_parser("export", help="write a mapping version as CSV")
    q.add_argument("--roster", help="accepted for symmetry; mappings are shared across rosters")
    q.add_argument("--name", required=True, help="mapping name (required)")
    q.add_argument("--version", type=int, help="mapping version (default: the newest)")
    q.add_argument("--out", help="CSV file to write (default: print to standard output)")
    q.add_argument("--rules", action="store_true",
                   help="write the version's classification rules (code,field,comparison,value,category)")
    common(q, json_flag=False)
    q.set_defaults(func=cmd_mapping_export)

    p = sub.add_parser("universe", help="import or derive the universe of firm-years behind rates")
    usub = p.add_subparsers(dest="universe_command", required=True)
    q = usub.add_parser("import", help="store a CSV/XLSX of firm-years (firm_id, year) or spans "
                                       "(firm_id, first_year, last_year) for a roster")
    q.add_argument("file", help="the universe file, CSV or XLSX")
    q.add_argument("--roster", required=True, help="roster id or name (required)")
    q.add_argument("--column", action="append", metavar="ROLE=HEADER",
                   help="set a column role explicitly (firm_id, year, first_year, last_year)")
    q.add_argument("--sheet", help="XLSX sheet (default: the first)")
    q.add_argument("--encoding", help="text encoding (default: detect)")
    common(q)
    q.set_defaults(func=cmd_universe_import)
    q = usub.add_parser("derive", help="approximate the universe from the roster (first to last year per firm)")
    q.add_argument("--roster", required=True, help="roster id or name (required)")
    common(q)
    q.set_defaults(func=cmd_universe_derive)

    p = sub.add_parser("coverage", help="departures per year and the suggested window")
    p.add_argument("--roster", required=True, help="roster id or name (required)")
    p.add_argument("--mapping", help="mapping NAME or NAME:VERSION (default: the roster's current mapping)")
    p.add_argument("--threshold", type=float, default=0.5, help="share of the median year (default 0.5)")
    common(p)
    p.set_defaults(func=cmd_coverage)

    p = sub.add_parser("fit", help="fit the trend of the forced share")
    p.add_argument("--roster", required=True, help="roster id or name (required)")
    p.add_argument("--mapping", help="mapping NAME or NAME:VERSION (default: the roster's current mapping)")
    p.add_argument("--years", metavar="FROM-TO", help="analysis window, e.g. 1998-2022 (default: the roster's saved window, else the suggested one)")
    p.add_argument("--by", choices=["sector"], help="sector: one trend per sector and the test of equal trends "
                                                    "(default: one trend for all)")
    p.add_argument("--model", choices=["linear", "sector", "spline", "adjusted"], default="linear",
                   help="linear: straight trend; sector: adjusted for sector mix; spline: straight trend plus a "
                        "test for a bend; adjusted: departure-level logit on year + the --adjust fields with "
                        "firm-clustered standard errors (default: linear)")
    p.add_argument("--adjust", metavar="age,tenure,sector", default="age,tenure,sector",
                   help="what the adjusted model adjusts for (--model adjusted; '' for none; default: all three)")
    p.add_argument("--resamples", type=int, metavar="B",
                   help="--model adjusted: also the firm bootstrap with B resamples (default: none)")
    p.add_argument("--seed", type=int, default=20261201, help="seed of that firm bootstrap (default: 20261201)")
    p.add_argument("--spline-df", type=int, choices=range(2, 7), default=3, metavar="2..6",
                   help="degrees of freedom of the spline in the bend test (--model spline; default 3)")
    p.add_argument("--quasi", action="store_true",
                   help="also give quasi-binomial intervals whatever the dispersion (given anyway above 1.5)")
    p.add_argument("--measure", choices=["share", "rate"], default="share",
                   help="share: forced share of departures (default); rate: turnover per 100 firm-years "
                        "over the roster's universe")
    p.add_argument("--compare", metavar="FROM-TO:FROM-TO",
                   help="also compare the forced share of two periods, e.g. 1997-2009:2010-2022 (adds 'periods')")
    common(p)
    p.set_defaults(func=cmd_fit)

    from app.stats.statistic_names import STATISTIC_HELP, STATISTICS  # no numpy: just the names

    p = sub.add_parser("bootstrap", help="bootstrap the odds ratio per year, or another reported statistic",
                       formatter_class=argparse.RawDescriptionHelpFormatter,
                       epilog="statistics (--statistic):\n" + "\n".join(f"  {name:<18} {text}"
                                                                     for name, text in STATISTIC_HELP.items()))
    p.add_argument("--roster", required=True, help="roster id or name (required)")
    p.add_argument("--mapping", help="mapping NAME or NAME:VERSION (default: the roster's current mapping)")
    p.add_argument("--years", metavar="FROM-TO", help="analysis window, e.g. 1998-2022 (default: the roster's saved window, else the suggested one)")
    p.add_argument("--unit", choices=["firm", "departure"], default="firm",
                   help="resample whole firms (keeps each firm's departures together) or single departures "
                        "(default: firm)")
    p.add_argument("--resamples", type=int, default=2000,
                   help="number of resamples B; 10000 for figures in a board paper (default: 2000)")
    p.add_argument("--seed", type=int, default=20261201,
                   help="random seed; the same seed and inputs give the same numbers (default: 20261201)")
    p.add_argument("--model", choices=["linear", "sector"], default="linear",
                   help="for slope and decade_odds_ratio: the straight trend or the trend adjusted for sector "
                        "(default: linear)")
    p.add_argument("--statistic", choices=list(STATISTICS), default="slope", metavar="NAME",
                   help="what to bootstrap: " + ", ".join(STATISTICS) + " (default slope; listed below)")
    p.add_argument("--sector", help="for sector_slope: the sector whose own trend is bootstrapped")
    p.add_argument("--spline-df", type=int, choices=range(2, 7), default=None, metavar="2..6",
                   help="for spline_bend: the spline's df (default 3)")
    p.add_argument("--periods", metavar="FROM-TO:FROM-TO",
                   help="for period_difference: the two periods (default: the window's last third against the rest)")
    p.add_argument("--stratify", choices=["none", "sector"], default="none",
                   help="sector: draw firms within their sector, so every resample keeps each sector's number "
                        "of firms (unit firm only; default: none)")
    common(p)
    p.set_defaults(func=cmd_bootstrap)

    p = sub.add_parser("run", help="stored runs: export a replication pack")
    rsub = p.add_subparsers(dest="run_command", required=True)
    q = rsub.add_parser("export", help="write a run's replication pack (zip) for recomputing it without Helmshift")
    q.add_argument("run_id", type=int, metavar="RUN_ID", help="the run's id, as in its page's address /runs/ID")
    q.add_argument("--out", required=True, metavar="PACK.zip", help="zip file to write (required)")
    q.add_argument("--records", action="store_true",
                   help="include records.csv, the departures behind the counts (personal data: keep it local)")
    common(q)
    q.set_defaults(func=cmd_run_export)

    p = sub.add_parser("robustness", help="the trend under several mappings and variants")
    p.add_argument("--roster", required=True, help="roster id or name (required)")
    p.add_argument("--mapping", action="append", help="a mapping (repeat for several; NAME or NAME:VERSION)")
    p.add_argument("--vary", action="append", metavar="CODE", help="move CODE to each other category")
    p.add_argument("--preset", action="store_true",
                   help="also read the codes with the academic preset (retirement below 60 counts as forced, "
                        "Parrino 1997; default: off)")
    p.add_argument("--years", metavar="FROM-TO", help="analysis window, e.g. 1998-2022 (default: the roster's saved window, else the suggested one)")
    common(p)
    p.set_defaults(func=cmd_robustness)

    p = sub.add_parser("export", help="export charts, a deck or the brief")
    p.add_argument("--roster", required=True, help="roster id or name (required)")
    p.add_argument("--mapping", help="mapping NAME or NAME:VERSION (default: the roster's current mapping)")
    p.add_argument("--years", metavar="FROM-TO", help="analysis window, e.g. 1998-2022 (default: the roster's saved window, else the suggested one)")
    p.add_argument("--run", type=int, help="a stored bootstrap run to include (default: the newest finished run "
                                           "that matches the mapping and window)")
    p.add_argument("--format", required=True, choices=["png", "svg", "pdf", "pptx", "brief"],
                   help="png, svg or pdf: one chart; pptx: the slide deck; brief: the PDF brief (required)")
    p.add_argument("--chart", help="png/svg/pdf: coverage, trend, bootstrap, sectors or robustness (default: "
                                   "trend); pptx: the findings as a comma list, every one shown or an error "
                                   "(default: every finding that can be shown); brief: the same comma list "
                                   "(default: trend and bootstrap, or coverage without a run)")
    p.add_argument("--out", required=True, help="file to write, whole or not at all (required)")
    p.add_argument("--title", help="title of the brief or deck (default: the one saved on the Briefing page, "
                                   "else 'Forced chief-executive departures: ROSTER')")
    p.add_argument("--author", help="author named on the title slide and the brief (default: the saved one, "
                                    "else none)")
    p.add_argument("--marking", help="confidentiality marking on every page and slide, e.g. CONFIDENTIAL "
                                     "(default: the saved one, else none)")
    p.add_argument("--date", metavar="YYYY-MM-DD", help="date of the paper (default: the saved one, else today)")
    common(p, json_flag=False)
    p.set_defaults(func=cmd_export)

    from app.cli_roster import register as register_roster
    from app.cli_team import register

    register(sub, common, _store, _emit)
    register_roster(sub, common, _store, _emit)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    from app.cli_team import TeamCommandError
    from app.store.audit import acting_as

    try:
        # changes made from the command line are recorded as the operating-system user's
        with acting_as(f"{getpass.getuser()} (command line)"):
            return int(args.func(args))
    except (CommandError, TeamCommandError) as exc:
        print(f"helmshift: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except (ValueError, LookupError, OSError) as exc:
        # store, ingest and stats errors are ValueError/LookupError subclasses with clear messages
        message = str(exc).strip() or exc.__class__.__name__
        print(f"helmshift: {message}", file=sys.stderr)
        return EXIT_FAILED
    finally:
        while _OPENED:
            _OPENED.pop().dispose()


if __name__ == "__main__":
    raise SystemExit(main())
