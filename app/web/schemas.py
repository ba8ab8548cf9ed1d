"""Models of the JSON the API returns, for the OpenAPI schema only: generated from the dataclasses.

Routes build their JSON from the page dataclasses (``rendering.as_json``) and return it directly, so these
models never touch a response at run time: they document it, and the tests (``test_openapi``, the
schemathesis fuzz test) hold real responses to them. The models of stored records and analysis results are
made here from their dataclasses by ``schema_gen`` (a field is declared once, in its dataclass); each page
module makes its own body model next to its page dataclass with :func:`define` (this module cannot import
the page modules, which import it). Page bodies and stored records forbid unknown keys; analysis results
nested inside them allow extra keys, where spelling out every statistic would only make the schema brittle.

Written by hand here is only what no dataclass describes: error and health bodies, the import answer, the
stored bootstrap summary (``bootstrap_to_dict``) and the rows of DataFrames and dicts built in place.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field

from app.analysis.robustness import Robustness, Variant
from app.intake.reasons import MappingDiff
from app.stats.coverage import TABLE_COLUMNS, WindowSuggestion, YearFlag
from app.stats.sectors import Heterogeneity, SectorTrend, SectorTrends
from app.stats.trend import Curvature, QuasiTrend, TrendFit
from app.store import MappingVersion, RejectedRow, Roster, Run
from app.types import Unit
from app.web.schema_gen import ModelFactory, list_of, one_of, row_model

_INTERVAL = "[low, high]; an end that is not finite is null"
_BY_METHOD = "interval name -> [low, high]; an end that is not finite is null"
#: descriptions of fields that mean the same wherever they appear
GLOSSARY = {
    "window": "[first, last] fiscal year", "years": "[first, last] fiscal year",
    "wald": _INTERVAL, "profile": _INTERVAL, "bootstrap": _INTERVAL, "interval": _INTERVAL,
    "conf_int": _BY_METHOD, "decade_conf_int": _BY_METHOD, "mc_error": "Monte Carlo error of each end",
    "mapping_names": "[mapping name, latest version] per mapping",
    "columns": "role -> column name in the file",
}

MODELS = ModelFactory(glossary=GLOSSARY)
#: the model of a dataclass wherever it appears (page modules make their bodies with it)
define = MODELS.define
#: another model of a dataclass, for one route (e.g. the same page when nothing could be fitted)
variant = MODELS.variant

Interval = Annotated[tuple[float | None, float | None], Field(description=_INTERVAL)]
Percent = Annotated[int, Field(ge=0, le=100)]


class _Exact(BaseModel):
    model_config = ConfigDict(extra="forbid")


class _Open(BaseModel):
    model_config = ConfigDict(extra="allow")


# -- no dataclass: errors, health, the import answer ------------------------------------------------


class ErrorBody(_Exact):
    """Every error the app itself reports as JSON (404, 400, 409, ...)."""

    error: str


class ValidationIssue(_Open):
    loc: list[str | int]
    msg: str
    type: str


class ValidationErrorBody(_Exact):
    """FastAPI's own 422 when a path parameter has the wrong type."""

    detail: list[ValidationIssue]


class HealthBody(_Exact):
    status: Literal["ok"]
    version: str
    schema_version: int = Field(alias="schema", description="database schema version")


class RosterImportBody(_Exact):
    """What ``POST /api/rosters`` imported."""

    roster: str = Field(description="the roster's name")
    id: int
    rows: int
    accepted: int
    rejected: int
    duplicates: int
    version: int = Field(description="the roster version stored: 1 for a new roster, more with into")
    added: int = Field(description="records added since the version before (all of them for version 1)")
    removed: int = Field(description="records of the version before that this file no longer has")
    changed: int = Field(description="records with the same identity whose other fields differ")
    header_row: int = Field(description="1-based line (or sheet row) read as the header")
    columns: dict[str, str] = Field(description="the column holding each role")
    messages: list[str] = Field(description="how the file was read where a reader should know (an ambiguous "
                                            "day/month order, a guessed header, an encoding), as the CLI prints")


# -- no dataclass: rows built in place ---------------------------------------------------------------


class BootstrapResultOut(_Open):
    """A finished bootstrap run's stored summary (``bootstrap_to_dict``)."""

    odds_ratio: float | None
    conf_int: dict[str, Interval] = Field(description=_BY_METHOD)
    mc_error: dict[str, Interval] = Field(description="Monte Carlo error of each end, per interval")
    resamples: int
    failed: int
    unit: Unit
    seed: int
    failure_flag: bool
    failed_by_reason: dict[str, int]


class SectorCount(_Exact):
    """Departures and firms of one sector in the roster."""

    sector: str
    departures: int
    firms: int


class OddsRow(_Exact):
    what: str
    odds_ratio: float | None
    wald: Interval | None
    profile: Interval | None


class IntervalRow(_Exact):
    method: str
    interval: Interval | None
    mc_error: Interval | None
    source: str


class ObservedYear(_Open):
    """A year's counted departures and observed forced share (with its intervals)."""

    year: int
    forced: int
    total: int
    share: float | None


class FittedYear(_Open):
    """The fitted forced share of a year, with its band."""

    year: int
    fit: float | None
    low: float | None
    high: float | None


CoverageYear = row_model("CoverageYear", dict.fromkeys(TABLE_COLUMNS, int),
                         doc="Departures of one fiscal year, by category (gap years count zero).")


# -- stored records ----------------------------------------------------------------------------------

RosterOut = define(Roster)
RejectedRowOut = define(RejectedRow)
MappingVersionOut = define(MappingVersion)
RunOut = define(Run, doc="A stored fit or bootstrap run; ``result`` is its JSON result once it is done.")
BootstrapRunOut = variant(Run, "BootstrapRunOut", doc="A stored bootstrap run and, once done, its summary.",
                          fields={"kind": Literal["bootstrap"], "result": BootstrapResultOut | None})

# -- analysis results --------------------------------------------------------------------------------

MappingDiffOut = define(MappingDiff, descriptions={
    "added": "[code, category]", "removed": "[code, category]", "moved": "[code, from, to]",
    "relabelled": "[code, old label, new label]"})
WindowSuggestionOut = define(WindowSuggestion)
YearFlagOut = define(YearFlag)
QuasiTrendOut = define(QuasiTrend, extra="allow")
CurvatureOut = define(Curvature, extra="allow")
TrendFitOut = define(TrendFit, extra="allow",
                     fields={"observed": list_of(ObservedYear), "fitted": list_of(FittedYear)})
#: ``fit_to_dict``: the fit without its covariance matrix, with its sentence (the CLI's ``fit --json``)
QuasiTrendSummary = variant(QuasiTrend, "QuasiTrendSummary", drop=frozenset({"message"}))
TrendFitSummary = variant(TrendFit, "TrendFitSummary", drop=frozenset({"covariance"}), add={"sentence": str},
                          fields={"quasi": QuasiTrendSummary | None})
SectorTrendOut = define(SectorTrend, extra="allow")
HeterogeneityOut = define(Heterogeneity, extra="allow")
SectorTrendsOut = define(SectorTrends, extra="allow")
VariantOut = define(Variant, extra="allow")
RobustnessOut = define(Robustness, extra="allow")

__all__ = ["BootstrapResultOut", "BootstrapRunOut", "CoverageYear", "CurvatureOut", "ErrorBody",
           "FittedYear", "GLOSSARY", "HealthBody", "HeterogeneityOut", "Interval", "IntervalRow", "MODELS",
           "MappingDiffOut", "MappingVersionOut", "ObservedYear", "OddsRow", "OverrideMark", "OverrideOut",
           "Percent", "QuasiTrendOut",
           "QuasiTrendSummary", "RejectedRowOut", "RobustnessOut", "RosterImportBody", "RosterOut",
           "RunOut", "SectorCount", "SectorTrendOut", "SectorTrendsOut", "TrendFitOut", "TrendFitSummary",
           "ValidationErrorBody", "ValidationIssue", "VariantOut", "WindowSuggestionOut", "YearFlagOut",
           "define", "list_of", "one_of", "variant"]


# -- a run's replicates and jackknife values, as data for other tools (built as dicts, not dataclasses) ---------


class OverrideMark(_Exact):
    """A case override on a listed departure: what the mapping version counts it as, and why."""

    position: int = Field(description="the override's number in the mapping version (what a removal names)")
    category: Literal["forced", "voluntary", "excluded"]
    note: str
    author: str
    created_at: str


class OverrideOut(_Exact):
    """One case override of a roster in a mapping version (rows built by app.analysis.overrides)."""

    position: int = Field(description="number in the mapping version's list, from 1")
    record: str = Field(description="the departure in words: firm, executive (or code), fiscal year")
    firm_id: str
    executive: str | None
    year: int
    reason: str
    counted_as: str | None = Field(description="the category its code and the rules give it (None: not applied)")
    category: Literal["forced", "voluntary", "excluded"] = Field(description="what the override counts it as")
    note: str
    author: str
    created_at: str
    departure_id: int | None = Field(description="the record in the roster's current version (None: not applied)")
    line: int | None
    applied: bool
    not_applied: str = Field(description="why the override names no record of this roster version ('' if applied)")
    mapping: str | None


class DepartureOut(_Exact):
    """One departure in the record browser (rows are built from a SQL query, not a dataclass)."""

    id: int = Field(description="the record's id in this roster version (what an override is set on)")
    override: OverrideMark | None = Field(default=None, description="the case override counting this record, if any")

    line: int = Field(description="line of the departure in the imported file")
    year: int
    date: str | None
    firm_id: str
    firm_name: str | None
    sector: str | None
    executive: str | None
    reason: str
    category: Literal["forced", "voluntary", "excluded", "unmapped"]
    age: float | None
    tenure: float | None
    interim: bool | None
    notes: str | None


class ReplicateOut(_Exact):
    """One resample: the statistic as a log odds ratio and odds ratio, or as ``estimate`` for a statistic not on
    the odds-ratio scale; its standard error where the statistic has one."""

    index: int
    log_odds_ratio: float | None = None
    odds_ratio: float | None = None
    estimate: float | None = None
    standard_error: float | None = None
    status: Literal["ok", "failed"]
    reason: str


class JackknifeOut(_Exact):
    """One resampling unit left out: a firm id, or a departure's roster line with its cell."""

    unit_id: str
    log_odds_ratio: float | None = None
    estimate: float | None = None
    year: int | None = None
    sector: str | None = None
    category: Literal["forced", "voluntary"] | None = None


class ReplicatesBody(_Exact):
    run: int
    unit: Literal["departure", "firm"]
    seed: int
    block_size: int
    statistic: str
    scale: Literal["log", "identity"]
    log_odds_ratio: float | None
    replicates: list[ReplicateOut]
    jackknife: list[JackknifeOut]
