"""Pydantic models of the JSON the API returns, for the OpenAPI schema only.

Routes build their JSON from the page dataclasses (``rendering.as_json``) and return it directly, so these
models never touch a response at run time: they document it, and the tests (``test_openapi``, the
schemathesis fuzz test) hold real responses to them. Page bodies and stored records forbid unknown keys, so a
new field on a page must be documented here too; analysis results nested inside them allow extra keys,
where spelling out every statistic would only make the schema brittle. Numbers the app turns into null
when they are not finite are ``float | None``.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field

Interval = Annotated[list[float | None], Field(min_length=2, max_length=2,
                                               description="[low, high]; an end that is not finite is null")]
YearSpan = Annotated[list[int], Field(min_length=2, max_length=2, description="[first, last] fiscal year")]
NameVersion = Annotated[list[str | int], Field(min_length=2, max_length=2, description="[mapping name, version]")]


class _Exact(BaseModel):
    model_config = ConfigDict(extra="forbid")


class _Open(BaseModel):
    model_config = ConfigDict(extra="allow")


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


# -- stored records --------------------------------------------------------------------------------


class RosterOut(_Exact):
    id: int
    name: str
    source_name: str
    sha256: str
    imported_at: str
    rows_total: int
    accepted: int
    rejected: int
    duplicates: int
    columns: dict[str, str] = Field(description="role -> column name in the file")


class RejectedRowOut(_Exact):
    line: int
    raw: str
    reason: str


class MappingVersionOut(_Exact):
    name: str
    version: int
    created_at: str
    author: str
    note: str
    categories: dict[str, Literal["forced", "voluntary", "excluded"]]
    labels: dict[str, str]


RunStatus = Literal["queued", "running", "done", "failed", "cancelled", "interrupted"]


class RunOut(_Exact):
    """A stored fit or bootstrap run; ``result`` is the run's JSON result once it is done."""

    id: int
    kind: Literal["fit", "bootstrap"]
    roster_id: int
    status: RunStatus
    created_at: str
    started_at: str | None
    finished_at: str | None
    mapping_name: str | None
    mapping_version: int | None
    window: YearSpan | None
    params: dict[str, Any]
    fingerprint: str
    progress_done: int
    progress_total: int
    cancel_requested: bool
    result: dict[str, Any] | None
    error: str | None
    seconds: float | None


class BootstrapResultOut(_Open):
    odds_ratio: float | None
    conf_int: dict[str, Interval]
    mc_error: dict[str, Interval]
    resamples: int
    failed: int
    unit: Literal["departure", "firm"]
    seed: int
    failure_flag: bool
    failed_by_reason: dict[str, int]


class BootstrapRunOut(RunOut):
    kind: Literal["bootstrap"]
    result: BootstrapResultOut | None  # type: ignore[assignment]


# -- rosters ---------------------------------------------------------------------------------------


class RostersBody(_Exact):
    rosters: list[RosterOut]
    upload_limit_mb: float
    message: str | None


class RosterImportBody(_Exact):
    """What ``POST /api/rosters`` imported."""

    roster: str = Field(description="the roster's name")
    id: int
    rows: int
    accepted: int
    rejected: int
    duplicates: int


class SectorCount(_Exact):
    sector: str
    departures: int
    firms: int


class RosterDetailBody(_Exact):
    roster: RosterOut
    years: YearSpan | None
    firms: int
    sectors: list[SectorCount]
    mapping_name: str | None
    window: YearSpan | None
    rejected: list[RejectedRowOut] = Field(description="the first 200 rejected rows")
    rejected_total: int
    runs: int = Field(description="stored runs; they stay readable if the roster is deleted")


# -- reason codes ----------------------------------------------------------------------------------


class CodeRowOut(_Exact):
    code: str
    count: int
    count_in_window: int
    first_year: int
    last_year: int
    category: Literal["forced", "voluntary", "excluded"] | None
    label: str
    suggested: Literal["forced", "voluntary", "excluded"] | None
    suggestion_note: str
    ambiguous: bool


class MappingDiffOut(_Exact):
    added: list[list[str]] = Field(description="[code, category]")
    removed: list[list[str]] = Field(description="[code, category]")
    moved: list[list[str]] = Field(description="[code, from, to]")
    relabelled: list[list[str]] = Field(description="[code, old label, new label]")


class ReasonsBody(_Exact):
    roster: RosterOut
    mapping: MappingVersionOut | None
    mapping_names: list[NameVersion]
    history: list[list[int | str]] = Field(description="[version, created_at, author, note] per version")
    codes: list[CodeRowOut]
    window: YearSpan | None
    unmapped_codes: int
    unmapped_departures: int
    using_suggestion: bool
    compare: YearSpan | None = Field(description="the two versions compared, when asked with ?a=&b=")
    diff: MappingDiffOut | None
    categories: list[str]
    message: str | None
    error: str | None = Field(description="why the last mapping import failed")


# -- coverage --------------------------------------------------------------------------------------


class CoverageYear(_Open):
    year: int
    departures: int
    forced: int
    voluntary: int
    excluded: int
    unmapped: int


class WindowSuggestionOut(_Exact):
    window: YearSpan
    median: float | None
    cutoff: float | None
    threshold: float
    basis: Literal["not_excluded", "departures", "counted"]
    rule: str
    below_cutoff: list[int]


class YearFlagOut(_Exact):
    year: int
    kind: Literal["drop", "spike", "repeat", "below_cutoff"]
    message: str


class CoverageBody(_Exact):
    roster: RosterOut
    mapping_label: str
    table: list[CoverageYear]
    suggestion: WindowSuggestionOut
    flags: list[YearFlagOut]
    window: YearSpan
    window_source: str
    threshold: float
    warnings: list[str]


# -- trend -----------------------------------------------------------------------------------------


class ObservedYear(_Open):
    year: int
    forced: int
    total: int
    share: float | None


class FittedYear(_Open):
    year: int
    fit: float | None
    low: float | None
    high: float | None


class FitCore(_Open):
    """The fields every trend fit carries, in ``fit_to_dict`` and in a fitted ``TrendFit`` alike."""

    model: str
    window: YearSpan
    centre: float | None
    alpha: float
    departures: int
    forced: int
    n_years: int
    n_groups: int
    odds_ratio: float | None
    log_or: float | None
    se: float | None
    conf_int: dict[str, Interval | None]
    decade_odds_ratio: float | None
    decade_conf_int: dict[str, Interval | None]
    deviance: float | None
    df_resid: int
    dispersion: float | None
    converged: bool
    separated: bool
    quasi: dict[str, Any] | None
    curvature: dict[str, Any] | None
    coefficients: list[dict[str, Any]]
    observed: list[ObservedYear]
    fitted: list[FittedYear]
    messages: list[str]


class TrendFitOut(FitCore):
    sentence: str


class OddsRow(_Exact):
    what: str
    odds_ratio: float | None
    wald: Interval | None
    profile: Interval | None


class TrendBody(_Exact):
    """200: the fit. The same page with ``fit`` null and ``error`` set comes with status 422."""

    roster: RosterOut
    mapping_label: str
    window: YearSpan
    window_source: str
    model: str
    spline_df: int
    fit: TrendFitOut | None
    sentence: str | None
    error: str | None
    warnings: list[str]
    run_id: int | None
    runs: list[RunOut]
    table: list[OddsRow]


class TrendUnfitBody(TrendBody):
    fit: None
    sentence: None
    error: str


# -- resampling ------------------------------------------------------------------------------------


class RunsBody(_Exact):
    roster: RosterOut
    mapping_label: str
    window: YearSpan | None
    runs: list[BootstrapRunOut]
    default_seed: int
    error: str | None
    warnings: list[str]
    max_resamples: int
    units: list[str]


class IntervalRow(_Exact):
    method: str
    interval: Interval | None
    mc_error: Interval | None
    source: str


class RunBody(_Exact):
    roster: RosterOut | None = Field(description="null when the roster was deleted (the run stays readable)")
    roster_deleted: bool
    run: BootstrapRunOut
    method: Literal["percentile", "basic", "bca"]
    rows: list[IntervalRow]
    comparison: str | None
    comparison_found: bool
    percent: int = Field(ge=0, le=100)


# -- sectors and robustness ------------------------------------------------------------------------


class SectorTrendOut(_Open):
    sector: str
    status: Literal["fitted", "skipped"]
    reason: str | None
    departures: int
    forced: int
    n_years: int
    log_or: float | None
    se: float | None
    odds_ratio: float | None
    conf_int: dict[str, Interval | None]
    messages: list[str]


class HeterogeneityOut(_Open):
    statistic: float | None
    df: int
    p: float | None
    sectors: list[str]


class SectorTrendsOut(_Open):
    window: YearSpan
    centre: float | None
    alpha: float
    min_departures: int
    sectors: list[SectorTrendOut]
    common: FitCore | None
    heterogeneity: HeterogeneityOut | None
    messages: list[str]


class SectorsBody(_Exact):
    roster: RosterOut
    mapping_label: str
    window: YearSpan | None
    result: SectorTrendsOut | None
    verdict: str | None
    error: str | None
    warnings: list[str]


class VariantOut(_Open):
    label: str
    kind: str
    changes: list[str]
    departures: int
    forced: int
    odds_ratio: float | None
    wald: Interval | None
    profile: Interval | None
    bootstrap: Interval | None
    bootstrap_note: str
    error: str | None


class RobustnessOut(_Open):
    window: YearSpan
    variants: list[VariantOut]
    direction: str
    holds: bool
    sentence: str


class RobustnessBody(_Exact):
    roster: RosterOut
    mapping_label: str
    result: RobustnessOut | None
    mapping_names: list[NameVersion]
    chosen: list[str] = Field(description="the other mappings compared, as name:version")
    vary: list[str]
    codes: list[str]
    error: str | None
    warnings: list[str]


# -- briefing --------------------------------------------------------------------------------------


class PreviewItemOut(_Exact):
    name: str
    label: str
    takeaway: str
    error: str | None


class BriefingBody(_Exact):
    roster: RosterOut
    mapping_label: str
    window: YearSpan | None
    chosen: list[str]
    run_id: int | None
    runs: list[BootstrapRunOut]
    items: list[PreviewItemOut]
    export_ok: bool
    export_message: str
    error: str | None
    warnings: list[str]
    chart_labels: dict[str, str]
