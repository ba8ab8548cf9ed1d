"""What a replication pack holds for the other measures: a rate (fit or bootstrap of the rate ratio) and the
adjusted trend (fit or bootstrap of its odds ratio). ``app.analysis.replication.build_pack`` calls
:func:`measure_members` for these runs and adds the mapping, parameters, replicates, jackknife and results.

* rate: ``cells.csv`` (year, firm_years, forced[, voluntary]) are the counts the Poisson model saw;
  ``universe.csv`` every firm-year of the run's universe; a bootstrap run adds ``firm_cells.csv`` (each
  universe firm's forced departures per year inside its firm-years), so with ``universe.csv`` each firm's row
  of the resampled matrix can be rebuilt.
* adjusted: ``cells.csv`` (year, age_band, tenure_band, sector, forced, voluntary) and ``firm_cells.csv`` (the
  same per firm), from which the clustered standard errors and every firm resample are computed.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse

from app.analysis.adjusted import _fingerprint, adjusted_cells
from app.analysis.inputs import AnalysisInput, input_for_run
from app.analysis.rates import run_rates
from app.analysis.run_params import cells_for
from app.intake.spreadsheet_safety import safe_csv
from app.stats.adjusted import AGE_BANDS, AGE_EDGES, TENURE_BANDS, TENURE_EDGES, band, parse_adjust
from app.stats.cells import Cells
from app.store import Run, Store

BAND_KEYS = ["year", "age_band", "tenure_band", "sector"]


def measure_kind(run: Run) -> str | None:
    """``rate`` or ``adjusted`` for a run of those measures (fit or bootstrap), else None."""
    if run.kind == "fit":
        model = run.params.get("model")
        return model if model in ("rate", "adjusted") else None
    return {"rate_ratio": "rate", "adjusted_odds_ratio": "adjusted"}.get(run.params.get("statistic", ""))


def _changed(run: Run) -> ValueError:
    return ValueError(f"The roster's counts no longer match run {run.id}'s data fingerprint, so no pack can show "
                      "what it saw; start a new run.")


def measure_members(store: Store, run: Run) -> tuple[AnalysisInput, dict[str, str], int, dict[str, Any]]:
    """(input, pack members, number of cells, extra params.json entries) of a rate or adjusted run."""
    inp = input_for_run(store, run)
    if measure_kind(run) == "rate":
        return (inp, *_rate_members(store, inp, run))
    return (inp, *_adjusted_members(inp, run))


def _rate_members(store: Store, inp: AnalysisInput, run: Run) -> tuple[dict[str, str], int, dict[str, Any]]:
    universe_id = int(run.params["universe_id"])
    members: dict[str, str] = {}
    if run.kind == "fit":
        analysis = run_rates(store, inp, record=False)
        table = analysis.table.years
        if analysis.universe.id != universe_id or _table_fingerprint(table) != run.fingerprint:
            raise _changed(run)
        members["cells.csv"] = safe_csv(table[["year", "firm_years", "forced", "voluntary"]].itertuples(index=False),
                                        ["year", "firm_years", "forced", "voluntary"])
        n = len(table)
    else:
        cells = _checked_cells(inp, run)
        groups = cells.groups
        members["cells.csv"] = safe_csv(zip(groups["year"], groups["voluntary"], groups["forced"], strict=True),
                                        ["year", "firm_years", "forced"])
        coo = cells.firm_matrix.tocoo()
        forced = coo.col < cells.n_groups
        rows = sorted(zip(cells.firm_ids[coo.row[forced]], groups["year"].to_numpy()[coo.col[forced]],
                          coo.data[forced], strict=True))
        members["firm_cells.csv"] = safe_csv(([str(f), int(y), int(k)] for f, y, k in rows),
                                             ["firm_id", "year", "forced"])
        n = cells.n_groups
    universe = store.universe_firm_years(universe_id)
    members["universe.csv"] = safe_csv(universe.itertuples(index=False), ["firm_id", "year"])
    extra = {"universe": {"id": universe_id, "fingerprint": run.params.get("universe_fingerprint")},
             "measure": "rate"}
    return members, n, extra


def _table_fingerprint(table: pd.DataFrame) -> str:
    import hashlib

    return hashlib.sha256(table.to_csv(index=False).encode()).hexdigest()[:16]  # as run_rates records it


def _checked_cells(inp: AnalysisInput, run: Run) -> Cells:
    cells = cells_for(inp, run.params)
    if cells.fingerprint() != run.fingerprint:
        raise _changed(run)
    return cells


def _adjusted_members(inp: AnalysisInput, run: Run) -> tuple[dict[str, str], int, dict[str, Any]]:
    adjust = parse_adjust(run.params.get("adjust", ()))
    if run.kind == "fit":
        data = adjusted_cells(inp, adjust)
        if _fingerprint(data) != run.fingerprint:
            raise _changed(run)
        groups, firm_ids = data.cells, data.firm_ids
        matrix = sparse.hstack([data.firm_forced, data.firm_voluntary], format="csr")
    else:
        cells = _checked_cells(inp, run)
        groups, firm_ids, matrix = cells.groups, cells.firm_ids, cells.firm_matrix.tocsr()
    header = [*BAND_KEYS, "forced", "voluntary"]
    members = {"cells.csv": safe_csv(groups[header].itertuples(index=False), header)}
    n = len(groups)
    coo = matrix.tocoo()
    per = pd.DataFrame({"firm": coo.row, "cell": coo.col % max(n, 1), "forced": np.where(coo.col < n, coo.data, 0),
                        "voluntary": np.where(coo.col < n, 0, coo.data)})
    per = per.groupby(["firm", "cell"], sort=True)[["forced", "voluntary"]].sum().reset_index()
    keyed = list(groups[BAND_KEYS].itertuples(index=False))
    rows = [[str(firm_ids[f]), *keyed[c], int(a), int(b)] for f, c, a, b in per.itertuples(index=False)]
    members["firm_cells.csv"] = safe_csv(rows, ["firm_id", *header])
    extra = {"measure": "adjusted", "adjust": list(adjust), "age_bands": list(AGE_BANDS),
             "tenure_bands": list(TENURE_BANDS), "dropped": (run.result or {}).get("dropped")}
    return members, n, extra


def adjusted_departures(inp: AnalysisInput, cells: Cells, adjust: list[str]) -> pd.DataFrame:
    """The departures an adjusted departure-resampling run counted, with their cell's keys and position."""
    frame = inp.in_window()
    frame = frame.loc[frame["category"].isin(["forced", "voluntary"])]
    chosen = parse_adjust(adjust)
    for name in chosen:
        frame = frame.loc[frame[name].notna()]
    blank = np.full(len(frame), "", dtype=object)
    age = band(frame["age"].astype(float).to_numpy(), AGE_EDGES, AGE_BANDS) if "age" in chosen else blank
    tenure = band(frame["tenure"].astype(float).to_numpy(), TENURE_EDGES, TENURE_BANDS) if "tenure" in chosen else blank
    sector = frame["sector"].astype(str).to_numpy(dtype=object) if "sector" in chosen else blank
    out = pd.DataFrame({"line": frame["line"].to_numpy(), "year": frame["year"].to_numpy(dtype=np.int64),
                        "age_band": age, "tenure_band": tenure, "sector": sector,
                        "category": frame["category"].to_numpy()})
    index = pd.MultiIndex.from_frame(cells.groups[BAND_KEYS].astype({"year": np.int64}))
    out["column"] = index.get_indexer(pd.MultiIndex.from_frame(out[BAND_KEYS]))
    return out
