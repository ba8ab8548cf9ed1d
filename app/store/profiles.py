"""Intake profiles: how one source's files are read, saved under a name and offered when a file's headers match.

A profile holds the column roles, the header row, the date reading and the fiscal-year end of an import. A later
file from the same source is recognised by its header set (the same header names, in any order).
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

from sqlalchemy import delete, insert, select, update

from app.store.audit import record_event
from app.store.engine import Gateway
from app.store.records import MAX_ID, StoreError, now_iso
from app.store.tables import intake_profiles

#: the longest profile name accepted (it is shown in a select box and a command line)
PROFILE_NAME_MAX = 80


@dataclass(frozen=True)
class IntakeProfile:
    """One saved way of reading a source's files."""

    id: int
    name: str
    headers: tuple[str, ...]
    roles: dict[str, str]
    header_row: int | None
    date_order: str
    fy_end: int
    created_at: str
    updated_at: str


def header_set(headers: Iterable[str]) -> tuple[str, ...]:
    """The key a file is recognised by: its distinct header names, surrounding spaces trimmed, sorted."""
    return tuple(sorted({str(h).strip() for h in headers if str(h).strip()}))


def _profile(row: object) -> IntakeProfile:
    r = row._mapping  # type: ignore[attr-defined]
    return IntakeProfile(
        id=int(r["id"]), name=str(r["name"]), headers=tuple(json.loads(r["headers"])),
        roles=dict(json.loads(r["roles"])), header_row=None if r["header_row"] is None else int(r["header_row"]),
        date_order=str(r["date_order"]), fy_end=int(r["fy_end"]), created_at=str(r["created_at"]),
        updated_at=str(r["updated_at"]),
    )


class ProfileQueries(Gateway):
    """Reads and writes of intake profiles."""

    def save_profile(self, name: str, *, headers: Iterable[str], roles: Mapping[str, str], header_row: int | None,
                     date_order: str, fy_end: int) -> IntakeProfile:
        """Save (or, for a name already saved, replace) a profile; one audit event in the same transaction."""
        name = name.strip()
        if not name or len(name) > PROFILE_NAME_MAX:
            raise StoreError(f"A profile name must be 1 to {PROFILE_NAME_MAX} characters; got {name!r}.")
        if date_order not in ("auto", "dmy", "mdy"):
            raise StoreError(f"date_order must be auto, dmy or mdy; got {date_order!r}.")
        if not 1 <= int(fy_end) <= 12:
            raise StoreError(f"The fiscal-year end must be a month number 1..12; got {fy_end!r}.")
        keys = header_set(headers)
        missing = sorted(h for h in roles.values() if h.strip() not in keys)
        if missing:
            raise StoreError(f"Profile {name!r} names column(s) {', '.join(map(repr, missing))} that are not among "
                             f"the file's headers.")
        values = {"headers": json.dumps(list(keys)), "roles": json.dumps(dict(sorted(roles.items()))),
                  "header_row": header_row, "date_order": date_order, "fy_end": int(fy_end), "updated_at": now_iso()}
        with self.engine.begin() as conn:
            existing = conn.execute(select(intake_profiles.c.id).where(intake_profiles.c.name == name)).first()
            if existing is None:
                conn.execute(insert(intake_profiles).values(name=name, created_at=values["updated_at"], **values))
            else:
                conn.execute(update(intake_profiles).where(intake_profiles.c.id == existing.id).values(**values))
            record_event(conn, "intake_profile", f"profile:{name}",
                         {"roles": dict(roles), "header_row": header_row, "date_order": date_order,
                          "fy_end": int(fy_end), "replaced": existing is not None})
        return self.get_profile(name)

    def get_profile(self, name: str) -> IntakeProfile:
        """The profile saved under ``name``; ``StoreError`` naming the saved ones when there is none."""
        with self.engine.connect() as conn:
            row = conn.execute(select(intake_profiles).where(intake_profiles.c.name == name)).first()
        if row is None:
            names = [p.name for p in self.list_profiles()]
            raise StoreError(f"No intake profile is named {name!r}; "
                             + (f"saved profiles: {', '.join(names)}." if names else "none is saved yet."))
        return _profile(row)

    def list_profiles(self) -> list[IntakeProfile]:
        """Every saved profile, by name."""
        with self.engine.connect() as conn:
            rows = conn.execute(select(intake_profiles).order_by(intake_profiles.c.name)).all()
        return [_profile(r) for r in rows]

    def profiles_for_headers(self, headers: Iterable[str]) -> list[IntakeProfile]:
        """Profiles saved from a file with exactly this header set (any order), most recently saved first."""
        key = json.dumps(list(header_set(headers)))
        with self.engine.connect() as conn:
            rows = conn.execute(select(intake_profiles).where(intake_profiles.c.headers == key)
                                .order_by(intake_profiles.c.updated_at.desc(), intake_profiles.c.id.desc())).all()
        return [_profile(r) for r in rows]

    def profile_by_id(self, profile_id: int) -> IntakeProfile:
        """The profile with this id; ``StoreError`` when there is none (ids are never reused)."""
        row = None
        if 0 < int(profile_id) <= MAX_ID:  # a larger id cannot exist, and the driver refuses it (a 500)
            with self.engine.connect() as conn:
                row = conn.execute(select(intake_profiles).where(intake_profiles.c.id == int(profile_id))).first()
        if row is None:
            raise StoreError(f"No intake profile number {profile_id} is saved; it may have been deleted.")
        return _profile(row)

    def delete_profile(self, ref: int | str) -> IntakeProfile:
        """Delete the profile with this id (int) or name (str); one audit event in the same transaction.

        Rosters imported with it are untouched: a profile only says how files are read.
        """
        profile = self.profile_by_id(ref) if isinstance(ref, int) else self.get_profile(ref)
        with self.engine.begin() as conn:
            gone = conn.execute(delete(intake_profiles).where(intake_profiles.c.id == profile.id)).rowcount
            if not gone:
                raise StoreError(f"Intake profile {profile.name!r} was deleted meanwhile.")
            record_event(conn, "intake_profile_delete", f"profile:{profile.name}", {"id": profile.id})
        return profile
