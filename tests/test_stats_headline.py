"""Headlines in shares: the fitted share at both ends of the window (delta-method band on the logit scale),
the percentage-point change, then the odds ratio with its profile-likelihood interval.

Oracle: statsmodels ``GLM.get_prediction`` on the same grouped counts (its mean confidence interval is
formed on the linear predictor and transformed back, which is the band asked for), and the profile interval
found independently in conftest ``profile_interval``.
"""

from __future__ import annotations

import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import profile_interval, read_mapping, statsmodels_trend, year_counts

from app.analysis.inputs import load_input
from app.analysis.runs import fit_summary
from app.intake.ingest import import_roster
from app.stats.headline import fitted_share, headline_sentence
from app.stats.trend import fit_trend
from app.store import Store

ROSTER = 1


def _prediction(counts: pd.DataFrame, window: tuple[int, int], years: list[int], *,
                scale: str | float = 1.0) -> pd.DataFrame:
    """statsmodels' fitted mean and 95% interval at ``years`` (Binomial logit, year centred on the window)."""
    t = counts["year"].to_numpy(dtype=float) - (window[0] + window[1]) / 2
    endog = np.column_stack([counts["forced"], counts["total"] - counts["forced"]]).astype(float)
    result = sm.GLM(endog, np.column_stack([np.ones_like(t), t]), family=sm.families.Binomial()).fit(scale=scale)
    at = np.array(years, dtype=float) - (window[0] + window[1]) / 2
    return result.get_prediction(np.column_stack([np.ones_like(at), at])).summary_frame(alpha=0.05)


def test_demo_fitted_share_equals_statsmodels_prediction(demo_store: Store, demo_clean: pd.DataFrame) -> None:
    inp = load_input(demo_store, ROSTER)
    payload = fit_summary(demo_store, inp)
    window = tuple(payload["window"])
    counts = year_counts(demo_clean, read_mapping("mapping-standard.csv"), window)
    first, last = payload["fitted_share"]["first"], payload["fitted_share"]["last"]
    assert (first["year"], last["year"]) == (int(counts["year"].min()), int(counts["year"].max()))
    ref = _prediction(counts, window, [first["year"], last["year"]],
                      scale="X2" if payload["quasi"] else 1.0)
    for mine, (_, row) in zip((first, last), ref.iterrows(), strict=True):
        assert mine["share"] == pytest.approx(row["mean"], rel=1e-7)
        assert mine["low"] == pytest.approx(row["mean_ci_lower"], rel=1e-6)
        assert mine["high"] == pytest.approx(row["mean_ci_upper"], rel=1e-6)
    # the headline quotes exactly these numbers, the difference as printed, and the profile interval
    lo, hi = profile_interval(counts, window)
    a, b = round(first["share"] * 100), round(last["share"] * 100)
    headline = payload["headline"]
    assert headline.startswith(f"Across {window[0]}–{window[1]}, the fitted share of departures that were forced")
    assert f"from {a}% in {first['year']} to {b}% in {last['year']} ({b - a:+d} percentage points)" in headline
    assert f"95% profile-likelihood interval {lo:.3f} to {hi:.3f}" in headline
    assert f"odds ratio per year is {math.exp(float(statsmodels_trend(counts, window).params[1])):.3f}" in headline
    assert "Wald" not in headline


def _built_roster(store: Store, shares: dict[int, tuple[int, int]]) -> int:
    """A roster written in the test: per year (forced, voluntary) departures, each its own firm."""
    lines = ["Issuer Code,FY,Exit Reason"]
    n = 0
    for year, (forced, voluntary) in shares.items():
        for reason, k in (("Ousted", forced), ("Retired", voluntary)):
            for _ in range(k):
                n += 1
                lines.append(f"F{n},{year},{reason}")
    roster = import_roster(store, "\n".join(lines).encode(), "built.csv").roster
    store.save_mapping_version("built", {"Ousted": "forced", "Retired": "voluntary"})
    store.update_settings(roster.id, mapping_name="built")
    return roster.id


def test_built_roster_headline_and_band_against_statsmodels(store: Store) -> None:
    # a falling share: 60% forced in 2001 down to about 20% in 2010, with a gap year (2005 has no departures)
    shares = {2001: (30, 20), 2002: (27, 23), 2003: (25, 25), 2004: (22, 28), 2006: (18, 32),
              2007: (16, 34), 2008: (13, 37), 2009: (12, 38), 2010: (10, 40)}
    roster_id = _built_roster(store, shares)
    inp = load_input(store, roster_id, window=(2001, 2010))
    fit = fit_trend(inp.cells())
    ends = fitted_share(fit)
    assert ends is not None
    counts = pd.DataFrame({"year": list(shares), "forced": [f for f, _ in shares.values()],
                           "total": [f + v for f, v in shares.values()]})
    ref = _prediction(counts, (2001, 2010), [2001, 2010], scale="X2" if fit.quasi else 1.0)
    assert [e.share for e in ends] == pytest.approx(ref["mean"].tolist(), rel=1e-7)
    assert [e.low for e in ends] == pytest.approx(ref["mean_ci_lower"].tolist(), rel=1e-6)
    assert [e.high for e in ends] == pytest.approx(ref["mean_ci_upper"].tolist(), rel=1e-6)
    sentence = headline_sentence(fit)
    match = re.search(r"fell from (\d+)% in 2001 to (\d+)% in 2010 \(([+-]\d+) percentage points\)", sentence)
    assert match, sentence
    assert int(match.group(3)) == int(match.group(2)) - int(match.group(1)) < 0


def test_flat_share_says_no_clear_change(store: Store) -> None:
    # about a quarter forced every year, wobbling by one departure
    roster_id = _built_roster(store, {y: (10 + (-1) ** y, 30 - (-1) ** y) for y in range(2001, 2011)})
    fit = fit_trend(load_input(store, roster_id, window=(2001, 2010)).cells())
    sentence = headline_sentence(fit)
    assert fit.conf_int["profile"] is not None and fit.conf_int["profile"][0] < 1 < fit.conf_int["profile"][1]
    assert re.search(r"went from 2\d% in 2001 to 2\d% in 2010 \([+-]\d percentage points?\), but this is no "
                     "clear change", sentence), sentence
    assert "which includes 1" in sentence


def test_trend_page_and_json_lead_with_the_share(client: Any) -> None:
    page = client.get(f"/rosters/{ROSTER}/trend")
    body = client.get(f"/api/rosters/{ROSTER}/trend").json()
    assert body["sentence"] == body["fit"]["headline"]
    assert body["fit"]["headline"] in page.text
    assert set(body["fit"]["fitted_share"]) == {"first", "last"}


def test_export_headline_and_takeaway_name_one_interval_method(tmp_path: Path, demo_store: Store) -> None:
    from app.briefing.findings import trend_finding

    finding = trend_finding(demo_store, load_input(demo_store, ROSTER))
    assert "percentage points" in finding.title
    for text in (finding.title, finding.takeaway, finding.provenance.interval_method):
        assert "profile-likelihood" in text.replace("profile likelihood", "profile-likelihood"), text
        assert "Wald" not in text
