"""Filtered, sorted, paged reads of a roster's departures: the record browser and its exports.

Every filter, the category, the sort and the page are done by the database, so a roster of 100,000
departures is never read into Python to show 50 of them. A departure's category is one CASE expression that
classifies as the counts do (app.analysis.cellstore ``categorise`` and app.analysis.overrides): a case
override of the record first, then the mapping version's classification rules in order (first match wins; a
record without the rule's field is not matched), then its code's category. The caller gives the category of
each stored code spelling (``DepartureFilter.codes``: the counts match codes by code key, which SQL cannot
compute) and the rules; see app.analysis.browse.

Rows still in post (no departure date, a code that says the executive has not left: ``in_post_codes``, which
the caller reads from the code's words, and not counted as forced or voluntary by the mapping or a case
override) are not departures of any year: a year filter leaves them out, and ``in_post="only"`` lists them
alone, as Coverage counts them apart.
"""

from __future__ import annotations

from collections.abc import Collection, Iterator
from dataclasses import dataclass
from typing import Any, Literal, get_args

import pandas as pd
from sqlalchemy import ColumnElement, Select, and_, case, func, literal, or_, select

from app.store.cells import completed, version_of
from app.store.engine import Gateway
from app.store.records import MAX_ID, StoreError
from app.store.tables import departures, mapping_entries, mapping_rules, mapping_versions, mappings
from app.types import CATEGORIES, UNMAPPED, ClassificationRule

#: the category values a filter accepts: the mapping's categories, "unmapped", and "counted"
#: (forced or voluntary: the departures every model counts)
CATEGORY_FILTERS: tuple[str, ...] = (*CATEGORIES, UNMAPPED, "counted")

#: the sector name the models give a departure without a sector (app.stats.cells)
NO_SECTOR = "(none)"

#: sort keys the browser offers -> columns; a leading "-" sorts descending
SORT_KEYS: dict[str, str] = {
    "line": "line", "year": "year", "date": "date", "firm": "firm_name", "firm_id": "firm_id",
    "sector": "sector", "reason": "reason", "category": "category", "executive": "executive",
}

#: the columns a listed departure carries, in display and export order
LISTED_FIELDS: tuple[str, ...] = (
    "line", "year", "date", "firm_id", "firm_name", "sector", "executive", "reason", "category",
    "age", "tenure", "interim", "notes",
)

MAX_PER_PAGE = 500

InPost = Literal["only", "none"]
#: the still-in-post filter: ``only`` those rows, ``none`` of them (a year filter implies ``none``)
IN_POST_FILTERS: tuple[InPost, ...] = get_args(InPost)

#: the longest ``q``: SQLite refuses a LIKE pattern over 50,000 bytes (sqlite.org/limits.html), and escaping
#: doubles '%' and '_'; a phrase typed into the search box is far shorter
MAX_SEARCH = 1_000

#: what case overrides read of a departure: its identity and its cell key
IDENTITY_FIELDS: tuple[str, ...] = (
    "line", "firm_id", "executive", "year", "sector", "reason", "age", "tenure", "interim",
)


@dataclass(frozen=True)
class DepartureFilter:
    """What the analyst asked for; ``None`` means "any".

    ``mapping`` (name, version) gives each code its category; without it every departure is unmapped.
    """

    mapping: tuple[str, int] | None = None
    year: int | None = None
    year_from: int | None = None
    year_to: int | None = None
    sector: str | None = None
    category: str | None = None
    reason: str | None = None
    firm: str | None = None
    q: str | None = None
    #: the roster version to list (default: the newest)
    version: int | None = None
    #: (departure id, category) of the mapping version's case overrides in this roster version: they take
    #: precedence over the code's category (app/analysis/overrides.py)
    overrides: tuple[tuple[int, str], ...] = ()
    #: (stored reason code, category) for the roster version's codes under the mapping version, matched as the
    #: counts match them (by code key); None: the store matches the version's entries by exact spelling
    codes: tuple[tuple[str, str], ...] | None = None
    #: the mapping version's classification rules in evaluation order (None: read from the mapping version)
    rules: tuple[ClassificationRule, ...] | None = None
    #: the stored reason codes that say the executive is still in post; their undated rows are not departures
    in_post_codes: tuple[str, ...] = ()
    #: ``only``: list the still-in-post rows alone; ``none``: leave them out (as any year filter does)
    in_post: InPost | None = None

    def __post_init__(self) -> None:
        if self.in_post is not None and self.in_post not in IN_POST_FILTERS:
            raise StoreError(f"in_post must be one of {', '.join(IN_POST_FILTERS)}; got {self.in_post!r}.")
        if self.category is not None and self.category not in CATEGORY_FILTERS:
            raise StoreError(f"category must be one of {', '.join(CATEGORY_FILTERS)}; got {self.category!r}.")
        for name in ("year", "year_from", "year_to"):
            value = getattr(self, name)
            if value is not None and not 0 <= value <= 9999:
                raise StoreError(f"{name.replace('_', ' ')} must be a fiscal year such as 1998; got {value}.")
        if self.q is not None and len(self.q) > MAX_SEARCH:
            raise StoreError(f"q (the text searched for) has {len(self.q):,} characters; at most {MAX_SEARCH:,} "
                             "are searched.")


@dataclass(frozen=True)
class DeparturePage:
    total: int
    rows: list[dict[str, Any]]


def _grouped(pairs: Collection[tuple[Any, str]]) -> dict[str, list[Any]]:
    """category -> the keys (departure ids or codes) that have it, in the given order."""
    out: dict[str, list[Any]] = {}
    for key, cat in pairs:
        out.setdefault(str(cat), []).append(key)
    return out


def _rule_test(rule: ClassificationRule) -> ColumnElement[bool]:
    """The rule's comparison in SQL, as app.stats.rules.apply_rules makes it: age and tenure in completed years
    (``completed``, as the cell store keys them), interim 1/0, notice in whole days. A NULL field makes the
    comparison NULL, so the CASE goes on to the next rule: a record without the field keeps its category."""
    d = departures.c
    if rule.field == "interim":
        return d.interim == bool(rule.value)
    value = completed(d[rule.field]) if rule.field in ("age", "tenure") else d[rule.field]
    if rule.comparison == "below":
        return value < rule.value
    if rule.comparison == "at_least":
        return value >= rule.value
    return value == rule.value


class DepartureQueries(Gateway):
    """The record browser's reads."""

    def _mapping_version_id(self, mapping: tuple[str, int] | None) -> int | None:
        if mapping is None:
            return None
        name, version = mapping
        if not 0 < version <= MAX_ID:
            raise StoreError(f"No version {version} of mapping {name!r} is stored.")
        with self.engine.connect() as conn:
            row = conn.execute(
                select(mapping_versions.c.id).join(mappings, mapping_versions.c.mapping_id == mappings.c.id)
                .where(mappings.c.name == name, mapping_versions.c.version == version)
            ).first()
        if row is None:
            raise StoreError(f"No version {version} of mapping {name!r} is stored.")
        return int(row.id)

    def _version_classification(self, version_id: int) -> tuple[tuple[tuple[str, str], ...],
                                                                tuple[ClassificationRule, ...]]:
        """A mapping version's (code, category) entries and its rules in order, as stored."""
        with self.engine.connect() as conn:
            entries = conn.execute(select(mapping_entries.c.code, mapping_entries.c.category)
                                   .where(mapping_entries.c.version_id == version_id)).fetchall()
            rules = conn.execute(select(mapping_rules).where(mapping_rules.c.version_id == version_id)
                                 .order_by(mapping_rules.c.position)).fetchall()
        return (tuple((str(e.code), str(e.category)) for e in entries),
                tuple(ClassificationRule(r.code, r.field, r.comparison, int(r.value), r.category) for r in rules))

    def _category(self, flt: DepartureFilter) -> ColumnElement[Any]:
        """Each departure's category as the counts classify it: override, then rules, then its code."""
        version_id = self._mapping_version_id(flt.mapping)
        if version_id is None:
            return literal(UNMAPPED)
        codes, rules = flt.codes, flt.rules
        if codes is None or rules is None:
            stored_codes, stored_rules = self._version_classification(version_id)
            codes = stored_codes if codes is None else codes
            rules = stored_rules if rules is None else rules
        d = departures.c
        whens: list[tuple[ColumnElement[bool], Any]] = []
        for cat, ids in sorted(_grouped(flt.overrides).items()):
            whens.append((d.id.in_(ids), literal(cat)))
        for rule in rules:
            whens.append((and_(d.reason == rule.code, _rule_test(rule)), literal(rule.category)))
        for cat, reasons in sorted(_grouped(codes).items()):
            whens.append((d.reason.in_(reasons), literal(cat)))
        return case(*whens, else_=literal(UNMAPPED)) if whens else literal(UNMAPPED)

    def _departure_select(self, roster_id: int, flt: DepartureFilter) -> Select[Any]:
        category = self._category(flt)
        d = departures.c
        conditions: list[ColumnElement[bool]] = [d.roster_id == roster_id,
                                                 d.version == version_of(roster_id, flt.version)]
        # a row the mapping or a case override counts as forced or voluntary is taken as a departure after all
        in_post = (and_(d.date.is_(None), d.reason.in_(flt.in_post_codes), category.notin_(["forced", "voluntary"]))
                   if flt.in_post_codes else None)
        if flt.in_post == "only":
            conditions.append(in_post if in_post is not None else literal(False))
        elif in_post is not None and (flt.in_post == "none" or flt.year is not None or flt.year_from is not None
                                      or flt.year_to is not None):
            conditions.append(~in_post)
        if flt.year is not None:
            conditions.append(d.year == flt.year)
        if flt.year_from is not None:
            conditions.append(d.year >= flt.year_from)
        if flt.year_to is not None:
            conditions.append(d.year <= flt.year_to)
        if flt.sector is not None:
            # the models put departures without a sector in "(none)"; the filter must find the same ones
            conditions.append(or_(d.sector.is_(None), d.sector == NO_SECTOR) if flt.sector == NO_SECTOR
                              else d.sector == flt.sector)
        if flt.reason is not None:
            conditions.append(d.reason == flt.reason)
        if flt.firm is not None:
            conditions.append(or_(d.firm_id == flt.firm, d.firm_name == flt.firm))
        if flt.category == "counted":
            conditions.append(category.in_(["forced", "voluntary"]))
        elif flt.category is not None:
            conditions.append(category == flt.category)
        if flt.q:
            needle = flt.q.strip().lower()
            texts = (d.firm_id, d.firm_name, d.sector, d.executive, d.reason, d.notes)
            conditions.append(or_(*(func.lower(c).contains(needle, autoescape=True) for c in texts)))
        columns = [d[f] for f in LISTED_FIELDS if f != "category"]
        return select(*columns, category.label("category"), d.id.label("id")).where(*conditions)

    def category_counts(self, roster_id: int, flt: DepartureFilter) -> pd.DataFrame:
        """``year``, ``reason``, ``category``, ``departures``: the matching departures counted per year, code and
        category (each classified as the list classifies it), sorted by those."""
        inner = self._departure_select(roster_id, flt).subquery()
        key = (inner.c.year, inner.c.reason, inner.c.category)
        with self.engine.connect() as conn:
            rows = conn.execute(select(*key, func.count()).group_by(*key).order_by(*key)).fetchall()
        frame = pd.DataFrame.from_records([tuple(r) for r in rows],
                                          columns=["year", "reason", "category", "departures"])
        return frame.astype({"year": "int64", "reason": object, "category": object, "departures": "int64"})

    def count_departures(self, roster_id: int, flt: DepartureFilter) -> int:
        inner = self._departure_select(roster_id, flt).subquery()
        with self.engine.connect() as conn:
            return int(conn.execute(select(func.count()).select_from(inner)).scalar_one())

    def _ordered(self, roster_id: int, flt: DepartureFilter, sort: str) -> Select[Any]:
        key = sort.lstrip("-")
        if key not in SORT_KEYS:
            raise StoreError(f"sort must be one of {', '.join(SORT_KEYS)} (with '-' for descending); got {sort!r}.")
        stmt = self._departure_select(roster_id, flt)
        column = stmt.selected_columns[SORT_KEYS[key]]
        first = column.desc() if sort.startswith("-") else column.asc()
        # NULLs last whichever the direction, then source line: a stable order for paging
        return stmt.order_by(column.is_(None), first, departures.c.line, departures.c.id)

    def find_departures(self, roster_id: int, flt: DepartureFilter, *, sort: str = "line", page: int = 1,
                        per_page: int = 50) -> DeparturePage:
        """One page (1-based) of the departures matching ``flt``, with the total that match."""
        if not 1 <= per_page <= MAX_PER_PAGE:
            raise StoreError(f"per page must be between 1 and {MAX_PER_PAGE}; got {per_page}.")
        if not 1 <= page <= MAX_ID // MAX_PER_PAGE:
            raise StoreError(f"page must be 1 or more; got {page}.")
        total = self.count_departures(roster_id, flt)
        stmt = self._ordered(roster_id, flt, sort).limit(per_page).offset((page - 1) * per_page)
        with self.engine.connect() as conn:
            rows = [dict(r._mapping) for r in conn.execute(stmt)]
        return DeparturePage(total=total, rows=rows)

    def iter_departures(self, roster_id: int, flt: DepartureFilter, *, sort: str = "line",
                        batch: int = 5000) -> Iterator[dict[str, Any]]:
        """Every matching departure in order, fetched in batches (for exports)."""
        stmt = self._ordered(roster_id, flt, sort)
        with self.engine.connect() as conn:
            result = conn.execution_options(yield_per=batch).execute(stmt)
            for row in result:
                yield dict(row._mapping)

    def departures_in_years(self, roster_id: int, years: Collection[int], version: int | None = None
                            ) -> pd.DataFrame:
        """The departures of a roster version (default: the newest) in the given fiscal years, with their ids,
        in line order: where case overrides look for the records they name (a few years, not the roster)."""
        d = departures.c
        cols = [d.id, *(d[f] for f in IDENTITY_FIELDS)]
        years = sorted({int(y) for y in years if 0 <= int(y) <= 9999})
        with self.engine.connect() as conn:
            rows = conn.execute(select(*cols).where(
                d.roster_id == roster_id, d.version == version_of(roster_id, version), d.year.in_(years))
                .order_by(d.line, d.id)).fetchall() if years else []
        frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=["id", *IDENTITY_FIELDS])
        frame["year"] = frame["year"].astype("int64")
        for c in ("age", "tenure"):
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype("float64")
        return frame

    def get_departure(self, roster_id: int, departure_id: int, version: int | None = None) -> dict[str, Any]:
        """One departure of a roster version (default: the newest) by id; ``StoreError`` when it is not one."""
        d = departures.c
        row = None
        if 0 < departure_id <= MAX_ID:
            with self.engine.connect() as conn:
                row = conn.execute(select(d.id, *(d[f] for f in IDENTITY_FIELDS)).where(
                    d.id == departure_id, d.roster_id == roster_id,
                    d.version == version_of(roster_id, version))).first()
        if row is None:
            raise StoreError(f"Departure {departure_id} is not a record of the current version of roster "
                             f"{roster_id}.")
        return dict(row._mapping)

    def departure_facets(self, roster_id: int, version: int | None = None) -> dict[str, list[Any]]:
        """The distinct years, sectors and reason codes of a roster version (default: the newest), for the
        filter controls."""
        d = departures.c
        current = version_of(roster_id, version)
        with self.engine.connect() as conn:
            def distinct(col: Any) -> list[Any]:
                return [r[0] for r in conn.execute(
                    select(col).where(d.roster_id == roster_id, d.version == current, col.is_not(None)).distinct().order_by(col))]
            return {"years": distinct(d.year), "sectors": distinct(d.sector), "reasons": distinct(d.reason)}
