"""The forced rate per firm-year and the adjusted odds ratio under each robustness reading (issue 16).

A robustness reading is a way of reading the reason codes: a code -> category map, the classification rules in
order, and the case overrides that take precedence. The share trend of a reading is fitted in
:mod:`app.analysis.robustness`; here the same reading feeds the two other measures, classified by the very
functions the share, the Rates section and the adjusted trend use (``categorise_with`` then
``apply_overrides`` on the roster's firm cells with the detailed key, split by the universe flags of
``app.analysis.rates.mark_inside``), so a rule or an override moves the same departures in all three:

* the **rate ratio per year**: Poisson GLM of forced departures inside the universe's firm-years with log
  firm-years as offset (``app.stats.rate_trend.fit_rate_trend``, Wald and profile intervals; quasi-Poisson when
  the dispersion calls for it, as on the Rates section). Only when the roster has a universe of firm-years.
* the **adjusted odds ratio per year**: the departure-level logit on year and the chosen adjustments
  (``app.stats.adjusted.fit_adjusted``, firm-clustered interval).

The firm cells are read once per check (and only when some reading's measures are not memoised yet); each
reading's measures are memoised by the roster version, window, universe, adjustment set and the reading.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from app.analysis.adjusted import adjusted_cells_from
from app.analysis.cellstore import categorise_with, memoised
from app.analysis.inputs import AnalysisInput
from app.analysis.overrides import ResolvedOverride, apply_overrides
from app.analysis.rates import mark_inside, universe_rate_table
from app.stats.adjusted import ADJUSTMENTS, AdjustedError, fit_adjusted
from app.stats.rate_trend import RateError, fit_rate_trend
from app.store import Roster, Universe
from app.types import ClassificationRule

Interval = tuple[float, float]

#: the adjusted model's fields as the roster's column roles name them (sector, age, tenure)
_ROLE = {"age": "age", "tenure": "tenure", "sector": "sector"}


def default_adjust(roster: Roster) -> tuple[str, ...]:
    """Age, tenure and sector, each only where the roster has that column (an adjustment on a field the roster
    lacks would drop every departure)."""
    return tuple(a for a in ADJUSTMENTS if _ROLE[a] in roster.columns)


@dataclass(frozen=True)
class RateReading:
    """One reading's forced rate ratio per year over the universe's firm-years (``error`` says why none)."""

    rate_ratio: float | None
    #: Wald and profile-likelihood 95% intervals (quasi-Poisson when ``quasi``: the Rates section's rule)
    wald: Interval | None
    profile: Interval | None
    quasi: bool
    #: forced departures inside the universe's firm-years in the window, and those firm-years
    forced: int
    firm_years: int
    #: counted departures of the window outside the universe's firm-years (left out of the rate)
    outside: int
    error: str | None


@dataclass(frozen=True)
class AdjustedReading:
    """One reading's odds ratio per year adjusted for the chosen set, with its firm-clustered interval."""

    odds_ratio: float | None
    cluster_se: float | None
    cluster: Interval | None
    departures: int
    forced: int
    firms: int
    #: departures left out for a missing adjusting field (first missing, in the order age, tenure, sector)
    dropped: dict[str, int] = field(default_factory=dict)
    error: str | None = None


@dataclass(frozen=True)
class ReadingMeasures:
    rate: RateReading
    adjusted: AdjustedReading


class MeasureContext:
    """What every reading of one check shares: the universe, the adjustment set and, read lazily once, the
    roster version's firm cells (detailed key) flagged inside or outside the universe."""

    def __init__(self, inp: AnalysisInput, universe: Universe | None, adjust: tuple[str, ...]) -> None:
        self.inp = inp
        self.universe = universe
        self.adjust = adjust
        self._firms: pd.DataFrame | None = None
        self._exposure: pd.Series | None = None

    def firms(self) -> pd.DataFrame:
        if self._firms is None:
            inp = self.inp
            firms = inp.store.firm_cell_counts(inp.roster.id, inp.roster.version, detail=True)
            self._firms = (mark_inside(inp.store, inp, self.universe.id, firms) if self.universe is not None
                           else firms.assign(inside=False))
        return self._firms

    def exposure(self) -> pd.Series:
        assert self.universe is not None
        if self._exposure is None:
            self._exposure = self.inp.store.universe_exposure(self.universe.id)
        return self._exposure

    def measures(self, categories: Mapping[str, str], rules: tuple[ClassificationRule, ...],
                 overrides: tuple[ResolvedOverride, ...]) -> ReadingMeasures:
        """Both measures of one reading (memoised: the same reading on the same data gives the same fits)."""
        key = ("reading_measures", *self.inp.key, self.universe.id if self.universe else None, self.adjust,
               tuple(sorted(categories.items())), rules, overrides)
        return memoised(self.inp.store, key, lambda: self._compute(categories, rules, overrides))

    def _compute(self, categories: Mapping[str, str], rules: Sequence[ClassificationRule],
                 overrides: Sequence[ResolvedOverride]) -> ReadingMeasures:
        # the share's own classification: the code, then the rules in order, then the case overrides
        firms = apply_overrides(categorise_with(self.firms(), categories, rules)[0], overrides)
        return ReadingMeasures(self._rate(firms), self._adjusted(firms))

    def _rate(self, firms: pd.DataFrame) -> RateReading:
        if self.universe is None:
            return RateReading(None, None, None, False, 0, 0, 0,
                               "no universe of firm-years: import one (helmshift universe import) or derive one "
                               "on the Universe page")
        table = universe_rate_table(firms, self.exposure(), self.inp.window)
        forced = int(table.years["forced"].sum())
        try:
            fit = fit_rate_trend(table, "forced")
        except RateError as exc:
            return RateReading(None, None, None, False, forced, table.firm_years, table.outside, str(exc))
        source = fit.quasi.conf_int if fit.quasi is not None else fit.conf_int
        return RateReading(fit.rate_ratio, source.get("wald"), source.get("profile"), fit.quasi is not None,
                           forced, table.firm_years, table.outside, None)

    def _adjusted(self, firms: pd.DataFrame) -> AdjustedReading:
        data = adjusted_cells_from(firms, self.inp.window, self.adjust)
        dropped = dict(data.dropped)
        forced = int(data.cells["forced"].sum())
        try:
            fit = _fit_quietly(lambda: fit_adjusted(data, self.inp.window))
        except AdjustedError as exc:
            return AdjustedReading(None, None, None, data.departures, forced, len(data.firm_ids), dropped,
                                   _with_dropped(str(exc), dropped))
        return AdjustedReading(fit.odds_ratio, fit.cluster_se, fit.cluster_interval, fit.departures, fit.forced,
                               fit.firms, dropped, None)


def _with_dropped(message: str, dropped: Mapping[str, int]) -> str:
    lost = {k: v for k, v in dropped.items() if v}
    if not lost:
        return message
    return message + " (" + ", ".join(f"{v:,} left out for a missing {k}" for k, v in lost.items()) + ")"


def _fit_quietly(fit: Callable[[], Any]) -> Any:
    """``fit()``, with statsmodels' separation and convergence warnings turned into an ``AdjustedError``: a
    reading whose categories leave a band or sector with only forced (or only voluntary) departures has no
    finite odds ratio, and the table must say so rather than print a huge number."""
    from statsmodels.tools.sm_exceptions import ConvergenceWarning, PerfectSeparationWarning

    with warnings.catch_warnings(record=True) as caught, np.errstate(all="ignore"):
        warnings.simplefilter("always")
        result = fit()
    for w in caught:
        if issubclass(w.category, PerfectSeparationWarning):
            raise AdjustedError("separation: some band or sector has only forced or only voluntary departures "
                                "under this reading, so the odds ratio is not estimable")
        if issubclass(w.category, ConvergenceWarning):
            raise AdjustedError("the adjusted fit did not converge under this reading (near-separation)")
    if not np.isfinite(result.cluster_se) or result.cluster_se > 10:
        raise AdjustedError("separation: the odds ratio per year is not estimable under this reading "
                            "(its firm-clustered standard error is unbounded)")
    return result


# -- verdicts --------------------------------------------------------------------------------------------
def _direction(interval: Interval | None) -> int:
    if interval is None:
        return 0
    return 1 if interval[0] > 1 else -1 if interval[1] < 1 else 0


def measure_verdict(what: str, interval_name: str, ratio_name: str, span: str,
                    readings: Sequence[tuple[str, float | None, Interval | None, str | None]], *,
                    plural: bool = False) -> tuple[str, bool | None]:
    """The sentence and ``holds`` for one measure over the readings (reference first): does the direction of
    the reference hold in every reading? ``readings``: (label, estimate, interval, error); ``plural``: ``what``
    takes "are" ("the odds ..."). ``holds`` is None when the reference itself cannot be fitted."""
    is_, shows = ("are", "show") if plural else ("is", "shows")
    label, estimate, interval, error = readings[0]
    if estimate is None:
        return f"The {what.rstrip(',')} could not be fitted under the reference reading: {error}.", None
    fitted = [(lab, e, iv) for lab, e, iv, err in readings if e is not None]
    failed = [lab for lab, e, _, _ in readings if e is None]
    n = len(readings)
    ref_dir = _direction(interval)
    dirs = [_direction(iv) for _, _, iv in fitted]
    same = sum(d == ref_dir for d in dirs)
    holds = same == n
    if ref_dir == 0:
        sentence = (f"Under the reference reading the {what} {shows} no clear change over {span} (its 95% "
                    f"{interval_name} holds 1); {same} of {n} readings agree.")
    else:
        word, side = ("rising", "above") if ref_dir > 0 else ("falling", "below")
        if holds:
            sentence = (f"The {what} {is_} {word} over {span} under every reading tried: the 95% "
                        f"{interval_name} lies {side} 1 in all {n}.")
        else:
            sentence = (f"The {what} {is_} {word} over {span} under the reference reading, but its 95% "
                        f"{interval_name} lies {side} 1 under only {same} of {n} readings.")
    values = [e for _, e, _ in fitted if e is not None]
    sentence += f" {ratio_name[0].upper()}{ratio_name[1:]}s per year range from {min(values):.3f} to {max(values):.3f}."
    if failed:
        sentence += (f" {len(failed)} reading{'s' if len(failed) > 1 else ''} could not be fitted "
                     f"({'; '.join(failed[:3])}{'; …' if len(failed) > 3 else ''}): see the table for why.")
    return sentence, holds


def measure_verdicts(span: str, readings: Sequence[tuple[str, RateReading | None, AdjustedReading | None]],
                     adjust: tuple[str, ...]) -> tuple[str, bool | None, str, bool | None]:
    """Both measures' sentences and ``holds`` over the readings of the share's verdict (reference first)."""
    rates = [(label, r.rate_ratio, r.profile or r.wald, r.error) for label, r, _ in readings if r is not None]
    adjusted = [(label, a.odds_ratio, a.cluster, a.error) for label, _, a in readings if a is not None]
    named = ", ".join(adjust) if adjust else "nothing (the plain logit)"
    rate_sentence, rate_holds = measure_verdict("forced rate per firm-year", "profile interval of the rate ratio",
                                                "rate ratio", span, rates)
    adj_sentence, adj_holds = measure_verdict(f"odds that a departure was forced, adjusted for {named},",
                                              "firm-clustered interval", "adjusted odds ratio", span, adjusted,
                                              plural=True)
    return rate_sentence, rate_holds, adj_sentence, adj_holds


def measures_takeaway(readings: Sequence[tuple[RateReading | None, AdjustedReading | None]]) -> str:
    """One short clause per measure for a slide or a brief caption: the reference reading's direction and how
    many readings agree, or why the measure could not be fitted (reference first)."""
    parts = []
    for name, values in (
            ("forced rate ratio", [(r.rate_ratio, r.profile or r.wald, r.error) for r, _ in readings if r]),
            ("adjusted odds ratio", [(a.odds_ratio, a.cluster, a.error) for _, a in readings if a])):
        if not values:
            continue
        estimate, interval, error = values[0]
        if estimate is None:
            parts.append(f"{name}: not fitted ({error})")
            continue
        ref = _direction(interval)
        same = sum(e is not None and _direction(iv) == ref for e, iv, _ in values)
        word = {1: "rising", -1: "falling", 0: "no clear change"}[ref]
        parts.append(f"{name}: {word} ({same} of {len(values)} readings agree)")
    text = "; ".join(parts)
    return f"{text[:1].upper()}{text[1:]}." if text else ""


def rate_to_dict(r: RateReading | None) -> dict[str, Any] | None:
    if r is None:
        return None
    return {"rate_ratio": _num(r.rate_ratio), "conf_int": {"wald": _pair(r.wald), "profile": _pair(r.profile)},
            "quasi": r.quasi, "forced": r.forced, "firm_years": r.firm_years, "outside": r.outside, "error": r.error}


def adjusted_reading_to_dict(a: AdjustedReading | None) -> dict[str, Any] | None:
    if a is None:
        return None
    return {"odds_ratio": _num(a.odds_ratio), "cluster_se": _num(a.cluster_se),
            "conf_int": {"cluster": _pair(a.cluster)}, "departures": a.departures, "forced": a.forced,
            "firms": a.firms, "dropped": dict(a.dropped), "error": a.error}


def _num(x: float | None) -> float | None:
    return float(x) if x is not None and np.isfinite(x) else None


def _pair(p: Interval | None) -> list[float | None] | None:
    return None if p is None else [_num(float(x)) for x in p]
