"""Trend: observed forced share per year, the fitted logistic trend, odds ratios with two intervals."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse

from app.analysis.adjusted import MixSection, adjusted_sentence, mix_section, run_adjusted
from app.analysis.inputs import AnalysisInput, load_input
from app.analysis.rates import RatesSection, rates_section
from app.analysis.runs import period_comparison, refresh_comparison, run_trend
from app.briefing.findings import rates_finding, trend_finding_from_fit
from app.briefing.mix_chart import mix_figures
from app.stats.adjusted import AdjustedError
from app.stats.headline import headline_fields, headline_sentence
from app.stats.periods import PeriodError, Span, parse_periods
from app.stats.trend import SPLINE_DFS, TREND_KINDS, TrendError, TrendFit
from app.stats.trend_report import fit_to_dict
from app.store import Roster, Run, Store, StoreError
from app.web.departures import mapping_ref
from app.web.deps import BadRequest, NotFound, adjust_arg, app_store, flag_arg, window_query
from app.web.figures import FigureSpec, figure_spec, page_memo
from app.web.rendering import as_json, context_line, render
from app.web.route_docs import WINDOW_QUERY, api_errors, json_or_validation_error, page_errors, query
from app.web.run_numbers import ordinals, trend_fits
from app.web.schemas import OddsRow, TrendFitSummary, define, list_of, variant

router = APIRouter()


@dataclass(frozen=True)
class TrendPage:
    """The fit (or the reason there is none), its sentence, chart and the list of stored fits."""

    roster: Roster
    mapping_label: str
    window: tuple[int, int]
    window_source: str
    model: str
    spline_df: int
    fit: dict[str, Any] | None
    sentence: str | None
    error: str | None
    warnings: list[str]
    run_id: int | None
    runs: list[Run]
    figure: FigureSpec | None = field(default=None, metadata={"json_skip": True})
    table: list[dict[str, Any]] = field(default_factory=list)
    quasi: bool = False
    spline_dfs: tuple[int, ...] = SPLINE_DFS
    #: forced and voluntary turnover per 100 firm-years and their Poisson trends (None without a mapping)
    rates: RatesSection | None = None
    records_mapping: str | None = field(default=None, metadata={"json_skip": True})
    periods: dict[str, Any] | None = None
    periods_error: str | None = None
    #: the same fit on the roster's previous version, when one was made: the finding before and after a refresh
    refresh: dict[str, Any] | None = None
    #: age and tenure mix of counted departures by year, and whether it moved (composition diagnostic)
    mix: MixSection | None = None
    mix_figures: dict[str, FigureSpec] = field(default_factory=dict, metadata={"json_skip": True})
    #: the rates finding's figure (the one the Briefing exports), when the roster has a universe
    rates_figure: FigureSpec | None = field(default=None, metadata={"json_skip": True})
    #: the adjustments asked for (``adjust`` query); the adjusted fit only when asked (it reads firm counts)
    adjust: list[str] | None = None
    adjusted: dict[str, Any] | None = None
    adjusted_error: str | None = None
    #: run id -> "Fit N", the run's number among the roster's trend fits (links keep the run id)
    run_numbers: dict[int, int] = field(default_factory=dict)


TrendBody = define(TrendPage, "TrendBody", fields={"fit": TrendFitSummary | None, "table": list_of(OddsRow)},
                   doc="200: the fit. The same page, ``fit`` null and ``error`` set, comes with status 422.")
TrendUnfitBody = variant(TrendPage, "TrendUnfitBody", fields={"fit": None, "sentence": None, "error": str},
                         doc="No trend could be fitted: ``error`` says why.")


def _odds_table(fit: TrendFit) -> list[dict[str, Any]]:
    rows = [{"what": "per year", "odds_ratio": fit.odds_ratio, "wald": fit.conf_int.get("wald"),
             "profile": fit.conf_int.get("profile")},
            {"what": "per decade", "odds_ratio": fit.decade_odds_ratio, "wald": fit.decade_conf_int.get("wald"),
             "profile": fit.decade_conf_int.get("profile")}]
    if fit.quasi is not None:
        rows.append({"what": "per year, quasi-binomial", "odds_ratio": fit.odds_ratio,
                     "wald": fit.quasi.conf_int.get("wald"), "profile": fit.quasi.conf_int.get("profile")})
    return rows


def _periods(inp: AnalysisInput, periods: tuple[Span, Span] | None) -> tuple[dict[str, Any] | None, str | None]:
    """The period comparison, or why there is none (periods outside the data, overlapping, ...)."""
    try:
        return period_comparison(inp, periods).as_dict(), None
    except PeriodError as exc:
        return None, str(exc)


def trend_data(store: Store, roster_id: int, *, model: str = "linear", spline_df: int = 3,
               window: tuple[int, int] | None = None, quasi: bool = False,
               periods: tuple[Span, Span] | None = None, adjust: tuple[str, ...] | None = None) -> TrendPage:
    if model not in TREND_KINDS:
        raise BadRequest(f"model must be one of {', '.join(TREND_KINDS)}; got {model!r}.")
    if spline_df not in SPLINE_DFS:
        raise BadRequest(f"spline df must be one of {', '.join(map(str, SPLINE_DFS))}; got {spline_df}.")
    try:
        roster = store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    try:
        inp = load_input(store, roster.id, window=window)
    except StoreError as exc:
        return _empty(store, roster, model, spline_df, str(exc))
    runs, numbers = _trend_runs(store, roster.id)
    rates = rates_section(store, inp, fit=True)
    try:
        outcome = run_trend(store, inp, model=model, spline_df=spline_df, quasi=quasi)
    except TrendError as exc:
        return TrendPage(roster, inp.mapping_label, inp.window, inp.window_source, model, spline_df, None, None,
                         str(exc), inp.warnings(), None, runs, quasi=quasi, rates=rates, run_numbers=numbers)
    fit = outcome.fit
    mix, mix_specs, adjusted, adjusted_error = _composition(store, inp, adjust)
    figure = page_memo(store, ("trend", *inp.key, model, spline_df, quasi),
                       lambda: figure_spec(trend_finding_from_fit(inp, fit, model).figure, titled=False))
    compared, compare_error = _periods(inp, periods)
    runs, numbers = _trend_runs(store, roster.id)
    rates_spec = None
    if rates.universe_id is not None and rates.forced is not None and rates.voluntary is not None:
        rates_spec = page_memo(store, ("trend-rates", *inp.key, rates.universe_id),
                               lambda: figure_spec(rates_finding(store, inp).figure, titled=False))
    return TrendPage(
        roster=roster, mapping_label=inp.mapping_label, window=inp.window, window_source=inp.window_source,
        model=model, spline_df=spline_df, fit={**fit_to_dict(fit), **headline_fields(fit)},
        sentence=headline_sentence(fit), error=None,
        warnings=inp.warnings(), run_id=outcome.run_id, runs=runs, run_numbers=numbers,
        figure=figure, table=_odds_table(fit), quasi=quasi, rates=rates, records_mapping=mapping_ref(inp.mapping),
        periods=compared, periods_error=compare_error, refresh=refresh_comparison(store, inp, outcome.run_id),
        mix=mix, mix_figures=mix_specs, rates_figure=rates_spec,
        adjust=list(adjust) if adjust is not None else None, adjusted=adjusted, adjusted_error=adjusted_error,
    )


def _composition(store: Store, inp: AnalysisInput, adjust: tuple[str, ...] | None) -> tuple[
        MixSection | None, dict[str, FigureSpec], dict[str, Any] | None, str | None]:
    """The mix diagnostic (always) and the adjusted fit (when asked), or why there is none."""
    mix = mix_section(inp)
    specs = page_memo(store, ("trend-mix", *inp.key),
                      lambda: {k: figure_spec(f, titled=False) for k, f in mix_figures(inp, mix).items()})
    if adjust is None:
        return mix, specs, None, None
    try:
        outcome = run_adjusted(store, inp, adjust)
    except AdjustedError as exc:
        return mix, specs, None, str(exc)
    return mix, specs, {**outcome.result, "sentence": adjusted_sentence(outcome.fit),
                        "run": outcome.run_id}, None


def _trend_runs(store: Store, roster_id: int) -> tuple[list[Run], dict[int, int]]:
    """The ten newest stored trend fits and their per-roster numbers."""
    fits = trend_fits(store, roster_id)
    numbers = ordinals(fits)
    shown = fits[:10]
    return shown, {r.id: numbers[r.id] for r in shown}


def _empty(store: Store, roster: Roster, model: str, spline_df: int, error: str) -> TrendPage:
    runs, numbers = _trend_runs(store, roster.id)
    return TrendPage(roster, "no mapping", (0, 0), "none", model, spline_df, None, None, error, [], None,
                     runs, run_numbers=numbers)


def _period_args(request: Request) -> tuple[Span, Span] | None:
    first, second = (request.query_params.get(k, "").strip() for k in ("first", "second"))
    if not first and not second:
        return None
    try:
        return parse_periods(f"{first}:{second}")
    except PeriodError:
        raise BadRequest("Compare two periods written like 1998-2014 (first) and 2015-2022 (second); "
                         f"got {first!r} and {second!r}.") from None


def _request_args(request: Request) -> dict[str, Any]:
    df = request.query_params.get("spline_df", "3")
    quasi = flag_arg(request, "quasi")
    adjust = adjust_arg(request, "adjusted")
    return {"model": request.query_params.get("model", "linear"),
            "spline_df": int(df) if df.isdecimal() else -1, "window": window_query(request), "quasi": quasi,
            "periods": _period_args(request), "adjust": adjust}


_TREND_QUERY = query(("model", {"type": "string", "enum": list(TREND_KINDS), "default": "linear"}, "trend model"),
                     ("spline_df", {"type": "integer", "enum": list(SPLINE_DFS), "default": 3},
                      "degrees of freedom of the spline checked for curvature"),
                     ("quasi", {"type": "string", "enum": ["0", "1"], "default": "0"},
                      "1 gives the quasi-binomial intervals whatever the dispersion"),
                     *WINDOW_QUERY,
                     ("first", {"type": "string", "pattern": "^([0-9]{4}-[0-9]{4})?$"},
                      "first period to compare, e.g. 1998-2014 (default: the window before its last third)"),
                     ("second", {"type": "string", "pattern": "^([0-9]{4}-[0-9]{4})?$"},
                      "second period, e.g. 2015-2022 (default: the window's last third)"),
                     ("adjusted", {"type": "string", "enum": ["0", "1"], "default": "0"},
                      "1 also fits the trend adjusted for the ``adjust`` fields (firm-clustered SEs)"),
                     ("adjust", {"type": "array", "items": {"type": "string", "enum": ["age", "tenure", "sector"]}},
                      "what the adjusted trend adjusts for (repeatable; none: the plain logit with clustered SEs)"))


@router.get("/rosters/{roster_id}/trend", response_class=HTMLResponse, name="trend_page",
            responses=page_errors(400, 404), openapi_extra=_TREND_QUERY)
def trend_page(request: Request, roster_id: int) -> HTMLResponse:
    page = trend_data(app_store(request), roster_id, **_request_args(request))
    return render(request, "trend.html", page, roster=page.roster, active="trend_page", cautions_open=True,
                  context_line=context_line(page.mapping_label, page.window))


@router.get("/api/rosters/{roster_id}/trend", name="trend_api", response_model=None,
            responses={200: {"model": TrendBody, "description": "The fitted trend"}, **api_errors(400, 404),
                       422: json_or_validation_error(TrendUnfitBody, "No trend could be fitted (error says "
                                                     "why), or the roster id is not a number")},
            openapi_extra=_TREND_QUERY)
def trend_api(request: Request, roster_id: int) -> JSONResponse:
    page = trend_data(app_store(request), roster_id, **_request_args(request))
    return as_json(page, status=200 if page.fit else 422)
