"""Rosters and their records: imports, departures, rejected rows, reason counts and per-roster settings.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd
from sqlalchemy import (
    Connection,
    Table,
    delete,
    func,
    insert,
    select,
    update,
)
from sqlalchemy.exc import IntegrityError

from app.store.audit import current_actor, record_event
from app.store.cells import fill_cells_from_records, version_of
from app.store.engine import Gateway, bulk_insert
from app.store.raw_rows import RawCells, read_raw, store_raw
from app.store.records import (
    MAX_ID,
    RejectedRow,
    Roster,
    RosterSettings,
    StoreError,
    now_iso,
)
from app.store.tables import (
    DEPARTURE_FIELDS,
    STORED_FIELDS,
    departures,
    rejected_rows,
    roster_settings,
    roster_versions,
    rosters,
    runs,
)


class RosterQueries(Gateway):
    """Reads and writes of rosters, their departures and rejected rows, and roster settings."""

    def save_import(
        self,
        *,
        name: str,
        source_name: str,
        sha256: str,
        rows_total: int,
        duplicates: int,
        columns: Mapping[str, str],
        records: pd.DataFrame,
        rejected: Sequence[RejectedRow],
        into: int | None = None,
        raw: RawCells | None = None,
    ) -> Roster:
        """Store one roster (or, with ``into``, the next version of that roster) with all its accepted and
        rejected rows in a single transaction.

        ``records`` has the columns of ``DEPARTURE_FIELDS``. Either everything lands or nothing does. A new
        version leaves the earlier ones stored (their departures, rejected rows and cells) and becomes the
        roster's newest; ``name`` is ignored then. ``raw``: the records' cells as the file had them, when
        ``records`` has no ``raw`` column (stored per batch in ``departure_raw``, never as one JSON text per row).
        """
        if "reason_raw" not in records.columns and "reason" in records.columns:
            records = records.assign(reason_raw=records["reason"])
        # optional fields (issue 16): records from a file without announcement dates may leave them out
        records = records.assign(**{c: None for c in ("announced", "notice_days") if c not in records.columns})
        missing = [c for c in DEPARTURE_FIELDS if c not in records.columns and not (c == "raw" and raw is not None)]
        if missing:
            raise StoreError(f"records lack columns {missing}")
        figures = {"source_name": source_name, "sha256": sha256, "imported_at": now_iso(),
                   "rows_total": rows_total, "accepted": len(records), "rejected": len(rejected),
                   "duplicates": duplicates, "columns": json.dumps(dict(columns))}
        taken = StoreError(f"A roster named {name!r} already exists; choose another name.")
        try:
            return self._save_import(name, figures, records, rejected, into, raw, taken)
        except IntegrityError as exc:
            # another process stored a roster of this name between our check and our insert
            if into is None:
                with self.engine.connect() as conn:
                    if conn.execute(select(rosters.c.id).where(rosters.c.name == name)).first():
                        raise taken from exc
            raise

    def _save_import(self, name: str, figures: dict[str, Any], records: pd.DataFrame,
                     rejected: Sequence[RejectedRow], into: int | None,
                     raw: RawCells | None, taken: StoreError) -> Roster:
        with self._tx() as conn:
            if into is None:
                if conn.execute(select(rosters.c.id).where(rosters.c.name == name)).first():
                    raise taken
                version = 1
                roster_id = int(conn.execute(insert(rosters).values(name=name, version=1, **figures))
                                .inserted_primary_key[0])  # type: ignore[index]
                conn.execute(insert(roster_settings).values(roster_id=roster_id))
                record_event(conn, "import", f"roster:{roster_id}", {
                    "name": name, "source": figures["source_name"], "accepted": len(records), "rejected": len(rejected)})
            else:
                roster_id = int(into)
                # the next version number is taken by an atomic increment, this transaction's first write: a
                # refresh of the same roster by another process waits for it and then takes the number after
                # (reading the number first let two processes both take it: tests/test_roster_versions.py)
                conn.execute(update(rosters).where(rosters.c.id == roster_id)
                             .values(version=rosters.c.version + 1, **figures))
                current = conn.execute(select(rosters.c.version, rosters.c.name)
                                       .where(rosters.c.id == roster_id)).first()
                if current is None:
                    raise StoreError(f"No roster number {roster_id} is stored; it may have been deleted.")
                version = int(current.version)
                record_event(conn, "import_version", f"roster:{roster_id}", {
                    "name": current.name, "version": version, "source": figures["source_name"],
                    "accepted": len(records), "rejected": len(rejected)})
            conn.execute(insert(roster_versions).values(roster_id=roster_id, version=version,
                                                        author=current_actor(), **figures))
            if len(records):
                bulk_insert(conn, departures, records, {"roster_id": roster_id, "version": version},
                            columns=list(STORED_FIELDS))
                store_raw(conn, roster_id, version, records["line"].to_numpy(),
                          raw if raw is not None else list(records["raw"]))
                fill_cells_from_records(conn, roster_id, version, records)
            if rejected:
                conn.execute(
                    insert(rejected_rows),
                    [{"roster_id": roster_id, "version": version, "line": r.line, "raw": r.raw,
                      "reason": r.reason} for r in rejected],
                )
        return self.get_roster(roster_id, version=version)

    @staticmethod
    def _bulk_insert(conn: Connection, table: Table, frame: pd.DataFrame) -> None:
        """Insert many rows inside the caller's transaction (see :func:`app.store.engine.bulk_insert`)."""
        bulk_insert(conn, table, frame)

    def _roster_from_row(self, row: Any, at: Any = None) -> Roster:
        """A roster as of its newest version, or as of version ``at`` (a ``roster_versions`` row)."""
        m = row._mapping
        v = m if at is None else at._mapping
        return Roster(
            id=m["id"], name=m["name"], source_name=v["source_name"], sha256=v["sha256"],
            imported_at=v["imported_at"], rows_total=v["rows_total"], accepted=v["accepted"],
            rejected=v["rejected"], duplicates=v["duplicates"], columns=json.loads(v["columns"]),
            version=int(v["version"]), latest_version=int(m["version"]),
        )

    def list_rosters(self) -> list[Roster]:
        with self.engine.connect() as conn:
            return [self._roster_from_row(r) for r in conn.execute(select(rosters).order_by(rosters.c.id))]

    def get_roster(self, ref: int | str, *, version: int | None = None) -> Roster:
        """Find a roster by id or by name, as of ``version`` (default: its newest); raise ``StoreError``
        naming what was asked for."""
        with self.engine.connect() as conn:
            row = None
            numeric = isinstance(ref, int) or (isinstance(ref, str) and ref.isdecimal())
            if numeric and 0 < int(ref) <= MAX_ID:
                row = conn.execute(select(rosters).where(rosters.c.id == int(ref))).first()
            if row is None:
                row = conn.execute(select(rosters).where(rosters.c.name == str(ref))).first()
            at = None
            if row is not None and version is not None and version != row.version:
                at = conn.execute(select(roster_versions).where(
                    roster_versions.c.roster_id == row.id, roster_versions.c.version == version)).first()
                if at is None:
                    raise StoreError(f"Roster {row.name!r} has no version {version}; its versions are "
                                     f"1 to {row.version}.")
        if row is None:
            names = [r.name for r in self.list_rosters()]
            known = f"stored rosters: {', '.join(repr(n) for n in names[:10])}" if names else "no roster is stored yet"
            raise StoreError(f"No roster called {ref!r}; {known}.")
        return self._roster_from_row(row, at)

    def roster_versions(self, roster_id: int) -> list[Roster]:
        """Every stored version of a roster, oldest first (each as the roster looked at that version)."""
        with self.engine.connect() as conn:
            row = conn.execute(select(rosters).where(rosters.c.id == roster_id)).first()
            if row is None:
                raise StoreError(f"No roster number {roster_id} is stored.")
            versions = conn.execute(select(roster_versions).where(roster_versions.c.roster_id == roster_id)
                                    .order_by(roster_versions.c.version)).all()
        return [self._roster_from_row(row, v) for v in versions]

    def find_roster_by_sha(self, sha256: str) -> Roster | None:
        """The roster (as of that version) some version of which was imported from exactly these bytes."""
        with self.engine.connect() as conn:
            hit = conn.execute(select(roster_versions.c.roster_id, roster_versions.c.version)
                               .where(roster_versions.c.sha256 == sha256)
                               .order_by(roster_versions.c.id.desc())).first()
            if hit is None:  # a roster whose version rows are missing (never: the migration fills them)
                row = conn.execute(select(rosters.c.id, rosters.c.version).where(rosters.c.sha256 == sha256)).first()
                hit = row
        return None if hit is None else self.get_roster(int(hit[0]), version=int(hit[1]))

    def roster_name_taken(self, name: str) -> bool:
        with self.engine.connect() as conn:
            return conn.execute(select(rosters.c.id).where(rosters.c.name == name)).first() is not None

    def delete_roster(self, roster_id: int) -> None:
        """Delete a roster with its rows and settings; its runs stay (readable as "roster deleted"),
        and the ones still queued or running are asked to stop."""
        with self._tx() as conn:
            conn.execute(update(runs).where(runs.c.roster_id == roster_id, runs.c.status.in_(("queued", "running")))
                         .values(cancel_requested=True))
            name = conn.execute(select(rosters.c.name).where(rosters.c.id == roster_id)).scalar()
            conn.execute(delete(rosters).where(rosters.c.id == roster_id))
            record_event(conn, "roster_delete", f"roster:{roster_id}", {"name": name})

    def departures(self, roster_id: int, *, with_raw: bool = False, version: int | None = None) -> pd.DataFrame:
        """All accepted departures of a roster version (default: the newest), one row each, in source-line
        order; ``with_raw`` adds ``raw``, each row as the file had it (JSON)."""
        cols = [departures.c[f] for f in STORED_FIELDS]
        with self.engine.connect() as conn:
            number = conn.execute(select(version_of(roster_id, version))).scalar()
            result = conn.execute(
                select(departures.c.id, *cols).where(departures.c.roster_id == roster_id,
                                                     departures.c.version == number)
                .order_by(departures.c.line)
            )
            frame = pd.DataFrame(result.fetchall(), columns=list(result.keys()))
            if with_raw:
                # a batch at a time, in stored order (app/store/raw_rows.py); matched to records by source line
                by_line = {line: raw for lines, rows in read_raw(conn, roster_id, int(number or 0))
                           for line, raw in zip(lines, rows, strict=True)}
                frame["raw"] = [by_line.get(int(line)) for line in frame["line"]]
        frame["year"] = frame["year"].astype("int64")
        for c in ("age", "tenure"):
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype("float64")
        return frame

    def rejected(self, roster_id: int, *, version: int | None = None) -> list[RejectedRow]:
        """The rejected rows of a roster version (default: the newest), in line order."""
        r = rejected_rows.c
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(r.line, r.raw, r.reason)
                .where(r.roster_id == roster_id, r.version == version_of(roster_id, version)).order_by(r.line)
            )
            return [RejectedRow(line=r.line, raw=r.raw, reason=r.reason) for r in rows]

    def reason_counts(self, roster_id: int, *, version: int | None = None) -> pd.DataFrame:
        """Reason code, departures with it, first and last year seen (default: the newest version)."""
        with self.engine.connect() as conn:
            result = conn.execute(
                select(
                    departures.c.reason.label("code"), func.count().label("count"),
                    func.min(departures.c.year).label("first_year"),
                    func.max(departures.c.year).label("last_year"),
                )
                .where(departures.c.roster_id == roster_id, departures.c.version == version_of(roster_id, version))
                .group_by(departures.c.reason).order_by(func.count().desc(), departures.c.reason)
            )
            return pd.DataFrame(result.fetchall(), columns=list(result.keys()))

    # -- roster settings -----------------------------------------------------------------------
    def settings(self, roster_id: int) -> RosterSettings:
        with self.engine.connect() as conn:
            row = conn.execute(select(roster_settings).where(roster_settings.c.roster_id == roster_id)).first()
        if row is None:
            return RosterSettings(roster_id, None, None)
        window = None
        if row.window_from is not None and row.window_to is not None:
            window = (int(row.window_from), int(row.window_to))
        return RosterSettings(roster_id, row.mapping_name, window)

    def update_settings(
        self, roster_id: int, *, mapping_name: str | None = None,
        window: tuple[int, int] | None = None, clear_window: bool = False,
    ) -> RosterSettings:
        values: dict[str, Any] = {}
        if mapping_name is not None:
            values["mapping_name"] = mapping_name
        if window is not None:
            values["window_from"], values["window_to"] = window
        if clear_window:
            values["window_from"] = values["window_to"] = None
        with self._tx() as conn:
            exists = conn.execute(
                select(roster_settings.c.roster_id).where(roster_settings.c.roster_id == roster_id)
            ).first()
            if exists is None:
                conn.execute(insert(roster_settings).values(roster_id=roster_id, **values))
            elif values:
                conn.execute(update(roster_settings).where(roster_settings.c.roster_id == roster_id)
                             .values(**values))
            if values:
                record_event(conn, "roster_settings", f"roster:{roster_id}", values)
        return self.settings(roster_id)
