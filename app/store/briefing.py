"""Per-roster briefing settings: the title, author, date, marking and takeaway sentences exports carry."""

from __future__ import annotations

import json
from collections.abc import Mapping

from sqlalchemy import delete, insert, select

from app.store.audit import record_event
from app.store.engine import Gateway
from app.store.records import BriefingSettings, StoreError, now_iso
from app.store.tables import briefing_settings, rosters


class BriefingQueries(Gateway):
    """Reads and writes of a roster's briefing settings (one row per roster, replaced on save)."""

    def briefing_settings(self, roster_id: int) -> BriefingSettings:
        """The saved settings, or empty ones (all defaults) when none were saved."""
        with self.engine.connect() as conn:
            row = conn.execute(select(briefing_settings).where(briefing_settings.c.roster_id == roster_id)).first()
        if row is None:
            return BriefingSettings(roster_id, takeaways={})
        m = row._mapping
        return BriefingSettings(roster_id, m["title"], m["author"], m["marking"], m["date"],
                                dict(json.loads(m["takeaways"])), m["updated_at"])

    def save_briefing_settings(self, roster_id: int, *, title: str, author: str, marking: str, date: str,
                               takeaways: Mapping[str, str]) -> BriefingSettings:
        """Replace the roster's settings in one transaction (validated by the caller, app.briefing.signature)."""
        with self._tx() as conn:
            if conn.execute(select(rosters.c.id).where(rosters.c.id == roster_id)).first() is None:
                raise StoreError(f"No roster number {roster_id} is stored.")
            conn.execute(delete(briefing_settings).where(briefing_settings.c.roster_id == roster_id))
            conn.execute(insert(briefing_settings).values(
                roster_id=roster_id, title=title, author=author, marking=marking, date=date,
                takeaways=json.dumps(dict(takeaways), sort_keys=True), updated_at=now_iso()))
            record_event(conn, "briefing_settings", f"roster:{roster_id}", {
                "title": title, "author": author, "marking": marking, "date": date,
                "takeaways": sorted(takeaways)})
        return self.briefing_settings(roster_id)
