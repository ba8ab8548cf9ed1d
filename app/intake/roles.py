"""Which column holds each role: header words first, then the values, each guess with a confidence and why.

Header words are compared after lower-casing and dropping everything but letters and digits ("Interim?" ->
"interim"); then single words of the header are tried ("Why did they leave" -> reason). Where no header
names a required role, the values decide: a column whose values read as dates or years, a low-cardinality
text column with departure wording, an id-like column whose values repeat. The word lists are common
practice in roster spreadsheets, not a standard. Every guess stays overridable.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Literal

import pandas as pd

from app.intake.dates import parse_dates
from app.intake.rawtable import RosterFileError, looks_like_data, shown
from app.intake.reasons import suggest_category
from app.types import REQUIRED_ROLES, ROLES

ROLE_LABELS = {
    "firm_id": "firm id", "firm_name": "firm name", "sector": "sector", "year": "fiscal year",
    "date": "departure date", "reason": "reason code", "executive": "executive", "age": "age",
    "tenure": "tenure", "interim": "interim flag", "notes": "notes", "announced": "announcement date",
}

# whole headers, normalised
HEADER_WORDS: dict[str, tuple[str, ...]] = {
    "firm_id": ("firmid", "issuercode", "issuerid", "companyid", "companycode", "firmcode", "ticker",
                "tickersymbol", "symbol", "isin", "permid", "entityid", "id", "code", "ref", "reference",
                "firmref", "companyref", "issuerref"),
    "firm_name": ("firmname", "firm", "company", "companyname", "issuername", "issuer", "entityname",
                  "organisation", "organization"),
    "sector": ("sector", "industry", "industrygroup", "sectorname", "industryname", "industrysector"),
    "year": ("year", "fy", "fiscalyear", "financialyear", "fyear", "exityear", "departureyear",
             "yearofdeparture", "yearofexit", "turnoveryear", "fyofexit", "fyleft", "exitfy"),
    "date": ("date", "exitdate", "departuredate", "dateofdeparture", "dateofexit", "leavedate",
             "leavingdate", "dateleft", "enddate", "separationdate", "turnoverdate", "exit", "left",
             "departure", "departed", "exited", "whenleft"),
    "reason": ("reason", "reasoncode", "exitreason", "departurereason", "reasonfordeparture",
               "reasonforleaving", "exitcode", "departurecode", "departuretype", "exittype", "turnovertype",
               "why", "cause", "howleft", "whyleft", "typeofexit", "typeofdeparture", "exitroute"),
    "executive": ("executive", "ceo", "name", "executivename", "ceoname", "person", "leader",
                  "chiefexecutive", "incumbent", "chiefexecutiveofficer", "outgoingceo"),
    "age": ("age", "ageatexit", "ageatdeparture", "ceoage", "ageatleaving", "exitage"),
    "tenure": ("tenure", "yearsinrole", "tenureyears", "yearsinoffice", "yearsinpost", "tenureinyears",
               "yearsasceo", "yearsinseat", "seat", "timeinpost", "yearsinthejob"),
    "interim": ("interim", "isinterim", "interimflag", "acting", "actingceo", "interimceo"),
    "notes": ("notes", "note", "comment", "comments", "remarks", "remark", "details"),
    # the day the departure was announced (notice_days = exit date minus this); "notice" alone is left out:
    # a "Notice (days)" column holds a number of days, not a date
    "announced": ("announced", "announcement", "announcementdate", "dateannounced", "announceddate",
                  "dateofannouncement", "announcedon", "noticedate", "dateofnotice", "announcementday", "dateannouncement"),
}
# single words inside a longer header, tried in this order (age before executive: "CEO age")
WORD_HINTS: tuple[tuple[str, frozenset[str]], ...] = (
    ("announced", frozenset({"announced", "announcement", "announce"})),  # before date: "Date announced"
    ("age", frozenset({"age"})),
    ("tenure", frozenset({"tenure", "seat"})),
    ("interim", frozenset({"interim", "acting"})),
    ("reason", frozenset({"reason", "reasons", "why", "cause", "circumstances"})),
    ("notes", frozenset({"note", "notes", "comment", "comments", "remarks"})),
    ("sector", frozenset({"sector", "industry"})),
    ("year", frozenset({"fy", "year", "yr"})),
    ("date", frozenset({"date", "exit", "left", "departure", "departed", "leaving"})),
    ("firm_id", frozenset({"ticker", "ref", "id", "isin", "symbol", "code"})),
    ("firm_name", frozenset({"issuer", "company", "firm", "organisation", "organization", "entity"})),
    ("executive", frozenset({"ceo", "chief", "executive", "incumbent", "leader", "name"})),
)
_TENURE_CONTEXT = frozenset({"post", "seat", "office", "role", "ceo", "job"})

Confidence = Literal["high", "medium", "low"]


@dataclass(frozen=True)
class RoleGuess:
    """One column's role with how sure we are and why (shown beside the role's control)."""

    role: str
    header: str
    confidence: Confidence
    why: str


def norm(header: str) -> str:
    return re.sub(r"[^0-9a-z]", "", header.lower())


def _words(header: str) -> list[str]:
    return re.sub(r"[^0-9a-z]+", " ", header.lower()).split()


def header_role(header: str) -> tuple[str, Confidence] | None:
    """The role a header's words name, if any: whole header ("high") or one of its words ("medium")."""
    key, bare = norm(header), norm(re.sub(r"\(.*?\)|\[.*?\]", "", header))  # "Exit Date (dd/mm)" -> exitdate
    for role, words in HEADER_WORDS.items():
        if key in words or bare in words:
            return role, "high"
    parts = set(_words(re.sub(r"\(.*?\)|\[.*?\]", "", header)))
    if "years" in parts and parts & _TENURE_CONTEXT:
        return "tenure", "medium"
    if "how" in parts and parts & {"left", "leave", "exit", "exited", "departed"}:
        return "reason", "medium"
    for role, hints in WORD_HINTS:
        if parts & hints:
            return role, "medium"
    return None


def is_header_word(cell: str) -> bool:
    """True when a cell reads like a column name of a roster (used to score header rows)."""
    return header_role(cell) is not None


_DEPARTURE_WORDS = re.compile(
    r"retir|resign|dismiss|fired|ousted|forced|death|died|health|still in post|incumbent|serving|left|"
    r"depart|terminat|removed|step(?:ped)? down|succession|new role|personal|board|activist|merger",
    re.IGNORECASE)
_ID_LIKE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._:/-]{0,23}$")


def _share(mask: pd.Series) -> float:
    return float(mask.mean()) if len(mask) else 0.0


def _content_guesses(columns: Mapping[str, Sequence[str]], taken: set[str], max_year: int) -> list[RoleGuess]:
    """Guesses from the values of columns no header word claimed, best first per role."""
    out: list[RoleGuess] = []
    ids: list[tuple[int, RoleGuess]] = []
    for header, values in columns.items():
        if header in taken:
            continue
        s = pd.Series([str(v).strip() for v in values], dtype=object)
        s = s[s != ""]
        if len(s) < 2:
            continue
        parsed = parse_dates(s, max_year=max_year)
        ok = parsed.status == ""
        serial = s.str.fullmatch(r"\d{5,7}(?:\.\d+)?")
        # five-digit numbers are ids as often as Excel serial dates: only recent serials count as dates
        plausible = ok & ~(serial & (parsed.year < 1960))
        if _share(plausible) >= 0.8:
            years_only = _share(parsed.precision[ok] == "year") == 1.0
            role = "year" if years_only else "date"
            out.append(RoleGuess(role, header, "medium", f"{_share(ok):.0%} of its values read as "
                                 f"{'four-digit years' if years_only else 'dates'}"))
            continue
        distinct = s.nunique()
        texty = _share(~s.map(looks_like_data))
        worded = _share(s.drop_duplicates().map(
            lambda v: bool(_DEPARTURE_WORDS.search(v)) or suggest_category(v).category is not None))
        if texty > 0.9 and distinct <= max(40, len(s) // 5) and worded >= 0.5:
            out.append(RoleGuess("reason", header, "medium",
                                 f"{distinct} distinct text values, {worded:.0%} of them departure wording"))
            continue
        if _share(s.map(lambda v: bool(_ID_LIKE.match(v)))) > 0.95 and 2 < distinct < len(s):
            ids.append((distinct, RoleGuess(
                "firm_id", header, "medium", f"short id-like values ({distinct} distinct in {len(s)} rows, "
                "so firms repeat)")))
    # of several id-like columns (a sector code also repeats), the one with the most distinct values
    out.extend(g for _, g in sorted(ids, key=lambda t: -t[0]))
    return out


def _announcement_by_values(guesses: dict[str, RoleGuess], others: list[RoleGuess],
                            columns: Mapping[str, Sequence[str]], max_year: int, *, exit_by_values: bool) -> None:
    """A second date column is the announcement date when its dates come on or before the exit dates.

    Of two date columns found by their values alone, the earlier one (on or before the other in at least
    80% of the rows where both read) is the announcement and the later the exit; a departure date named by
    its header stays the exit, and a column of later dates is then left alone.
    """
    exit_guess = guesses["date"]

    def dates(header: str) -> pd.Series:
        s = pd.Series([str(v).strip() for v in columns[header]], dtype=object)
        iso = parse_dates(s, max_year=max_year).iso
        return iso.where(iso.str.len() == 10)  # whole days only: a month cannot be ordered against a day

    for other in others:
        a, b = dates(other.header), dates(exit_guess.header)
        both = a.notna() & b.notna()
        if both.sum() < 2:
            continue
        earlier = _share(a[both] <= b[both])
        if earlier >= 0.8:
            guesses["announced"] = RoleGuess("announced", other.header, "low", f"a second date column whose "
                                             f"dates come on or before “{exit_guess.header}” in {earlier:.0%} "
                                             "of rows")
            return
        later = _share(b[both] <= a[both])
        if later >= 0.8 and exit_by_values:
            guesses["date"] = RoleGuess("date", other.header, "medium", other.why + ", the later of two date "
                                        "columns")
            guesses["announced"] = RoleGuess("announced", exit_guess.header, "low", "a second date column "
                                             f"whose dates come on or before “{other.header}” in {later:.0%} "
                                             "of rows")
            return


def guess_roles(
    headers: Sequence[str], columns: Mapping[str, Sequence[str]] | None = None, *, max_year: int = 2100,
) -> tuple[dict[str, RoleGuess], list[str]]:
    """Role -> guess from header words, then (for roles still open) from the sample ``columns`` values."""
    found: dict[str, list[tuple[str, Confidence]]] = {}
    for h in headers:
        hit = header_role(h)
        if hit:
            found.setdefault(hit[0], []).append((h, hit[1]))
    guesses: dict[str, RoleGuess] = {}
    notes: list[str] = []
    for role in ROLES:
        cands = sorted(found.get(role, []), key=lambda c: c[1] != "high")
        if not cands:
            continue
        header, conf = cands[0]
        guesses[role] = RoleGuess(role, header, conf, f"the header “{header}” names the {ROLE_LABELS[role]}"
                                  if conf == "high" else f"the header “{header}” has a word for the "
                                  f"{ROLE_LABELS[role]}")
        if len(cands) > 1:
            notes.append(f"Several columns look like the {ROLE_LABELS[role]} ({', '.join(c[0] for c in cands)}); "
                         f"using {header!r}; choose another explicitly if that is wrong.")
    if columns:
        taken = {g.header for g in guesses.values()}
        content = _content_guesses(columns, taken, max_year)
        for g in content:
            if g.role not in guesses and g.header not in taken and not (g.role == "year" and "date" in guesses):
                guesses[g.role] = g
                taken.add(g.header)
        if "announced" not in guesses and "date" in guesses:
            _announcement_by_values(guesses, [g for g in content if g.role == "date" and g.header not in taken],
                                    columns, max_year, exit_by_values=guesses["date"] in content)
    if "firm_id" not in guesses and "firm_name" in guesses:
        named = guesses.pop("firm_name")
        guesses["firm_id"] = RoleGuess("firm_id", named.header, "low",
                                       f"no id column; the firm names in “{named.header}” identify the firms")
    return {r: guesses[r] for r in ROLES if r in guesses}, notes


def detect_roles(
    headers: Sequence[str], columns: Mapping[str, Sequence[str]] | None = None, *, max_year: int = 2100,
) -> tuple[dict[str, str], list[str]]:
    """Role -> header (see :func:`guess_roles`) and notes about ambiguous guesses."""
    guesses, notes = guess_roles(headers, columns, max_year=max_year)
    return {r: g.header for r, g in guesses.items()}, notes


def resolve_roles(
    headers: list[str], explicit: dict[str, str] | None, columns: Mapping[str, Sequence[str]] | None = None,
    *, max_year: int = 2100,
) -> tuple[dict[str, str], list[str], dict[str, RoleGuess]]:
    """Detected roles with the analyst's explicit choices laid over them ("" = no such column)."""
    guesses, notes = guess_roles(headers, columns, max_year=max_year)
    roles = {r: g.header for r, g in guesses.items()}
    if not explicit:
        return roles, notes, guesses
    by_norm = {norm(h): h for h in headers}
    for role, header in explicit.items():
        if role not in ROLES:
            raise RosterFileError(f"Unknown role {role!r}; roles are: {', '.join(ROLES)}.")
        if not header:
            roles.pop(role, None)  # an empty choice means "this roster has no such column"
            guesses.pop(role, None)
            continue
        actual = header if header in headers else by_norm.get(norm(header))
        if actual is None:
            raise RosterFileError(
                f"No column {shown(header)} (asked for the {ROLE_LABELS[role]}); the headers are: {', '.join(headers)}."
            )
        for other, used in list(roles.items()):
            if used == actual and other != role:
                if other in explicit and explicit[other]:
                    raise RosterFileError(f"Column {actual!r} cannot be both the {ROLE_LABELS[other]} "
                                          f"and the {ROLE_LABELS[role]}.")
                del roles[other]
                guesses.pop(other, None)
        roles[role] = actual
        guesses[role] = RoleGuess(role, actual, "high", "chosen by you")
    return ({r: roles[r] for r in ROLES if r in roles}, notes,
            {r: guesses[r] for r in ROLES if r in guesses})


def missing_roles(roles: Mapping[str, str]) -> list[str]:
    missing = [ROLE_LABELS[r] for r in REQUIRED_ROLES if r not in roles]
    if "year" not in roles and "date" not in roles:
        missing.append("fiscal year or departure date")
    return missing
