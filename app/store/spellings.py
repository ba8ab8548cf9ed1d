"""Reason-code spellings: how each shown code was written in the file, with counts (the Reason codes page).

A record keeps its own spelling in ``departures.reason_raw`` beside the shown code ``reason`` (issue 14). Records
stored before that column existed have no raw spelling; they count under the shown code itself.
"""

from __future__ import annotations

import pandas as pd
from sqlalchemy import func, select

from app.store.cells import version_of
from app.store.engine import Gateway
from app.store.tables import departures


class SpellingQueries(Gateway):
    """Reads of the raw spellings behind each reason code."""

    def reason_spellings(self, roster_id: int, *, version: int | None = None) -> pd.DataFrame:
        """``code``, ``spelling``, ``count`` for one roster version (default: the newest): one row per shown
        code and raw spelling, most frequent first within a code, then by spelling."""
        d = departures.c
        spelling = func.coalesce(d.reason_raw, d.reason)
        count = func.count().label("count")
        with self.engine.connect() as conn:
            rows = conn.execute(
                select(d.reason.label("code"), spelling.label("spelling"), count)
                .where(d.roster_id == roster_id, d.version == version_of(roster_id, version))
                .group_by(d.reason, spelling).order_by(d.reason, count.desc(), spelling)
            ).all()
        frame = pd.DataFrame.from_records([tuple(r) for r in rows], columns=["code", "spelling", "count"])
        return frame.astype({"code": object, "spelling": object, "count": "int64"})
