"""Reason codes: every code of a roster with its category, editable in place and saved as a new version."""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.analysis.cellstore import (
    code_counts_apart,
    memoised,
    roster_fingerprint,
    window_code_counts,
    without_in_post,
)
from app.analysis.inputs import load_input
from app.analysis.overrides import overrides_to_list, resolve_overrides
from app.intake.codes import code_key
from app.intake.reasons import MappingDiff, diff_mappings, suggest_categories
from app.store import MAX_ID, MappingConflict, MappingVersion, Roster, Store, StoreError
from app.types import CATEGORIES, Category
from app.web.deps import BadRequest, NotFound, app_store
from app.web.forms import Upload, read_form
from app.web.reason_rules import rules_view
from app.web.rendering import as_json, render
from app.web.route_docs import (
    api_errors,
    form_body,
    merged,
    page_errors,
    query,
    redirect,
)
from app.web.schemas import define

router = APIRouter()


@dataclass(frozen=True)
class CodeRow:
    """One reason code as the analyst sees it: its departures, and apart from them its rows still in post."""

    code: str
    count: int
    count_in_window: int
    in_post: int
    first_year: int
    last_year: int
    category: str | None
    label: str
    suggested: str | None
    suggestion_note: str
    ambiguous: bool
    #: (spelling as in the file, rows) most frequent first, when the file wrote the code more than one way
    variants: tuple[tuple[str, int], ...] = ()


CodeRowOut = define(CodeRow, fields={"category": Category | None, "suggested": Category | None},
                    descriptions={"variants": "[spelling, rows] per spelling in the file (two or more), "
                                              "most frequent first; empty when written one way",
                                  "count": "the code's departures in every year (rows still in post left out)",
                                  "count_in_window": "the code's departures inside the window",
                                  "in_post": "the code's rows still in post (no departure date, a code saying "
                                             "the executive has not left, not counted as forced or voluntary): "
                                             "no departure of any year; listed by the record browser with "
                                             "reason=CODE&in_post=only",
                                  "first_year": "first year of the code's departures (of its rows still in "
                                                "post when it has none)",
                                  "last_year": "last year of the code's departures (of its rows still in post "
                                               "when it has none)"})


@dataclass(frozen=True)
class ReasonsPage:
    """Codes with counts and categories, the mapping's version history and an optional comparison."""

    roster: Roster
    mapping: MappingVersion | None
    mapping_names: list[tuple[str, int]]
    history: list[tuple[int, str, str, str]]
    codes: list[CodeRow]
    window: tuple[int, int] | None
    unmapped_codes: int
    unmapped_departures: int
    #: rows still in post of the unmapped codes (not among ``unmapped_departures``)
    unmapped_in_post: int
    using_suggestion: bool
    compare: tuple[int, int] | None
    diff: MappingDiff | None
    categories: tuple[str, ...] = CATEGORIES
    message: str | None = None
    error: str | None = None
    #: the mapping version's classification rules in order, each with ``matched``, ``moved``, ``missing`` (departures
    #: only) and ``in_post_matched``, ``in_post_missing`` (rows still in post, counted apart)
    rules: list[dict[str, Any]] = field(default_factory=list)
    #: the academic preset's rules this version does not have yet (empty: nothing to add)
    preset: list[str] = field(default_factory=list)
    preset_name: str = ""
    preset_source: str = ""
    #: the mapping version's case overrides of this roster (app.analysis.overrides.overrides_to_list)
    overrides: list[dict[str, Any]] = field(default_factory=list)
    #: the fields the rules table offers (notice_days only for a roster with announcement dates)
    rule_fields: tuple[str, ...] = ("age", "tenure", "interim")
    #: why notice_days is not offered ("" when it is)
    notice_note: str = ""
    #: the notice preset's rules when this version does not hold them yet (empty: not on offer)
    notice_preset: list[str] = field(default_factory=list)
    notice_preset_name: str = ""
    notice_preset_source: str = ""


ReasonsBody = define(ReasonsPage, "ReasonsBody", descriptions={
    "history": "[version, created_at, author, note] per version",
    "compare": "the two versions compared, when asked with ?a=&b="})


def _variants(store: Store, roster: Roster) -> dict[str, tuple[tuple[str, int], ...]]:
    """Each shown code's spellings in the file with their rows, for codes written more than one way."""
    table = store.reason_spellings(roster.id, version=roster.version)
    out: dict[str, tuple[tuple[str, int], ...]] = {}
    for code, part in table.groupby("code", sort=False):
        if len(part) > 1:
            out[str(code)] = tuple((str(s), int(n)) for s, n in zip(part["spelling"], part["count"], strict=True))
    return out


def reasons_data(store: Store, roster_id: int, *, compare: tuple[int, int] | None = None,
                 message: str | None = None, error: str | None = None) -> ReasonsPage:
    try:
        roster = store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    settings = store.settings(roster.id)
    mapping = store.get_mapping(settings.mapping_name) if settings.mapping_name else None
    inp = load_input(store, roster.id, require_mapping=False)
    # which rows are still in post depends on the mapping version (a code or an override counting one as forced
    # or voluntary makes it a departure), so the counts are memoised per mapping version; suggestions and
    # spellings depend on the roster only
    roster_key = (roster.id, roster_fingerprint(roster))
    counts = memoised(store, ("code_counts_apart", *inp.key[:3]), lambda: code_counts_apart(inp.counts, inp.in_post_rows))
    window_counts = memoised(store, ("window_code_counts_apart", *inp.key),
                             lambda: window_code_counts(without_in_post(inp.counts, inp.in_post_rows), inp.window))
    suggestions = memoised(store, ("suggestions", *roster_key),
                           lambda: suggest_categories(counts["code"].astype(str).tolist()))
    variants = memoised(store, ("spellings", *roster_key), lambda: _variants(store, roster))
    # a mapping's codes match the roster's by code key, as the models match them (app.stats.cells)
    by_key = {code_key(c): c for c in mapping.categories} if mapping else {}
    rows = []
    for rec in counts.to_dict("records"):
        code = str(rec["code"])
        sug = suggestions[code]
        named = by_key.get(code_key(code))
        category = (mapping.categories[named] if named is not None else None) if mapping else sug.category
        rows.append(CodeRow(
            code=code, count=int(rec["count"]), count_in_window=int(window_counts.get(code, 0)),
            in_post=int(rec["in_post"]),
            first_year=int(rec["first_year"]), last_year=int(rec["last_year"]),
            category=category, label=(mapping.labels.get(named, "") if mapping and named is not None else ""),
            suggested=sug.category, suggestion_note=sug.why, ambiguous=sug.ambiguous,
            variants=variants.get(code, ()),
        ))
    unmapped = [r for r in rows if r.category is None]
    diff = None
    if compare and mapping:
        missing = [v for v in compare if not 1 <= v <= mapping.version]
        if missing:  # a version typed into the address bar, or one from before a database reset
            raise NotFound(f"Mapping {mapping.name!r} has no version {missing[0]}; "
                             f"its versions are 1 to {mapping.version}.")
        old = store.get_mapping(mapping.name, compare[0])
        new = store.get_mapping(mapping.name, compare[1])
        diff = diff_mappings(old.categories, new.categories, old.labels, new.labels)
    return ReasonsPage(
        roster=roster, mapping=mapping, mapping_names=store.list_mappings(),
        history=store.mapping_history(mapping.name) if mapping else [], codes=rows,
        window=inp.window, unmapped_codes=len(unmapped),
        unmapped_departures=sum(r.count for r in unmapped), unmapped_in_post=sum(r.in_post for r in unmapped),
        using_suggestion=mapping is None,
        compare=compare if diff else None, diff=diff, message=message, error=error,
        **rules_view(store, roster, mapping, [r.code for r in rows]),
        overrides=overrides_to_list(resolve_overrides(store, roster, mapping), mapping),
    )


def _compare_arg(request: Request) -> tuple[int, int] | None:
    """Versions ``a`` and ``b`` to compare; a value that is not a version number is refused, not ignored."""
    a, b = request.query_params.get("a"), request.query_params.get("b")
    for key, raw in (("a", a), ("b", b)):
        if raw and not (raw.isdecimal() and int(raw) >= 1):
            raise BadRequest(f"{key} must be a mapping version number (1 or more); got {raw!r}.")
    if a and b:
        return int(a), int(b)
    return None


_COMPARE = query(("a", {"type": "integer", "minimum": 1}, "compare this mapping version ..."),
                 ("b", {"type": "integer", "minimum": 1}, "... with this one (both needed)"))


@router.get("/rosters/{roster_id}/reasons", response_class=HTMLResponse, name="reasons_page",
            responses=page_errors(400, 404),
            openapi_extra=merged(_COMPARE, query(("saved", {"type": "string"}, "say the mapping was saved"))))
def reasons_page(request: Request, roster_id: int) -> HTMLResponse:
    page = reasons_data(app_store(request), roster_id, compare=_compare_arg(request),
                        message=request.query_params.get("saved") and "Saved as a new version.")
    return render(request, "reasons.html", page, roster=page.roster, active="reasons")


@router.get("/api/rosters/{roster_id}/reasons", name="reasons_api", response_model=None,
            responses={200: {"model": ReasonsBody, "description": "The roster's codes and its mapping"},
                       **api_errors(400, 404)}, openapi_extra=_COMPARE)
def reasons_api(request: Request, roster_id: int) -> JSONResponse:
    return as_json(reasons_data(app_store(request), roster_id, compare=_compare_arg(request)))


def _form_entries(form: Any) -> tuple[dict[str, str], dict[str, str]]:
    categories: dict[str, str] = {}
    labels: dict[str, str] = {}
    for key in form:  # a category with no code beside it is still checked: the form is wrong either way
        value = str(form.get(key) or "")
        if key.startswith("cat-") and value and value not in CATEGORIES:
            raise BadRequest(f"{key} must be one of {', '.join(CATEGORIES)}; got {value!r}.")
    for key in form:
        if not key.startswith("code-"):
            continue
        idx = key.removeprefix("code-")
        code = str(form.get(key))
        category = str(form.get(f"cat-{idx}") or "")
        if category and category not in CATEGORIES:
            raise BadRequest(f"Category for {code!r} must be one of {', '.join(CATEGORIES)}; got {category!r}.")
        if category:
            categories[code] = category
        # a label is one line: a line break typed into its (wrapping) box becomes a space
        label = " ".join(str(form.get(f"label-{idx}") or "").split())
        if label:
            labels[code] = label
    return categories, labels


#: a save based on a version that is no longer the newest (two analysts editing one mapping at once)
CONFLICT: dict[int | str, dict[str, Any]] = {409: {
    "description": "A newer version of the mapping was saved since the form was filled: nothing was saved. "
                   "HTML: the page again with the analyst's own choices, based on the newest version, and the "
                   "two versions compared; JSON: {\"error\": ..., \"diff\": the comparison's address}",
    "content": {"text/html": {"schema": {"type": "string"}},
                "application/json": {"schema": {"type": "object", "required": ["error", "diff"], "properties": {
                    "error": {"type": "string"}, "diff": {"type": "string"}}}}}}}


def _based_on(form: dict[str, str | Upload], name: str) -> int | None:
    """The version the form was filled from, when it is saved under the same mapping name (a save under
    another name is a deliberate "save as" and is not checked)."""
    raw = str(form.get("based_on") or "").strip()
    if raw and (not raw.isdecimal() or int(raw) > MAX_ID):
        raise BadRequest(f"based_on must be a mapping version number (0 or more); got {raw!r}. Nothing was saved.")
    if not raw or str(form.get("based_on_mapping") or "") != name:
        return None
    if int(raw) > MAX_ID:
        raise BadRequest(f"based_on must be a mapping version number (0 or more); got {raw!r}. Nothing was saved.")
    return int(raw)


def _conflict(request: Request, store: Store, roster_id: int, exc: MappingConflict, categories: dict[str, str],
              labels: dict[str, str]) -> Response:
    """409: the analyst's edit is not lost. The page comes back with their own choices in the form (now based
    on the newest version, so saving again is a deliberate decision) and the versions compared."""
    diff_url = str(request.url_for("reasons_page", roster_id=roster_id).include_query_params(
        a=max(exc.based_on, 1), b=exc.latest))
    if "application/json" in request.headers.get("accept", ""):
        return JSONResponse({"error": str(exc), "diff": diff_url}, status_code=409)
    current = store.settings(roster_id).mapping_name == exc.name and exc.based_on >= 1
    page = reasons_data(store, roster_id, compare=(exc.based_on, exc.latest) if current else None,
                        error=f"{exc} Your choices are still in the form below.")
    page = replace(page, codes=[replace(c, category=categories.get(c.code), label=labels.get(c.code, ""))
                                for c in page.codes])
    return render(request, "reasons.html", page, roster=page.roster, active="reasons", status=409,
                  diff_url=diff_url)


@router.post("/rosters/{roster_id}/reasons", name="reasons_save", status_code=303,
             response_class=RedirectResponse,
             responses=redirect("the Reason codes page", page_errors(400, 404), CONFLICT),
             openapi_extra=form_body({
                 "mapping_name": {"type": "string", "description": "save as this mapping (default: the current)"},
                 "author": {"type": "string", "maxLength": 80}, "note": {"type": "string", "maxLength": 500},
                 "based_on_mapping": {"type": "string", "description": "the mapping the form was filled from ..."},
                 "based_on": {"type": "integer", "minimum": 0, "maximum": MAX_ID,
                              "description": "... and its version: saving it under that name when a newer "
                                             "version exists answers 409 and saves nothing"},
             }, pattern_properties={
                 "^code-[0-9]+$": {"type": "string", "description": "a reason code ..."},
                 "^cat-[0-9]+$": {"type": "string", "enum": ["", *CATEGORIES],
                                  "description": "... its category (same number; empty: unmapped)"},
                 "^label-[0-9]+$": {"type": "string", "description": "... and its label"},
             }))
async def reasons_save(request: Request, roster_id: int) -> Response:
    """Save the categories in the form as the next version; codes of other rosters are carried over."""
    form = await read_form(request)
    return await run_in_threadpool(_reasons_save, request, roster_id, form)


def _reasons_save(request: Request, roster_id: int, form: dict[str, str | Upload]) -> Response:
    store = app_store(request)
    page = reasons_data(store, roster_id)
    categories, labels = _form_entries(form)
    if page.codes and not any(str(key).startswith("code-") for key in form):
        # the page's form sends every code; a save without any would unmap this roster's codes
        raise BadRequest("The form sent no reason codes (code-N fields); nothing was saved. Save from the "
                         "Reason codes page, or import a mapping CSV.")
    name = str(form.get("mapping_name") or "").strip() or (
        page.mapping.name if page.mapping else f"{page.roster.name} mapping")
    if page.mapping and name == page.mapping.name:
        roster_keys = {code_key(r.code) for r in page.codes}
        for code, cat in page.mapping.categories.items():
            if code_key(code) not in roster_keys:  # another spelling of a code on the page is that code
                categories.setdefault(code, cat)
                if code in page.mapping.labels:
                    labels.setdefault(code, page.mapping.labels[code])
    for key, most in (("author", 80), ("note", 500)):
        if len(str(form.get(key) or "")) > most:
            raise BadRequest(f"The {key} is longer than {most} characters; shorten it. Nothing was saved.")
    note = str(form.get("note") or "").strip() or "edited on the Reason codes page"
    author = str(form.get("author") or "").strip() or "analyst"
    # the version's classification rules stay with it (they are edited in their own table)
    rules = page.mapping.rules if page.mapping and name == page.mapping.name else ()
    based_on = _based_on(form, name)
    try:
        store.save_mapping_version(name, categories, labels, author=author, note=note, rules=rules,
                                   based_on=based_on)
    except MappingConflict as exc:
        return _conflict(request, store, page.roster.id, exc, categories, labels)
    except StoreError as exc:  # a new mapping name that is too long or holds an invisible character
        raise BadRequest(f"{exc} Nothing was saved.") from exc
    store.update_settings(page.roster.id, mapping_name=name)
    url = request.url_for("reasons_page", roster_id=page.roster.id).include_query_params(saved=1)
    return RedirectResponse(url, status_code=303)
