"""The `helmshift` argument parser and `main`: every subcommand, its options and help texts."""

from __future__ import annotations

import argparse
import getpass
import sys
from collections.abc import Sequence

from app import __version__
from app.cli.analysis_commands import (
    cmd_bootstrap,
    cmd_coverage,
    cmd_export,
    cmd_fit,
    cmd_robustness,
    cmd_run_check,
    cmd_run_export,
    quick_fit,
)
from app.cli.common import (
    _OPENED,
    EXIT_FAILED,
    EXIT_USAGE,
    CommandError,
    _emit,
    _store,
)
from app.cli.intake_commands import (
    cmd_import,
    cmd_mapping_export,
    cmd_mapping_import,
    cmd_serve,
    cmd_universe_derive,
    cmd_universe_import,
)


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
    p.add_argument("--seed", type=int,
                   help="seed of that firm bootstrap (default: the roster's own seed, the one the Resampling page "
                        "offers: stable for a roster, new after a refresh)")
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
    p.set_defaults(func=cmd_fit, quick=quick_fit)

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
    p.add_argument("--seed", type=int,
                   help="random seed; the same seed and inputs give the same numbers (default: the roster's own "
                        "seed, the one the Resampling page offers: stable for a roster, new after a refresh)")
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
    p.add_argument("--adjust", metavar="age,tenure,sector", default=None,
                   help="for adjusted_odds_ratio: what the adjusted model adjusts for ('' for none; default: all "
                        "three)")
    common(p)
    p.set_defaults(func=cmd_bootstrap)

    p = sub.add_parser("run", help="stored runs: export a replication pack, or redraw a run and compare")
    rsub = p.add_subparsers(dest="run_command", required=True)
    q = rsub.add_parser("export", help="write a run's replication pack (zip) for recomputing it without Helmshift")
    q.add_argument("run_id", type=int, metavar="RUN_ID", help="the run's id, as in its page's address /runs/ID")
    q.add_argument("--out", required=True, metavar="PACK.zip", help="zip file to write (required)")
    q.add_argument("--records", action="store_true",
                   help="include records.csv, the departures behind the counts (personal data: keep it local)")
    common(q)
    q.set_defaults(func=cmd_run_export)
    q = rsub.add_parser("check", help="redraw a finished bootstrap run with this installation and compare it with "
                                      "what it stored (exit status 1 when a replicate differs)")
    q.add_argument("run_id", type=int, metavar="RUN_ID", help="the run's id, as in its page's address /runs/ID")
    common(q)
    q.set_defaults(func=cmd_run_check)

    p = sub.add_parser("robustness", help="the trend under several mappings and variants")
    p.add_argument("--roster", required=True, help="roster id or name (required)")
    p.add_argument("--mapping", action="append", help="a mapping (repeat for several; NAME or NAME:VERSION)")
    p.add_argument("--vary", action="append", metavar="CODE", help="move CODE to each other category")
    p.add_argument("--preset", action="store_true",
                   help="also read the codes with the academic preset (retirement below 60 counts as forced, "
                        "Parrino 1997; default: off)")
    p.add_argument("--adjust", metavar="age,tenure,sector", default=None,
                   help="the adjusted odds ratio of each reading adjusts for these ('' for none; default: age, "
                        "tenure and sector where the roster has them)")
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
    p.add_argument("--chart", help="png/svg/pdf: coverage, trend, bootstrap, sectors, robustness, rates or "
                                   "adjusted (default: trend); pptx: the findings as a comma list, every one "
                                   "shown or an error (default: every finding that can be shown; rates when the "
                                   "roster has a universe; adjusted only when named); brief: the same comma list "
                                   "(default: trend and bootstrap, or coverage without a run)")
    p.add_argument("--adjust", metavar="LIST", help="the adjusted finding's adjustments, a comma list of age, "
                                                    "tenure, sector (default: all three)")
    p.add_argument("--out", required=True, help="file to write, whole or not at all (required)")
    p.add_argument("--pack", metavar="PACK.zip",
                   help="also write the brief pack: a zip of the replication pack of every run the export quotes, "
                        "with a manifest of sha256s; the brief's and deck's footers name its sha256 (default: none)")
    p.add_argument("--title", help="title of the brief or deck (default: the one saved on the Briefing page, "
                                   "else 'Forced chief-executive departures: ROSTER')")
    p.add_argument("--author", help="author named on the title slide and the brief (default: the saved one, "
                                    "else none)")
    p.add_argument("--marking", help="confidentiality marking on every page and slide, e.g. CONFIDENTIAL "
                                     "(default: the saved one, else none)")
    p.add_argument("--date", metavar="YYYY-MM-DD", help="date of the paper (default: the saved one, else today)")
    common(p, json_flag=False)
    p.set_defaults(func=cmd_export)

    from app.cli.overrides import register as register_overrides
    from app.cli.profiles import register as register_profiles
    from app.cli.roster import register as register_roster
    from app.cli.team import register

    register(sub, common, _store, _emit)
    register_roster(sub, common, _store, _emit)
    register_profiles(sub, common, _store, _emit)
    register_overrides(sub, common, _store, _emit)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    quick = getattr(args, "quick", None)
    if quick is not None:
        # a read-only answer that needs neither the store's SQLAlchemy nor pandas (``helmshift fit`` of a
        # recorded fit); its errors are the ordinary path's to report, so any doubt falls through to it
        try:
            done = quick(args)
        except CommandError as exc:
            print(f"helmshift: {exc}", file=sys.stderr)
            return EXIT_USAGE
        if done is not None:
            return int(done)
    from app.cli.team import TeamCommandError
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
