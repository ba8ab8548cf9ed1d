"""What every chart, deck and brief states about where its numbers came from, and the standard cautions.

This sits below the exporters (:mod:`app.briefing`) that print it, so they import it and never each other.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime

from app import __version__
from app.analysis.inputs import AnalysisInput
from app.analysis.overrides import override_line
from app.store import Roster, Universe
from app.types import CATEGORIES

#: The standard cautions, shown on pages and in every export.
CAUTIONS: tuple[str, ...] = (
    "Observational data: a trend is not a cause.",
    "\u201cForced\u201d is a judgement that the mapping makes explicit; see how results move under other mappings.",
    "Years with few departures give wide intervals.",
    "Rosters hold personal data about named people: keep these files local.",
)

#: overrides listed one by one in an export's methods section (the rest are counted)
OVERRIDES_LISTED = 5

MODEL_LABELS = {
    "linear": "binomial GLM, logit(forced share) linear in fiscal year",
    "sector": "binomial GLM, sector intercepts + common linear trend in fiscal year",
    "spline": "binomial GLM, linear trend compared with a natural cubic spline in fiscal year",
    "adjusted": "departure-level logit, forced vs voluntary on fiscal year + adjustments, firm-clustered SEs",
    "rate": "Poisson GLM of forced and of voluntary departures on fiscal year, log firm-years offset",
}


def universe_label(u: Universe) -> str:
    """How exports name a universe of firm-years: id, where it came from, size and fingerprint."""
    kind = "derived from the roster (approximation)" if u.approximate else f"imported from {u.source_name}"
    return f"universe {u.id}, {kind}: {u.firms:,} firms, {u.firm_years:,} firm-years, fingerprint {u.fingerprint}"


#: what a source line says when no mapping is chosen (a version number of 0 would read as a real version)
NO_MAPPING = "no mapping chosen"


@dataclass(frozen=True, kw_only=True)
class Provenance:
    """Everything a reader needs to reproduce an exported number."""

    roster: str
    roster_fingerprint: str
    mapping_name: str
    mapping_version: int
    window: tuple[int, int]
    model: str
    interval_method: str
    resamples: int | None = None
    seed: int | None = None
    unit: str | None = None
    tool_version: str = __version__
    created: datetime = field(default_factory=lambda: datetime.now(UTC))
    #: (category, codes) pairs of the mapping version, for the deck's methods slide
    categories: tuple[tuple[str, tuple[str, ...]], ...] = ()
    #: (run id, sha256) of the replication pack behind each run quoted
    packs: tuple[tuple[int, str], ...] = ()
    #: the mapping version's classification rules, in evaluation order (pinned by the version)
    rules: tuple[str, ...] = ()
    #: how many of the file's rows were used ("670 of 803 rows; 133 rejected, see Rosters"); empty: not stated
    rows_used: str = ""
    #: the universe of firm-years behind a rate (``universe_label``); empty: no rate quoted
    universe: str = ""
    universe_fingerprint: str = ""
    universe_approximate: bool = False
    #: the adjusted trend's adjustment set (empty tuple: adjusted for nothing); None: no adjusted trend quoted
    adjustment: tuple[str, ...] | None = None
    #: sha256 of the brief pack (the zip of every quoted run's replication pack); empty: none made
    brief_pack: str = ""
    #: the mapping version's case overrides of this roster, one line each (record, from -> to, note, author)
    overrides: tuple[str, ...] = ()
    #: how many of them are listed one by one (the rest are counted; a one-page brief may list fewer)
    overrides_listed: int = OVERRIDES_LISTED

    @property
    def mapping_label(self) -> str:
        """``mapping NAME vN``, or "no mapping chosen" (version 0: saved versions count from 1)."""
        return f"mapping {self.mapping_name} v{self.mapping_version}" if self.mapping_version else NO_MAPPING

    def _created(self) -> str:
        return self.created.strftime("%Y-%m-%d %H:%M %Z").strip()

    def _resampling(self) -> str | None:
        if self.resamples is None:
            return None
        parts = [f"B = {self.resamples:,} resamples"]
        if self.unit:
            parts.append(f"by {self.unit}")
        if self.seed is not None:
            parts.append(f"seed {self.seed}")
        return ", ".join(parts)

    def lines(self) -> list[str]:
        """One labelled line per fact, for the methods slide and the brief's footer."""
        out = [
            f"Roster: {self.roster} (data fingerprint {self.roster_fingerprint})",
            (f"Mapping: {self.mapping_name}, version {self.mapping_version}" if self.mapping_version
             else "Mapping: none chosen (every reason code is unmapped, so nothing is counted)")
            + (f"; classification rules, first match wins: {'; '.join(self.rules)}" if self.rules else ""),
            *self._override_lines(),
            f"Window: fiscal years {self.window[0]}\u2013{self.window[1]}",
            *([f"Rows used: {self.rows_used}"] if self.rows_used else []),
            *([f"Universe: {self.universe}"] if self.universe else []),
            f"Model: {self.model}",
            *([f"Adjustment set: {', '.join(self.adjustment) or 'none (plain trend, firm-clustered SEs)'}"]
              if self.adjustment is not None else []),
            f"Intervals: {self.interval_method}",
        ]
        if (resampling := self._resampling()) is not None:
            out.append(f"Resampling: {resampling}")
        if self.brief_pack:  # before the runs' own packs: a slide that must shorten the list keeps it
            out.append(f"Brief pack (every quoted run's replication pack): sha256 {self.brief_pack}")
        for run_id, sha in self.packs:
            out.append(f"Replication pack of run {run_id}: sha256 {sha}")
        out.append(f"Made with Helmshift {self.tool_version} on {self._created()}")
        return out

    def _override_lines(self) -> list[str]:
        """One line: how many departures the analyst classified case by case, and the first few of them."""
        if not self.overrides:
            return []
        n, listed = len(self.overrides), max(0, self.overrides_listed)
        shown = "; ".join(self.overrides[:listed])
        if n > listed:
            shown += (f"; \u2026 and {n - listed:,} more" if listed else f"{n:,}") + " listed on the Reason codes page"
        return [f"Case overrides: {n} departure{'s' if n > 1 else ''} counted as the analyst set, over codes and "
                f"rules: {shown}"]

    def text(self) -> str:
        return "\n".join(self.lines())

    def short(self) -> str:
        """The one-line form for a chart's source line."""
        parts = [
            f"Source: roster {self.roster} [{self.roster_fingerprint[:12]}]",
            self.mapping_label
            + (f" with {len(self.rules)} rule{'s' if len(self.rules) > 1 else ''}" if self.rules else "")
            + (f", {len(self.overrides)} case override{'s' if len(self.overrides) > 1 else ''}"
               if self.overrides else ""),
            f"FY{self.window[0]}\u2013{self.window[1]}",
            *([f"universe [{self.universe_fingerprint[:12]}]"
               + (" derived from the roster (approximation)" if self.universe_approximate else "")]
              if self.universe else []),
            self.model,
        ]
        if (resampling := self._resampling()) is not None:
            parts.append(resampling)
        parts.append(f"Helmshift {self.tool_version}, {self.created:%Y-%m-%d}")
        return " \u00b7 ".join(parts)


def rows_used_line(roster: Roster) -> str:
    """How many of the file's rows a roster holds, as pages and exports state it (the Rosters page lists the
    rejected rows)."""
    dupes = f" ({roster.duplicates:,} exact duplicates stored once)" if roster.duplicates else ""
    return (f"{roster.accepted:,} of {roster.rows_total:,} rows{dupes}; {roster.rejected:,} rejected, "
            "see Rosters")


def provenance_for(inp: AnalysisInput, *, model: str = "linear", interval_method: str = "Wald and profile likelihood",
                   resamples: int | None = None, seed: int | None = None, unit: str | None = None,
                   by_sector: bool = False, adjust: tuple[str, ...] | None = None,
                   universe: Universe | None = None) -> Provenance:
    """What every chart, deck and brief states about where its numbers came from (``adjust``: the adjusted
    trend's adjustment set, named in the model line and on its own line; ``universe``: the firm-years behind
    a rate)."""
    cats = inp.mapping.categories if inp.mapping else {}
    grouped = tuple((c, tuple(sorted(code for code, cat in cats.items() if cat == c))) for c in CATEGORIES)
    return Provenance(
        roster=inp.roster.name, roster_fingerprint=inp.group_cells(by_sector=by_sector).fingerprint(),
        mapping_name=inp.mapping.name if inp.mapping else "none",
        mapping_version=inp.mapping.version if inp.mapping else 0, window=inp.window,
        model=MODEL_LABELS.get(model, model) + (f" (adjusted for {', '.join(adjust) or 'nothing'})"
                                                 if adjust is not None else ""),
        interval_method=interval_method, resamples=resamples, seed=seed, unit=unit, categories=grouped,
        rules=tuple(r.describe() for r in (inp.mapping.rules if inp.mapping else ())),
        rows_used=rows_used_line(inp.roster), universe=universe_label(universe) if universe is not None else "",
        universe_fingerprint=universe.fingerprint if universe is not None else "",
        universe_approximate=universe.approximate if universe is not None else False,
        adjustment=tuple(adjust) if adjust is not None else None,
        overrides=tuple(override_line(r) for r in inp.overrides),
    )
