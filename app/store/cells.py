"""The cell store: per-roster-version counts by (year, sector, reason code), and the same counts per firm.

The plain cells and the code spellings are filled when a roster is imported (inside the import's
transaction). The detailed cells and the firm cells, whose keys hold nearly one row per departure on a large
roster, are built on their first read (``ensure_detail_cells``: one transaction of their own, marked in
``roster_cell_builds``), so a 1,000,000-row import does not store ~1.8 million cell rows that only rules, the
mix diagnostic, firm counts and jobs read (benchmarks/README.md, bench_import.py). Pages read ``cell_counts``
(a few thousand rows whatever the roster's size); nothing on a normal request reads the departures
themselves, except the one build of a version's detailed cells.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import (
    ColumnElement,
    Connection,
    Integer,
    Table,
    and_,
    case,
    cast,
    distinct,
    exists,
    func,
    insert,
    literal,
    select,
)
from sqlalchemy.exc import IntegrityError

from app.store.engine import Gateway, bulk_insert
from app.store.records import now_iso
from app.store.tables import (
    departures,
    roster_cell_builds,
    roster_cells,
    roster_detail_cells,
    roster_firm_cells,
    roster_spellings,
    rosters,
    universe_firm_years,
)

#: the key's detail (issue 16): age and tenure in completed years, the interim flag, the notice in whole days
#: (exit minus announcement); None where missing
DETAIL_COLUMNS = ("age", "tenure", "interim", "notice_days")


def version_of(roster_id: int, version: int | None) -> ColumnElement[int]:
    """The roster version a read means: the one given, else the roster's newest (a scalar subquery)."""
    if version is not None:
        return literal(int(version))
    return select(rosters.c.version).where(rosters.c.id == roster_id).scalar_subquery()


def completed(column: Any) -> Any:
    """Completed whole units of a non-negative REAL column (floor), NULL stays NULL.

    Written with CAST and a correction so it gives the same integer on SQLite (CAST truncates) and on
    PostgreSQL (CAST rounds); the import's validation keeps age and tenure non-negative.
    """
    whole = cast(column, Integer)
    return case((column.is_(None), None), (whole > column, whole - 1), else_=whole)


def fill_cells(conn: Connection, roster_id: int, version: int = 1, *, detail: bool = True) -> None:
    """Count one roster version's departures into the cell tables and the spellings, inside the caller's
    transaction; without ``detail`` the detailed and firm cells are left to their first read."""
    d = departures.c
    keys = (d.year, d.sector, d.reason, completed(d.age), completed(d.tenure), d.interim, d.notice_days)
    names = ("year", "sector", "reason", *DETAIL_COLUMNS, "departures")
    plain = (d.year, d.sector, d.reason)
    which = (d.roster_id == roster_id, d.version == version)
    conn.execute(insert(roster_cells).from_select(
        ["roster_id", "version", "year", "sector", "reason", "departures"],
        select(d.roster_id, d.version, *plain, func.count()).where(*which)
        .group_by(d.roster_id, d.version, *plain)))
    spelling = func.coalesce(d.reason_raw, d.reason)
    conn.execute(insert(roster_spellings).from_select(
        ["roster_id", "version", "reason", "spelling", "departures"],
        select(d.roster_id, d.version, d.reason, spelling, func.count()).where(*which)
        .group_by(d.roster_id, d.version, d.reason, spelling)))
    if not detail:
        return
    conn.execute(insert(roster_cell_builds).values(roster_id=roster_id, version=version, built_at=now_iso()))
    conn.execute(insert(roster_detail_cells).from_select(
        ["roster_id", "version", *names],
        select(d.roster_id, d.version, *keys, func.count()).where(*which)
        .group_by(d.roster_id, d.version, *keys)))
    conn.execute(insert(roster_firm_cells).from_select(
        ["roster_id", "version", "firm_id", *names],
        select(d.roster_id, d.version, d.firm_id, *keys, func.count()).where(*which)
        .group_by(d.roster_id, d.version, d.firm_id, *keys)))


_INT64_MAX = 2**63 - 1


def _completed_values(values: pd.Series) -> np.ndarray:
    """``completed`` in pandas: floor of each value as a Python int (None where missing), capped like SQLite's
    CAST at the largest 64-bit integer."""
    codes, uniq = pd.factorize(values.to_numpy(dtype="float64"), use_na_sentinel=True)
    floors = [int(v) if v < _INT64_MAX else _INT64_MAX for v in np.floor(np.asarray(uniq, dtype="float64"))]
    mapped = np.empty(len(floors) + 1, dtype=object)
    mapped[:-1] = floors
    mapped[-1] = None  # code -1: a missing value
    return mapped[codes]


def _whole_values(values: pd.Series) -> np.ndarray:
    """Whole numbers (notice days) as Python ints, None where missing: what SQLite's GROUP BY hands back."""
    out = np.full(len(values), None, dtype=object)
    present = values.notna().to_numpy()
    out[present] = [int(v) for v in values[present]]
    return out


def _insert_counts(conn: Connection, table: Table, keys: pd.DataFrame, by: list[str], ids: dict[str, int]) -> None:
    counted = keys.groupby(by, dropna=False, sort=False).size().reset_index(name="departures")
    bulk_insert(conn, table, counted, ids)


def _keys(records: pd.DataFrame) -> pd.DataFrame:
    raw = records["reason_raw"] if "reason_raw" in records else records["reason"]
    return pd.DataFrame({
        "year": records["year"].astype("int64"), "sector": records["sector"].astype(object),
        "reason": records["reason"].astype(object), "age": _completed_values(records["age"]),
        "tenure": _completed_values(records["tenure"]), "interim": records["interim"].astype(object),
        "notice_days": _whole_values(records["notice_days"]) if "notice_days" in records
        else np.full(len(records), None, dtype=object),
        "firm_id": records["firm_id"].astype(object),
        "spelling": raw.astype(object).where(raw.notna(), records["reason"]),
    })


def fill_cells_from_records(conn: Connection, roster_id: int, version: int, records: pd.DataFrame, *,
                            detail: bool = False) -> None:
    """The counts of ``fill_cells``, computed from the records just inserted (``DEPARTURE_FIELDS``), not re-read;
    the detailed and firm cells only with ``detail`` (else on their first read, ``ensure_detail_cells``).

    SQLite groups by sorting the whole version in a temporary B-tree, four times: ~37 s of a 1,000,000-row
    import; pandas' hash group-by over the frame in memory gives the same counts in a few seconds.
    """
    keys = _keys(records)
    ids = {"roster_id": int(roster_id), "version": int(version)}
    _insert_counts(conn, roster_cells, keys, ["year", "sector", "reason"], ids)
    _insert_counts(conn, roster_spellings, keys, ["reason", "spelling"], ids)
    if detail:
        _insert_detail(conn, keys, ids)


def _insert_detail(conn: Connection, keys: pd.DataFrame, ids: dict[str, int]) -> None:
    conn.execute(insert(roster_cell_builds).values(**ids, built_at=now_iso()))
    detail = ["year", "sector", "reason", *DETAIL_COLUMNS]
    _insert_counts(conn, roster_detail_cells, keys, detail, ids)
    _insert_counts(conn, roster_firm_cells, keys, ["firm_id", *detail], ids)


#: what the detailed and firm cells are counted from
_KEY_FIELDS = ("firm_id", "year", "sector", "reason", "age", "tenure", "interim", "notice_days")
#: departures read at a time when building the detailed cells
_READ_CHUNK = 100_000


def _shared_strings(frame: pd.DataFrame) -> pd.DataFrame:
    """The text columns of a chunk with one string object per distinct value (the driver makes one per cell:
    ~300 MB on 1,000,000 departures)."""
    for c in ("firm_id", "sector", "reason"):
        codes, uniq = pd.factorize(frame[c].to_numpy(dtype=object), use_na_sentinel=True)
        values = np.empty(len(uniq) + 1, dtype=object)
        values[:-1] = uniq
        values[-1] = None
        frame[c] = values[codes]
    return frame


def _frame(rows: Sequence[Any], columns: tuple[str, ...]) -> pd.DataFrame:
    # plain tuples: pandas probes each SQLAlchemy Row for a ``dtype`` attribute, which costs a raised
    # NoSuchColumnError per row (issue 13)
    frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=list(columns))
    frame["year"] = frame["year"].astype(np.int64)
    frame["departures"] = frame["departures"].astype(np.int64)
    for c in ("sector", "reason", "firm_id"):
        if c in frame:
            frame[c] = frame[c].astype(object)
    for c in ("age", "tenure", "notice_days"):
        if c in frame:
            frame[c] = frame[c].astype("Int64")
    if "interim" in frame:
        frame["interim"] = frame["interim"].astype("boolean")
    return frame


class CellQueries(Gateway):
    """Reads of the cell store (writes happen in ``fill_cells``, with the import)."""

    def cell_counts(self, roster_id: int, version: int | None = None, *, detail: bool = False) -> pd.DataFrame:
        """Departures per (year, sector, reason) of one roster version (default: the newest); ``sector`` is
        None where the record had none.

        With ``detail`` the key also holds ``age``, ``tenure`` (completed years), ``interim`` and
        ``notice_days`` (missing values are <NA>). Sorted by the key (missing values last, on every backend).
        Rebuilds the cells of a roster stored without them.
        """
        return self._read_cells(roster_detail_cells if detail else roster_cells, roster_id, (), detail, version)

    def firm_cell_counts(self, roster_id: int, version: int | None = None, *, detail: bool = False) -> pd.DataFrame:
        """Departures per (firm, year, sector, reason[, age, tenure, interim]) of one roster version (default:
        the newest): what a firm bootstrap needs. Read by jobs only."""
        return self._read_cells(roster_firm_cells, roster_id, ("firm_id",), detail, version)

    def _read_cells(self, table: Any, roster_id: int, lead: tuple[str, ...], detail: bool,
                    version: int | None) -> pd.DataFrame:
        c = table.c
        key = [c[name] for name in (*lead, "year", "sector", "reason", *(DETAIL_COLUMNS if detail else ()))]
        which = (c.roster_id == roster_id, c.version == version_of(roster_id, version))
        # missing values (no sector, no age) last on every backend: SQLite sorts NULL first, PostgreSQL last
        order = [k.asc().nulls_last() for k in key]
        if table is roster_firm_cells:
            query = select(*key, func.sum(c.departures)).where(*which).group_by(*key).order_by(*order)
        else:  # one row per key already
            query = select(*key, c.departures).where(*which).order_by(*order)

        def fetch() -> list[Any]:
            with self.engine.connect() as conn:
                # the driver's plain tuples: building a SQLAlchemy Row per cell costs more than the query on a
                # roster whose detailed key has ~one cell per departure (benchmarks/bench_rules_adjusted.py)
                return list(conn.execute(query).cursor.fetchall())

        if table is not roster_cells:
            self.ensure_detail_cells(roster_id, version)
        rows = fetch()
        if not rows and self._repair_cells(roster_id, version):
            rows = fetch()
        return _frame(rows, tuple(k.name for k in key) + ("departures",))

    def ensure_detail_cells(self, roster_id: int, version: int | None = None) -> None:
        """Build the detailed and firm cells of a roster version (default: the newest) unless they are built.

        Counted in pandas from the version's departures (as the import counts the plain cells) and stored with
        their ``roster_cell_builds`` mark in one transaction of their own: a build killed half-way leaves
        nothing, and the next read builds again. Two processes building at once: the mark's primary key makes
        the second one's transaction fail as a whole, and the first's cells (the same counts) stand.
        """
        b, d = roster_cell_builds.c, departures.c
        with self.engine.connect() as conn:
            number = conn.execute(select(version_of(roster_id, version))).scalar()
            if number is None or conn.execute(select(b.roster_id).where(
                    b.roster_id == roster_id, b.version == number)).first() is not None:
                return
            cursor = conn.execute(select(*[d[f] for f in _KEY_FIELDS])
                                  .where(d.roster_id == roster_id, d.version == number)).cursor
            chunks = []
            while rows := cursor.fetchmany(_READ_CHUNK):
                chunks.append(_shared_strings(pd.DataFrame.from_records(rows, columns=list(_KEY_FIELDS))))
                del rows
        records = (pd.concat(chunks, ignore_index=True) if chunks
                   else pd.DataFrame({f: pd.Series([], dtype=object) for f in _KEY_FIELDS}))
        del chunks
        records["year"] = records["year"].astype("int64")
        for c in ("age", "tenure", "notice_days"):
            records[c] = pd.to_numeric(records[c], errors="coerce").astype("float64")
        # SQLite hands back booleans as 0/1: the cells hold True/False (a PostgreSQL boolean refuses 0/1)
        records["interim"] = np.array([None if v is None or v != v else bool(v) for v in records["interim"]],
                                      dtype=object)
        try:
            with self._tx() as conn:
                _insert_detail(conn, _keys(records), {"roster_id": int(roster_id), "version": int(number)})
        except IntegrityError:  # built meanwhile by another process, or the roster was deleted: nothing to add
            return

    def cell_table_rows(self, roster_id: int) -> dict[str, int]:
        """Stored rows of each cell table for one roster (the cost of the detailed key: benchmarks, tests); builds
        the detailed cells of its newest version first."""
        self.ensure_detail_cells(roster_id)
        with self.engine.connect() as conn:
            return {t.name: int(conn.execute(select(func.count()).select_from(t)
                                             .where(t.c.roster_id == roster_id)).scalar_one())
                    for t in (roster_cells, roster_detail_cells, roster_firm_cells)}

    def firm_counts(self, roster_id: int, *, missing: str = "(none)",
                    version: int | None = None) -> tuple[int, pd.DataFrame]:
        """Distinct firms of a roster version (default: the newest), and per sector (``missing`` stands for
        none): ``sector``, ``departures``, ``firms``, sorted by sector."""
        self.ensure_detail_cells(roster_id, version)
        c = roster_firm_cells.c
        sector = func.coalesce(c.sector, missing)
        which = (c.roster_id == roster_id, c.version == version_of(roster_id, version))
        with self.engine.connect() as conn:
            total = int(conn.execute(select(func.count(distinct(c.firm_id))).where(*which)).scalar_one())
            rows = conn.execute(select(sector, func.sum(c.departures), func.count(distinct(c.firm_id)))
                                .where(*which).group_by(sector).order_by(sector)).all()
        frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=["sector", "departures", "firms"])
        return total, frame.astype({"departures": np.int64, "firms": np.int64})

    # -- a roster's counts against a universe of firm-years (the Rates sections and the Universe page) --------
    def universe_cell_counts(self, roster_id: int, universe_id: int, version: int | None = None) -> pd.DataFrame:
        """Departures per (year, reason, inside) of one roster version (default: the newest): ``inside`` is 1
        where the departure's (firm, year) is one of the universe's firm-years, else 0. Counted in SQL from the
        firm cells (a few hundred rows back)."""
        self.ensure_detail_cells(roster_id, version)
        c, u = roster_firm_cells.c, universe_firm_years.c
        inside = exists().where(u.universe_id == universe_id, u.firm_id == c.firm_id, u.year == c.year)
        flag = case((inside, 1), else_=0).label("inside")
        query = (select(c.year, c.reason, flag, func.sum(c.departures))
                 .where(c.roster_id == roster_id, c.version == version_of(roster_id, version))
                 .group_by(c.year, c.reason, flag).order_by(c.year, c.reason, flag))
        with self.engine.connect() as conn:
            rows = conn.execute(query).all()
        frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=["year", "reason", "inside", "departures"])
        return frame.astype({"year": np.int64, "reason": object, "inside": bool, "departures": np.int64})

    def universe_firm_year_flags(self, roster_id: int, universe_id: int, version: int | None = None) -> pd.DataFrame:
        """Each (``firm_id``, ``year``) with a departure in one roster version (default: the newest) and
        ``inside``: whether it is one of the universe's firm-years. Flagged in SQL from the firm cells (one row
        per roster firm-year; the universe's firm-years are not read), so the categorised firm cells (rules and
        case overrides applied) can be split into inside and outside the universe."""
        self.ensure_detail_cells(roster_id, version)
        c, u = roster_firm_cells.c, universe_firm_years.c
        # a left join, not EXISTS per firm-year: about 1.6x faster on SQLite (benchmarks/bench_rates_rules.py)
        joined = roster_firm_cells.outerjoin(
            universe_firm_years, and_(u.universe_id == universe_id, u.firm_id == c.firm_id, u.year == c.year))
        flag = func.max(case((u.year.is_not(None), 1), else_=0)).label("inside")
        query = (select(c.firm_id, c.year, flag).select_from(joined)
                 .where(c.roster_id == roster_id, c.version == version_of(roster_id, version))
                 .group_by(c.firm_id, c.year).order_by(c.firm_id, c.year))
        with self.engine.connect() as conn:
            rows = conn.execute(query).all()
        frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=["firm_id", "year", "inside"])
        return frame.astype({"firm_id": object, "year": np.int64, "inside": bool})

    def universe_exposure(self, universe_id: int) -> pd.Series:
        """Firm-years per year of a universe (index ``year``, name ``firm_years``), in year order."""
        u = universe_firm_years.c
        with self.engine.connect() as conn:
            rows = conn.execute(select(u.year, func.count()).where(u.universe_id == universe_id)
                                .group_by(u.year).order_by(u.year)).all()
        years = pd.Index(np.array([r[0] for r in rows], dtype=np.int64), name="year")
        return pd.Series(np.array([r[1] for r in rows], dtype=np.int64), index=years, name="firm_years")

    def firms_outside_universe(self, roster_id: int, universe_id: int,
                               window: tuple[int, int] | None = None, version: int | None = None) -> pd.DataFrame:
        """Distinct (``firm_id``, ``reason``) of the roster's departures whose firm has no firm-year in the universe
        (both read inside ``window`` when given), sorted: the firms a universe misses, before categories."""
        self.ensure_detail_cells(roster_id, version)
        c, u = roster_firm_cells.c, universe_firm_years.c
        held = [u.universe_id == universe_id, u.firm_id == c.firm_id]
        where = [c.roster_id == roster_id, c.version == version_of(roster_id, version)]
        if window is not None:
            held.append(u.year.between(*window))
            where.append(c.year.between(*window))
        query = (select(c.firm_id, c.reason).where(and_(*where), ~exists().where(*held)).distinct()
                 .order_by(c.firm_id, c.reason))
        with self.engine.connect() as conn:
            rows = conn.execute(query).all()
        return pd.DataFrame.from_records([tuple(r) for r in rows], columns=["firm_id", "reason"]).astype(object)

    def _repair_cells(self, roster_id: int, version: int | None) -> bool:
        """Fill the cells of a roster version that has departures but no cells (written by an older release)."""
        with self._tx() as conn:
            number = conn.execute(select(version_of(roster_id, version))).scalar()
            if number is None:
                return False
            rc, d = roster_cells.c, departures.c
            if conn.execute(select(rc.roster_id).where(rc.roster_id == roster_id, rc.version == number)
                            .limit(1)).first() is not None:
                return True
            if conn.execute(select(d.id).where(d.roster_id == roster_id, d.version == number)
                            .limit(1)).first() is None:
                return False
            conn.execute(roster_spellings.delete().where(roster_spellings.c.roster_id == roster_id,
                                                         roster_spellings.c.version == number))
            fill_cells(conn, roster_id, int(number), detail=False)  # the detailed cells: ensure_detail_cells
        return True
