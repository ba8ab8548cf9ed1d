"""The cell store: per-roster counts by (year, sector, reason code), and the same counts per firm.

Filled once when a roster is imported (``fill_cells``, inside the import's transaction) and by the schema
migration for rosters stored before the cell store existed. Pages read ``cell_counts`` (a few thousand rows
whatever the roster's size); only jobs read ``firm_cell_counts``; nothing on a normal request reads the
departures themselves.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Connection, Integer, case, cast, distinct, func, insert, select

from app.store.engine import Gateway
from app.store.tables import departures, roster_cells, roster_detail_cells, roster_firm_cells

#: the key's detail (issue 16): age and tenure in completed years, the interim flag; None where missing
DETAIL_COLUMNS = ("age", "tenure", "interim")


def completed(column: Any) -> Any:
    """Completed whole units of a non-negative REAL column (floor), NULL stays NULL.

    Written with CAST and a correction so it gives the same integer on SQLite (CAST truncates) and on
    PostgreSQL (CAST rounds); the import's validation keeps age and tenure non-negative.
    """
    whole = cast(column, Integer)
    return case((column.is_(None), None), (whole > column, whole - 1), else_=whole)


def fill_cells(conn: Connection, roster_id: int) -> None:
    """Count one roster's departures into both cell tables, inside the caller's transaction."""
    d = departures.c
    keys = (d.year, d.sector, d.reason, completed(d.age), completed(d.tenure), d.interim)
    names = ("year", "sector", "reason", *DETAIL_COLUMNS, "departures")
    plain = (d.year, d.sector, d.reason)
    conn.execute(insert(roster_cells).from_select(
        ["roster_id", "year", "sector", "reason", "departures"],
        select(d.roster_id, *plain, func.count()).where(d.roster_id == roster_id)
        .group_by(d.roster_id, *plain)))
    conn.execute(insert(roster_detail_cells).from_select(
        ["roster_id", *names],
        select(d.roster_id, *keys, func.count()).where(d.roster_id == roster_id)
        .group_by(d.roster_id, *keys)))
    conn.execute(insert(roster_firm_cells).from_select(
        ["roster_id", "firm_id", *names],
        select(d.roster_id, d.firm_id, *keys, func.count()).where(d.roster_id == roster_id)
        .group_by(d.roster_id, d.firm_id, *keys)))


def _frame(rows: Sequence[Any], columns: tuple[str, ...]) -> pd.DataFrame:
    # plain tuples: pandas probes each SQLAlchemy Row for a ``dtype`` attribute, which costs a raised
    # NoSuchColumnError per row (issue 13)
    frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=list(columns))
    frame["year"] = frame["year"].astype(np.int64)
    frame["departures"] = frame["departures"].astype(np.int64)
    for c in ("sector", "reason", "firm_id"):
        if c in frame:
            frame[c] = frame[c].astype(object)
    for c in ("age", "tenure"):
        if c in frame:
            frame[c] = frame[c].astype("Int64")
    if "interim" in frame:
        frame["interim"] = frame["interim"].astype("boolean")
    return frame


class CellQueries(Gateway):
    """Reads of the cell store (writes happen in ``fill_cells``, with the import)."""

    def cell_counts(self, roster_id: int, *, detail: bool = False) -> pd.DataFrame:
        """Departures per (year, sector, reason) of one roster; ``sector`` is None where the record had none.

        With ``detail`` the key also holds ``age``, ``tenure`` (completed years) and ``interim`` (missing
        values are <NA>). Sorted by the key (missing first). Rebuilds the cells of a roster stored without them.
        """
        return self._read_cells(roster_detail_cells if detail else roster_cells, roster_id, (), detail)

    def firm_cell_counts(self, roster_id: int, *, detail: bool = False) -> pd.DataFrame:
        """Departures per (firm, year, sector, reason[, age, tenure, interim]): what a firm bootstrap needs.
        Read by jobs only."""
        return self._read_cells(roster_firm_cells, roster_id, ("firm_id",), detail)

    def _read_cells(self, table: Any, roster_id: int, lead: tuple[str, ...], detail: bool) -> pd.DataFrame:
        c = table.c
        key = [c[name] for name in (*lead, "year", "sector", "reason", *(DETAIL_COLUMNS if detail else ()))]
        if table is roster_firm_cells:
            query = (select(*key, func.sum(c.departures)).where(c.roster_id == roster_id).group_by(*key)
                     .order_by(*key))
        else:  # one row per key already
            query = select(*key, c.departures).where(c.roster_id == roster_id).order_by(*key)

        def fetch() -> list[Any]:
            with self.engine.connect() as conn:
                # the driver's plain tuples: building a SQLAlchemy Row per cell costs more than the query on a
                # roster whose detailed key has ~one cell per departure (benchmarks/bench_rules_adjusted.py)
                return list(conn.execute(query).cursor.fetchall())

        rows = fetch()
        if not rows and self._repair_cells(roster_id):
            rows = fetch()
        return _frame(rows, tuple(k.name for k in key) + ("departures",))

    def cell_table_rows(self, roster_id: int) -> dict[str, int]:
        """Stored rows of each cell table for one roster (the cost of the detailed key: benchmarks, tests)."""
        with self.engine.connect() as conn:
            return {t.name: int(conn.execute(select(func.count()).select_from(t)
                                             .where(t.c.roster_id == roster_id)).scalar_one())
                    for t in (roster_cells, roster_detail_cells, roster_firm_cells)}

    def firm_counts(self, roster_id: int, *, missing: str = "(none)") -> tuple[int, pd.DataFrame]:
        """Distinct firms of a roster, and per sector (``missing`` stands for none): ``sector``, ``departures``,
        ``firms``, sorted by sector."""
        c = roster_firm_cells.c
        sector = func.coalesce(c.sector, missing)
        with self.engine.connect() as conn:
            total = int(conn.execute(select(func.count(distinct(c.firm_id))).where(c.roster_id == roster_id))
                        .scalar_one())
            rows = conn.execute(select(sector, func.sum(c.departures), func.count(distinct(c.firm_id)))
                                .where(c.roster_id == roster_id).group_by(sector).order_by(sector)).all()
        frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=["sector", "departures", "firms"])
        return total, frame.astype({"departures": np.int64, "firms": np.int64})

    def _repair_cells(self, roster_id: int) -> bool:
        """Fill the cells of a roster that has departures but no cells (written by an older version)."""
        with self._tx() as conn:
            if conn.execute(select(roster_cells.c.roster_id).where(roster_cells.c.roster_id == roster_id)
                            .limit(1)).first() is not None:
                return True
            if conn.execute(select(departures.c.id).where(departures.c.roster_id == roster_id)
                            .limit(1)).first() is None:
                return False
            for table in (roster_detail_cells, roster_firm_cells):
                conn.execute(table.delete().where(table.c.roster_id == roster_id))
            fill_cells(conn, roster_id)
        return True
