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
from dataclasses import dataclass
from datetime import date
from typing import Any, Literal, get_args

import pandas as pd

from app.readers import (
    DATE_FORMATS,
    DEFAULT_LIMITS,
    RawTable,
    ReadLimits,
    RosterFileError,
    parse_dates,
    read_table,
)
from app.spreadsheet_safety import safe_csv
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
        super().__init__(
            f"All {len(rejected):,} data rows were rejected, so nothing was imported "
            f"(first: line {first.line}: {first.reason})."
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


def _default_name(store: Store, filename: str) -> str:
    base = re.split(r"[\\/]", filename)[-1]
    stem = base.rsplit(".", 1)[0] if "." in base.strip(".") else base
    stem = re.sub(r"[\x00-\x1f\x7f]", "", stem).strip()[:80] or "roster"
    name, n = stem, 2
    while store.roster_name_taken(name):
        name, n = f"{stem} ({n})", n + 1
    return name


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
    sha = hashlib.sha256(data).hexdigest()
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
        name=name or _default_name(store, filename), source_name=filename, sha256=sha,
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
class _Problems:
    """Collects reasons per row index; masks are mostly false, so only hits cost Python time."""

    def __init__(self) -> None:
        self.by_row: dict[int, list[str]] = {}

    def add(self, mask: pd.Series, message: str | pd.Series) -> None:
        hits = mask.to_numpy(dtype=bool, na_value=False).nonzero()[0]
        for pos in hits:
            text = message if isinstance(message, str) else str(message.iloc[pos])
            self.by_row.setdefault(int(pos), []).append(text)


def _numbers(s: pd.Series) -> pd.Series:
    # "3,5" is a decimal comma (semicolon-delimited European exports), not a thousands separator
    fixed = s.where(~s.str.fullmatch(r"-?\d+,\d+"), s.str.replace(",", ".", regex=False))
    num = pd.to_numeric(fixed.where(fixed != ""), errors="coerce").astype("float64")
    return num.where(num.abs() != float("inf"))


def validate(
    table: RawTable, roles: dict[str, str], *, date_order: DateOrder = "auto",
    limits: ReadLimits = DEFAULT_LIMITS, today: date | None = None,
) -> tuple[pd.DataFrame, list[RejectedRow], int, list[str]]:
    """Split ``table`` into accepted records (``DEPARTURE_FIELDS``), rejected rows, a duplicate count
    and messages."""
    max_year = (today or date.today()).year + 1
    frame = pd.DataFrame(table.rows, columns=table.headers, dtype=object).astype(str)
    lines = pd.Series(table.lines, dtype="int64")
    dup = frame.duplicated(keep="first")
    duplicates = int(dup.sum())
    if duplicates:
        frame, lines = frame[~dup].reset_index(drop=True), lines[~dup].reset_index(drop=True)
    messages: list[str] = []
    if duplicates:
        messages.append(f"{duplicates:,} exact duplicate row(s) were counted and stored once.")
    if table.blank_rows:
        messages.append(f"{table.blank_rows:,} blank row(s) were skipped.")
    p = _Problems()
    for col in frame.columns:
        s = frame[col]
        p.add(s.str.contains("\x00", regex=False), f"NUL byte in column {col!r}")
        length = s.str.len()
        p.add(length > limits.max_cell_chars,
              length.map(lambda n, c=col: f"cell in column {c!r} has {n:,} characters "
                         f"(limit {limits.max_cell_chars:,})"))
    stripped = {role: frame[h].str.strip() for role, h in roles.items()}
    header_norm = [h.strip().lower() for h in table.headers]
    repeats_header = (frame.apply(lambda c: c.str.strip().str.lower()) == header_norm).all(axis=1)
    p.add(stripped["firm_id"] == "", f"missing firm id (column {roles['firm_id']!r} is empty)")
    reason = stripped["reason"]
    p.add(reason == "", f"missing reason code (column {roles['reason']!r} is empty)")

    year = pd.Series(float("nan"), index=frame.index)
    if "year" in roles:
        ys = stripped["year"].str.replace(r"^FY\s*", "", case=False, regex=True)
        ok = ys.str.fullmatch(r"\d{1,4}(?:\.0+)?")
        year = pd.to_numeric(ys.where(ok), errors="coerce").astype("float64")
        bad = (ys != "") & ~ok
        p.add(bad, "year " + stripped["year"].map(repr) + " is not a whole number")
        p.add((year < 1900) | (year > max_year),
              "year " + year.map(lambda v: f"{v:.0f}") + f" is outside 1900..{max_year}")
    iso = pd.Series(None, index=frame.index, dtype=object)
    date_year = pd.Series(float("nan"), index=frame.index)
    if "date" in roles:
        parsed = parse_dates(stripped["date"], date_order, max_year=max_year)
        iso, date_year = parsed.iso, parsed.year
        raw_date = stripped["date"].map(repr)
        p.add(parsed.status == "unparseable",
              "unparseable date " + raw_date + f"; expected {DATE_FORMATS}")
        p.add(parsed.status == "impossible",
              "impossible date " + raw_date + f" (no such day when read as {parsed.order_label})")
        p.add(parsed.status == "out_of_range", "date " + raw_date + f" is outside 1900..{max_year}")
        if parsed.message:
            messages.append(f"Dates in column {roles['date']!r}: {parsed.message}")
        both = year.notna() & date_year.notna()
        p.add(both & ((year - date_year).abs() > 1),
              "year " + year.map(lambda v: f"{v:.0f}") + " and date " + iso.astype(str)
              + " disagree by more than one year")
    no_when = (stripped["year"] == "" if "year" in roles else True) & (
        stripped["date"] == "" if "date" in roles else True)
    no_when = pd.Series(no_when, index=frame.index, dtype=bool)
    serving = reason.map(is_still_in_post)
    p.add(no_when & serving, "still-in-post record has no year (and no departure date to take it from)")
    p.add(no_when & ~serving, "missing year and date (a fiscal year or a departure date is needed)")

    num: dict[str, pd.Series] = {}
    for role in ("age", "tenure"):
        if role not in roles:
            num[role] = pd.Series(float("nan"), index=frame.index)
            continue
        s = stripped[role]
        num[role] = v = _numbers(s)
        p.add((s != "") & v.isna(), f"{role} " + s.map(repr) + " is not a number")
        p.add(v < 0, f"negative {role} " + s)
    if "age" in roles:
        a = num["age"]
        p.add((a >= 0) & ((a < 14) | (a > 110)), "age " + stripped["age"] + " is outside 14..110")
    interim = pd.Series(None, index=frame.index, dtype=object)
    if "interim" in roles:
        low = stripped["interim"].str.lower()
        interim = low.map(_INTERIM_VALUES).astype(object)
        p.add((low != "") & interim.isna(), "interim flag " + stripped["interim"].map(repr)
              + " not recognised; use yes/no, true/false, 1/0, y/n or leave it blank")

    for pos in repeats_header.to_numpy().nonzero()[0]:
        p.by_row[int(pos)] = ["repeats the header row (were two files joined together?)"]
    raw = [json.dumps(dict(zip(table.headers, row, strict=True)), ensure_ascii=False)
           for row in frame.itertuples(index=False, name=None)]
    rejected = [RejectedRow(line=int(lines.iloc[i]), raw=raw[i], reason="; ".join(msgs))
                for i, msgs in p.by_row.items()]
    rejected = sorted(table.bad_rows + rejected, key=lambda r: r.line)
    keep = pd.Series(True, index=frame.index)
    keep.iloc[list(p.by_row)] = False

    def text(role: str) -> pd.Series:
        if role not in roles:
            return pd.Series(None, index=frame.index, dtype=object)
        s = stripped[role].astype(object)
        return s.where(s != "", None)

    records = pd.DataFrame({
        "line": lines, "firm_id": stripped["firm_id"].astype(object), "firm_name": text("firm_name"),
        "sector": text("sector"), "year": year.fillna(date_year), "date": iso,
        "reason": reason.astype(object), "executive": text("executive"), "age": num["age"],
        "tenure": num["tenure"], "interim": interim, "notes": text("notes"),
        "raw": pd.Series(raw, index=frame.index, dtype=object),
    })[keep].reset_index(drop=True)
    records["year"] = records["year"].astype("int64")
    return records, rejected, duplicates, messages
