"""Commands that analyse and export: `coverage`, `fit`, `bootstrap`, `robustness`, `export`, `run export`."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from app.cli.common import (
    CommandError,
    _emit,
    _out_path,
    _parse_years,
    _store,
)


def cmd_coverage(args: argparse.Namespace) -> int:
    from app.analysis.inputs import load_input
    from app.analysis.runs import coverage_summary

    inp = load_input(_store(args), args.roster, mapping=args.mapping, require_mapping=False)
    payload = coverage_summary(inp, threshold=args.threshold)
    _emit(args, payload, lambda p: "\n".join(
        [f"{'year':>6} {'all':>5} {'forced':>7} {'volunt.':>7} {'excl.':>6} {'unmap.':>6}"]
        + [f"{y['year']:>6} {y['departures']:>5} {y['forced']:>7} {y['voluntary']:>7} {y['excluded']:>6} "
           f"{y['unmapped']:>6}" for y in p["years"]]
        + ([f"{p['still_in_post']:,} row(s) still in post, not departures (no departure date; the code says the "
             "executive has not left): no year counts them."] if p["still_in_post"] else [])
        + [f"Suggested window: {p['suggested_window'][0]}\u2013{p['suggested_window'][1]} ({p['rule']})"]))
    return 0


def quick_fit(args: argparse.Namespace) -> int | None:
    """``helmshift fit`` of the straight or spline trend without importing numpy, pandas, SQLAlchemy or
    statsmodels (``app.analysis.quick_fit``): a recorded fit of the same counts printed again, or new counts
    fitted by the engine's plain-Python trend and recorded; None when that path does not apply."""
    if args.measure != "share" or args.by or args.compare or args.resamples is not None:
        return None
    import getpass

    from app.analysis.quick_fit import quick_summary
    from app.config import database_url

    window = _parse_years(args.years)
    payload = quick_summary(database_url(args.db), args.roster, mapping=args.mapping, window=window,
                            model=args.model, spline_df=args.spline_df, quasi=args.quasi, fit_new=True,
                            actor=f"{getpass.getuser()} (command line)")  # as ``main`` records CLI changes
    if payload is None:
        return None
    print(json.dumps(payload) if args.json else payload["headline"])
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
        from app.analysis.adjusted_bootstrap import adjusted_fit_summary

        if args.by or args.compare:
            raise CommandError("--model adjusted adjusts for sector itself (--adjust); drop --by and --compare.")
        from app.analysis.run_params import default_seed

        seed = args.seed if args.seed is not None else default_seed(inp.roster)
        adjusted_payload = adjusted_fit_summary(store, inp, args.adjust, resamples=args.resamples, seed=seed)

        def adjusted_text(p: dict[str, Any]) -> str:
            if "bootstrap" not in p:
                return str(p["sentence"])
            b, (lo, hi) = p["bootstrap"], p["conf_int"]["bootstrap"]
            interval = "n/a" if lo is None or hi is None else f"{lo:.3f} to {hi:.3f}"
            return (f"{p['sentence']}\nFirm bootstrap (run {b['run']}, B={b['resamples']}, seed {b['seed']}): BCa 95% "
                    f"{interval}; {b['failed']} failed resamples.")
        _emit(args, adjusted_payload, adjusted_text)
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


def cmd_run_check(args: argparse.Namespace) -> int:
    from app.analysis.run_check import check_run

    check = check_run(_store(args), args.run_id)
    _emit(args, check.as_dict(), lambda p: str(p["sentence"]))
    return 0 if check.passed else 1


def cmd_bootstrap(args: argparse.Namespace) -> int:
    from app.analysis.inputs import load_input
    from app.analysis.jobs import run_bootstrap_now
    from app.analysis.run_params import default_seed

    store = _store(args)
    inp = load_input(store, args.roster, mapping=args.mapping, window=_parse_years(args.years))
    seed = args.seed if args.seed is not None else default_seed(inp.roster)
    payload = run_bootstrap_now(store, inp, unit=args.unit, resamples=args.resamples, seed=seed,
                                model=args.model, statistic=args.statistic, sector=args.sector,
                                spline_df=args.spline_df, periods=args.periods, stratify=args.stratify,
                                adjust=args.adjust)

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
    from app.analysis.robustness_report import robustness_summary

    store = _store(args)
    mappings = args.mapping or []
    inp = load_input(store, args.roster, mapping=mappings[0] if mappings else None,
                     window=_parse_years(args.years))
    payload = robustness_summary(store, inp, extra_mappings=mappings[1:], vary=args.vary or [], preset=args.preset,
                                 adjust=args.adjust)
    _emit(args, payload, lambda p: "\n".join([p["sentence"], p["rate_sentence"], p["adjusted_sentence"]]))
    return 0


def cmd_export(args: argparse.Namespace) -> int:
    from app.analysis.inputs import load_input
    from app.briefing.exports import export_to_file
    from app.briefing.signature import resolve_signature

    out = _out_path(args.out)
    pack_out = _out_path(args.pack, "--pack") if args.pack else None
    if pack_out is not None and pack_out.resolve() == out.resolve():
        raise CommandError("--pack and --out name the same file; give the brief pack its own name.")
    store = _store(args)
    inp = load_input(store, args.roster, mapping=args.mapping, window=_parse_years(args.years))
    signature = resolve_signature(store.briefing_settings(inp.roster.id), inp.roster.name, title=args.title,
                                  author=args.author, marking=args.marking, when=args.date)
    charts = None
    if args.format in ("pptx", "brief") and args.chart is not None:
        charts = [c.strip() for c in args.chart.split(",") if c.strip()]
    path, pack = export_to_file(store, inp, fmt=args.format, out=out, chart=args.chart or "trend",
                                run_id=args.run, signature=signature, charts=charts, adjust=args.adjust,
                                pack_out=pack_out)
    print(f"Wrote {path}", file=sys.stderr)
    if pack is not None and pack_out is not None:
        print(f"Wrote {pack_out} (brief pack, sha256 {pack.sha256})", file=sys.stderr)
    return 0
