"""Universes of firm-years per roster: store one in a single transaction, read the latest, its rejected rows.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd
from sqlalchemy import func, insert, select

from app.store.engine import Gateway
from app.store.records import MAX_ID, RejectedRow, StoreError, Universe, now_iso
from app.store.rosters import RosterQueries
from app.store.tables import rosters, universe_firm_years, universe_rejected, universes


class UniverseQueries(Gateway):
    """Reads and writes of universes, their firm-years and rejected rows."""

    def save_universe(
        self, *, roster_id: int, source: str, source_name: str, sha256: str, fingerprint: str, shape: str,
        rows_total: int, columns: Mapping[str, str], firm_years: pd.DataFrame, rejected: Sequence[RejectedRow],
    ) -> Universe:
        """Store a universe (``firm_years``: columns ``firm_id``, ``year``, distinct) with its rejected rows.

        Everything lands in one transaction or nothing does; the new universe becomes the roster's current one.
        """
        if list(firm_years.columns[:2]) != ["firm_id", "year"]:
            raise StoreError("firm_years needs the columns firm_id and year")
        with self._tx() as conn:
            if conn.execute(select(rosters.c.id).where(rosters.c.id == roster_id)).first() is None:
                raise StoreError(f"No roster number {roster_id} is stored.")
            universe_id = int(conn.execute(insert(universes).values(
                roster_id=roster_id, source=source, source_name=source_name, sha256=sha256,
                fingerprint=fingerprint, imported_at=now_iso(), shape=shape, rows_total=rows_total,
                rejected=len(rejected), firms=int(firm_years["firm_id"].nunique()), firm_years=len(firm_years),
                columns=json.dumps(dict(columns)),
            )).inserted_primary_key[0])  # type: ignore[index]
            frame = firm_years[["firm_id", "year"]].astype({"firm_id": str, "year": "int64"}).astype(object)
            frame.insert(0, "universe_id", universe_id)
            RosterQueries._bulk_insert(conn, universe_firm_years, frame)
            if rejected:
                conn.execute(insert(universe_rejected), [
                    {"universe_id": universe_id, "line": r.line, "raw": r.raw, "reason": r.reason}
                    for r in rejected])
        return self.get_universe(universe_id)

    @staticmethod
    def _universe_from_row(row: Any) -> Universe:
        m = row._mapping
        return Universe(
            id=m["id"], roster_id=m["roster_id"], source=m["source"], source_name=m["source_name"],
            sha256=m["sha256"], fingerprint=m["fingerprint"], imported_at=m["imported_at"], shape=m["shape"],
            rows_total=m["rows_total"], rejected=m["rejected"], firms=m["firms"], firm_years=m["firm_years"],
            columns=json.loads(m["columns"]),
        )

    def get_universe(self, universe_id: int) -> Universe:
        if not 0 < universe_id <= MAX_ID:
            raise StoreError(f"No universe number {universe_id} is stored.")
        with self.engine.connect() as conn:
            row = conn.execute(select(universes).where(universes.c.id == universe_id)).first()
        if row is None:
            raise StoreError(f"No universe number {universe_id} is stored.")
        return self._universe_from_row(row)

    def current_universe(self, roster_id: int) -> Universe | None:
        """The roster's latest universe, or None when it has none yet."""
        with self.engine.connect() as conn:
            row = conn.execute(select(universes).where(universes.c.roster_id == roster_id)
                               .order_by(universes.c.id.desc()).limit(1)).first()
        return None if row is None else self._universe_from_row(row)

    def list_universes(self, roster_id: int) -> list[Universe]:
        with self.engine.connect() as conn:
            return [self._universe_from_row(r) for r in conn.execute(
                select(universes).where(universes.c.roster_id == roster_id).order_by(universes.c.id.desc()))]

    def universe_firm_years(self, universe_id: int) -> pd.DataFrame:
        """The firm-years of a universe (``firm_id``, ``year``), sorted."""
        with self.engine.connect() as conn:
            result = conn.execute(
                select(universe_firm_years.c.firm_id, universe_firm_years.c.year)
                .where(universe_firm_years.c.universe_id == universe_id)
                .order_by(universe_firm_years.c.firm_id, universe_firm_years.c.year))
            frame = pd.DataFrame(result.fetchall(), columns=["firm_id", "year"])
        return frame.astype({"firm_id": object, "year": "int64"})

    def universe_rejected(self, universe_id: int) -> list[RejectedRow]:
        with self.engine.connect() as conn:
            rows = conn.execute(select(universe_rejected.c.line, universe_rejected.c.raw, universe_rejected.c.reason)
                                .where(universe_rejected.c.universe_id == universe_id)
                                .order_by(universe_rejected.c.line))
            return [RejectedRow(line=r.line, raw=r.raw, reason=r.reason) for r in rows]

    def universe_count(self) -> int:
        with self.engine.connect() as conn:
            return int(conn.execute(select(func.count()).select_from(universes)).scalar_one())
