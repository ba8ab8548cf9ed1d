"""``helmshift fit`` of the straight or spline trend in plain Python (issue 13: ``helmshift fit`` < 0.5 s).

``helmshift fit`` with the straight or spline trend first looks here. From a SQLite store at the schema's head
(``app.store.quick``: stdlib ``sqlite3``), it reads the roster, its mapping version and its cells, applies
the same steps as ``load_input`` and ``stored_summary`` in plain Python (categories by code key, the
coverage window rule of ``app.stats.window_rule``, the unmapped-code warning, the counts' fingerprint) and,
when a finished fit run of these counts, window, options and statistics code exists, returns the payload
``fit_summary`` would print. With ``fit_new`` (the command line) counts no run records yet are fitted by
``app.stats.trend_line`` (the engine ``fit_trend`` itself uses for these models, so the numbers are the
ordinary path's to the last digit) and recorded through ``app.store.quick.record_fit_run`` as ``run_trend``
records them. It imports neither numpy, pandas, SQLAlchemy, scipy nor statsmodels, which
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
import time
from dataclasses import dataclass
from functools import cache
from pathlib import Path
from typing import Any

from app import __version__
from app.intake.in_post import is_still_in_post
from app.stats.codekeys import code_key
from app.stats.window_rule import longest_run
from app.store.quick import QuickMapping, QuickReader, QuickRoster, open_quick, record_fit_run
from app.types import UNMAPPED

STATS_DIR = Path(__file__).resolve().parents[1] / "stats"
#: the fields of ``helmshift fit --json`` that come from the fit itself (the rest are labels and warnings)
SUMMARY_KEYS = ("fitted_share", "headline")
#: where a fit run's result keeps its profile-likelihood ends for the next fit of the same counts (not printed)
PROFILE_KEY = "profile_bounds"
#: the coverage rule ``load_input`` applies by default (not_excluded basis)
DEFAULT_THRESHOLD = 0.5
#: who a run is recorded as when no one is named (``app.store.audit.LOCAL_ACTOR``, kept equal by a test)
LOCAL_ACTOR = "local analyst"
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
    if sep and version.isdecimal():
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
                  quasi: bool = False, fit_new: bool = False, actor: str | None = None) -> dict[str, Any] | None:
    """What ``fit_summary(..., reuse=True)`` prints for a recorded fit, or None (take the ordinary path).

    With ``fit_new`` counts that no run records yet are fitted here (``app.stats.trend_line``, the engine the
    ordinary path uses for these models) and recorded as the ordinary path records them, with ``actor`` as the
    run's author and in the audit trail: what ``fit_summary(..., reuse=False)`` prints.
    """
    if model not in ("linear", "spline"):
        return None
    reader = open_quick(url)
    if reader is None:
        return None
    try:
        found = _input(reader, roster_ref, mapping, window)
        if found is None:
            return None
        params = fit_params(model, spline_df, quasi)
        served = _served(reader, found, params)
        if served is not None or not fit_new:
            return served
    except sqlite3.Error:  # a locked or unreadable file: the ordinary path waits for it or says what is wrong
        return None
    finally:
        reader.close()
    try:
        return _fit_and_record(url, found, params, actor or LOCAL_ACTOR)
    except (sqlite3.Error, ArithmeticError, ValueError):
        # locked past the timeout, a search that did not converge, a number out of range: the ordinary path
        # (statsmodels where the plain engine declines) answers or says what is wrong; nothing was written
        return None


@dataclass(frozen=True)
class QuickInput:
    """What ``load_input`` gives a fit: the roster, mapping version, window, yearly counts and warnings."""

    roster: QuickRoster
    mapping: QuickMapping
    window: tuple[int, int]
    rows: list[tuple[int, str, int, int]]
    fingerprint: str
    warnings: list[str]

    def header(self, run_id: int) -> dict[str, Any]:
        return {"roster": self.roster.name, "mapping": f"{self.mapping.name} v{self.mapping.version}", "run": run_id}

    def matches(self, run: dict[str, Any], params: dict[str, Any]) -> bool:
        """``app.analysis.stored_fits.matches`` (and the keys a served fit needs)."""
        result = run["result"]
        return (run["fingerprint"] == self.fingerprint and run["params"] == params and run["window"] == self.window
                and run["roster_version"] == self.roster.version and run["mapping_name"] == self.mapping.name
                and run["mapping_version"] == self.mapping.version and isinstance(result, dict)
                and result.get("engine") == engine_tag() and all(key in result for key in SUMMARY_KEYS))


def _input(reader: QuickReader, roster_ref: int | str, mapping_ref: str | None, given: tuple[int, int] | None
           ) -> QuickInput | None:
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
    # still-in-post rows are no departure of any year: Coverage (``departures_only``) leaves them out
    in_post = reader.undated_counts(roster.id, roster.version, sorted({r for _, r, _, _ in categorised
                                                                      if is_still_in_post(r)}))
    # a row the mapping counts as forced or voluntary is taken as a departure after all (as the store does)
    in_post = [(year, reason, n) for year, reason, n in in_post
               if by_key.get(code_key(reason), UNMAPPED) not in ("forced", "voluntary")]
    in_post_categorised = [(year, by_key.get(code_key(reason), UNMAPPED), n) for year, reason, n in in_post]
    if given is not None:
        if given[0] > last or given[1] < first:
            return None
        window = (max(int(given[0]), first), min(int(given[1]), last))
    elif chosen_window is not None:
        window = chosen_window
    else:
        records = [0] * (last - first + 1)
        covered = [0] * (last - first + 1)  # every year of the span, gaps as zero (basis: all but excluded)
        for year, category, n in [(y, c, n) for y, _r, c, n in categorised] + [(y, c, -n) for y, c, n
                                                                                 in in_post_categorised]:
            records[year - first] += n
            if category != "excluded":
                covered[year - first] += n
        held = [i for i, n in enumerate(records) if n > 0]
        if held:  # the span of years that hold a departure, as the coverage table's
            covered = covered[held[0]:held[-1] + 1]
            first += held[0]
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
    for year, reason, n in in_post:  # no departures: not among the window's unmapped codes either
        if window[0] <= year <= window[1] and reason in unmapped:
            unmapped[reason] -= n
    rows = [(year, "", f, v) for year, (f, v) in sorted(groups.items())]
    fingerprint = groups_csv_fingerprint(rows)
    nothing = not any(category in ("forced", "voluntary") for _, _, category, _ in categorised)
    listed = sorted(((code, n) for code, n in unmapped.items() if n > 0), key=lambda item: (-item[1], item[0]))
    return QuickInput(roster, mapping, window, rows, fingerprint, warning_notes(nothing, listed))


def _served(reader: QuickReader, inp: QuickInput, params: dict[str, Any]) -> dict[str, Any] | None:
    """``stored_summary``: the newest matching fit run's payload, or None."""
    for run in reader.fit_runs(inp.roster.id):  # newest first, as ``stored_fit`` takes the highest id
        if inp.matches(run, params):
            result = run["result"]
            break
    else:
        return None
    # the same keys in the same order as ``stored_summary``
    payload = {k: v for k, v in result.items() if k not in ("engine", PROFILE_KEY, "fitted_share", "headline")}
    payload.update({**inp.header(run["id"]), "sentence": result["sentence"], "warnings": inp.warnings,
                    "fitted_share": result["fitted_share"], "headline": result["headline"]})
    return dict(_plain(payload))


def _fit_and_record(url: str, inp: QuickInput, params: dict[str, Any], actor: str) -> dict[str, Any] | None:
    """``fit_summary(..., reuse=False)`` for the straight or spline trend: fit, record the run, print."""
    from app.stats.trend_line import fit_line, line_payload  # only a first fit needs the model code

    started = time.perf_counter()
    line = fit_line([r[0] for r in inp.rows], [r[2] for r in inp.rows], [r[3] for r in inp.rows], inp.window,
                    params["model"], spline_df=params.get("spline_df", 3), quasi=bool(params.get("quasi")))
    if line is None:  # separation, no convergence, too few years, ...: the ordinary path says what is wrong
        return None
    fitted = line_payload(line)
    # what ``run_trend`` records: the printed fit, the profile ends for the next fit, the engine tag
    profiles = {name: [low if math.isfinite(low) else None, high if math.isfinite(high) else None, message]
                for name, (low, high, message) in line.profiles.items()}
    result = {**fitted, PROFILE_KEY: profiles, "engine": engine_tag()}
    run_id = record_fit_run(url, roster_id=inp.roster.id, roster_version=inp.roster.version, params=params,
                            fingerprint=inp.fingerprint, mapping=(inp.mapping.name, inp.mapping.version),
                            window=inp.window, result=result, seconds=time.perf_counter() - started, actor=actor,
                            existing=lambda run: inp.matches(run, params))
    if run_id is None:
        return None
    payload = {k: v for k, v in fitted.items() if k not in ("fitted_share", "headline")}
    payload.update({**inp.header(run_id), "sentence": fitted["sentence"], "warnings": inp.warnings,
                    "fitted_share": fitted["fitted_share"], "headline": fitted["headline"]})
    return dict(_plain(payload))
