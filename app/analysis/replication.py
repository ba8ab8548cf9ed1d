"""Replication packs: everything an outside statistician needs to recompute a stored run without Helmshift.

A pack is a zip holding the counts the model saw, the mapping version, the parameters, every replicate and
jackknife value, every reported number and a standalone ``reproduce.py`` (``pack_script.py`` here). The zip is
built byte-for-byte the same way each time (fixed member order and timestamps), so its sha256 names it: a
brief's footer quotes it, and an auditor can check a pack they were sent against it.
"""

from __future__ import annotations

import hashlib
import io
import json
import platform
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from app import __version__
from app.analysis.inputs import AnalysisInput, input_for_run
from app.analysis.mapping_files import export_mapping_csv
from app.analysis.measure_packs import adjusted_departures, measure_kind, measure_members
from app.analysis.overrides import overrides_to_list
from app.analysis.run_params import cells_for, statistic_for
from app.intake.spreadsheet_safety import safe_csv
from app.stats.bootstrap import BLOCK_SIZE, MC_RESAMPLES, jackknife_statistic
from app.stats.cells import Cells
from app.stats.design import window_centre
from app.stats.draws import SPAN
from app.stats.intervals import PASS_ELEMENTS
from app.stats.jackknife import cluster_cases, departure_cases
from app.store import Run, Store

SCRIPT = Path(__file__).with_name("pack_script.py")
#: a fixed timestamp for every member, so the same run always gives the same bytes (and sha256)
ZIP_TIME = (2000, 1, 1, 0, 0, 0)
RECORD_COLUMNS = ("line", "firm_id", "firm_name", "sector", "year", "date", "reason", "category", "executive",
                  "age", "tenure", "interim", "notes")

FILE_NOTES = {
    "README.txt": "this file",
    "cells.csv": "the counts the model saw: one row per group (fiscal year, or sector and year; for a rate: fiscal "
                 "year with its firm-years; for the adjusted trend: year x age band x tenure band x sector), "
                 "forced and voluntary departures inside the window under the mapping version",
    "firm_cells.csv": "firm runs and the adjusted trend: each firm's departures per group (rows add up to cells.csv; "
                      "for a rate its forced departures per year, its firm-years being in universe.csv)",
    "records.csv": "the departures behind the cells (only when asked for: rosters hold personal data about "
                   "named people; keep this file local)",
    "universe.csv": "rate runs: every firm-year (firm_id, year) of the universe the rate divides by (the model "
                    "uses those inside the window)",
    "mapping.csv": "the exact mapping version: reason code, category, label",
    "overrides.csv": "the mapping version's case overrides of this roster: the departure (firm id, fiscal year, "
                     "reason code, roster line; the executive only with the records), the category its code and "
                     "rules give it and the one the analyst set, the note, author and date, and whether it "
                     "applied to this roster version; cells.csv already counts them",
    "params.json": "model, statistic and its options, window and its centre, unit, stratification, B, seed, "
                   "block size, alpha, roster and mapping fingerprints, library versions",
    "replicates.csv": "one row per resample in order: index, the statistic (log odds ratio and odds ratio, or "
                      "'estimate' for a statistic not on the odds-ratio scale), its standard error where it has "
                      "one (studentized interval), status (ok or failed) and the failure reason",
    "jackknife.csv": "one row per resampling unit (firm, or departure by its roster line): the statistic "
                     "with that unit left out, used for the BCa acceleration",
    "results.json": "every number the run reports, as stored",
    "reproduce.py": "recomputes the fit, the Wald and profile intervals and (bootstrap runs) the percentile, "
                    "basic, BCa, normal and studentized intervals with their Monte Carlo errors, and prints them beside "
                    "results.json; "
                    "needs only numpy, pandas, scipy and statsmodels",
}


@dataclass(frozen=True)
class ReplicationPack:
    run_id: int
    data: bytes
    files: tuple[str, ...]

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.data).hexdigest()

    @property
    def filename(self) -> str:
        return f"helmshift-run-{self.run_id}-pack.zip"


def finished_run(store: Store, run_id: int) -> Run:
    """A stored run with a result; anything else is a clear error."""
    run = store.get_run(run_id)
    if run.status != "done" or run.result is None:
        raise ValueError(f"Run {run_id} is {run.status}; only a finished run can be exported or its replicates "
                         "read.")
    return run


def run_cells(store: Store, run: Run) -> tuple[AnalysisInput, Cells]:
    """The input and counts a run used, checked against the run's data fingerprint."""
    inp = input_for_run(store, run)
    if run.kind == "bootstrap":
        cells = cells_for(inp, run.params)
    else:
        cells = inp.cells(by_sector=run.params.get("model") in ("sector", "by_sector"))
    if cells.fingerprint() != run.fingerprint:
        raise ValueError(f"The roster's counts no longer match run {run.id}'s data fingerprint, so no pack can "
                         "show what it saw; start a new run.")
    return inp, cells


def _number(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def _logged(run: Run) -> bool:
    return (run.result or {}).get("scale", "log") == "log"


def replicate_rows(store: Store, run: Run) -> list[dict[str, Any]]:
    """One row per resample: index, the statistic (log odds ratio and odds ratio for a log-scale statistic,
    ``estimate`` otherwise), its standard error where stored, status and failure reason."""
    estimates, failures = store.replicates_with_failures(run.id)
    errors = store.replicate_standard_errors(run.id)
    ses = errors.tolist() if errors is not None else [None] * len(estimates)
    rows = []
    for i, (v, why, se) in enumerate(zip(estimates.tolist(), failures.tolist(), ses, strict=True)):
        row: dict[str, Any] = ({"log_odds_ratio": _number(v), "odds_ratio": _number(float(np.exp(v)))} if _logged(run)
                               else {"estimate": _number(v)})
        if se is not None:
            row["standard_error"] = _number(se)
        rows.append({"index": i, **row, "status": "failed" if why or not np.isfinite(v) else "ok", "reason": str(why)})
    return rows


def jackknife_rows(store: Store, run: Run) -> list[dict[str, Any]]:
    """One row per resampling unit with the estimate that leaves it out.

    ``app.stats.bootstrap.jackknife_estimates`` fits each distinct leave-one-out data set once; which units
    give which data set is not part of its answer, so each unit's left-out counts are matched to the cases
    of ``app.stats.jackknife`` here.
    """
    inp, cells = run_cells(store, run)
    unit = run.params["unit"]
    values, _ = jackknife_statistic(cells, statistic_for(run.params, cells), unit=unit)
    key = "log_odds_ratio" if _logged(run) else "estimate"
    total = np.concatenate([cells.forced, cells.voluntary]).astype(np.int64)
    cases = (cluster_cases(cells.firm_matrix) if unit == "firm" else departure_cases(total)).cells
    value_of = {np.asarray(row, dtype=np.int64).tobytes(): float(v) for row, v in zip(cases, values, strict=True)}
    rows: list[dict[str, Any]] = []
    if unit == "firm":
        matrix = cells.firm_matrix.tocsr()
        for i, firm in enumerate(cells.firm_ids):
            left = total.copy()
            lo, hi = matrix.indptr[i], matrix.indptr[i + 1]
            left[matrix.indices[lo:hi]] -= matrix.data[lo:hi].astype(np.int64)
            rows.append({"unit_id": str(firm), key: _number(value_of[left.tobytes()])})
        return rows
    n = cells.n_groups
    if run.params.get("statistic") == "adjusted_odds_ratio":  # cells of year x bands x sector
        for line, year, age, tenure, sector, category, column in adjusted_departures(
                inp, cells, run.params.get("adjust", [])).itertuples(index=False):
            left = total.copy()
            left[column if category == "forced" else column + n] -= 1
            rows.append({"unit_id": str(line), "year": int(year), "age_band": age, "tenure_band": tenure,
                         "sector": sector, "category": category, key: _number(value_of[left.tobytes()])})
        return rows
    counted = _counted(inp, cells)
    for line, year, sector, category, column in counted.itertuples(index=False):
        left = total.copy()
        left[column if category == "forced" else column + n] -= 1
        rows.append({"unit_id": str(line), "year": int(year), "sector": sector, "category": category,
                     key: _number(value_of[left.tobytes()])})
    return rows


def _counted(inp: AnalysisInput, cells: Cells) -> pd.DataFrame:
    """The departures the model counted, with the position of their group in ``cells.groups``."""
    frame = inp.in_window()
    frame = frame.loc[frame["category"].isin(["forced", "voluntary"])]
    sector = (frame["sector"].fillna("(none)").astype(str) if cells.by_sector
              else pd.Series("", index=frame.index, dtype=object))
    index = pd.MultiIndex.from_arrays([cells.groups["sector"], cells.groups["year"]])
    column = index.get_indexer(pd.MultiIndex.from_arrays([sector.to_numpy(), frame["year"].to_numpy()]))
    return pd.DataFrame({"line": frame["line"].to_numpy(), "year": frame["year"].to_numpy(),
                         "sector": sector.to_numpy(), "category": frame["category"].to_numpy(), "column": column})


def _csv(rows: list[dict[str, Any]], header: list[str]) -> str:
    return safe_csv(([r.get(h) for h in header] for r in rows), header)


def _firm_cells(cells: Cells) -> str:
    matrix = cells.firm_matrix.tocoo()
    n = cells.n_groups
    frame = pd.DataFrame({"firm": matrix.row, "group": matrix.col % n, "forced": matrix.col < n,
                          "count": matrix.data})
    frame["forced_count"] = np.where(frame["forced"], frame["count"], 0)
    frame["voluntary_count"] = np.where(frame["forced"], 0, frame["count"])
    per = frame.groupby(["firm", "group"], sort=True)[["forced_count", "voluntary_count"]].sum().reset_index()
    groups = cells.groups
    years = groups["year"].to_numpy(dtype=np.int64)
    sectors = groups["sector"].astype(str).to_numpy()
    rows = [[cells.firm_ids[f], sectors[g], int(years[g]), int(a), int(b)] for f, g, a, b in per.itertuples(index=False)]
    return safe_csv(rows, ["firm_id", "sector", "year", "forced", "voluntary"])


def _records(inp: AnalysisInput) -> str:
    frame = inp.in_window()
    frame = frame.loc[frame["category"].isin(["forced", "voluntary"])]
    return safe_csv(frame[list(RECORD_COLUMNS)].itertuples(index=False), list(RECORD_COLUMNS))


def _overrides(inp: AnalysisInput, records: bool) -> str:
    """overrides.csv: executives are named only in a pack that holds the records (personal data)."""
    header = ["position", "firm_id", *(["executive"] if records else []), "year", "reason", "occurrence", "line",
              "counted_as", "category", "note", "author", "created_at", "applied", "not_applied"]
    return _csv(overrides_to_list(inp.overrides, inp.mapping), header)


def _libraries() -> dict[str, str]:
    import scipy
    import statsmodels

    return {"python": platform.python_version(), "numpy": np.__version__, "pandas": pd.__version__,
            "scipy": scipy.__version__, "statsmodels": statsmodels.__version__, "helmshift": __version__}


def run_params(run: Run, inp: AnalysisInput, n_groups: int, mapping_sha256: str | None) -> dict[str, Any]:
    """params.json: what fixes every number of the run."""
    p = run.params
    out: dict[str, Any] = {
        "run": run.id, "kind": run.kind, "model": p.get("model", "linear"), "created_at": run.created_at,
        "window": list(inp.window), "centre": window_centre(inp.window),
        "alpha": (run.result or {}).get("alpha", 0.05), "data_fingerprint": run.fingerprint,
        "roster": {"id": inp.roster.id, "name": inp.roster.name, "file_sha256": inp.roster.sha256,
                   "accepted": inp.roster.accepted},
        "mapping": None if inp.mapping is None else {"name": inp.mapping.name, "version": inp.mapping.version,
                                                     "csv_sha256": mapping_sha256,
                                                     "case_overrides": len(inp.overrides)},
        "groups": n_groups, "libraries": _libraries(),
    }
    if run.kind == "fit":
        out.update({"spline_df": p.get("spline_df"), "quasi": bool(p.get("quasi", False)),
                    "min_departures": p.get("min_departures")})
    else:
        options: dict[str, Any] = {k: p[k] for k in ("sector", "sectors", "spline_df", "periods", "adjust") if k in p}
        out.update({"statistic": p.get("statistic", "slope"), "scale": (run.result or {}).get("scale", "log"),
                    "stratify": p.get("stratify", "none"), **options,
                    "unit": p["unit"], "resamples": p["resamples"], "seed": p["seed"], "block_size": BLOCK_SIZE,
                    "mc_resamples": MC_RESAMPLES, "mc_pass_elements": PASS_ELEMENTS,
                    "sampler": p.get("sampler", 1), "sampler_span": SPAN,
                    "seeding": "resample i comes from block i // block_size; block k draws from "
                               "numpy.random.default_rng(SeedSequence(seed, spawn_key=(k,))); firm draws by "
                               "sampler 1: per resample integers(0, F, F); sampler 2 (over sampler_span firms): "
                               "multinomial(F, range sizes / F) per resample over ranges of sampler_span firms, "
                               "then range by range, resample by resample, that many integers within the range; "
                               "sampler 3: as sampler 2 (ranges also at F <= sampler_span, one range, no "
                               "multinomial) with numpy.random.SFC64(the block's SeedSequence) for the multinomial "
                               "and the firms: a firm within a range of S firms is w // (2**32 // S) for the next "
                               "32-bit word w (low, then high half of each random_raw() output), a word >= "
                               "S * (2**32 // S) replaced by the low half of the next random_raw() until below; "
                               "sampler 4: numpy.random.SFC64(the block's SeedSequence), groups of 25 resamples, "
                               "each firm a Poisson((F - a) / F) count (a = ceil(3 sqrt(F))) from a 16-bit word, "
                               "then F - T uniform firms added (or T - F distinct balls removed) so every resample "
                               "holds F firms; the stream is defined in app/stats/poisson_draws.py"})
    return out


def _readme(run: Run, files: list[str]) -> str:
    lines = [f"Helmshift {__version__} replication pack for run {run.id} ({run.kind}).", "",
             "Files:"]
    lines += [f"  {name}: {FILE_NOTES[name]}" for name in files]
    lines += ["", "Check it:  python -m venv env && env/bin/pip install numpy pandas scipy statsmodels && "
              "env/bin/python reproduce.py", "",
              "CSV cells that a spreadsheet would run as a formula carry a leading apostrophe.",
              "Numbers are written with enough digits to read back exactly; empty cells are missing values."]
    if run.kind == "fit":
        lines.append("A fit run has no replicates or jackknife values.")
    if run.kind == "fit" and run.params.get("model") == "adjusted" and run.params.get("resamples"):
        lines.append("The firm bootstrap of this adjusted fit stored no replicates: its interval is in results.json "
                     "but is not recomputed (a bootstrap run of adjusted_odds_ratio stores them).")
    if run.params.get("model") == "by_sector":
        lines.append("reproduce.py recomputes the straight trend of cells.csv; the per-sector trends and the test "
                     "of equal trends are in results.json but are not recomputed by it.")
    return "\r\n".join(lines) + "\r\n"


def build_pack(store: Store, run_id: int, *, records: bool = False) -> ReplicationPack:
    """The replication pack of a finished run, as zip bytes (the same bytes every time)."""
    run = finished_run(store, run_id)
    extra: dict[str, Any] = {}
    if measure_kind(run) is not None:
        inp, members, n_groups, extra = measure_members(store, run)
    else:
        inp, cells = run_cells(store, run)
        members = {"cells.csv": safe_csv(cells.groups[["year", "sector", "forced", "voluntary"]].itertuples(index=False),
                                         ["year", "sector", "forced", "voluntary"])}
        n_groups = cells.n_groups
        if run.kind == "bootstrap" and run.params["unit"] == "firm":
            members["firm_cells.csv"] = _firm_cells(cells)
    if records:
        members["records.csv"] = _records(inp)
    mapping_sha = None
    if inp.mapping is not None:
        members["mapping.csv"] = export_mapping_csv(store, name=inp.mapping.name, version=inp.mapping.version)
        mapping_sha = hashlib.sha256(members["mapping.csv"].encode()).hexdigest()
    if inp.overrides:
        members["overrides.csv"] = _overrides(inp, records)
    members["params.json"] = json.dumps(run_params(run, inp, n_groups, mapping_sha) | extra, indent=1,
                                        sort_keys=True) + "\n"
    if run.kind == "bootstrap":
        members["replicates.csv"] = replicates_csv(store, run.id)
        members["jackknife.csv"] = jackknife_csv(store, run.id)
    members["results.json"] = json.dumps(run.result, indent=1, sort_keys=True) + "\n"
    members["reproduce.py"] = SCRIPT.read_text(encoding="utf-8")
    names = ["README.txt", *members]
    members = {"README.txt": _readme(run, names), **members}
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, text in members.items():
            info = zipfile.ZipInfo(name, date_time=ZIP_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, text.encode("utf-8"))
    return ReplicationPack(run.id, buffer.getvalue(), tuple(names))


def write_pack(store: Store, run_id: int, out: Path, *, records: bool = False) -> ReplicationPack:
    """Write a run's pack to ``out`` (whole or not at all) and return it."""
    pack = build_pack(store, run_id, records=records)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".part")
    tmp.write_bytes(pack.data)
    tmp.replace(out)  # never leave a half-written file under the final name
    return pack


def replicates_payload(store: Store, run_id: int) -> dict[str, Any]:
    """A bootstrap run's replicates and jackknife values as plain JSON values."""
    run = finished_run(store, run_id)
    if run.kind != "bootstrap":
        raise ValueError(f"Run {run_id} is a {run.kind} run; only bootstrap runs have replicates.")
    assert run.result is not None
    return {"run": run.id, "unit": run.params["unit"], "seed": run.params["seed"], "block_size": BLOCK_SIZE,
            "statistic": run.params.get("statistic", "slope"), "scale": run.result.get("scale", "log"),
            "log_odds_ratio": run.result.get("log_odds_ratio"), "replicates": replicate_rows(store, run),
            "jackknife": jackknife_rows(store, run)}


def replicates_csv(store: Store, run_id: int) -> str:
    """replicates.csv of a finished bootstrap run."""
    payload = replicates_payload(store, run_id)
    rows = payload["replicates"]
    value = ["log_odds_ratio", "odds_ratio"] if payload["scale"] == "log" else ["estimate"]
    errors = ["standard_error"] if rows and "standard_error" in rows[0] else []
    return _csv(rows, ["index", *value, *errors, "status", "reason"])


def jackknife_csv(store: Store, run_id: int) -> str:
    """jackknife.csv of a finished bootstrap run."""
    payload = replicates_payload(store, run_id)
    value = "log_odds_ratio" if payload["scale"] == "log" else "estimate"
    bands = ["age_band", "tenure_band"] if payload["statistic"] == "adjusted_odds_ratio" else []
    header = (["unit_id", value] if payload["unit"] == "firm"
              else ["unit_id", "year", *bands, "sector", "category", value])
    return _csv(payload["jackknife"], header)
