"""Does the trend survive other readings of "forced"? The same model under alternative mappings.

Variants: the roster's mapping (the reference), any other saved mapping versions the analyst names,
one chosen code moved to each other category, every ambiguous code treated as excluded, the reading without
the mapping version's classification rules (when it has any), the reading without its case overrides (when it
has any; every other reading of the roster's mapping keeps them, and another saved mapping brings its own) and,
on request, with the academic preset.
Each variant is fitted on the same window; the differences from the reference are spelled out. Each reading
also carries the forced rate ratio per year (when the roster has a universe of firm-years) and the adjusted odds
ratio per year (the analyst's adjustment set), classified exactly as its share
(:mod:`app.analysis.robustness_measures`), each with its own verdict sentence.

A reading must not mislead: other mappings are offered by default only when they give a category to every
code the reference counts (forced or voluntary) in the window (:func:`offered_mappings` says which were left
out and why), and a reading that still leaves counted departures unmapped is marked and kept out of the
verdict sentence, which would otherwise report a change of mind that is only missing codes.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from functools import partial
from typing import Literal

from app.analysis.cellstore import categorise_with, cells_from_counts, detail_counts, memoised
from app.analysis.inputs import AnalysisInput, parse_mapping_ref
from app.analysis.overrides import ResolvedOverride, apply_overrides, resolve_overrides
from app.analysis.provenance import universe_label
from app.analysis.robustness_measures import (
    AdjustedReading,
    MeasureContext,
    RateReading,
    default_adjust,
    measure_verdicts,
    measures_takeaway,
)
from app.analysis.rules import PRESET_NAME, PRESET_SOURCE, preset_rules, with_preset
from app.intake.reasons import diff_mappings, suggest_categories
from app.stats.adjusted import parse_adjust
from app.stats.trend import TrendError, TrendFit, fit_trend
from app.store import Store, Universe
from app.types import CATEGORIES, ClassificationRule


@dataclass(frozen=True)
class Variant:
    """One reading of the reason codes and the trend it gives."""

    label: str
    kind: str  # reference | mapping | moved | ambiguous-excluded
    changes: tuple[str, ...]
    departures: int
    forced: int
    odds_ratio: float | None
    wald: tuple[float, float] | None
    profile: tuple[float, float] | None
    bootstrap: tuple[float, float] | None
    bootstrap_note: str
    error: str | None
    #: departures the reference counts whose code this reading leaves unmapped (such a reading is marked)
    unmapped: int = 0
    #: NAME:VERSION of the stored mapping behind the reading (for links to its departures), None if generated
    mapping_ref: str | None = None
    #: the forced rate ratio per year under this reading (None: measures not asked for)
    rate: RateReading | None = None
    #: the adjusted odds ratio per year under this reading (None: measures not asked for)
    adjusted: AdjustedReading | None = None


@dataclass(frozen=True)
class Robustness:
    """All variants, with a verdict on whether the direction of the trend holds in every one."""

    window: tuple[int, int]
    variants: list[Variant]
    direction: str
    holds: bool
    sentence: str
    #: (NAME:VERSION, why) of the saved mappings not offered because they leave counted codes unmapped
    left_out: tuple[tuple[str, str], ...] = ()
    #: does the direction of the forced rate ratio / the adjusted odds ratio hold in every reading? (None: the
    #: reference reading's measure could not be fitted, or measures were not asked for)
    rate_sentence: str = ""
    rate_holds: bool | None = None
    adjusted_sentence: str = ""
    adjusted_holds: bool | None = None
    #: provenance of the two measures: the universe of firm-years (label and fingerprint; None without one)
    #: and the adjustment set
    universe: str | None = None
    universe_fingerprint: str | None = None
    universe_approximate: bool = False
    adjust: tuple[str, ...] = ()

    @property
    def measured(self) -> bool:
        """True when the readings carry the rate ratio and the adjusted odds ratio (``check_robustness``'s
        ``measures``)."""
        return bool(self.adjusted_sentence)

    def measures_takeaway(self) -> str:
        """One short clause per measure for a slide or a brief caption (``measures_takeaway``)."""
        return measures_takeaway([(v.rate, v.adjusted) for v in self.variants
                                  if v.unmapped == 0 or v.kind == "reference"])


def counted_codes(inp: AnalysisInput, categories: Mapping[str, str]) -> dict[str, int]:
    """Reason code -> departures in the window, for the codes ``categories`` counts (forced or voluntary)."""
    counts = inp.counts
    inside = counts[(counts["year"] >= inp.window[0]) & (counts["year"] <= inp.window[1])]
    per_code = inside.groupby(inside["reason"].astype(str))["departures"].sum()
    return {str(code): int(n) for code, n in per_code.items() if categories.get(str(code)) in ("forced", "voluntary")}


def _unmapped(counted: Mapping[str, int], other: Mapping[str, str]) -> dict[str, int]:
    return {code: n for code, n in counted.items() if code not in other}


def offered_mappings(store: Store, inp: AnalysisInput) -> tuple[list[str], list[tuple[str, str]]]:
    """The other saved mappings (latest versions) that cover every counted code, and those left out with why."""
    if inp.mapping is None:
        return [], []
    counted = counted_codes(inp, inp.mapping.categories)
    offered: list[str] = []
    left_out: list[tuple[str, str]] = []
    for name, version in store.list_mappings():
        if name == inp.mapping.name:
            continue
        missing = _unmapped(counted, store.get_mapping(name, version).categories)
        ref = f"{name}:{version}"
        if not missing:
            offered.append(ref)
            continue
        shown = ", ".join(sorted(missing)[:4]) + (", \u2026" if len(missing) > 4 else "")
        left_out.append((ref, f"gives no category to {len(missing):,} of the {len(counted):,} codes counted here "
                              f"({shown}), {sum(missing.values()):,} departures"))
    return offered, left_out


def _describe(base: Mapping[str, str], other: Mapping[str, str], roster_codes: set[str]) -> tuple[str, ...]:
    diff = diff_mappings({k: v for k, v in base.items() if k in roster_codes},
                         {k: v for k, v in other.items() if k in roster_codes})
    parts = [f"{code}: {old} → {new}" for code, old, new in diff.moved]
    parts += [f"{code}: unmapped → {cat}" for code, cat in diff.added]
    parts += [f"{code}: {cat} → unmapped" for code, cat in diff.removed]
    return tuple(parts) or ("no change for this roster's codes",)


def _bootstrap_interval(store: Store, inp: AnalysisInput, name: str, version: int) -> tuple[tuple[float, float] | None, str]:
    runs = sorted(store.list_runs(inp.roster.id, "bootstrap"), key=lambda r: r.params.get("unit") != "firm")
    for run in runs:  # firm resampling first: it is the interval to quote when firms cluster
        if (run.status == "done" and run.mapping_name == name and run.mapping_version == version
                and run.window == inp.window and run.params.get("model") == "linear" and run.result):
            bca = run.result["conf_int"]["bca"]
            if bca[0] is not None and bca[1] is not None:
                return (float(bca[0]), float(bca[1])), (
                    f"BCa, {run.params['unit']} resampling, B={run.params['resamples']} (run {run.id})")
    return None, "no stored bootstrap run for this mapping and window"


def _fit_variant(inp: AnalysisInput, categories: Mapping[str, str], label: str, kind: str,
                 changes: tuple[str, ...], boot: tuple[tuple[float, float] | None, str],
                 rules: tuple[ClassificationRule, ...] = (), *,
                 counted: Mapping[str, int] | None = None, ref: str | None = None,
                 overrides: tuple[ResolvedOverride, ...] = (), ctx: MeasureContext | None = None) -> Variant:
    def fit_variant() -> tuple[int, int, TrendFit | str]:
        if rules:  # rules read the age/tenure/interim key of the cells
            counts = categorise_with(detail_counts(inp.store, inp.roster), categories, rules)[0]
        else:  # read afresh through ``categories``: the input's own case overrides are not carried along
            counts = categorise_with(inp.counts, categories, ())[0]
        # case overrides last: they take precedence over codes and rules (app.analysis.overrides)
        cells = cells_from_counts(apply_overrides(counts, overrides), inp.window)
        try:
            return int(cells.totals.sum()), int(cells.forced.sum()), fit_trend(cells, "linear")
        except TrendError as exc:
            return int(cells.totals.sum()), int(cells.forced.sum()), str(exc)

    # the same reading of the codes on the same counts and window gives the same fit: memoised
    departures, forced, fit = memoised(inp.store, ("variant", *inp.key, tuple(sorted(categories.items())), rules,
                                                   overrides), fit_variant)
    unmapped = sum(_unmapped(counted or {}, categories).values())
    # the rate ratio and the adjusted odds ratio of the same reading (codes, rules, overrides)
    measures = ctx.measures(categories, rules, overrides) if ctx is not None else None
    rate, adjusted = (measures.rate, measures.adjusted) if measures is not None else (None, None)
    if isinstance(fit, str):
        return Variant(label, kind, changes, departures, forced, None, None, None, None, boot[1], fit, unmapped, ref,
                       rate, adjusted)
    return Variant(label, kind, changes, departures, forced, fit.odds_ratio, fit.conf_int.get("wald"),
                   fit.conf_int.get("profile"), boot[0], boot[1],
                   "; ".join(fit.messages) if fit.separated else None, unmapped, ref, rate, adjusted)


def _direction(v: Variant) -> int:
    """+1 rising, -1 falling, 0 no clear change (the profile interval spans 1)."""
    iv = v.profile or v.wald
    if v.odds_ratio is None or iv is None:
        return 0
    if iv[0] > 1:
        return 1
    if iv[1] < 1:
        return -1
    return 0


def check_robustness(store: Store, inp: AnalysisInput, *, extra_mappings: list[str] | Literal["covering"] | None = None,
                     vary: list[str] | None = None, ambiguous_excluded: bool = True,
                     preset: bool = False, adjust: str | tuple[str, ...] | None = None,
                     measures: bool = True) -> Robustness:
    """Fit the straight trend under each variant of the mapping (see module docstring); with ``preset``, also
    with the academic preset's rules added (retirement below 60 counts as forced).

    ``measures``: also the forced rate ratio (when the roster has a universe) and the adjusted odds ratio per
    year of every reading; ``adjust``: the adjustment set (default: age, tenure and sector where the roster has
    those columns).

    ``extra_mappings="covering"``: every other saved mapping that covers the counted codes; the rest are
    listed in ``left_out`` with the reason.
    """
    if inp.mapping is None:
        raise ValueError("Robustness needs a reference mapping; choose one on the Reason codes page.")
    base: dict[str, str] = dict(inp.mapping.categories)
    rules = inp.mapping.rules
    mine = inp.overrides  # every reading of this mapping keeps its case overrides, but the one without them
    roster_codes = set(inp.counts["reason"].astype(str))
    counted = counted_codes(inp, base)
    left_out: list[tuple[str, str]] = []
    if extra_mappings == "covering":
        extra_mappings, left_out = offered_mappings(store, inp)
    chosen_adjust = parse_adjust(adjust) if adjust is not None else default_adjust(inp.roster)
    universe = store.current_universe(inp.roster.id) if measures else None
    ctx = MeasureContext(inp, universe, chosen_adjust) if measures else None
    fit = partial(_fit_variant, ctx=ctx)
    variants = [fit(inp, base, inp.mapping_label, "reference", ("the roster's mapping",),
                             _bootstrap_interval(store, inp, inp.mapping.name, inp.mapping.version), rules,
                             ref=f"{inp.mapping.name}:{inp.mapping.version}", overrides=mine)]
    no_boot = (None, "not bootstrapped (a generated variant)")
    if rules:
        variants.append(fit(inp, base, "without rules (codes alone)", "rules-off",
                                     tuple(f"dropped rule: {r.describe()}" for r in rules), no_boot,
                                     overrides=mine))
    if applied := tuple(r for r in mine if r.applied):
        variants.append(fit(inp, base, "without case overrides", "overrides-off",
                                     tuple(f"dropped override: {r.override.describe()} "
                                           f"({r.counted_as} \u2192 {r.override.category})" for r in applied),
                                     no_boot, rules))
    if preset:
        added = with_preset(rules, preset_rules(inp.mapping, roster_codes))
        if added != rules:
            variants.append(fit(inp, base, f"with the preset: {PRESET_NAME}", "rules-preset",
                                         tuple(f"added rule: {r.describe()} ({PRESET_SOURCE})"
                                               for r in added[len(rules):]), no_boot, added, overrides=mine))
    for ref in extra_mappings or []:
        name, version = parse_mapping_ref(ref)
        other = store.get_mapping(name, version)
        if other.name == inp.mapping.name and other.version == inp.mapping.version:
            continue
        variants.append(fit(inp, dict(other.categories), f"{other.name} v{other.version}", "mapping",
                                     _describe(base, dict(other.categories), roster_codes)
                                     + tuple(f"rule: {r.describe()}" for r in other.rules if r not in rules),
                                     _bootstrap_interval(store, inp, other.name, other.version), other.rules,
                                     counted=counted, ref=f"{other.name}:{other.version}",
                                     overrides=resolve_overrides(store, inp.roster, other)))
    for code in vary or []:
        if code not in roster_codes:
            raise ValueError(f"Reason code {code!r} does not occur in roster {inp.roster.name!r}.")
        current = base.get(code, "unmapped")
        for target in CATEGORIES:
            if target == current:
                continue
            moved = base | {code: target}
            variants.append(fit(inp, moved, f"{code} as {target}", "moved",
                                         (f"{code}: {current} → {target}",), no_boot, rules, overrides=mine))
    if ambiguous_excluded:
        ambiguous = sorted(c for c, s in suggest_categories(sorted(roster_codes)).items() if s.ambiguous)
        changed = {c: "excluded" for c in ambiguous if base.get(c) != "excluded"}
        if changed:
            variants.append(fit(inp, base | changed, "ambiguous codes excluded", "ambiguous-excluded",
                                         tuple(f"{c}: {base.get(c, 'unmapped')} → excluded" for c in changed),
                                         no_boot, rules, overrides=mine))
    result = replace(_verdict(inp, _merge_identical(variants)), left_out=tuple(left_out))
    if ctx is None:
        return result
    return _measure_verdicts(inp, result, universe, chosen_adjust)


def _measure_verdicts(inp: AnalysisInput, result: Robustness, universe: Universe | None,
                      adjust: tuple[str, ...]) -> Robustness:
    """The rate ratio's and the adjusted odds ratio's sentences over the readings of the share's verdict."""
    judged = [v for v in result.variants if v.unmapped == 0 or v.kind == "reference"]
    rate_sentence, rate_holds, adj_sentence, adj_holds = measure_verdicts(
        f"{inp.window[0]}\u2013{inp.window[1]}", [(v.label, v.rate, v.adjusted) for v in judged], adjust)
    return replace(result, rate_sentence=rate_sentence, rate_holds=rate_holds, adjusted_sentence=adj_sentence,
                   adjusted_holds=adj_holds, universe=universe_label(universe) if universe is not None else None,
                   universe_fingerprint=universe.fingerprint if universe is not None else None,
                   universe_approximate=universe is not None and universe.approximate, adjust=adjust)


def _merge_identical(variants: list[Variant]) -> list[Variant]:
    """Readings that count exactly the same departures are shown once, with both names."""
    kept: list[Variant] = []
    for v in variants:
        twin = next((k for k in kept if (k.departures, k.forced, k.odds_ratio) == (v.departures, v.forced, v.odds_ratio)
                     and k.changes == v.changes), None)
        if twin is None or twin.unmapped != v.unmapped:
            kept.append(v)
        else:
            kept[kept.index(twin)] = replace(twin, label=f"{twin.label} = {v.label}")
    return kept


def _verdict(inp: AnalysisInput, shown: list[Variant]) -> Robustness:
    """The sentence from the readings that count every departure the reference counts (marked ones aside)."""
    variants = [v for v in shown if v.unmapped == 0 or v.kind == "reference"]
    marked = len(shown) - len(variants)
    ref = variants[0]
    ref_dir = _direction(ref)
    dirs = [_direction(v) for v in variants]
    point_up = [v.odds_ratio is not None and v.odds_ratio > 1 for v in variants]
    n = len(variants)
    span = f"{inp.window[0]}–{inp.window[1]}"
    if ref_dir == 0:
        same = sum(d == 0 for d in dirs)
        holds = same == n
        direction = "no clear change"
        sentence = (f"Under the reference mapping the trend over {span} is not clearly different from no change; "
                    f"{same} of {n} readings agree.")
    else:
        word = "rising" if ref_dir > 0 else "falling"
        same = sum(d == ref_dir for d in dirs)
        same_point = sum(p == (ref_dir > 0) for p in point_up)
        holds = same == n
        direction = word
        side = "above" if ref_dir > 0 else "below"
        if holds:
            sentence = (f"The forced share is {word} over {span} under every reading tried: all {n} "
                        f"95% profile intervals lie {side} 1.")
        else:
            sentence = (f"The forced share is {word} over {span} under the reference mapping, but the 95% profile "
                        f"interval lies {side} 1 under only {same} of {n} readings (the point estimate points the "
                        f"same way under {same_point} of {n}).")
    ors = [v.odds_ratio for v in variants if v.odds_ratio is not None]
    if ors:
        sentence += f" Odds ratios per year range from {min(ors):.3f} to {max(ors):.3f}."
    if marked:
        sentence += (f" {marked} further reading{'s' if marked > 1 else ''} leave{'' if marked > 1 else 's'} "
                     "counted departures unmapped and {} not part of this verdict.".format(
                         "are" if marked > 1 else "is"))
    return Robustness(inp.window, shown, direction, holds, sentence)
