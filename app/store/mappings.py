"""Named, versioned reason-code mappings: every save is a new version; old versions stay readable.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from sqlalchemy import (
    Connection,
    func,
    insert,
    select,
)
from sqlalchemy.dialects import postgresql, sqlite

from app.store.audit import LOCAL_ACTOR, current_actor, record_event
from app.store.engine import Gateway
from app.store.records import (
    MAX_ID,
    OVERRIDE_NOTE_MAX,
    CaseOverride,
    MappingVersion,
    StoreError,
    check_name,
    now_iso,
)
from app.store.tables import (
    mapping_entries,
    mapping_overrides,
    mapping_rules,
    mapping_versions,
    mappings,
)
from app.types import CATEGORIES, ClassificationRule


class MappingConflict(StoreError):
    """A save based on a version of a mapping that is no longer its newest: nothing was saved."""

    def __init__(self, name: str, based_on: int, latest: int, author: str) -> None:
        self.name, self.based_on, self.latest, self.author = name, based_on, latest, author
        super().__init__(
            f"Mapping {name!r} was saved as version {latest} by {author} while you were editing version "
            f"{based_on}, so your changes were not saved; compare the two versions, then save again.")


def _lock_mapping(conn: Connection, name: str) -> int:
    """The id of mapping ``name`` (created when new), locked for this transaction, so that saves of one
    mapping take their version numbers one after the other. The first statement writes: SQLite then holds
    its write lock for the whole transaction (a reader could not become the writer after another save
    committed); on PostgreSQL the row stays locked (FOR UPDATE) until the transaction ends."""
    values: dict[str, Any] = {"name": name, "created_at": now_iso()}
    if conn.dialect.name in ("postgresql", "sqlite"):
        dialect_insert = postgresql.insert if conn.dialect.name == "postgresql" else sqlite.insert
        conn.execute(dialect_insert(mappings).values(**values).on_conflict_do_nothing(index_elements=["name"]))
        query = select(mappings.c.id).where(mappings.c.name == name)
        if conn.dialect.name == "postgresql":
            query = query.with_for_update()
        return int(conn.execute(query).scalar_one())
    row = conn.execute(select(mappings.c.id).where(mappings.c.name == name)).first()
    return int(row.id if row else conn.execute(insert(mappings).values(**values)).inserted_primary_key[0])  # type: ignore[index]


class MappingQueries(Gateway):
    """Reads and writes of mappings and their versions."""

    def save_mapping_version(
        self,
        name: str,
        categories: Mapping[str, str],
        labels: Mapping[str, str] | None = None,
        *,
        author: str = "analyst",
        note: str = "",
        rules: Sequence[ClassificationRule] = (),
        based_on: int | None = None,
        overrides: Sequence[CaseOverride] | None = None,
    ) -> MappingVersion:
        """Save ``categories`` (code -> category) and its classification ``rules`` (in evaluation order) as the
        next version of mapping ``name``. With ``based_on`` (the version the edit started from; 0 for a mapping
        that did not exist yet) the save is refused with :class:`MappingConflict` when a newer version was saved
        meanwhile: two analysts saving at once get two versions or a conflict, never a silently lost edit.

        ``overrides`` (case-level, :class:`CaseOverride`) are the new version's; ``None`` carries the newest
        version's overrides forward, so an edit of codes or rules never drops an analyst's override."""
        bad = sorted({c for c in [*categories.values(), *(r.category for r in rules),
                                  *(o.category for o in overrides or ())] if c not in CATEGORIES})
        if bad:
            raise StoreError(f"Unknown categories {bad}; allowed: {', '.join(CATEGORIES)}.")
        check_overrides(overrides or ())
        labels = labels or {}
        if current_actor() != LOCAL_ACTOR:
            author = current_actor()  # in team mode the signed-in account is the author, not a typed name
        with self._tx() as conn:
            try:
                check_name(name, "mapping name")
            except StoreError:
                # a new name is shown on every page and export; one stored before the check stays editable
                # (never one with a NUL: PostgreSQL cannot even compare it)
                if "\x00" in name or conn.execute(select(mappings.c.id).where(mappings.c.name == name)).first() is None:
                    raise
            mapping_id = _lock_mapping(conn, name)
            last = conn.execute(
                select(func.max(mapping_versions.c.version)).where(mapping_versions.c.mapping_id == mapping_id)
            ).scalar()
            if based_on is not None and (last or 0) != based_on:
                by = conn.execute(select(mapping_versions.c.author).where(
                    mapping_versions.c.mapping_id == mapping_id, mapping_versions.c.version == last)).scalar()
                raise MappingConflict(name, based_on, int(last or 0), str(by))
            version = (last or 0) + 1
            version_id = conn.execute(
                insert(mapping_versions).values(
                    mapping_id=mapping_id, version=version, created_at=now_iso(), author=author, note=note,
                )
            ).inserted_primary_key[0]  # type: ignore[index]
            if categories:
                conn.execute(insert(mapping_entries), [
                    {"version_id": version_id, "code": code, "category": cat, "label": labels.get(code, "")}
                    for code, cat in categories.items()
                ])
            if rules:
                conn.execute(insert(mapping_rules), [
                    {"version_id": version_id, "position": i, "code": r.code, "field": r.field,
                     "comparison": r.comparison, "value": int(r.value), "category": r.category}
                    for i, r in enumerate(rules, start=1)
                ])
            if overrides is None and last:
                overrides = _read_overrides(conn, _version_id(conn, mapping_id, int(last)))
            if overrides:
                conn.execute(insert(mapping_overrides), [
                    {"version_id": version_id, "position": i, **_override_row(o)}
                    for i, o in enumerate(overrides, start=1)
                ])
            record_event(conn, "mapping_version", f"mapping:{name}:{version}",
                         {"codes": len(categories), "rules": len(rules), "overrides": len(overrides or ()),
                          "note": note})
        return self.get_mapping(name, version)

    def list_mappings(self) -> list[tuple[str, int]]:
        """Every mapping name with its latest version number."""
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(mappings.c.name, func.max(mapping_versions.c.version))
                .join(mapping_versions, mapping_versions.c.mapping_id == mappings.c.id)
                .group_by(mappings.c.name).order_by(mappings.c.name)
            )
            return [(r[0], int(r[1])) for r in rows]

    def mapping_history(self, name: str) -> list[tuple[int, str, str, str]]:
        """(version, created_at, author, note) for each version of a mapping, oldest first."""
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(mapping_versions.c.version, mapping_versions.c.created_at,
                       mapping_versions.c.author, mapping_versions.c.note)
                .join(mappings, mapping_versions.c.mapping_id == mappings.c.id)
                .where(mappings.c.name == name).order_by(mapping_versions.c.version)
            )
            return [(int(r[0]), r[1], r[2], r[3]) for r in rows]

    def get_mapping(self, name: str, version: int | None = None) -> MappingVersion:
        """A version of a mapping (the latest when ``version`` is None)."""
        if version is not None and not 0 < version <= MAX_ID:
            raise StoreError(f"No version {version} of mapping {name!r} is stored.")
        with self.engine.connect() as conn:
            q = (select(mapping_versions).join(mappings, mapping_versions.c.mapping_id == mappings.c.id)
                 .where(mappings.c.name == name))
            q = (q.where(mapping_versions.c.version == version) if version is not None
                 else q.order_by(mapping_versions.c.version.desc()).limit(1))
            row = conn.execute(q).first()
            if row is None:
                what = f"version {version} of mapping {name!r}" if version is not None else f"mapping {name!r}"
                raise StoreError(f"No {what} is stored.")
            entries = conn.execute(
                select(mapping_entries.c.code, mapping_entries.c.category, mapping_entries.c.label)
                .where(mapping_entries.c.version_id == row.id).order_by(mapping_entries.c.code)
            ).fetchall()
            rules = conn.execute(
                select(mapping_rules).where(mapping_rules.c.version_id == row.id).order_by(mapping_rules.c.position)
            ).fetchall()
            overrides = _read_overrides(conn, int(row.id))
        return MappingVersion(
            overrides=overrides,
            name=name, version=int(row.version), created_at=row.created_at, author=row.author,
            note=row.note, categories={e.code: e.category for e in entries},
            labels={e.code: e.label for e in entries if e.label},
            rules=tuple(ClassificationRule(r.code, r.field, r.comparison, int(r.value), r.category)
                        for r in rules),
        )


# -- case-level overrides (issue 15) --------------------------------------------------------------------
_OVERRIDE_FIELDS = ("roster_id", "firm_id", "executive", "year", "reason", "occurrence", "departure_id",
                    "roster_version", "category", "note", "author", "created_at")


def check_overrides(overrides: Sequence[CaseOverride]) -> None:
    """Refuse overrides without a note, with an over-long note, or two naming the same departure."""
    seen: set[tuple[Any, ...]] = set()
    for o in overrides:
        if not o.note.strip():
            raise StoreError(f"The override of {o.describe()} needs a note saying why (e.g. the source).")
        if len(o.note) > OVERRIDE_NOTE_MAX:
            raise StoreError(f"The note of the override of {o.describe()} has {len(o.note):,} characters; "
                             f"at most {OVERRIDE_NOTE_MAX} are kept.")
        if o.identity() in seen:
            raise StoreError(f"Two overrides name the same departure ({o.describe()}); keep one.")
        seen.add(o.identity())


def _override_row(o: CaseOverride) -> dict[str, Any]:
    return {f: getattr(o, f) for f in _OVERRIDE_FIELDS}


def _version_id(conn: Connection, mapping_id: int, version: int) -> int:
    return int(conn.execute(select(mapping_versions.c.id).where(
        mapping_versions.c.mapping_id == mapping_id, mapping_versions.c.version == version)).scalar_one())


def _read_overrides(conn: Connection, version_id: int) -> tuple[CaseOverride, ...]:
    rows = conn.execute(select(mapping_overrides).where(mapping_overrides.c.version_id == version_id)
                        .order_by(mapping_overrides.c.position)).fetchall()
    return tuple(CaseOverride(**{f: getattr(r, f) for f in _OVERRIDE_FIELDS}) for r in rows)
