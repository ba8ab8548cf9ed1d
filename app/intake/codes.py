"""One reason code per spelling: spellings that differ only in case, spaces, dashes or quotes are one code.

The code shown is the group's most frequent spelling (surrounding spaces trimmed; the earliest on a tie);
each record keeps its raw spelling beside it. Matching uses :func:`app.stats.cells.code_key`, the same key
mapping files and saved mappings are matched with.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from app.stats.cells import code_key

__all__ = ["CodeGroup", "code_key", "group_spellings"]


@dataclass(frozen=True)
class CodeGroup:
    """A reason code as shown, how many rows carry it, and its spellings with their row counts."""

    code: str
    count: int
    variants: tuple[tuple[str, int], ...]


def group_spellings(values: pd.Series) -> tuple[dict[str, str], list[CodeGroup]]:
    """Shown code per distinct raw spelling, and the groups that have more than one spelling.

    ``values`` are raw cells (one per row); blanks are ignored.
    """
    counts = values[values.str.strip() != ""].value_counts(sort=False)
    if counts.empty:
        return {}, []
    frame = pd.DataFrame({"raw": counts.index.astype(str), "n": counts.to_numpy()})
    frame["shown"] = frame["raw"].str.strip().str.replace(r"\s+", " ", regex=True)
    frame["key"] = frame["raw"].map(code_key)
    per_shown = frame.groupby(["key", "shown"], sort=False)["n"].sum().reset_index()
    # stable sort: on equal counts the spelling seen first wins
    best = per_shown.sort_values("n", ascending=False, kind="stable").drop_duplicates("key")
    shown_by_key = dict(zip(best["key"], best["shown"], strict=True))
    canonical = {raw: shown_by_key[key] for raw, key in zip(frame["raw"], frame["key"], strict=True)}
    groups: list[CodeGroup] = []
    for key, part in frame.groupby("key", sort=False):
        if len(part) > 1:
            variants = tuple(sorted(((str(r), int(n)) for r, n in zip(part["raw"], part["n"], strict=True)),
                                    key=lambda v: -v[1]))
            groups.append(CodeGroup(shown_by_key[str(key)], int(part["n"].sum()), variants))
    groups.sort(key=lambda g: -g.count)
    return canonical, groups
