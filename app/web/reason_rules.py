"""Classification rules on the Reason codes page: the small rules table, the academic preset, the rules CSV.

Every change saves the next version of the roster's mapping with the same codes and the new rules (a saved
version never changes), so every run that names a mapping version names its rules.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from app.analysis.mapping_files import export_rules_csv
from app.analysis.rules import (
    NOTICE_PRESET_NAME,
    NOTICE_PRESET_SOURCE,
    PRESET_NAME,
    PRESET_SOURCE,
    notice_preset_rules,
    preset_rules,
    rules_to_list,
    save_rules,
    with_notice_preset,
    with_preset,
)
from app.intake.reasons import MappingFileError
from app.intake.rule_files import parse_rules_csv
from app.stats.rules import RuleError, make_rule
from app.store import MappingVersion, Roster, Store, StoreError
from app.types import CATEGORIES, ClassificationRule
from app.web.deps import BadRequest, NotFound, app_store, version_csv
from app.web.forms import Upload, read_form
from app.web.route_docs import FILE, GUARDS, download, form_body, page_errors, query, redirect

router = APIRouter()

RULE_FIELDS_OFFERED = ("age", "tenure", "interim", "notice_days")
RULE_COMPARISONS_OFFERED = ("below", "at_least", "equals")
NO_ANNOUNCEMENTS = ("This roster has no announcement dates, so rules on notice_days (days from the announcement "
                    "to the exit) are not offered; import a file with an announcement-date column to use them.")


def has_announcements(roster: Roster) -> bool:
    """True when the roster's newest version was imported with an announcement-date column."""
    return "announced" in roster.columns


def rules_view(store: Store, roster: Roster, mapping: MappingVersion | None, codes: list[str]) -> dict[str, Any]:
    """What the page shows about rules: each rule with what it moved, the fields on offer (notice_days only
    where the roster has announcement dates, or a rule already uses it), and the presets on offer."""
    preset = preset_rules(mapping, codes)
    missing = [r for r in preset if mapping is None or r not in mapping.rules]
    dated = has_announcements(roster)
    used = bool(mapping and any(r.field == "notice_days" for r in mapping.rules))
    notice = notice_preset_rules(mapping, codes) if dated else ()
    notice_added = bool(mapping) and with_notice_preset(mapping.rules if mapping else (), notice) == (
        mapping.rules if mapping else ())
    return {"rules": rules_to_list(store, roster, mapping),
            "preset": [r.describe() for r in missing], "preset_name": PRESET_NAME, "preset_source": PRESET_SOURCE,
            "rule_fields": RULE_FIELDS_OFFERED if dated or used else RULE_FIELDS_OFFERED[:3],
            "notice_note": "" if dated else NO_ANNOUNCEMENTS,
            "notice_preset": [] if notice_added else [r.describe() for r in notice],
            "notice_preset_name": NOTICE_PRESET_NAME, "notice_preset_source": NOTICE_PRESET_SOURCE}


def _mapping_of(store: Store, roster_id: int) -> tuple[Roster, MappingVersion]:
    try:
        roster = store.get_roster(roster_id)
    except StoreError as exc:
        raise NotFound(str(exc)) from exc
    name = store.settings(roster.id).mapping_name
    if not name:
        raise BadRequest("Save the roster's categories first (the rules belong to a mapping version).")
    return roster, store.get_mapping(name)


def _form_rules(form: dict[str, Any]) -> tuple[ClassificationRule, ...]:
    """Rows ``rule-N-code|field|comparison|value|category`` in N order; a row with ``rule-N-drop`` or with
    no code and no value is left out; a bad row is refused with its number."""
    numbers = sorted({int(k.split("-")[1]) for k in form if k.startswith("rule-") and k.split("-")[1].isdecimal()})
    rules: list[ClassificationRule] = []
    for n in numbers:
        cell = {part: str(form.get(f"rule-{n}-{part}") or "").strip()
                for part in ("code", "field", "comparison", "value", "category")}
        for part, allowed in (("field", RULE_FIELDS_OFFERED), ("comparison", RULE_COMPARISONS_OFFERED),
                              ("category", CATEGORIES)):
            if cell[part] and cell[part] not in allowed:
                raise BadRequest(f"Rule {n}: {part} must be one of {', '.join(allowed)}; got {cell[part]!r}.")
        if form.get(f"rule-{n}-drop") or not (cell["code"] or cell["value"]):
            continue
        try:
            rules.append(make_rule(**cell))
        except RuleError as exc:
            raise BadRequest(f"Rule {n}: {exc}") from None
    return tuple(rules)


def _back(request: Request, roster: Roster) -> RedirectResponse:
    url = request.url_for("reasons_page", roster_id=roster.id).include_query_params(saved=1)
    return RedirectResponse(url, status_code=303)


_RULE_ROW = {
    "^rule-[0-9]+-code$": {"type": "string", "description": "the reason code a rule applies to ..."},
    "^rule-[0-9]+-field$": {"type": "string", "enum": list(RULE_FIELDS_OFFERED)},
    "^rule-[0-9]+-comparison$": {"type": "string", "enum": list(RULE_COMPARISONS_OFFERED)},
    "^rule-[0-9]+-value$": {"type": "string", "description": "whole years (age, tenure), days (notice_days) or "
                            "1/0 (interim)"},
    "^rule-[0-9]+-category$": {"type": "string", "enum": list(CATEGORIES)},
    "^rule-[0-9]+-drop$": {"type": "string", "description": "present: remove this rule"},
}


@router.post("/rosters/{roster_id}/rules", name="rules_save", status_code=303, response_class=RedirectResponse,
             responses=redirect("the Reason codes page", page_errors(400, 404)),
             openapi_extra=form_body({"note": {"type": "string", "maxLength": 500}}, pattern_properties=_RULE_ROW))
async def rules_save(request: Request, roster_id: int) -> RedirectResponse:
    """Save the rules table (in row order: the first matching rule decides) as the next mapping version."""
    form = await read_form(request)
    return await run_in_threadpool(_rules_save, request, roster_id, form)


def _rules_save(request: Request, roster_id: int, form: Any) -> RedirectResponse:
    store = app_store(request)
    roster, mapping = _mapping_of(store, roster_id)
    rules = _form_rules(form)
    note = str(form.get("note") or "").strip()
    if len(note) > 500:
        raise BadRequest(f"The note is {len(note):,} characters; keep it to 500.")
    note = note or f"{len(rules)} classification rule(s) edited"
    save_rules(store, mapping, rules, note=note)
    return _back(request, roster)


@router.post("/rosters/{roster_id}/rules/preset", name="rules_preset", status_code=303,
             response_class=RedirectResponse, responses=redirect("the Reason codes page", page_errors(400, 404)),
             openapi_extra=form_body({"which": {"type": "string", "enum": ["age", "notice"], "default": "age",
                                               "description": "notice: the preset with the notice test"}}))
async def rules_preset(request: Request, roster_id: int) -> RedirectResponse:
    """Add the academic preset (retirement below 60 counts as forced) after the existing rules; with
    ``which=notice``, the preset with the notice test (rosters with announcement dates)."""
    form = await read_form(request)
    return await run_in_threadpool(_rules_preset, request, roster_id, form)


def _rules_preset(request: Request, roster_id: int, form: dict[str, str | Upload]) -> RedirectResponse:
    store = app_store(request)
    roster, mapping = _mapping_of(store, roster_id)
    which = str(form.get("which") or "age")
    if which not in ("age", "notice"):
        raise BadRequest(f"which must be age or notice; got {which!r}.")
    codes = store.reason_counts(roster.id)["code"].astype(str)
    if which == "notice" and not has_announcements(roster):
        raise BadRequest(NO_ANNOUNCEMENTS)
    preset = (notice_preset_rules if which == "notice" else preset_rules)(mapping, codes)
    if not preset:
        raise BadRequest("No reason code of this roster reads as a retirement; add the rule by hand.")
    rules = (with_notice_preset if which == "notice" else with_preset)(mapping.rules, preset)
    if rules == mapping.rules:
        raise BadRequest("The preset's rules are already in this mapping version.")
    note = (f"added the preset: {NOTICE_PRESET_NAME} (the academic convention, Parrino 1997, Journal of "
            "Financial Economics 46)" if which == "notice" else f"added the preset: {PRESET_NAME}, {PRESET_SOURCE}")
    save_rules(store, mapping, rules, note=note)
    return _back(request, roster)


@router.post("/rosters/{roster_id}/rules/import", name="rules_import", status_code=303,
             response_class=RedirectResponse,
             responses={**redirect("the Reason codes page", page_errors(400, 404)), **GUARDS},
             openapi_extra=form_body({"file": FILE}, required=("file",), multipart=True))
async def rules_import(request: Request, roster_id: int) -> RedirectResponse:
    """Replace the rules with a ``code,field,comparison,value,category`` CSV (the whole file or nothing)."""
    form = await read_form(request)
    return await run_in_threadpool(_rules_import, request, roster_id, form)


def _rules_import(request: Request, roster_id: int, form: Any) -> RedirectResponse:
    store = app_store(request)
    roster, mapping = _mapping_of(store, roster_id)
    upload = form.get("file")
    if not isinstance(upload, Upload):
        raise BadRequest("Choose a rules CSV (code,field,comparison,value,category).")
    try:
        rules = parse_rules_csv(upload.data)
    except MappingFileError as exc:
        raise BadRequest(f"{upload.filename}: {exc} Nothing was saved.") from None
    save_rules(store, mapping, rules, note=f"rules imported from {upload.filename}"[:500])
    return _back(request, roster)


@router.get("/mapping-rules/{name:path}.csv", name="rules_csv", response_class=Response,
            responses={**download("The version's rules as code,field,comparison,value,category", "text/csv"),
                       **page_errors(400, 404)},
            openapi_extra=query(("version", {"type": "integer", "minimum": 1}, "default: the latest")))
def rules_csv(request: Request, name: str) -> Response:
    return version_csv(request, name, "rules", export_rules_csv, "-rules")
