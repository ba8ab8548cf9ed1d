"""The original rows of a roster version (provenance), stored per insert batch in ``departure_raw``.

A departure's ``raw`` is its source row as JSON, ``{"header": "cell", ...}`` in the file's column order
(``row_json``). An import stores each batch of up to ``BATCH_ROWS`` accepted rows as one zlib-compressed JSON
document: the batch's source lines, the file's header and the rows' cells column by column (repeated values
compress to almost nothing; one ``json.dumps`` of a few lists instead of a million small ones). Rows moved
out of the old ``departures.raw`` column by revision 0016 are stored as their JSON text (``"rows"``), byte for
byte. Reading rebuilds each row's JSON with the same ``row_json`` the import used, so a row reads back exactly
as it was written.
"""

from __future__ import annotations

import json
import zlib
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from json.encoder import encode_basestring
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import Connection, insert, select

from app.store.tables import departure_raw

#: rows per stored batch (the import's executemany batch)
RAW_BATCH = 50_000
#: rows whose JSON is built at a time: bounds the per-cell strings alive at once
_JSON_BLOCK = 100_000
#: cells looked at to tell a column of mostly distinct values
_PROBE = 2_000
#: zlib level 1: a third of level 6's CPU for ~1.3x its size on roster columns (benchmarks/README.md)
_LEVEL = 1


def shared_map(values: np.ndarray, fn: Callable[[str], object]) -> np.ndarray:
    """``fn`` applied to every cell, computed once per distinct value (most roster columns repeat).

    A column whose first cells are mostly distinct (names, notes) is mapped cell by cell: hashing a million
    distinct strings to find the few repeats costs more than it saves.
    """
    head = values[:_PROBE]
    if len(values) > 2 * _PROBE and len(set(head.tolist())) * 2 > len(head):
        out = np.empty(len(values), dtype=object)
        out[:] = [fn(u) for u in values.tolist()]
        return out
    codes, uniq = pd.factorize(values)
    mapped = np.empty(len(uniq), dtype=object)
    mapped[:] = [fn(u) for u in uniq]
    return mapped[codes]


def row_json(headers: Sequence[str], columns: Sequence[np.ndarray]) -> list[str]:
    """``json.dumps(dict(zip(headers, row)), ensure_ascii=False)`` for every row, column-wise, in blocks."""
    template = "{" + ", ".join(json.dumps(h, ensure_ascii=False).replace("%", "%%") + ": %s"
                               for h in headers) + "}"
    out: list[str] = []
    n = len(columns[0]) if len(columns) else 0
    for start in range(0, n, _JSON_BLOCK):
        encoded = [shared_map(col[start:start + _JSON_BLOCK], encode_basestring) for col in columns]
        out.extend(template % r for r in zip(*encoded, strict=True))
    return out


@dataclass(frozen=True)
class RawCells:
    """The accepted rows' cells as the file had them: ``columns[j][i]`` is row *i*'s cell under ``headers[j]``
    (rows in the order of the records stored with them)."""

    headers: list[str]
    columns: list[np.ndarray]


def _pack(payload: dict[str, Any]) -> bytes:
    return zlib.compress(json.dumps(payload, ensure_ascii=False, separators=(",", ":")).encode("utf-8"), _LEVEL)


def store_raw(conn: Connection, roster_id: int, version: int, lines: np.ndarray,
              raw: RawCells | Sequence[str]) -> None:
    """Store the raw rows of one roster version inside the caller's transaction: ``lines`` are the records'
    source lines, ``raw`` their cells (an import) or their JSON texts, in the same order."""
    for seq, start in enumerate(range(0, len(lines), RAW_BATCH)):
        stop = min(start + RAW_BATCH, len(lines))
        part = [int(x) for x in lines[start:stop]]
        payload: dict[str, Any] = {"lines": part}
        if isinstance(raw, RawCells):
            payload |= {"headers": list(raw.headers), "columns": [c[start:stop].tolist() for c in raw.columns]}
        else:
            payload["rows"] = list(raw[start:stop])
        conn.execute(insert(departure_raw).values(roster_id=roster_id, version=version, seq=seq,
                                                  first_line=part[0], rows=len(part), data=_pack(payload)))


def unpack(data: bytes) -> tuple[list[int], list[str]]:
    """One stored batch: its source lines and each row's JSON."""
    payload = json.loads(zlib.decompress(data).decode("utf-8"))
    if "rows" in payload:
        return payload["lines"], payload["rows"]
    columns = [np.array(c, dtype=object) for c in payload["columns"]]
    return payload["lines"], row_json(payload["headers"], columns)


def read_raw(conn: Connection, roster_id: int, version: int) -> Iterator[tuple[list[int], list[str]]]:
    """The raw rows of one roster version, a stored batch at a time, in source-line order."""
    r = departure_raw.c
    query = (select(r.seq).where(r.roster_id == roster_id, r.version == version).order_by(r.seq))
    for seq in conn.execute(query).scalars().all():
        data = conn.execute(select(r.data).where(r.roster_id == roster_id, r.version == version,
                                                 r.seq == seq)).scalar_one()
        yield unpack(bytes(data))
