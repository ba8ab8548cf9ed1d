"""Reason-code spellings: how each shown code was written in the file, with counts (the Reason codes page).

A record keeps its own spelling in ``departures.reason_raw`` beside the shown code ``reason`` (issue 14); the
counts per spelling are kept with the cells (``roster_spellings``, filled with them on import), so this page
reads a few rows, never the departures. Records stored before raw spellings existed count under their code.
"""

from __future__ import annotations

import pandas as pd
from sqlalchemy import func, select

from app.store.cells import version_of
from app.store.engine import Gateway
from app.store.tables import roster_spellings


class SpellingQueries(Gateway):
    """Reads of the raw spellings behind each reason code."""

    def reason_spellings(self, roster_id: int, *, version: int | None = None) -> pd.DataFrame:
        """``code``, ``spelling``, ``count`` for one roster version (default: the newest): one row per shown
        code and raw spelling, most frequent first within a code, then by spelling."""
        c = roster_spellings.c
        count = func.sum(c.departures).label("count")
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(c.reason.label("code"), c.spelling.label("spelling"), count)
                .where(c.roster_id == roster_id, c.version == version_of(roster_id, version))
                .group_by(c.reason, c.spelling).order_by(c.reason, count.desc(), c.spelling)
            ).all()
        frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=["code", "spelling", "count"])
        return frame.astype({"code": object, "spelling": object, "count": "int64"})
