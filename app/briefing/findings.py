"""Each chart the product shows, built once from the analysis, for the page and for every export.

A finding is a figure, the sentence that states what it shows, and the provenance of its numbers.
Pages draw ``finding.figure``; the briefing exports the very same figure as PNG, SVG, PDF, a slide
or part of the one-page brief.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any, Literal, get_args

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from app.analysis.adjusted import adjusted_sentence, mix_section, run_adjusted
from app.analysis.inputs import AnalysisInput, input_for_run
from app.analysis.jobs import replicate_odds_ratios
from app.analysis.provenance import Provenance, provenance_for
from app.analysis.rates import SHARE_VS_RATE, run_rates
from app.analysis.runs import run_sectors, run_trend
from app.briefing.charts import bootstrap_histogram, coverage_figure, forest_figure, trend_figure
from app.briefing.rate_chart import rates_figure
from app.stats.adjusted import ADJUSTMENTS, parse_adjust
from app.stats.headline import headline_sentence, interval_label, model_interval
from app.stats.rate_trend import RateError, RateTrend, rate_trend_to_dict
from app.stats.sectors import SectorTrends
from app.stats.trend import TrendFit
from app.store import Run, Store, StoreError

#: the model line of a rate ratio run's provenance (the universe's fingerprint is in the run's parameters)
RATE_MODEL = "Poisson GLM, forced departures with log firm-years offset, linear in fiscal year"

if TYPE_CHECKING:
    from app.analysis.robustness import Robustness

ChartName = Literal["coverage", "trend", "bootstrap", "sectors", "robustness", "rates", "adjusted"]
CHART_NAMES: tuple[ChartName, ...] = get_args(ChartName)
METHOD_LABELS = {"percentile": "percentile", "basic": "basic", "bca": "BCa", "normal": "normal",
                 "studentized": "studentized"}


@dataclass(frozen=True)
class ChartFinding:
    """A chart, its headline (the chart's title), the supporting sentence, and where its numbers came from."""

    name: ChartName
    figure: go.Figure
    takeaway: str
    provenance: Provenance
    title: str = ""
    #: what a reader must not conclude from the chart (the slide's speaker notes)
    caveat: str = ""
    #: the odds-ratio rows behind a forest chart (label, odds_ratio, low, high, group), for the deck's own chart
    rows: pd.DataFrame | None = field(default=None, compare=False)
    #: the stored runs whose numbers the finding shows (their replication packs go in the brief pack)
    run_ids: tuple[int, ...] = ()
    #: the finding's own numbers (JSON-ready), for the brief pack's results.json
    numbers: dict[str, Any] = field(default_factory=dict, compare=False)


def coverage_finding(inp: AnalysisInput) -> ChartFinding:
    lo, hi = inp.window
    inside = inp.coverage[(inp.coverage["year"] >= lo) & (inp.coverage["year"] <= hi)]
    counted = int(inside["forced"].sum() + inside["voluntary"].sum())
    if inp.window == inp.suggestion.window and inp.suggestion.below_cutoff:
        takeaway = (f"{counted:,} forced or voluntary departures are counted in {lo}–{hi}, the longest run of years "
                    f"with at least {inp.suggestion.threshold:.0%} of the median year's records; years outside it "
                    "are thinly covered and left out.")
    else:
        takeaway = f"{counted:,} forced or voluntary departures are counted in the analysis window {lo}–{hi}."
    title = (f"{counted:,} departures counted in {lo}–{hi}; thinly covered years lie outside"
             if inp.suggestion.below_cutoff else f"{counted:,} departures counted in {lo}–{hi}")
    prov = provenance_for(inp, model="coverage count per fiscal year", interval_method="none")
    fig = coverage_figure(inp.coverage, inp.window, sorted({f.year for f in inp.flags}), title=title,
                          source=prov.short())
    caveat = ("Only forced and voluntary departures are counted; excluded and unmapped codes are not. Years "
              "outside the window are thinly covered, so their shares would rest on few departures.")
    numbers = {"window": list(inp.window), "counted": counted,
               "years": [{k: int(v) for k, v in row.items()} for row in
                         inside[["year", "forced", "voluntary", "excluded", "unmapped"]].to_dict("records")]}
    return ChartFinding("coverage", fig, takeaway, prov, title, caveat, numbers=numbers)


def trend_finding_from_fit(inp: AnalysisInput, fit: TrendFit, model: str, run_id: int | None = None) -> ChartFinding:
    prov = provenance_for(inp, model=model, interval_method=interval_label(fit), by_sector=model == "sector")
    observed = fit.observed.assign(low=fit.observed["wilson_low"], high=fit.observed["wilson_high"])
    sentence = headline_sentence(fit)
    fig = trend_figure(observed, fit.fitted, title=sentence, source=prov.short())
    interval = model_interval(fit)
    # the takeaway names the same interval as the headline (profile likelihood), never a second method
    detail = (f"Odds ratio per year {fit.odds_ratio:.3f} ({interval_label(fit)} {interval[0]:.3f} to "
              f"{interval[1]:.3f}), from {fit.departures:,} departures of which {fit.forced:,} were forced; "
              f"Pearson dispersion {fit.dispersion:.2f}." if fit.odds_ratio is not None and interval is not None
              else sentence)
    caveat = ("Observational data: a trend is not a cause. The fitted line is straight on the log-odds scale; "
              "years with few departures have wide Wilson intervals.")
    return ChartFinding("trend", fig, detail, prov, sentence, caveat,
                        run_ids=(run_id,) if run_id is not None else ())


def trend_finding(store: Store, inp: AnalysisInput, model: str = "linear") -> ChartFinding:
    outcome = run_trend(store, inp, model=model)
    return trend_finding_from_fit(inp, outcome.fit, model, outcome.run_id)


def bootstrap_run(store: Store, run_id: int) -> Run:
    run = store.get_run(run_id)
    if run.kind != "bootstrap":
        raise StoreError(f"Run {run_id} is a {run.kind} run, not a bootstrap run.")
    if run.status != "done" or run.result is None:
        raise StoreError(f"Bootstrap run {run_id} has not finished (status {run.status}).")
    return run


def latest_bootstrap(store: Store, inp: AnalysisInput) -> Run | None:
    """The newest finished bootstrap run on this roster's mapping version and window, firm resampling first."""
    runs = sorted(store.list_runs(inp.roster.id, "bootstrap"), key=lambda r: r.params.get("unit") != "firm")
    for run in runs:
        if (run.status == "done" and run.window == inp.window and inp.mapping is not None
                and run.mapping_name == inp.mapping.name and run.mapping_version == inp.mapping.version):
            return run
    return None


def bootstrap_finding(store: Store, run_id: int, method: str = "bca") -> ChartFinding:
    if method not in METHOD_LABELS:
        raise ValueError(f"method must be one of {', '.join(METHOD_LABELS)}; got {method!r}.")
    run = bootstrap_run(store, run_id)
    assert run.result is not None
    inp = input_for_run(store, run)
    result = run.result
    label = METHOD_LABELS[method]
    statistic = run.params.get("statistic", "slope")
    model = {"rate_ratio": RATE_MODEL, "adjusted_odds_ratio": "adjusted"}.get(statistic, run.params.get("model", "linear"))
    adjust = tuple(run.params["adjust"]) if statistic == "adjusted_odds_ratio" else None
    prov = provenance_for(inp, model=model, interval_method=f"bootstrap {label}, 95%",
                          resamples=result["resamples"], seed=run.params["seed"], unit=run.params["unit"],
                          by_sector=run.params.get("model") == "sector", adjust=adjust)
    lo, hi = result["conf_int"].get(method, (None, None))
    estimate = float(result["odds_ratio"])
    unit = "whole firms" if run.params["unit"] == "firm" else "departures"
    what = result.get("label") or "odds ratio per year"
    if lo is not None and hi is not None:
        takeaway = (f"Resampling {unit} {result['resamples']:,} times, the {what} is {estimate:.3f} "
                    f"(95% {label} interval {lo:.3f} to {hi:.3f}).")
    else:
        takeaway = f"Resampling {unit}: the {label} interval could not be computed."
    logged = result.get("scale", "log") == "log"
    values = replicate_odds_ratios(store, run.id) if logged else store.replicates(run.id)
    reference = 1.0 if logged else 0.0 if run.params.get("statistic") == "period_difference" else None
    fig = bootstrap_histogram(values, estimate, (lo if lo is not None else np.nan, hi if hi is not None else np.nan),
                              method_label=f"95% {label}", title=takeaway, source=prov.short(),
                              what=what[:1].upper() + what[1:], reference=reference,
                              reference_label=("No change (ratio 1)" if run.params.get("statistic") == "rate_ratio"
                                               else "No change (OR = 1)") if logged else "No difference")
    failed = int(result["failed"])
    detail = (f"{'Whole firms were' if run.params['unit'] == 'firm' else 'Departures were'} drawn with replacement "
              f"(seed {run.params['seed']}); {failed:,} resample(s) could not be fitted"
              + (" and are reported, not redrawn." if failed else ".")
              + (" The dashed line marks no change (ratio 1)." if logged else
                 " The dashed line marks no difference." if reference is not None else ""))
    caveat = (f"{failed:,} resample(s) could not be fitted and are left out, not redrawn; with few firms or "
              "few forced departures the interval is itself uncertain.")
    return ChartFinding("bootstrap", fig, detail, prov, takeaway, caveat, run_ids=(run.id,))


def _pair(p: tuple[float, float] | None) -> tuple[float, float]:
    return (float(p[0]), float(p[1])) if p else (np.nan, np.nan)


def sector_verdict(result: SectorTrends) -> str:
    """The test of equal trends in words."""
    het = result.heterogeneity
    if het is None:
        return "Too few sectors could be fitted to test whether their trends differ."
    p = het.p
    words = ("differ clearly" if p < 0.01 else "differ" if p < 0.05
             else "may differ (weak evidence)" if p < 0.10 else "are consistent with one common trend")
    text = (f"Across {len(het.sectors)} sectors the yearly trends {words} (likelihood-ratio test of equal "
            f"trends: {het.statistic:.1f} on {het.df} df, p = {p:.3g}).")
    fitted = [t for t in result.sectors if t.status == "fitted" and t.odds_ratio is not None]
    if fitted and p < 0.05:
        hi = max(fitted, key=lambda t: t.odds_ratio or 0.0)
        lo = min(fitted, key=lambda t: t.odds_ratio or 0.0)
        text += (f" Steepest: {hi.sector} (odds ratio {hi.odds_ratio:.3f} a year); "
                 f"flattest: {lo.sector} ({lo.odds_ratio:.3f}).")
    return text


#: what "(84/274)" after a sector's name means, under the sector chart on the page and in every export
SECTOR_LABEL_NOTE = ("In brackets after each sector: forced/counted departures in the window (counted = forced "
                     "plus voluntary; excluded and unmapped codes are left out).")


def sectors_finding_from(inp: AnalysisInput, result: SectorTrends, run_id: int | None = None) -> ChartFinding:
    rows = []
    if result.common is not None and result.common.odds_ratio is not None:
        lo, hi = _pair(result.common.conf_int.get("profile"))
        rows.append({"label": "All sectors (sector-adjusted)", "odds_ratio": result.common.odds_ratio,
                     "low": lo, "high": hi, "group": "common"})
    for t in result.sectors:
        lo, hi = _pair(t.conf_int.get("profile")) if t.status == "fitted" else (np.nan, np.nan)
        rows.append({"label": f"{t.sector} ({t.forced}/{t.departures})",
                     "odds_ratio": t.odds_ratio if t.odds_ratio is not None else np.nan,
                     "low": lo, "high": hi, "group": "sector"})
    verdict = sector_verdict(result)
    prov = provenance_for(inp, model="sector", by_sector=True, interval_method="profile likelihood, 95%")
    title = verdict.split(" (")[0]
    table = pd.DataFrame(rows)
    fig = forest_figure(table, title=title, source=prov.short(), notes=[SECTOR_LABEL_NOTE])
    caveat = (f"Each row's label gives forced/all departures counted in that sector, e.g. {rows[-1]['label']}. "
              "Sectors too small to fit alone are shown as not estimable; with many sectors some "
              "differences arise by chance.") if len(rows) > 1 else "Too few sectors to compare."
    return ChartFinding("sectors", fig, verdict, prov, title, caveat, table,
                        run_ids=(run_id,) if run_id is not None else ())


def sectors_finding(store: Store, inp: AnalysisInput, min_departures: int = 20) -> ChartFinding:
    return sectors_finding_from(inp, *run_sectors(store, inp, min_departures=min_departures))


#: the robustness finding's interval methods when its readings carry the rate and adjusted measures
ROBUSTNESS_MEASURES_METHOD = ("profile likelihood, 95%; each reading's forced rate ratio: Poisson GLM with log "
                              "firm-years as offset, profile likelihood (quasi-Poisson when overdispersed); its "
                              "adjusted odds ratio: firm-clustered Wald, 95%")


def robustness_finding_from(inp: AnalysisInput, result: Robustness) -> ChartFinding:
    """The share's forest chart under each reading; with measures, the readings' rate ratios and adjusted odds
    ratios in the rows, their verdicts in the takeaway and notes, the universe and adjustment set in the
    provenance."""
    from app.analysis.robustness_report import robustness_rows

    prov = provenance_for(inp, interval_method="profile likelihood, 95%")
    if result.measured:
        prov = replace(prov, interval_method=ROBUSTNESS_MEASURES_METHOD, universe=result.universe or "",
                       universe_fingerprint=result.universe_fingerprint or "",
                       universe_approximate=result.universe_approximate, adjustment=result.adjust)
    title = result.sentence.split(": ")[0].split(", but")[0]
    table = robustness_rows(result)
    # the chart draws the share's odds ratios (label, odds_ratio, low, high, group); the other columns are data
    fig = forest_figure(table, title=title, source=prov.short())
    caveat = ("Each row is the same trend under another reading of the reason codes. A reading that leaves "
              "counted departures unmapped is marked and does not decide the verdict.")
    takeaway = result.sentence
    if result.measured:
        caveat += f" {result.rate_sentence} {result.adjusted_sentence}"
        takeaway += f" {result.measures_takeaway()}"
    numbers: dict[str, Any] = {
        "sentence": result.sentence,
        "readings": [{k: (None if isinstance(v, float) and not np.isfinite(v) else v)
                      for k, v in row.items()} for row in table.to_dict("records")]}
    if result.measured:
        numbers |= {"rate_sentence": result.rate_sentence, "rate_holds": result.rate_holds,
                    "adjusted_sentence": result.adjusted_sentence, "adjusted_holds": result.adjusted_holds,
                    "universe_fingerprint": result.universe_fingerprint, "adjust": list(result.adjust)}
    return ChartFinding("robustness", fig, takeaway, prov, title, caveat, table, numbers=numbers)


def robustness_finding(store: Store, inp: AnalysisInput, extra: list[str] | None = None,
                       vary: list[str] | None = None, adjust: tuple[str, ...] | str | None = None) -> ChartFinding:
    """``adjust``: the readings' adjustment set (default: age, tenure and sector where the roster has them)."""
    from app.analysis.robustness import check_robustness

    # by default, only the saved mappings that give every counted code a category (the rest are left out)
    return robustness_finding_from(inp, check_robustness(store, inp, extra_mappings=extra or "covering",
                                                         vary=vary or [], adjust=adjust))


def _ratio_text(fit: RateTrend) -> str:
    lo, hi = fit.headline_interval()
    method = "quasi-Poisson profile likelihood" if fit.quasi is not None else "profile likelihood"
    return f"{fit.rate_ratio:.3f} per year (95% {method} {lo:.3f} to {hi:.3f})"


def rates_finding(store: Store, inp: AnalysisInput) -> ChartFinding:
    """Forced and voluntary rates per 100 firm-years over the roster's universe, both Poisson trends, the
    decomposition sentence and the share-vs-rate caution. Needs a universe (StoreError names how to get one)."""
    a = run_rates(store, inp)
    if a.error is not None or a.forced is None or a.voluntary is None or a.sentence is None:
        raise RateError(a.error or "The rate trends could not be fitted.")
    prov = provenance_for(inp, model="rate", interval_method="exact Poisson per year, profile likelihood and "
                          "Wald for the rate ratios, 95%", universe=a.universe)
    title = a.sentence.split(" (per 100 firm-years")[0] + "."
    fig = rates_figure(a.table.years, a.forced, a.voluntary, title=title, source=prov.short())
    # the Wald intervals are in the brief's table and the pack; the slide quotes the one headline method
    takeaway = (f"Forced rate ratio {_ratio_text(a.forced)}; voluntary {_ratio_text(a.voluntary)}; over "
                f"{a.table.firm_years:,} firm-years.")
    caveat = " ".join([SHARE_VS_RATE, *a.messages])
    estimates = []
    for label, fit in (("Forced rate ratio per year", a.forced), ("Voluntary rate ratio per year", a.voluntary)):
        quasi = " (quasi-Poisson)" if fit.quasi is not None else ""
        estimates.append({"label": label, "estimate": fit.rate_ratio, "low": fit.headline_interval()[0],
                          "high": fit.headline_interval()[1], "method": f"profile likelihood{quasi}"})
        if label.startswith("Forced"):
            wald = fit.quasi.conf_int["wald"] if fit.quasi is not None else fit.conf_int["wald"]
            estimates.append({"label": label, "estimate": fit.rate_ratio, "low": wald[0], "high": wald[1],
                              "method": f"Wald{quasi}"})
    numbers = {"rate_ratio": a.forced.rate_ratio, "voluntary_rate_ratio": a.voluntary.rate_ratio,
               "forced": rate_trend_to_dict(a.forced), "voluntary": rate_trend_to_dict(a.voluntary),
               "sentence": a.sentence, "years": a.years(), "firm_years": a.table.firm_years,
               "universe": {"id": a.universe.id, "fingerprint": a.universe.fingerprint,
                            "approximate": a.universe.approximate}, "estimates": estimates}
    return ChartFinding("rates", fig, takeaway, prov, title, caveat,
                        run_ids=(a.run_id,) if a.run_id is not None else (), numbers=numbers)


def adjusted_finding(store: Store, inp: AnalysisInput, adjust: tuple[str, ...] | str | None = None) -> ChartFinding:
    """The trend adjusted for the age and tenure mix (and sector), beside the same logit adjusted for nothing,
    both with firm-clustered intervals; the mix sentences say whether the age and tenure mix moved.
    ``adjust``: the adjustment set (default: every one, age, tenure and sector)."""
    chosen = parse_adjust(adjust) if adjust is not None else ADJUSTMENTS
    plain = run_adjusted(store, inp, ())
    outcome = run_adjusted(store, inp, chosen)
    fit = outcome.fit
    named = ", ".join(chosen) if chosen else "nothing"
    rows = []
    for label, f, group in (("Unadjusted (year only)", plain.fit, "unadjusted"),
                            (f"Adjusted for {named}", fit, "adjusted")):
        lo, hi = f.cluster_interval
        rows.append({"label": f"{label} ({f.departures:,} departures)", "odds_ratio": f.odds_ratio, "low": lo,
                     "high": hi, "group": group})
    table = pd.DataFrame(rows)
    prov = provenance_for(inp, model="adjusted", adjust=chosen, interval_method="firm-clustered Wald, 95%")
    sentence = adjusted_sentence(fit)
    title = f"{sentence.split(': odds ratio')[0]}: odds ratio {fit.odds_ratio:.3f} per year"
    mix = mix_section(inp)
    # the slide and brief carry each mix sentence's verdict; the numbers behind it go under the chart and in notes
    verdicts = " ".join(m.split(" (")[0].split(":")[0].rstrip(".") + "." for m in mix.sentences)
    # under the chart: each mix verdict with its numbers, without the advice that follows (it is in the notes)
    fig = forest_figure(table, title=title, source=prov.short(),
                        notes=[m.split("): ")[0] + (")" if "): " in m else "") for m in mix.sentences])
    caveat = ("Adjusting removes only the measured mix (age and tenure bands, sector); departures missing an "
              "adjusting field are left out and counted. " + " ".join(mix.sentences))
    numbers = {"adjust": list(chosen), "odds_ratio": fit.odds_ratio, "cluster_se": fit.cluster_se,
               "conf_int": {"cluster": list(fit.cluster_interval)}, "departures": fit.departures,
               "dropped": dict(fit.dropped), "unadjusted_odds_ratio": plain.fit.odds_ratio,
               "unadjusted_conf_int": {"cluster": list(plain.fit.cluster_interval)}, "mix": mix.sentences,
               "estimates": [{"label": f"Adjusted odds ratio per year ({named})", "estimate": fit.odds_ratio,
                              "low": fit.cluster_interval[0], "high": fit.cluster_interval[1],
                              "method": "firm-clustered Wald"}]}
    return ChartFinding("adjusted", fig, f"{sentence} {verdicts}", prov, title, caveat, table,
                        run_ids=(plain.run_id, outcome.run_id), numbers=numbers)


def build_finding(store: Store, inp: AnalysisInput, chart: str, *, run_id: int | None = None,
                  method: str = "bca", model: str = "linear",
                  adjust: tuple[str, ...] | str | None = None) -> ChartFinding:
    """Any chart by name; ``bootstrap`` uses ``run_id`` or the newest matching finished run; ``adjusted``
    adjusts for ``adjust`` (default age, tenure and sector)."""
    if chart not in CHART_NAMES:
        raise ValueError(f"chart must be one of {', '.join(CHART_NAMES)}; got {chart!r}.")
    if chart == "coverage":
        return coverage_finding(inp)
    if chart == "trend":
        return trend_finding(store, inp, model)
    if chart == "bootstrap":
        if run_id is None:
            latest = latest_bootstrap(store, inp)
            if latest is None:
                raise StoreError("No finished bootstrap run matches this roster's mapping and window; "
                                 "start one on the Resampling page or with the command helmshift bootstrap.")
            run_id = latest.id
        return bootstrap_finding(store, run_id, method)
    if chart == "sectors":
        return sectors_finding(store, inp)
    if chart == "rates":
        return rates_finding(store, inp)
    if chart == "adjusted":
        return adjusted_finding(store, inp, adjust)
    return robustness_finding(store, inp, adjust=adjust)
