"""Import a roster: read it, find which column holds each role, validate and store it in one go.

Public entry points: ``preview_roster`` (the browser's confirm step), ``import_roster`` (CLI and
upload) and ``rejected_rows_csv`` (the download of rejected rows). Validation is vectorised with
pandas; each rejected row keeps its 1-based source line number (the header is line 1 of a CSV, a
quoted cell spanning lines counts every physical line; for XLSX it is the Excel row number).

Fiscal year: when a roster has no year column, a departure's fiscal year is the calendar year of
its departure date. Rosters whose fiscal years do not follow calendar years should carry a year
column; where both are given they may differ by at most one year (fiscal years that end in a
different calendar year), beyond that the row is rejected.
"""

from __future__ import annotations

import hashlib
import json
import re
from collections.abc import Callable
from dataclasses import dataclass
from datetime import date
from json.encoder import encode_basestring
from typing import Any, Literal, get_args

import numpy as np
import pandas as pd

from app.intake.readers import (
    DATE_FORMATS,
    DEFAULT_LIMITS,
    RawTable,
    ReadLimits,
    RosterFileError,
    parse_dates,
    read_table,
)
from app.intake.spreadsheet_safety import safe_csv
from app.store import RejectedRow, Roster, Store
from app.types import REQUIRED_ROLES, ROLES, check_choice

__all__ = [
    "DateOrder", "DuplicateRosterError", "ImportReport", "NoValidRowsError", "ReadLimits", "RosterFileError", "RosterPreview",
    "detect_roles", "import_roster", "is_still_in_post", "preview_roster", "rejected_rows_csv",
]

DateOrder = Literal["auto", "dmy", "mdy"]
DATE_ORDERS: tuple[DateOrder, ...] = get_args(DateOrder)

ROLE_LABELS = {
    "firm_id": "firm id", "firm_name": "firm name", "sector": "sector", "year": "fiscal year",
    "date": "departure date", "reason": "reason code", "executive": "executive", "age": "age",
    "tenure": "tenure", "interim": "interim flag", "notes": "notes",
}

# Header words per role, compared after lower-casing and dropping everything but letters and digits
# ("Interim?" -> "interim", "Age at Exit" -> "ageatexit"). Common practice in roster spreadsheets.
HEADER_WORDS: dict[str, tuple[str, ...]] = {
    "firm_id": ("firmid", "issuercode", "issuerid", "companyid", "companycode", "firmcode", "ticker",
                "tickersymbol", "symbol", "isin", "permid", "entityid", "id", "code"),
    "firm_name": ("firmname", "firm", "company", "companyname", "issuername", "issuer", "entityname",
                  "organisation", "organization"),
    "sector": ("sector", "industry", "industrygroup", "sectorname", "industryname", "industrysector"),
    "year": ("year", "fy", "fiscalyear", "financialyear", "fyear", "exityear", "departureyear",
             "yearofdeparture", "yearofexit", "turnoveryear"),
    "date": ("date", "exitdate", "departuredate", "dateofdeparture", "dateofexit", "leavedate",
             "leavingdate", "dateleft", "enddate", "separationdate", "turnoverdate"),
    "reason": ("reason", "reasoncode", "exitreason", "departurereason", "reasonfordeparture",
               "reasonforleaving", "exitcode", "departurecode", "departuretype", "exittype", "turnovertype"),
    "executive": ("executive", "ceo", "name", "executivename", "ceoname", "person", "leader"),
    "age": ("age", "ageatexit", "ageatdeparture", "ceoage", "ageatleaving", "exitage"),
    "tenure": ("tenure", "yearsinrole", "tenureyears", "yearsinoffice", "yearsinpost", "tenureinyears",
               "yearsasceo"),
    "interim": ("interim", "isinterim", "interimflag", "acting", "actingceo", "interimceo"),
    "notes": ("notes", "note", "comment", "comments", "remarks", "remark", "details"),
}

_STILL_IN_POST = re.compile(
    r"still\s+(?:in\s+(?:post|office|role)|serving|there)|incumbent|\bserving\b|\bin\s+(?:office|post)\b"
    r"|currently\s+(?:ceo|in)",
    re.IGNORECASE,
)
_DATA_LIKE = re.compile(r"[-+]?\d[\d.,/: -]*")
_INTERIM_VALUES = {"yes": True, "y": True, "true": True, "1": True, "no": False, "n": False,
                   "false": False, "0": False}


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

    def as_dict(self) -> dict[str, Any]:
        """The JSON shape of ``helmshift import --json``."""
        return {
            "roster": self.roster.name, "roster_id": self.roster.id, "rows": self.rows,
            "accepted": self.accepted, "rejected": self.rejected, "duplicates": self.duplicates,
            "roles": self.roles, "encoding": self.encoding, "delimiter": self.delimiter,
            "sheet": self.sheet, "messages": list(self.messages),
        }


def is_still_in_post(reason: str) -> bool:
    """True when a reason code says the executive has not left ("still in post", "incumbent", ...)."""
    return bool(_STILL_IN_POST.search(reason))


def _norm(header: str) -> str:
    return re.sub(r"[^0-9a-z]", "", header.lower())


def detect_roles(headers: list[str] | tuple[str, ...]) -> tuple[dict[str, str], list[str]]:
    """Guess role -> header from header words; also return notes about ambiguous guesses."""
    found: dict[str, list[str]] = {}
    for h in headers:
        key = _norm(h)
        bare = _norm(re.sub(r"\(.*?\)|\[.*?\]", "", h))  # "Exit Date (dd/mm/yyyy)" -> "exitdate"
        for role, words in HEADER_WORDS.items():
            if key in words or bare in words:
                found.setdefault(role, []).append(h)
                break
    roles: dict[str, str] = {}
    notes: list[str] = []
    for role in ROLES:
        cands = found.get(role, [])
        if cands:
            roles[role] = cands[0]
        if len(cands) > 1:
            notes.append(f"Several columns look like the {ROLE_LABELS[role]} ({', '.join(cands)}); "
                         f"using {cands[0]!r}; choose another explicitly if that is wrong.")
    return roles, notes


def _resolve_roles(headers: list[str], explicit: dict[str, str] | None) -> tuple[dict[str, str], list[str]]:
    roles, notes = detect_roles(headers)
    if not explicit:
        return roles, notes
    by_norm = {_norm(h): h for h in headers}
    for role, header in explicit.items():
        if role not in ROLES:
            raise RosterFileError(f"Unknown role {role!r}; roles are: {', '.join(ROLES)}.")
        if not header:
            roles.pop(role, None)  # an empty choice means "this roster has no such column"
            continue
        actual = header if header in headers else by_norm.get(_norm(header))
        if actual is None:
            raise RosterFileError(
                f"No column {header!r} (asked for the {ROLE_LABELS[role]}); the headers are: {', '.join(headers)}."
            )
        for other, used in list(roles.items()):
            if used == actual and other != role:
                if other in explicit and explicit[other]:
                    raise RosterFileError(f"Column {actual!r} cannot be both the {ROLE_LABELS[other]} "
                                          f"and the {ROLE_LABELS[role]}.")
                del roles[other]
        roles[role] = actual
    return {r: roles[r] for r in ROLES if r in roles}, notes


def _missing(roles: dict[str, str]) -> list[str]:
    missing = [ROLE_LABELS[r] for r in REQUIRED_ROLES if r not in roles]
    if "year" not in roles and "date" not in roles:
        missing.append("fiscal year or departure date")
    return missing


def preview_roster(
    data: bytes, filename: str, *, encoding: str | None = None, sheet: str | None = None,
    roles: dict[str, str] | None = None, rows: int = 10, limits: ReadLimits = DEFAULT_LIMITS,
) -> RosterPreview:
    """Headers, detected roles and the first ``rows`` data rows, for the confirm step before import.

    Missing required roles are listed, not raised: the analyst chooses them on the next screen.
    """
    table = read_table(data, filename, encoding=encoding, sheet=sheet, limits=limits, max_rows=rows)
    resolved, notes = _resolve_roles(table.headers, roles)
    return RosterPreview(
        headers=tuple(table.headers), roles=resolved, missing_roles=tuple(_missing(resolved)),
        rows=tuple(tuple(r) for r in table.rows[:rows]), encoding=table.encoding,
        delimiter=table.delimiter, sheet=table.sheet, sheets=table.sheets,
        messages=tuple(table.messages + notes),
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


def import_roster(
    store: Store, data: bytes, filename: str, *, name: str | None = None,
    roles: dict[str, str] | None = None, encoding: str | None = None, sheet: str | None = None,
    date_order: DateOrder = "auto", allow_same_file: bool = False, limits: ReadLimits = DEFAULT_LIMITS,
    today: date | None = None,
) -> ImportReport:
    """Read, validate and store a roster; all rows land in one transaction or none do.

    ``filename`` is a label only (default roster name, stored as the source name), never a path.
    Raises ``RosterFileError`` for a file that cannot be imported as a whole and
    ``DuplicateRosterError`` when the same bytes were imported before (unless ``allow_same_file``).
    """
    check_choice(date_order, DATE_ORDERS, "date_order")
    sha = file_fingerprint(data)
    if not allow_same_file:
        existing = store.find_roster_by_sha(sha)
        if existing is not None:
            raise DuplicateRosterError(existing)
    if name is not None and store.roster_name_taken(name):
        raise RosterFileError(f"A roster named {name!r} already exists; choose another name.")
    table = read_table(data, filename, encoding=encoding, sheet=sheet, limits=limits)
    resolved, notes = _resolve_roles(table.headers, roles)
    missing = _missing(resolved)
    if missing and not resolved and any(_DATA_LIKE.fullmatch(h) for h in table.headers):
        raise RosterFileError(
            f"The first row (line {table.header_line}) looks like data, not column names "
            f"({', '.join(table.headers[:4])}, ...); add a header row naming each column."
        )
    if missing:
        raise RosterFileError(
            f"No column was found for the {' and the '.join(missing)}; the headers are: "
            f"{', '.join(table.headers)}; choose the columns explicitly."
        )
    if not table.rows and not table.bad_rows:
        raise RosterFileError(f"The file has a header row (line {table.header_line}) but no data rows.")
    records, rejected, duplicates, messages = validate(table, resolved, date_order=date_order,
                                                       limits=limits, today=today)
    if records.empty and rejected:
        raise NoValidRowsError(rejected)
    roster = store.save_import(
        name=name or default_roster_name(store, filename), source_name=filename, sha256=sha,
        rows_total=len(records) + len(rejected) + duplicates, duplicates=duplicates, columns=resolved,
        records=records, rejected=rejected,
    )
    return ImportReport(
        roster=roster, rows=roster.rows_total, accepted=roster.accepted, rejected=roster.rejected,
        duplicates=duplicates, roles=resolved, encoding=table.encoding, delimiter=table.delimiter,
        sheet=table.sheet, messages=tuple(table.messages + notes + messages), rejected_rows=tuple(rejected),
    )


def rejected_rows_csv(rows: list[RejectedRow]) -> str:
    """The rejected rows as CSV (line, reason, raw) with formula injection neutralised."""
    return safe_csv(((r.line, r.reason, r.raw) for r in rows), ("line", "reason", "raw"))


# -- validation ----------------------------------------------------------------------------------
# Speed: a 100,000-row roster has few distinct values per typed column (years, dates, ages, flags), so
# each typed column is factorised once and parsed per distinct value; per-row Python work is limited
# to stripping free text, building the raw JSON, and wording the (rare) rejections.
class _Problems:
    """Reasons per row position; masks are mostly false, so only the hits cost Python time."""

    def __init__(self) -> None:
        self.by_row: dict[int, list[str]] = {}

    def add(self, mask: np.ndarray, message: str | Callable[[int], str]) -> None:
        for pos in np.flatnonzero(mask):
            text = message if isinstance(message, str) else message(int(pos))
            self.by_row.setdefault(int(pos), []).append(text)


#: roles parsed per distinct value; the free-text roles are only stripped
_TYPED_ROLES = ("year", "date", "reason", "age", "tenure", "interim")


@dataclass(frozen=True)
class _Column:
    """One column as (codes, distinct values stripped): value of row i is ``uniq[codes[i]]``."""

    codes: np.ndarray
    uniq: pd.Series

    @classmethod
    def of(cls, values: np.ndarray) -> _Column:
        codes, uniq = pd.factorize(values)
        return cls(codes, pd.Series([str(u).strip() for u in uniq], dtype=object))

    def take(self, per_value: pd.Series | np.ndarray) -> np.ndarray:
        return np.asarray(per_value)[self.codes]

    def value(self, pos: int) -> str:
        return str(self.uniq.iloc[self.codes[pos]])


def _worded(template: str, value: Callable[[int], object]) -> Callable[[int], str]:
    """A rejection message for row ``i``: ``template`` filled with ``value(i)``."""
    return lambda i: template.format(value(i))


def _numbers(s: pd.Series) -> pd.Series:
    # "3,5" is a decimal comma (semicolon-delimited European exports), not a thousands separator
    fixed = s.where(~s.str.fullmatch(r"-?\d+,\d+"), s.str.replace(",", ".", regex=False))
    num = pd.to_numeric(fixed.where(fixed != ""), errors="coerce").astype("float64")
    return num.where(num.abs() != float("inf"))


def _raw_json(headers: list[str], columns: list[np.ndarray]) -> list[str]:
    """``json.dumps(dict(zip(headers, row)), ensure_ascii=False)`` for every row, column-wise."""
    template = "{" + ", ".join(json.dumps(h, ensure_ascii=False).replace("%", "%%") + ": %s"
                               for h in headers) + "}"
    encoded = [list(map(encode_basestring, col)) for col in columns]
    return [template % r for r in zip(*encoded, strict=True)]


def validate(
    table: RawTable, roles: dict[str, str], *, date_order: DateOrder = "auto",
    limits: ReadLimits = DEFAULT_LIMITS, today: date | None = None,
) -> tuple[pd.DataFrame, list[RejectedRow], int, list[str]]:
    """Split ``table`` into accepted records (``DEPARTURE_FIELDS``), rejected rows, a duplicate count
    and messages. Exact duplicate rows are dropped before validation (counted, never rejected)."""
    max_year = (today or date.today()).year + 1
    messages: list[str] = []
    total = len(table.rows)
    columns = ([np.array(c, dtype=object) for c in zip(*table.rows, strict=True)] if total
               else [np.empty(0, dtype=object) for _ in table.headers])
    # the raw JSON is needed for every row anyway, and equal rows give equal JSON: hashing these
    # strings finds exact duplicates more cheaply than hashing row tuples
    raw_all = _raw_json(table.headers, columns)
    # first occurrence of each distinct row: filling the dict from the end leaves the earliest index
    first_seen = dict(zip(reversed(raw_all), range(total - 1, -1, -1), strict=True))
    duplicates = total - len(first_seen)
    lines = np.array(table.lines, dtype=np.int64)
    if duplicates:
        kept = np.array(sorted(first_seen.values()), dtype=np.int64)
        columns, lines = [c[kept] for c in columns], lines[kept]
        raw = [raw_all[i] for i in kept]
        messages.append(f"{duplicates:,} exact duplicate row(s) were counted and stored once.")
    else:
        raw = raw_all
    del first_seen, raw_all
    if table.blank_rows:
        messages.append(f"{table.blank_rows:,} blank row(s) were skipped.")
    n = len(lines)
    by_header = dict(zip(table.headers, columns, strict=True))
    p = _Problems()
    for h, cells in by_header.items():
        if table.may_hold_nul and "\x00" in "".join(cells):
            p.add(np.array(["\x00" in c for c in cells]), f"NUL byte in column {h!r}")
        if n and max(map(len, cells)) > limits.max_cell_chars:
            lengths = np.fromiter(map(len, cells), dtype=np.int64, count=n)
            p.add(lengths > limits.max_cell_chars, _worded(
                f"cell in column {h!r} has {{:,}} characters (limit {limits.max_cell_chars:,})", lengths.__getitem__))
    first = table.headers[0]
    maybe_header = np.flatnonzero(np.array([c.strip() == first for c in by_header[first]], dtype=bool))
    repeats_header = [int(i) for i in maybe_header
                      if all(by_header[h][i].strip() == h for h in table.headers)]

    col = {role: _Column.of(by_header[h])
           for role, h in roles.items() if role in _TYPED_ROLES}
    firm_id = np.array([c.strip() for c in by_header[roles["firm_id"]]], dtype=object)
    p.add(firm_id == "", f"missing firm id (column {roles['firm_id']!r} is empty)")
    reason = col["reason"]
    p.add(reason.take(reason.uniq == ""), f"missing reason code (column {roles['reason']!r} is empty)")

    year = np.full(n, np.nan)
    if "year" in roles:
        c = col["year"]
        ys = c.uniq.str.replace(r"^FY\s*", "", case=False, regex=True)
        ok = ys.str.fullmatch(r"\d{1,4}(?:\.0+)?")
        year = c.take(pd.to_numeric(ys.where(ok), errors="coerce").astype("float64"))
        p.add(c.take((ys != "") & ~ok), lambda i: f"year {col['year'].value(i)!r} is not a whole number")
        p.add((year < 1900) | (year > max_year), lambda i: f"year {year[i]:.0f} is outside 1900..{max_year}")
    iso = np.full(n, None, dtype=object)
    date_year = np.full(n, np.nan)
    if "date" in roles:
        c = col["date"]
        parsed = parse_dates(c.uniq, date_order, max_year=max_year)
        iso, date_year, status = c.take(parsed.iso), c.take(parsed.year), c.take(parsed.status)
        p.add(status == "unparseable",
              lambda i: f"unparseable date {col['date'].value(i)!r}; expected {DATE_FORMATS}")
        p.add(status == "impossible", lambda i: (
            f"impossible date {col['date'].value(i)!r} (no such day when read as {parsed.order_label})"))
        p.add(status == "out_of_range", lambda i: f"date {col['date'].value(i)!r} is outside 1900..{max_year}")
        if parsed.message:
            messages.append(f"Dates in column {roles['date']!r}: {parsed.message}")
        p.add(~np.isnan(year) & ~np.isnan(date_year) & (np.abs(year - date_year) > 1),
              lambda i: f"year {year[i]:.0f} and date {iso[i]} disagree by more than one year")
    no_when = np.ones(n, dtype=bool)
    for role in ("year", "date"):
        if role in roles:
            no_when &= col[role].take(col[role].uniq == "")
    serving = reason.take(reason.uniq.map(is_still_in_post).astype(bool))
    p.add(no_when & serving, "still-in-post record has no year (and no departure date to take it from)")
    p.add(no_when & ~serving, "missing year and date (a fiscal year or a departure date is needed)")

    num: dict[str, np.ndarray] = {}
    for role in ("age", "tenure"):
        num[role] = np.full(n, np.nan)
        if role in roles:
            c = col[role]
            values = _numbers(c.uniq)
            num[role] = v = c.take(values)
            p.add(c.take((c.uniq != "") & values.isna()), _worded(role + " {!r} is not a number", c.value))
            p.add(v < 0, _worded(f"negative {role} {{}}", c.value))
    if "age" in roles:
        a = num["age"]
        p.add((a >= 0) & ((a < 14) | (a > 110)), lambda i: f"age {col['age'].value(i)} is outside 14..110")
    interim = np.full(n, None, dtype=object)
    if "interim" in roles:
        c = col["interim"]
        flags = c.uniq.str.lower().map(_INTERIM_VALUES)
        interim = c.take(flags.astype(object).where(flags.notna(), None))
        p.add(c.take((c.uniq != "") & flags.isna()), lambda i: (
            f"interim flag {col['interim'].value(i)!r} not recognised; use yes/no, true/false, 1/0, y/n "
            "or leave it blank"))
    for pos in repeats_header:
        p.by_row[pos] = ["repeats the header row (were two files joined together?)"]

    rejected = [RejectedRow(line=int(lines[i]), raw=raw[i], reason="; ".join(msgs))
                for i, msgs in p.by_row.items()]
    rejected = sorted(table.bad_rows + rejected, key=lambda r: r.line)
    keep = np.ones(n, dtype=bool)
    keep[list(p.by_row)] = False

    def text(role: str) -> np.ndarray:
        if role not in roles:
            return np.full(n, None, dtype=object)
        return np.array([c.strip() or None for c in by_header[roles[role]]], dtype=object)

    records = pd.DataFrame({
        "line": lines, "firm_id": firm_id, "firm_name": text("firm_name"), "sector": text("sector"),
        "year": np.where(np.isnan(year), date_year, year), "date": iso, "reason": reason.take(reason.uniq),
        "executive": text("executive"), "age": num["age"], "tenure": num["tenure"], "interim": interim,
        "notes": text("notes"), "raw": np.array(raw, dtype=object),
    })[keep].reset_index(drop=True)
    records["year"] = records["year"].astype("int64")
    return records, rejected, duplicates, messages
