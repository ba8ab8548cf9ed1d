"""A robustness check as plain values: the JSON object (pages' twins and ``robustness --json``) and the rows of
the forest chart. Split from :mod:`app.analysis.robustness`, which fits the readings."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from app.analysis.inputs import AnalysisInput
from app.analysis.robustness import Robustness, check_robustness
from app.analysis.robustness_measures import adjusted_reading_to_dict, rate_to_dict
from app.store import Store


def robustness_to_dict(result: Robustness) -> dict[str, Any]:
    def pair(p: tuple[float, float] | None) -> list[float | None] | None:
        if p is None:
            return None
        return [float(x) if np.isfinite(x) else None for x in p]

    return {
        "window": list(result.window), "direction": result.direction, "holds": result.holds,
        "sentence": result.sentence,
        "variants": [{
            "label": v.label, "kind": v.kind, "changes": list(v.changes), "departures": v.departures,
            "forced": v.forced, "odds_ratio": v.odds_ratio,
            "conf_int": {"wald": pair(v.wald), "profile": pair(v.profile), "bootstrap": pair(v.bootstrap)},
            "bootstrap_note": v.bootstrap_note, "error": v.error, "unmapped": v.unmapped,
            "mapping": v.mapping_ref, "rate": rate_to_dict(v.rate), "adjusted": adjusted_reading_to_dict(v.adjusted),
        } for v in result.variants],
        "left_out": [{"mapping": ref, "reason": why} for ref, why in result.left_out],
        "rate_sentence": result.rate_sentence, "rate_holds": result.rate_holds,
        "adjusted_sentence": result.adjusted_sentence, "adjusted_holds": result.adjusted_holds,
        "provenance": {"universe": result.universe, "universe_fingerprint": result.universe_fingerprint,
                       "adjust": list(result.adjust)},
    }


def robustness_rows(result: Robustness) -> pd.DataFrame:
    """Forest-plot rows: one per variant, the reference first and marked as the common row (``label``,
    ``odds_ratio``, ``low``, ``high``, ``group``: the share), then each reading's forced rate ratio and adjusted
    odds ratio with their intervals (profile, firm-clustered; NaN where not fitted) and why not."""
    def pair(p: tuple[float, float] | None) -> tuple[float, float]:
        return (float(p[0]), float(p[1])) if p is not None else (np.nan, np.nan)

    rows = []
    for v in result.variants:
        lo, hi = pair(v.profile)
        label = f"{v.label} (leaves {v.unmapped:,} unmapped)" if v.unmapped else v.label
        row: dict[str, Any] = {
            "label": label, "odds_ratio": v.odds_ratio if v.odds_ratio is not None else np.nan,
            "low": lo, "high": hi, "group": "Reference mapping" if v.kind == "reference" else "Other reading"}
        if v.rate is not None:
            r_lo, r_hi = pair(v.rate.profile or v.rate.wald)
            row |= {"rate_ratio": v.rate.rate_ratio if v.rate.rate_ratio is not None else np.nan,
                    "rate_low": r_lo, "rate_high": r_hi, "rate_note": v.rate.error or ""}
        if v.adjusted is not None:
            a_lo, a_hi = pair(v.adjusted.cluster)
            row |= {"adjusted_odds_ratio": v.adjusted.odds_ratio if v.adjusted.odds_ratio is not None else np.nan,
                    "adjusted_low": a_lo, "adjusted_high": a_hi, "adjusted_note": v.adjusted.error or ""}
        rows.append(row)
    return pd.DataFrame(rows)


def robustness_summary(store: Store, inp: AnalysisInput, *, extra_mappings: list[str], vary: list[str],
                       preset: bool = False, adjust: str | tuple[str, ...] | None = None) -> dict[str, Any]:
    """The command line's ``robustness --json`` object (moved here from app.analysis.runs, which the rate and
    adjusted measures of the readings import)."""
    result = check_robustness(store, inp, extra_mappings=extra_mappings, vary=vary, preset=preset, adjust=adjust)
    return {"roster": inp.roster.name, "mapping": inp.mapping_label, **robustness_to_dict(result)}
