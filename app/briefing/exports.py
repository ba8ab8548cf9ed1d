"""Board exports: chart files, the slide deck and the one-page brief, from the page's own figures."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path
from typing import Literal, get_args

import pandas as pd

from app.analysis.brief_pack import BriefPack, PackedFinding, build_brief_pack
from app.analysis.inputs import AnalysisInput
from app.analysis.provenance import CAUTIONS, Provenance
from app.analysis.runs import run_trend
from app.briefing.charts import untitled
from app.briefing.deck import Byline, Finding, build_deck
from app.briefing.findings import CHART_NAMES, ChartFinding, build_finding, latest_bootstrap
from app.briefing.render import figure_bytes
from app.briefing.signature import Signature, resolve_signature
from app.stats.headline import headline_sentence
from app.stats.trend import TrendError
from app.store import Store, StoreError

ExportFormat = Literal["png", "svg", "pdf", "pptx", "brief"]
AdjustSet = tuple[str, ...] | str | None
EXPORT_FORMATS: tuple[ExportFormat, ...] = get_args(ExportFormat)
DEFAULT_DECK: tuple[str, ...] = ("coverage", "trend", "bootstrap", "sectors", "robustness")
MEDIA_TYPES = {"png": "image/png", "svg": "image/svg+xml", "pdf": "application/pdf",
               "pptx": "application/vnd.openxmlformats-officedocument.presentationml.presentation",
               "brief": "application/pdf"}


def chart_file(store: Store, inp: AnalysisInput, chart: str, fmt: str, *, run_id: int | None = None,
               method: str = "bca", model: str = "linear", adjust: AdjustSet = None) -> bytes:
    """One chart as PNG (2x), SVG or PDF: the same figure the page draws."""
    if fmt not in ("png", "svg", "pdf"):
        raise ValueError(f"chart format must be png, svg or pdf; got {fmt!r}.")
    finding = build_finding(store, inp, chart, run_id=run_id, method=method, model=model, adjust=adjust)
    return figure_bytes(finding.figure, fmt)  # type: ignore[arg-type]


def default_charts(store: Store, inp: AnalysisInput, run_id: int | None = None) -> list[str]:
    """The standard deck when the analyst ticked nothing: every finding that can be shown now (rates when the
    roster has a universe of firm-years; the adjusted trend only when ticked, as it reads the firm counts)."""
    missing_run = run_id is None and latest_bootstrap(store, inp) is None
    chosen = [c for c in DEFAULT_DECK if not (c == "bootstrap" and missing_run)]
    if store.current_universe(inp.roster.id) is not None:
        chosen.insert(chosen.index("trend") + 1, "rates")
    return chosen


def _findings(store: Store, inp: AnalysisInput, charts: Sequence[str], run_id: int | None,
              adjust: AdjustSet = None) -> list[ChartFinding]:
    """Every ticked finding, in order, or an error naming the one that cannot be shown (none is left out)."""
    bad = [c for c in charts if c not in CHART_NAMES]
    if bad:
        raise ValueError(f"chart must be one of {', '.join(CHART_NAMES)}; got {', '.join(map(repr, bad))}.")
    out = []
    for chart in dict.fromkeys(charts):
        try:
            out.append(build_finding(store, inp, chart, run_id=run_id if chart == "bootstrap" else None,
                                     adjust=adjust))
        except (StoreError, ValueError, TrendError) as exc:
            raise ValueError(f"The {chart} finding was ticked but cannot be shown: {exc} "
                             "Untick it or fix the cause; no export leaves a ticked finding out.") from exc
    return out


def _deck_provenance(findings: Sequence[ChartFinding], fallback: Provenance) -> Provenance:
    """The trend's provenance, carrying the bootstrap's B, seed and unit when one is included, the rates'
    universe and model, and the adjusted trend's model and adjustment set."""
    base = next((f.provenance for f in findings if f.name == "trend"), fallback)
    boot = next((f.provenance for f in findings if f.name == "bootstrap"), None)
    if boot is not None:
        base = replace(base, resamples=boot.resamples, seed=boot.seed, unit=boot.unit,
                       interval_method=f"{base.interval_method}; {boot.interval_method}")
    for f in findings:
        p = f.provenance
        if f.name in ("rates", "adjusted") and p is not base:
            label = "rates" if f.name == "rates" else "adjusted trend"
            # the adjustment set has its own line, so the model line leaves it out
            model = p.model.split(" (adjusted for")[0]
            base = replace(base, model=f"{base.model}; {label}: {model}",
                           interval_method=f"{base.interval_method}; {label}: {p.interval_method}")
        if f.name == "rates":
            base = replace(base, universe=p.universe, universe_fingerprint=p.universe_fingerprint,
                           universe_approximate=p.universe_approximate)
        if f.name == "adjusted":
            base = replace(base, adjustment=p.adjustment)
    robust = next((f.provenance for f in findings if f.name == "robustness"), None)
    if robust is not None:  # the readings' rate ratios and adjusted odds ratios: their universe and set
        if robust.universe and not base.universe:
            base = replace(base, universe=robust.universe, universe_fingerprint=robust.universe_fingerprint,
                           universe_approximate=robust.universe_approximate)
        if robust.adjustment is not None and base.adjustment is None:
            base = replace(base, adjustment=robust.adjustment)
    return base


def _packed(store: Store, inp: AnalysisInput, findings: Sequence[ChartFinding]) -> list[PackedFinding]:
    """The brief pack's findings: the ticked ones, and the trend fit the brief's headline and table quote."""
    out = [PackedFinding(f.name, f.title, f.takeaway, f.run_ids, f.numbers) for f in findings]
    if not any(f.name == "trend" for f in findings):
        outcome = run_trend(store, inp)
        out.insert(0, PackedFinding("headline", headline_sentence(outcome.fit),
                                    "The trend fit the brief's headline and estimates table quote.",
                                    (outcome.run_id,)))
    return out


def pack_of(store: Store, inp: AnalysisInput, findings: Sequence[ChartFinding]) -> BriefPack:
    """The brief pack of these findings (the same bytes for the same findings, runs and data)."""
    heading = (f"{inp.roster.name} \u00b7 {inp.mapping_words} \u00b7 fiscal years "
               f"{inp.window[0]}\u2013{inp.window[1]}")
    return build_brief_pack(store, _packed(store, inp, findings), heading=heading)


def brief_pack(store: Store, inp: AnalysisInput, charts: Sequence[str] | None = None, *,
               run_id: int | None = None, adjust: AdjustSet = None) -> BriefPack:
    """The brief pack of the ticked findings (None: the standard deck's), as the brief and deck of the same
    ticks name it in their footers."""
    chosen = list(dict.fromkeys(charts)) if charts else default_charts(store, inp, run_id)
    return pack_of(store, inp, _findings(store, inp, chosen, run_id, adjust))


def speaker_notes(finding: ChartFinding, takeaway: str) -> str:
    """The slide's notes: what it shows, the method, the interval and the caveat."""
    prov = finding.provenance
    lines = [f"Finding: {finding.title or finding.name}", f"Takeaway on the slide: {takeaway}"]
    if takeaway != finding.takeaway:
        lines.append(f"Computed takeaway: {finding.takeaway}")
    lines += [f"Method: {prov.model}; {prov.mapping_label}, fiscal years "
              f"{prov.window[0]}\u2013{prov.window[1]}.", f"Interval: {prov.interval_method}."]
    if prov.resamples is not None:
        lines.append(f"Resampling: B = {prov.resamples:,}, by {prov.unit}, seed {prov.seed}.")
    if prov.universe:
        lines.append(f"Universe: {prov.universe}.")
    if prov.adjustment is not None:
        lines.append(f"Adjustment set: {', '.join(prov.adjustment) or 'none'}.")
    if finding.run_ids:
        lines.append(f"Runs: {', '.join(map(str, finding.run_ids))} (their replication packs are in the brief pack).")
    lines.append(f"Caveat: {finding.caveat or CAUTIONS[0]}")
    return "\n".join(lines)


def signature_for(store: Store, inp: AnalysisInput, signature: Signature | None) -> Signature:
    return signature or resolve_signature(store.briefing_settings(inp.roster.id), inp.roster.name)


def deck_file(store: Store, inp: AnalysisInput, charts: Sequence[str] | None = None, *,
              run_id: int | None = None, signature: Signature | None = None, adjust: AdjustSet = None) -> bytes:
    """A 16:9 deck: title, one slide per ticked finding (all of them, only them), methods and cautions."""
    return deck_and_pack(store, inp, charts, run_id=run_id, signature=signature, adjust=adjust)[0]


def deck_and_pack(store: Store, inp: AnalysisInput, charts: Sequence[str] | None = None, *,
                  run_id: int | None = None, signature: Signature | None = None,
                  adjust: AdjustSet = None) -> tuple[bytes, BriefPack]:
    """The deck and the brief pack its methods slide and footers name."""
    chosen = list(charts) if charts is not None else default_charts(store, inp, run_id)
    findings = _findings(store, inp, chosen, run_id, adjust)
    if not findings:
        raise ValueError("Choose at least one finding for the deck.")
    sign = signature_for(store, inp, signature)
    pack = pack_of(store, inp, findings)
    provenance = replace(_deck_provenance(findings, findings[0].provenance), packs=pack.run_packs,
                         brief_pack=pack.sha256)
    slides = []
    for f in findings:
        takeaway = sign.takeaway(f.name, f.takeaway)
        slides.append(Finding(title=f.title or f.name, takeaway=takeaway, figure=f.figure, name=f.name,
                              rows=f.rows, notes=speaker_notes(f, takeaway)))
    deck = build_deck(slides, provenance, title=sign.title,
                      subtitle=f"Fiscal years {inp.window[0]}\u2013{inp.window[1]} \u00b7 {inp.mapping_words}",
                      byline=Byline(author=sign.author, marking=sign.marking, date=sign.date))
    return deck, pack


def data_sentence(inp: AnalysisInput, departures: int, forced: int) -> str:
    """Rows used and rejected, and what the window counts, for the brief."""
    r = inp.roster
    lo, hi = inp.window
    inside = inp.coverage[(inp.coverage["year"] >= lo) & (inp.coverage["year"] <= hi)]
    excluded, unmapped = int(inside["excluded"].sum()), int(inside["unmapped"].sum())
    return (f"Rows used and rejected: {r.accepted:,} of {r.rows_total:,} rows of {r.source_name} were accepted "
            f"and {r.rejected:,} rejected" + (f" ({r.duplicates:,} duplicates)" if r.duplicates else "")
            + f". In {lo}\u2013{hi}, {departures:,} departures are counted ({forced:,} forced); "
            f"{excluded:,} with excluded codes and {unmapped:,} with unmapped codes are not counted."
            + _overrides_sentence(inp))


def _overrides_sentence(inp: AnalysisInput) -> str:
    applied = sum(r.applied for r in inp.overrides)
    missing = len(inp.overrides) - applied
    if not inp.overrides:
        return ""
    return (f" Mapping overrides: {applied:,} set case by case (see the provenance below)"
            + (f"; {missing:,} not applied (record not in this roster version)" if missing else "") + ".")


def brief_file(store: Store, inp: AnalysisInput, charts: Sequence[str] | None = None, *,
               run_id: int | None = None, signature: Signature | None = None, adjust: AdjustSet = None) -> bytes:
    """The brief (see ``brief_and_pack``)."""
    return brief_and_pack(store, inp, charts, run_id=run_id, signature=signature, adjust=adjust)[0]


def brief_and_pack(store: Store, inp: AnalysisInput, charts: Sequence[str] | None = None, *,
                   run_id: int | None = None, signature: Signature | None = None,
                   adjust: AdjustSet = None) -> tuple[bytes, BriefPack]:
    """The brief: headline, the findings' charts with their takeaways, odds ratios, data, method.

    ``charts`` are the ticked findings: every one appears, in order, and no other (as in the deck); one page
    for up to two, a page per two more. None (nothing ticked) gives the one-page pair: the trend and the
    bootstrap, or coverage when no bootstrap run fits.
    """
    from app.briefing.brief import build_brief

    outcome = run_trend(store, inp)
    fit = outcome.fit
    trend = build_finding(store, inp, "trend")
    if charts is None:
        run = store.get_run(run_id) if run_id is not None else latest_bootstrap(store, inp)
        chosen = ["trend", "bootstrap" if run is not None else "coverage"]
        run_id = run.id if run is not None else None
    else:
        chosen = list(dict.fromkeys(charts))
        if not chosen:
            raise ValueError("Choose at least one finding for the brief.")
        run = ((store.get_run(run_id) if run_id is not None else latest_bootstrap(store, inp))
               if "bootstrap" in chosen else None)
    findings = _findings(store, inp, chosen, run_id, adjust)
    rows = []
    for name, label in (("profile", "profile likelihood"), ("wald", "Wald")):
        iv = fit.conf_int.get(name)
        if fit.odds_ratio is not None and iv is not None:
            rows.append({"label": "Odds ratio per year", "odds_ratio": fit.odds_ratio, "low": iv[0], "high": iv[1],
                         "method": label})
    if fit.decade_odds_ratio is not None and fit.decade_conf_int.get("profile"):
        lo, hi = fit.decade_conf_int["profile"]  # type: ignore[misc]
        rows.append({"label": "Odds ratio per decade", "odds_ratio": fit.decade_odds_ratio, "low": lo, "high": hi,
                     "method": "profile likelihood"})
    if run is not None and run.result is not None:
        unit = run.params["unit"]
        for m, label in (("bca", "BCa"), ("percentile", "percentile")):
            lo, hi = run.result["conf_int"][m]
            if lo is not None and hi is not None:
                rows.append({"label": "Odds ratio per year", "odds_ratio": run.result["odds_ratio"], "low": lo,
                             "high": hi, "method": f"{label}, {unit} bootstrap (B = {run.result['resamples']:,})"})
    for f in findings:  # rate ratios and the adjusted odds ratio, as their findings state them
        rows += [{"label": e["label"], "odds_ratio": e["estimate"], "low": e["low"], "high": e["high"],
                  "method": e["method"]} for e in f.numbers.get("estimates", [])]
    method = (f"Binomial GLM of the forced share of departures (forced vs voluntary; excluded and unmapped codes "
              f"left out) on fiscal year, {inp.window[0]}–{inp.window[1]}, {fit.departures:,} departures of which "
              f"{fit.forced:,} forced. Pearson dispersion {fit.dispersion:.2f}."
              + (" Bootstrap intervals resample whole firms, keeping each firm's departures together."
                 if run is not None and run.params.get("unit") == "firm" else ""))
    method += "".join(_measure_method(f) for f in findings)
    pack = pack_of(store, inp, findings)
    # the footer names every quoted run's pack and the brief pack that holds them all
    provenance = replace(_deck_provenance(findings, trend.provenance), packs=pack.run_packs, brief_pack=pack.sha256)
    # the headline is the trend chart's own title, so that chart goes in without it
    sign = signature_for(store, inp, signature)
    captions = [sign.takeaway(f.name, f.takeaway) for f in findings]
    figures = [untitled(f.figure) if f.name == "trend" else f.figure for f in findings]
    # the footer lists the case overrides one by one; when they push the brief past its pages, fewer are
    # listed (the rest counted, all of them on the Reason codes page and in the replication pack)
    for listed in sorted({provenance.overrides_listed, min(2, provenance.overrides_listed), 0}, reverse=True):
        try:
            brief = build_brief(headline=headline_sentence(fit), charts=figures, table=pd.DataFrame(rows),
                                method_text=method, provenance=replace(provenance, overrides_listed=listed),
                                signature=sign, captions=captions,
                                data_text=data_sentence(inp, fit.departures, fit.forced),
                                spare_page=any(f.name in ("rates", "adjusted") for f in findings))
            return brief, pack
        except ValueError:
            if listed == 0 or not provenance.overrides:
                raise
    raise AssertionError("unreachable")  # the loop returns or raises


def _measure_method(finding: ChartFinding) -> str:
    """The brief's method sentence for a rate or adjusted finding (empty for the others); the universe and
    the adjustment set are named in the footer."""
    if finding.name == "rates":
        return (" Rates: departures per 100 firm-years of the universe; Poisson GLMs on fiscal year with log "
                "firm-years as offset (quasi-Poisson when overdispersed); exact Poisson intervals per year.")
    if finding.name == "adjusted":
        dropped = sum(finding.numbers["dropped"].values())
        return (" Adjusted trend: departure-level logit on fiscal year and age, tenure (bands) or sector as set "
                "in the footer, firm-clustered standard errors"
                + (f"; {dropped:,} departures lacking an adjusting field left out." if dropped else "."))
    if finding.name == "robustness" and "adjusted_sentence" in finding.numbers:
        return (" Robustness: each reading of the codes also gives the forced rate ratio (Poisson, log firm-years "
                "as offset) and the adjusted odds ratio (firm-clustered), counting departures as its share does. "
                + " ".join(finding.numbers[k] for k in ("rate_sentence", "adjusted_sentence")))
    return ""


def _write(out: Path, data: bytes) -> Path:
    """Write beside the target, then rename: never a half-written file under the final name."""
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".part")
    tmp.write_bytes(data)
    return tmp


def export_to_file(store: Store, inp: AnalysisInput, *, fmt: str, out: Path, chart: str = "trend",
                   run_id: int | None = None, signature: Signature | None = None,
                   charts: Sequence[str] | None = None, adjust: AdjustSet = None,
                   pack_out: Path | None = None) -> tuple[Path, BriefPack | None]:
    """The command line's export: write the file (and, with ``pack_out``, the brief pack its footer names)
    and return the path and the pack. Both files are written whole or not at all."""
    if fmt not in EXPORT_FORMATS:
        raise ValueError(f"format must be one of {', '.join(EXPORT_FORMATS)}; got {fmt!r}.")
    pack: BriefPack | None = None
    if fmt == "pptx":
        data, pack = deck_and_pack(store, inp, charts, run_id=run_id, signature=signature, adjust=adjust)
    elif fmt == "brief":
        data, pack = brief_and_pack(store, inp, charts, run_id=run_id, signature=signature, adjust=adjust)
    else:
        data = chart_file(store, inp, chart, fmt, run_id=run_id, adjust=adjust)
        if pack_out is not None:
            pack = brief_pack(store, inp, [chart], run_id=run_id, adjust=adjust)
    parts = [(_write(out, data), out)]
    if pack_out is not None and pack is not None:
        parts.append((_write(pack_out, pack.data), pack_out))
    for tmp, final in parts:
        tmp.replace(final)
    return out, pack
