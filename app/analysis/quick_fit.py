"""A fit already recorded for the same counts, printed again in plain Python (issue 13: ``helmshift fit`` < 0.5 s).

``helmshift fit`` with the straight or spline trend first looks here. From a SQLite store at the schema's head
(``app.store.quick``: stdlib ``sqlite3``), it reads the roster, its mapping version and its cells, applies
the same steps as ``load_input`` and ``stored_summary`` in plain Python (categories by code key, the
coverage window rule of ``app.stats.window_rule``, the unmapped-code warning, the counts' fingerprint) and,
when a finished fit run of these counts, window, options and statistics code exists, returns the payload
``fit_summary`` would print. It imports neither numpy, pandas, SQLAlchemy, scipy nor statsmodels, which
together take seconds to import on the 2-core machine. Anything it does not handle (another backend, a
mapping with classification rules, no matching run, an input ``load_input`` would refuse) gives None, and
the caller takes the ordinary path, which also says what is wrong. tests/test_quick_fit.py checks every
step against the ordinary path.

Also here, because both paths need them without pandas: the statistics-code tag a stored fit carries,
the options a fit run records, ``parse_mapping_ref`` and the input warnings' wording.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
import sqlite3
from functools import cache
from pathlib import Path
from typing import Any

from app import __version__
from app.stats.codekeys import code_key
from app.stats.window_rule import longest_run
from app.store.quick import QuickReader, open_quick
from app.types import UNMAPPED

STATS_DIR = Path(__file__).resolve().parents[1] / "stats"
#: the fields of ``helmshift fit --json`` that come from the fit itself (the rest are labels and warnings)
SUMMARY_KEYS = ("fitted_share", "headline")
#: where a fit run's result keeps its profile-likelihood ends for the next fit of the same counts (not printed)
PROFILE_KEY = "profile_bounds"
#: the coverage rule ``load_input`` applies by default (not_excluded basis)
DEFAULT_THRESHOLD = 0.5
NOTHING_COUNTED = ("The mapping counts no departure as forced or voluntary (every code is excluded), so there is "
                   "nothing to fit; change the categories on the Reason codes page.")


@cache
def engine_tag() -> str:
    """Names the statistics code a stored result came from: any change to ``app/stats`` gives a new tag.

    A stored fit is served again only under the same tag, so a changed engine never prints old numbers.
    """
    digest = hashlib.sha256(__version__.encode())
    for path in sorted(STATS_DIR.glob("*.py")):
        digest.update(path.name.encode() + b"\0" + path.read_bytes() + b"\0")
    return digest.hexdigest()[:16]


def fit_params(model: str, spline_df: int, quasi: bool) -> dict[str, Any]:
    """The options a fit run records (and is matched on)."""
    return ({"model": model} | ({"spline_df": spline_df} if model == "spline" else {})
            | ({"quasi": True} if quasi else {}))


def parse_mapping_ref(ref: str) -> tuple[str, int | None]:
    """``NAME`` or ``NAME:VERSION``."""
    name, sep, version = ref.rpartition(":")
    if sep and version.isdigit():
        return name, int(version)
    return ref, None


def warning_notes(nothing_counted: bool, unmapped: list[tuple[str, int]]) -> list[str]:
    """``AnalysisInput.warnings``: nothing counted, and the window's codes without a category."""
    notes: list[str] = [NOTHING_COUNTED] if nothing_counted else []
    if unmapped:
        total = sum(count for _, count in unmapped)
        notes.append(
            f"{len(unmapped)} reason code(s) covering {total} departure(s) in the window have no "
            "category and are left out; map them on the Reason codes page."
        )
    return notes


def groups_csv_fingerprint(rows: list[tuple[int, str, int, int]]) -> str:
    """``app.stats.cells.groups_fingerprint`` of (year, sector, forced, voluntary) rows: the sha256 of the
    CSV pandas writes for them (the csv module, as pandas uses it; a test checks they agree)."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["year", "sector", "forced", "voluntary"])
    writer.writerows(rows)
    return hashlib.sha256(out.getvalue().encode()).hexdigest()[:16]


def _plain(value: Any) -> Any:
    """``app.jsonable.jsonable`` for values read back from JSON: only non-finite floats change (to null)."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_plain(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def quick_summary(url: str, roster_ref: int | str, *, mapping: str | None = None,
                  window: tuple[int, int] | None = None, model: str = "linear", spline_df: int = 3,
                  quasi: bool = False) -> dict[str, Any] | None:
    """What ``fit_summary(..., reuse=True)`` prints for a recorded fit, or None (take the ordinary path)."""
    if model not in ("linear", "spline"):
        return None
    reader = open_quick(url)
    if reader is None:
        return None
    try:
        return _summary(reader, roster_ref, mapping, window, fit_params(model, spline_df, quasi))
    except sqlite3.Error:  # a locked or unreadable file: the ordinary path waits for it or says what is wrong
        return None
    finally:
        reader.close()


def _summary(reader: QuickReader, roster_ref: int | str, mapping_ref: str | None, given: tuple[int, int] | None,
             params: dict[str, Any]) -> dict[str, Any] | None:
    roster = reader.roster(roster_ref)
    if roster is None:
        return None
    chosen_mapping, chosen_window = reader.settings(roster.id)
    if mapping_ref:
        mapping = reader.mapping(*parse_mapping_ref(mapping_ref))
    else:
        mapping = reader.mapping(chosen_mapping) if chosen_mapping else None
    # refused, or rules need the detailed cells, or case overrides move single departures: the ordinary path
    if mapping is None or mapping.has_rules or mapping.has_overrides:
        return None
    cells = reader.cells(roster.id, roster.version)
    if not cells:
        return None
    by_key = {code_key(code): category for code, category in mapping.categories.items()}
    keys: dict[str, str] = {}
    categorised = [(year, reason, by_key.get(keys.setdefault(reason, code_key(reason)), UNMAPPED), n)
                   for year, _sector, reason, n in cells]

    first, last = min(c[0] for c in categorised), max(c[0] for c in categorised)
    if given is not None:
        if given[0] > last or given[1] < first:
            return None
        window = (max(int(given[0]), first), min(int(given[1]), last))
    elif chosen_window is not None:
        window = chosen_window
    else:
        covered = [0] * (last - first + 1)  # every year of the span, gaps as zero (basis: all but excluded)
        for year, _reason, category, n in categorised:
            if category != "excluded":
                covered[year - first] += n
        if sum(covered) <= 0:
            return None
        _median, _cutoff, _passes, (lo, hi) = longest_run(covered, DEFAULT_THRESHOLD)
        window = (first + lo, first + hi)

    groups: dict[int, list[int]] = {}
    unmapped: dict[str, int] = {}
    for year, reason, category, n in categorised:
        if not window[0] <= year <= window[1]:
            continue
        if category in ("forced", "voluntary"):
            counts = groups.setdefault(year, [0, 0])
            counts[category == "voluntary"] += n
        elif category == UNMAPPED:
            unmapped[reason] = unmapped.get(reason, 0) + n
    rows = [(year, "", f, v) for year, (f, v) in sorted(groups.items())]
    fingerprint = groups_csv_fingerprint(rows)
    tag = engine_tag()
    for run in reader.fit_runs(roster.id):  # newest first, as ``stored_fit`` takes the highest id
        result = run["result"]
        if (run["fingerprint"] == fingerprint and run["params"] == params and run["window"] == window
                and run["roster_version"] == roster.version and run["mapping_name"] == mapping.name
                and run["mapping_version"] == mapping.version and isinstance(result, dict)
                and result.get("engine") == tag and all(key in result for key in SUMMARY_KEYS)):
            break
    else:
        return None
    nothing = not any(category in ("forced", "voluntary") for _, _, category, _ in categorised)
    listed = sorted(((code, n) for code, n in unmapped.items() if n > 0), key=lambda item: (-item[1], item[0]))
    # the same keys in the same order as ``stored_summary``
    payload = {k: v for k, v in result.items() if k not in ("engine", PROFILE_KEY, "fitted_share", "headline")}
    payload.update({"roster": roster.name, "mapping": f"{mapping.name} v{mapping.version}", "run": run["id"],
                    "sentence": result["sentence"], "warnings": warning_notes(nothing, listed),
                    "fitted_share": result["fitted_share"], "headline": result["headline"]})
    return dict(_plain(payload))
