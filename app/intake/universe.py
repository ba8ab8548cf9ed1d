"""Import a universe of firm-years for a roster: which firms were in the index in which fiscal years.

Two file shapes, told apart by the columns found: one row per firm-year (roles ``firm_id``, ``year``) or one
row per membership span (``firm_id``, ``first_year``, ``last_year``, inclusive; a blank last year means "still
in the index" and runs to the roster's last year). Reading, header finding and size limits are the roster
readers'; roles are found from header words and can be set explicitly. All rows land or none do; rejected
rows are kept with their line numbers and reasons. Without a file, :func:`derive_universe` builds spans from
the roster itself (first to last year each firm appears, still-in-post rows included): an approximation,
stored and labelled as such.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from datetime import date
from typing import Any

import numpy as np
import pandas as pd

from app.intake.ingest import NoValidRowsError, file_fingerprint
from app.intake.rawtable import shown
from app.intake.readers import DEFAULT_LIMITS, ReadLimits, RosterFileError, read_table
from app.stats.rates import expand_spans, universe_fingerprint
from app.store import RejectedRow, Store, Universe

__all__ = ["UNIVERSE_ROLES", "UniverseReport", "derive_universe", "detect_universe_roles", "import_universe"]

UNIVERSE_ROLES = ("firm_id", "year", "first_year", "last_year")
ROLE_LABELS = {"firm_id": "firm id", "year": "fiscal year", "first_year": "first year in the index",
               "last_year": "last year in the index"}

# Header words per role, compared after lower-casing and keeping only letters and digits (as for rosters).
# Common practice in index-membership spreadsheets.
HEADER_WORDS: dict[str, tuple[str, ...]] = {
    "firm_id": ("firmid", "issuercode", "issuerid", "companyid", "companycode", "firmcode", "ticker",
                "tickersymbol", "symbol", "isin", "permid", "entityid", "id", "code", "firm", "company"),
    "year": ("year", "fy", "fiscalyear", "financialyear", "fyear", "indexyear", "memberyear"),
    "first_year": ("firstyear", "fromyear", "startyear", "yearfrom", "entryyear", "yearadded", "added",
                   "joined", "from", "start", "firstfy", "fromfy", "startfy"),
    "last_year": ("lastyear", "toyear", "endyear", "yearto", "leftyear", "yearremoved", "removed", "left",
                  "to", "end", "lastfy", "tofy", "endfy"),
}


@dataclass(frozen=True)
class UniverseReport:
    """The outcome of one universe import (or derivation)."""

    universe: Universe
    years: tuple[int, int]
    rows: int
    duplicates: int
    roles: dict[str, str]
    messages: tuple[str, ...]
    rejected_rows: tuple[RejectedRow, ...]

    def as_dict(self) -> dict[str, Any]:
        """The JSON shape of ``helmshift universe import --json``."""
        u = self.universe
        return {"universe": u.id, "roster_id": u.roster_id, "source": u.source, "approximate": u.approximate,
                "shape": u.shape, "firms": u.firms, "firm_years": u.firm_years, "years": list(self.years),
                "rows": self.rows, "rejected": u.rejected, "duplicates": self.duplicates,
                "fingerprint": u.fingerprint, "columns": self.roles, "messages": list(self.messages)}


def _norm(header: str) -> str:
    return re.sub(r"[^0-9a-z]", "", header.lower())


def detect_universe_roles(headers: list[str], explicit: dict[str, str] | None = None) -> dict[str, str]:
    """Role -> header from header words, overridden by ``explicit`` (an empty header drops a role)."""
    roles: dict[str, str] = {}
    for h in headers:
        key = _norm(h)
        for role, words in HEADER_WORDS.items():
            if key in words and role not in roles:
                roles[role] = h
                break
    by_norm = {_norm(h): h for h in headers}
    for role, header in (explicit or {}).items():
        if role not in UNIVERSE_ROLES:
            raise RosterFileError(f"Unknown universe role {role!r}; roles are: {', '.join(UNIVERSE_ROLES)}.")
        if not header:
            roles.pop(role, None)
            continue
        actual = header if header in headers else by_norm.get(_norm(header))
        if actual is None:
            raise RosterFileError(f"No column {shown(header)} (asked for the {ROLE_LABELS[role]}); the headers are: "
                                  f"{', '.join(headers)}.")
        roles = {r: h for r, h in roles.items() if h != actual}
        roles[role] = actual
    return {r: roles[r] for r in UNIVERSE_ROLES if r in roles}


def _shape(roles: dict[str, str], headers: list[str]) -> str:
    if "firm_id" not in roles:
        raise RosterFileError(f"No column was found for the firm id; the headers are: {', '.join(headers)}; "
                              "choose it explicitly (--column firm_id=HEADER).")
    if "year" in roles:
        return "firm_years"
    if "first_year" in roles and "last_year" in roles:
        return "spans"
    raise RosterFileError(
        "A universe needs either a fiscal-year column (one row per firm-year) or first- and last-year columns "
        f"(one row per span); the headers are: {', '.join(headers)}; choose them explicitly "
        "(--column year=HEADER, or first_year=... and last_year=...).")


def _years(values: pd.Series, label: str, max_year: int) -> tuple[np.ndarray, list[str | None]]:
    """Whole years 1900..max_year (an 'FY' prefix and a trailing .0 allowed); a reason per bad value."""
    text = values.astype(str).str.strip()
    bare = text.str.replace(r"^FY\s*", "", case=False, regex=True)
    ok = bare.str.fullmatch(r"\d{1,4}(?:\.0+)?")
    years = pd.to_numeric(bare.where(ok), errors="coerce").to_numpy(dtype=float)
    reasons: list[str | None] = []
    for raw, y, good in zip(text, years, ok, strict=True):
        if raw == "":
            reasons.append(f"missing {label}")
        elif not good:
            reasons.append(f"{label} {raw!r} is not a whole number")
        elif not 1900 <= y <= max_year:
            reasons.append(f"{label} {y:.0f} is outside 1900..{max_year}")
        else:
            reasons.append(None)
    return years, reasons


def import_universe(
    store: Store, roster_ref: int | str, data: bytes, filename: str, *, roles: dict[str, str] | None = None,
    encoding: str | None = None, sheet: str | None = None, limits: ReadLimits = DEFAULT_LIMITS,
    today: date | None = None,
) -> UniverseReport:
    """Read, validate and store a universe file for a roster in one transaction.

    Raises ``RosterFileError`` when the file as a whole cannot be read or has no usable columns, and
    ``NoValidRowsError`` when every row is rejected (nothing is stored then).
    """
    roster = store.get_roster(roster_ref)
    max_year = (today or date.today()).year + 1
    table = read_table(data, filename, encoding=encoding, sheet=sheet, limits=limits)
    resolved = detect_universe_roles(table.headers, roles)
    shape = _shape(resolved, table.headers)
    if not table.rows and not table.bad_rows:
        raise RosterFileError(f"The file has a header row (line {table.header_line}) but no data rows.")
    # by position: a header repeated in the file must not turn one role into two columns
    def column(role: str) -> pd.Series:
        i = table.headers.index(resolved[role])
        return pd.Series([row[i] for row in table.rows], dtype=object)

    firm = column("firm_id").astype(str).str.strip()
    reasons: list[list[str]] = [[] for _ in range(len(table.rows))]
    for i, f in enumerate(firm):
        if f == "":
            reasons[i].append(f"missing firm id (column {resolved['firm_id']!r} is empty)")
        elif "\x00" in f:  # kept out of the store: PostgreSQL text cannot hold NUL
            reasons[i].append(f"NUL byte in column {resolved['firm_id']!r}")
    messages = list(table.messages)
    if shape == "firm_years":
        year, why = _years(column("year"), "year", max_year)
        first, last = year, year
        for i, w in enumerate(why):
            if w:
                reasons[i].append(w)
    else:
        first, why_first = _years(column("first_year"), "first year", max_year)
        last_text = column("last_year").astype(str).str.strip()
        open_end = (last_text == "").to_numpy()
        roster_last = int(store.departures(roster.id)["year"].max()) if roster.accepted else max_year - 1
        last, why_last = _years(last_text.where(~open_end, str(roster_last)), "last year", max_year)
        if open_end.any():
            messages.append(f"{int(open_end.sum()):,} span(s) have no last year and are taken to run to the "
                            f"roster's last year, {roster_last}.")
        for i, (a, b) in enumerate(zip(why_first, why_last, strict=True)):
            reasons[i] += [w for w in (a, b) if w]
            if a is None and b is None and first[i] > last[i]:
                reasons[i].append(f"first year {first[i]:.0f} is after last year {last[i]:.0f}")
    rejected = [RejectedRow(line=int(line), reason="; ".join(r),
                            raw=json.dumps(dict(zip(table.headers, row, strict=True)), ensure_ascii=False))
                for line, row, r in zip(table.lines, table.rows, reasons, strict=True) if r]
    rejected = sorted(table.bad_rows + rejected, key=lambda r: r.line)
    keep = np.array([not r for r in reasons], dtype=bool)
    if not keep.any():
        if rejected:
            raise NoValidRowsError(rejected)
        raise RosterFileError("The file has no data rows.")
    spans = pd.DataFrame({"firm_id": firm[keep].to_numpy(), "first_year": first[keep].astype("int64"),
                          "last_year": last[keep].astype("int64")})
    firm_years = expand_spans(spans)
    duplicates = int(keep.sum()) - len(firm_years) if shape == "firm_years" else 0
    if duplicates:
        messages.append(f"{duplicates:,} repeated firm-year row(s) were counted once.")
    universe = store.save_universe(
        roster_id=roster.id, source="file", source_name=filename, sha256=file_fingerprint(data),
        fingerprint=universe_fingerprint(firm_years), shape=shape, rows_total=len(table.rows) + len(table.bad_rows),
        columns=resolved, firm_years=firm_years, rejected=rejected)
    return UniverseReport(universe, (int(firm_years["year"].min()), int(firm_years["year"].max())),
                          rows=universe.rows_total, duplicates=duplicates, roles=resolved,
                          messages=tuple(messages), rejected_rows=tuple(rejected))


def derive_universe(store: Store, roster_ref: int | str) -> UniverseReport:
    """Approximate a universe from the roster itself: each firm from the first to the last year it appears.

    Every accepted row counts, still-in-post rows included, so a firm whose executive is still serving
    stays in the universe up to that row's year. Firms that never had a row are missing, and a firm's
    years before its first departure are missing too; the universe is stored as ``derived`` and shown as
    an approximation.
    """
    roster = store.get_roster(roster_ref)
    records = store.departures(roster.id)
    if records.empty:
        raise RosterFileError(f"Roster {roster.name!r} has no accepted rows to derive a universe from.")
    spans = (records.assign(firm_id=records["firm_id"].astype(str)).groupby("firm_id")["year"]
             .agg(first_year="min", last_year="max").reset_index())
    firm_years = expand_spans(spans)
    note = ("Derived from the roster (first to last year each firm appears): an approximation that misses firms "
            "with no rows and years before a firm's first row; import the index membership for exact rates.")
    universe = store.save_universe(
        roster_id=roster.id, source="derived", source_name=f"roster {roster.name}", sha256=roster.sha256,
        fingerprint=universe_fingerprint(firm_years), shape="spans", rows_total=len(spans), columns={},
        firm_years=firm_years, rejected=[])
    return UniverseReport(universe, (int(firm_years["year"].min()), int(firm_years["year"].max())),
                          rows=len(spans), duplicates=0, roles={}, messages=(note,), rejected_rows=())
