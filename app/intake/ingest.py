"""Import a roster: read it, find the header row and each column's role, review, then store it in one go.

Public entry points: ``preview_roster`` (the browser's confirm step), ``review_roster`` (the dry run: what
an import would accept and reject, storing nothing), ``import_roster`` (CLI and upload) and
``rejected_rows_csv``. Reading is in :mod:`app.intake.readers`, header finding in :mod:`app.intake.headers`,
roles in :mod:`app.intake.roles`, dates in :mod:`app.intake.dates`, row checks in
:mod:`app.intake.validation`.
"""

from __future__ import annotations

import hashlib
import re
from collections import Counter
from dataclasses import dataclass, field
from datetime import date
from typing import Any

from app.intake.announced import NOTICE_RULE, KeptWithWarning
from app.intake.codes import CodeGroup
from app.intake.dates import date_rule, fiscal_rule
from app.intake.in_post import is_still_in_post
from app.intake.rawtable import DEFAULT_LIMITS, RawTable, ReadLimits, RosterFileError, looks_like_data
from app.intake.readers import read_table
from app.intake.refresh import diff_versions
from app.intake.roles import HEADER_WORDS, ROLE_LABELS, RoleGuess, detect_roles, missing_roles, resolve_roles
from app.intake.spreadsheet_safety import safe_csv
from app.intake.validation import (
    DATE_ORDERS,
    ROLE_SAMPLE,
    Checked,
    DateOrder,
    check_rows,
    validate,
)
from app.store import RejectedRow, Roster, Store, StoreError
from app.store.records import check_name
from app.types import check_choice

__all__ = [
    "DATE_ORDERS", "HEADER_WORDS", "ROLE_LABELS", "DateOrder", "DuplicateRosterError", "ImportReport",
    "NoValidRowsError", "ReadLimits", "RejectGroup", "Review", "RosterFileError", "RosterPreview",
    "detect_roles", "group_rejections", "import_roster", "is_still_in_post", "preview_roster", "rejected_rows_csv",
    "review_roster", "validate",
]


class DuplicateRosterError(RosterFileError):
    """The same file (same SHA-256) was imported before."""

    def __init__(self, existing: Roster) -> None:
        self.existing = existing
        super().__init__(
            f"This file was already imported as roster {existing.name!r} on {existing.imported_at}; "
            "import it again only if you mean to keep two copies."
        )


class NoValidRowsError(RosterFileError):
    """Every data row was rejected; nothing is stored, but the reasons travel with the error."""

    def __init__(self, rejected: list[RejectedRow]) -> None:
        self.rejected = rejected
        first = rejected[0]
        what = "The only data row was" if len(rejected) == 1 else f"All {len(rejected):,} data rows were"
        super().__init__(
            f"{what} rejected, so nothing was imported (first: line {first.line}: {first.reason})."
        )


@dataclass(frozen=True)
class RosterPreview:
    """What the browser shows before an import is confirmed."""

    headers: tuple[str, ...]
    roles: dict[str, str]
    missing_roles: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    encoding: str | None
    delimiter: str | None
    sheet: str | None
    sheets: tuple[str, ...]
    messages: tuple[str, ...]
    header_row: int = 1
    header_why: str = ""
    guesses: dict[str, RoleGuess] = field(default_factory=dict)


@dataclass(frozen=True)
class RejectGroup:
    """Rejected rows sharing one reason (values left out), with how many and two examples."""

    reason: str
    count: int
    examples: tuple[RejectedRow, ...]


_VALUES = re.compile(r"'[^']*'|\"[^\"]*\"|-?\d[\d,.:/-]*")


def group_rejections(rows: list[RejectedRow], examples: int = 2) -> list[RejectGroup]:
    """Rejected rows grouped by their reason with the quoted values and numbers left out, largest first."""
    by: dict[str, list[RejectedRow]] = {}
    for r in rows:
        by.setdefault(_VALUES.sub("…", r.reason), []).append(r)
    return sorted((RejectGroup(k, len(v), tuple(v[:examples])) for k, v in by.items()), key=lambda g: -g.count)


@dataclass(frozen=True)
class Review:
    """The dry run shown after the column step and by ``helmshift import --dry-run``: nothing is stored."""

    header_row: int
    rows: int
    accepted: int
    rejected: int
    duplicates: int
    still_in_post: int
    blank_rows: int
    footer_lines: tuple[int, ...]
    skipped_above: tuple[int, ...]
    rejected_groups: tuple[RejectGroup, ...]
    code_groups: tuple[CodeGroup, ...]
    fixes: tuple[str, ...]
    roles: dict[str, str]
    guesses: dict[str, RoleGuess]
    date_rule: str
    fy_end: int
    messages: tuple[str, ...]
    #: the file's header names (what an intake profile recognises a source by)
    headers: tuple[str, ...] = ()
    #: accepted rows that lost a field (an announcement date unreadable or after the exit), with their lines
    kept_with_warnings: tuple[KeptWithWarning, ...] = ()

    def as_dict(self) -> dict[str, Any]:
        return {
            "dry_run": True, "header_row": self.header_row, "rows": self.rows, "accepted": self.accepted,
            "rejected": self.rejected, "duplicates": self.duplicates, "still_in_post": self.still_in_post,
            "blank_rows": self.blank_rows, "footer_lines": list(self.footer_lines),
            "lines_above_header": list(self.skipped_above),
            "rejected_groups": [{"reason": g.reason, "count": g.count,
                                 "examples": [{"line": e.line, "reason": e.reason} for e in g.examples]}
                                for g in self.rejected_groups],
            "codes_with_variants": [{"code": g.code, "count": g.count,
                                     "variants": [{"spelling": s, "count": n} for s, n in g.variants]}
                                    for g in self.code_groups],
            "fixes": list(self.fixes), "roles": self.roles,
            "role_guesses": {r: {"column": g.header, "confidence": g.confidence, "why": g.why}
                             for r, g in self.guesses.items()},
            "date_rule": self.date_rule, "fiscal_year_end": self.fy_end, "messages": list(self.messages),
            "kept_with_warnings": [{"reason": w.reason, "count": w.count, "lines": list(w.lines)}
                                   for w in self.kept_with_warnings],
        }


@dataclass(frozen=True)
class ImportReport:
    """The outcome of one import; ``rows`` = accepted + rejected + duplicates (blank lines excluded)."""

    roster: Roster
    rows: int
    accepted: int
    rejected: int
    duplicates: int
    roles: dict[str, str]
    encoding: str | None
    delimiter: str | None
    sheet: str | None
    messages: tuple[str, ...]
    rejected_rows: tuple[RejectedRow, ...]
    header_row: int = 1
    review: Review | None = None
    #: the version stored (1 for a new roster) and what changed from the version before it
    version: int = 1
    added: int = 0
    removed: int = 0
    changed: int = 0
    #: the file's header names (what an intake profile recognises a source by)
    headers: tuple[str, ...] = ()

    def as_dict(self) -> dict[str, Any]:
        """The JSON shape of ``helmshift import --json``."""
        return {
            "roster": self.roster.name, "roster_id": self.roster.id, "version": self.version,
            "added": self.added, "removed": self.removed, "changed": self.changed, "rows": self.rows,
            "accepted": self.accepted, "rejected": self.rejected, "duplicates": self.duplicates,
            "roles": self.roles, "encoding": self.encoding, "delimiter": self.delimiter,
            "sheet": self.sheet, "header_row": self.header_row, "messages": list(self.messages),
        }


def _sample(table: RawTable) -> dict[str, list[str]]:
    rows = table.rows[:ROLE_SAMPLE]
    return {h: [r[i] for r in rows] for i, h in enumerate(table.headers)}


def _max_year(today: date | None) -> int:
    return (today or date.today()).year + 1


def _check_fy_end(fy_end: int) -> None:
    if not isinstance(fy_end, int) or not 1 <= fy_end <= 12:
        raise RosterFileError(f"The fiscal-year end must be a month number 1..12; got {fy_end!r}.")


def preview_roster(
    data: bytes, filename: str, *, encoding: str | None = None, sheet: str | None = None,
    roles: dict[str, str] | None = None, rows: int = 10, limits: ReadLimits = DEFAULT_LIMITS,
    header_row: int | None = None,
) -> RosterPreview:
    """Header row, detected roles and the first ``rows`` data rows, for the confirm step before import.

    Missing required roles are listed, not raised: the analyst chooses them on the next screen.
    """
    table = read_table(data, filename, encoding=encoding, sheet=sheet, limits=limits,
                       max_rows=max(rows, ROLE_SAMPLE), header_row=header_row)
    resolved, notes, guesses = resolve_roles(table.headers, roles, _sample(table), max_year=_max_year(None))
    return RosterPreview(
        headers=tuple(table.headers), roles=resolved, missing_roles=tuple(missing_roles(resolved)),
        rows=tuple(tuple(r) for r in table.rows[:rows]), encoding=table.encoding,
        delimiter=table.delimiter, sheet=table.sheet, sheets=table.sheets,
        messages=tuple(table.messages + notes), header_row=table.header_line, header_why=table.header_why,
        guesses=guesses,
    )


def default_roster_name(store: Store, filename: str) -> str:
    """The file's stem, cleaned of control characters and made unique ("name (2)"); a label, never a path."""
    base = re.split(r"[\\/]", filename)[-1]
    stem = base.rsplit(".", 1)[0] if "." in base.strip(".") else base
    stem = re.sub(r"[\x00-\x1f\x7f]", "", stem).strip()[:80] or "roster"
    name, n = stem, 2
    while store.roster_name_taken(name):
        name, n = f"{stem} ({n})", n + 1
    return name


def file_fingerprint(data: bytes) -> str:
    """sha256 of the uploaded bytes: how a re-import of the same file is recognised."""
    return hashlib.sha256(data).hexdigest()


def same_file_roster(store: Store, data: bytes) -> Roster | None:
    """The roster already imported from exactly these bytes, if any."""
    return store.find_roster_by_sha(file_fingerprint(data))


@dataclass
class _Prepared:
    table: RawTable
    roles: dict[str, str]
    notes: list[str]
    guesses: dict[str, RoleGuess]
    checked: Checked


def _prepare(
    data: bytes, filename: str, *, roles: dict[str, str] | None, encoding: str | None, sheet: str | None,
    header_row: int | None, date_order: DateOrder, fy_end: int, limits: ReadLimits, today: date | None,
    prior_roles: dict[str, str] | None = None,
) -> _Prepared:
    check_choice(date_order, DATE_ORDERS, "date_order")
    _check_fy_end(fy_end)
    table = read_table(data, filename, encoding=encoding, sheet=sheet, limits=limits, header_row=header_row,
                       columnar=True)
    if not roles and prior_roles and set(prior_roles.values()) <= set(table.headers):
        # a refresh whose file has the same headers keeps the roles the roster was imported with
        roles = dict(prior_roles)
    resolved, notes, guesses = resolve_roles(table.headers, roles, _sample(table), max_year=_max_year(today))
    missing = missing_roles(resolved)
    if missing and not resolved and any(looks_like_data(h) for h in table.headers):
        raise RosterFileError(
            f"The header row (line {table.header_line}) looks like data, not column names "
            f"({', '.join(table.headers[:4])}, ...); add a header row naming each column."
        )
    if missing:
        raise RosterFileError(
            f"No column was found for the {' and the '.join(missing)}; the headers are: "
            f"{', '.join(table.headers)} (line {table.header_line}); choose the columns explicitly."
        )
    if not table.rows and not table.bad_rows:
        raise RosterFileError(f"The file has a header row (line {table.header_line}) but no data rows.")
    # the rows live on as typed records: their text is let go during validation
    checked = check_rows(table, resolved, date_order=date_order, limits=limits, today=today, fy_end=fy_end,
                         release_rows=True, lazy_raw=True)
    return _Prepared(table, resolved, notes, guesses, checked)


def _fixes(p: _Prepared, groups: list[RejectGroup], date_order: DateOrder) -> list[str]:
    fixes: list[str] = []
    c = p.checked
    if c.other_order_rescues:
        fixes.append(f"Read dates as {c.other_order}: {c.other_order_rescues:,} rejected row(s) would be accepted"
                     + (" (the reading now is automatic)." if date_order == "auto" else "."))
    total = len(c.records) + len(c.rejected)
    if total and len(c.rejected) > total / 2:
        fixes.append(f"Most rows were rejected: check the header row (line {p.table.header_line} was used) "
                     "and the column roles.")
    if any("missing year and date" in g.reason for g in groups) and "date" in p.roles and "year" not in p.roles:
        fixes.append("Rows with no date are rejected unless the reason says the executive is still in post; "
                     "a year column, if the file has one, can be chosen as the fiscal year.")
    kinds = Counter("date" in g.reason for g in groups)
    if kinds[True] and not c.other_order_rescues:
        fixes.append("Dates not read are listed with their values; month-year text and bare years are "
                     "already read, so these need correcting in the file.")
    return fixes


def _review(p: _Prepared, date_order: DateOrder, fy_end: int) -> Review:
    c, t = p.checked, p.table
    groups = group_rejections(c.rejected)
    label = c.order_label or ("day/month/year" if date_order != "mdy" else "month/day/year")
    return Review(
        header_row=t.header_line, rows=len(c.records) + len(c.rejected) + c.duplicates,
        accepted=len(c.records), rejected=len(c.rejected), duplicates=c.duplicates, still_in_post=c.still_in_post,
        blank_rows=t.blank_rows, footer_lines=tuple(t.footer_lines), skipped_above=tuple(t.skipped_above),
        rejected_groups=tuple(groups), code_groups=tuple(c.code_groups), fixes=tuple(_fixes(p, groups, date_order)),
        roles=p.roles, guesses=p.guesses,
        date_rule=(date_rule(label, fy_end) if "date" in p.roles else fiscal_rule(fy_end)) + (
            " " + NOTICE_RULE if "announced" in p.roles else ""),
        fy_end=fy_end, messages=tuple(t.messages + p.notes + c.messages), headers=tuple(t.headers),
        kept_with_warnings=tuple(c.kept_with_warnings),
    )


def review_roster(
    data: bytes, filename: str, *, roles: dict[str, str] | None = None, encoding: str | None = None,
    sheet: str | None = None, header_row: int | None = None, date_order: DateOrder = "auto", fy_end: int = 12,
    limits: ReadLimits = DEFAULT_LIMITS, today: date | None = None,
) -> Review:
    """What importing would do (accepted, rejected by reason, duplicates, still in post, fixes); stores nothing."""
    p = _prepare(data, filename, roles=roles, encoding=encoding, sheet=sheet, header_row=header_row,
                 date_order=date_order, fy_end=fy_end, limits=limits, today=today)
    return _review(p, date_order, fy_end)


def import_roster(
    store: Store, data: bytes, filename: str, *, name: str | None = None,
    roles: dict[str, str] | None = None, encoding: str | None = None, sheet: str | None = None,
    date_order: DateOrder = "auto", allow_same_file: bool = False, limits: ReadLimits = DEFAULT_LIMITS,
    today: date | None = None, header_row: int | None = None, fy_end: int = 12, into: int | str | None = None,
) -> ImportReport:
    """Read, validate and store a roster; all rows land in one transaction or none do.

    ``into`` (a roster id or name) stores the file as that roster's next version instead of a new roster
    (a refresh); the report then says what was added, removed and changed since the version before
    (:mod:`app.intake.refresh`). Without column roles, a refresh whose file has the same headers keeps the
    roles the roster was imported with.

    ``filename`` is a label only (default roster name, stored as the source name), never a path.
    Raises ``RosterFileError`` for a file that cannot be imported as a whole and
    ``DuplicateRosterError`` when the same bytes were imported before (unless ``allow_same_file``).
    """
    check_choice(date_order, DATE_ORDERS, "date_order")
    sha = file_fingerprint(data)
    target: Roster | None = None
    if into is not None:
        try:
            target = store.get_roster(into)
        except StoreError as exc:
            raise RosterFileError(f"Cannot add a version: {exc}") from None
    existing = store.find_roster_by_sha(sha)
    if existing is not None and target is not None and existing.id == target.id:
        raise RosterFileError(f"This file is already version {existing.version} of roster {target.name!r}; "
                              "nothing was added.")
    if existing is not None and not allow_same_file:
        raise DuplicateRosterError(existing)
    if target is None and name:
        try:
            check_name(name, "roster name")
        except StoreError as exc:
            raise RosterFileError(str(exc)) from None
    if target is None and name is not None and store.roster_name_taken(name):
        raise RosterFileError(f"A roster named {name!r} already exists; choose another name.")
    p = _prepare(data, filename, roles=roles, encoding=encoding, sheet=sheet, header_row=header_row,
                 date_order=date_order, fy_end=fy_end, limits=limits, today=today,
                 prior_roles=target.columns if target is not None else None)
    c, table = p.checked, p.table
    if c.records.empty and c.rejected:
        raise NoValidRowsError(c.rejected)
    roster = store.save_import(
        name=target.name if target else name or default_roster_name(store, filename), source_name=filename,
        sha256=sha, rows_total=len(c.records) + len(c.rejected) + c.duplicates, duplicates=c.duplicates,
        columns=p.roles, records=c.records, rejected=c.rejected, into=target.id if target else None,
        raw=c.raw_cells,
    )
    added, removed, changed = roster.accepted, 0, 0
    if roster.version > 1:
        diff = diff_versions(store, roster.id, roster.version - 1, roster.version, limit=0)
        added, removed, changed = diff.added, diff.removed, diff.changed
    return ImportReport(
        roster=roster, rows=roster.rows_total, accepted=roster.accepted, rejected=roster.rejected,
        duplicates=c.duplicates, roles=p.roles, encoding=table.encoding, delimiter=table.delimiter,
        sheet=table.sheet, messages=tuple(table.messages + p.notes + c.messages), rejected_rows=tuple(c.rejected),
        header_row=table.header_line, review=_review(p, date_order, fy_end), version=roster.version,
        added=added, removed=removed, changed=changed, headers=tuple(table.headers),
    )


def rejected_rows_csv(rows: list[RejectedRow]) -> str:
    """The rejected rows as CSV (line, reason, raw) with formula injection neutralised."""
    return safe_csv(((r.line, r.reason, r.raw) for r in rows), ("line", "reason", "raw"))
