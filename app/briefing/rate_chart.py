"""Forced and voluntary turnover rates per 100 firm-years by year: the rates finding's figure.

Built once from the rate analysis (app.analysis.rates) for the Briefing preview, the chart files, the brief
and, read back trace by trace, the deck's native chart (app.briefing.native_charts.rates_chart).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from app.briefing.charts import CATEGORY_COLOURS, OKABE_ITO, _base_figure, _require, _year_ticks
from app.stats.rate_trend import RateTrend

#: trace names the native chart looks up (observed rates with their Garwood intervals, fitted Poisson lines)
OBSERVED = {"forced": "Forced rate (95% exact Poisson interval)",
            "voluntary": "Voluntary rate (95% exact Poisson interval)"}
FITTED = {"forced": "Fitted forced rate (Poisson trend)", "voluntary": "Fitted voluntary rate (Poisson trend)"}
COLOURS = {"forced": CATEGORY_COLOURS["forced"], "voluntary": OKABE_ITO["blue"]}


def fitted_per_100(fit: RateTrend, years: np.ndarray) -> np.ndarray:
    """The Poisson trend's rate per 100 firm-years: 100 exp(intercept + log_rr (year - centre))."""
    return np.asarray(100.0 * np.exp(fit.intercept + fit.log_rr * (years.astype(float) - fit.centre)))


def rates_figure(years: pd.DataFrame, forced: RateTrend, voluntary: RateTrend, *, title: str,
                 source: str) -> go.Figure:
    """Observed rates per 100 firm-years with exact (Garwood) intervals, and both fitted Poisson trends."""
    _require(years, ["year", "firm_years", "forced_rate_per_100", "forced_low", "forced_high",
                     "voluntary_rate_per_100", "voluntary_low", "voluntary_high"], "rates_figure")
    data = years.sort_values("year")
    xs = data["year"].astype(int).to_numpy()
    fig = _base_figure(title, source, notes=[
        "Rates count forced (or voluntary) departures per 100 firm-years of the universe; bars: 95% exact "
        "Poisson (Garwood) intervals; lines: the Poisson trend with log firm-years as offset."])
    tops = []
    for measure, fit in (("forced", forced), ("voluntary", voluntary)):
        rate = data[f"{measure}_rate_per_100"].astype(float).to_numpy()
        low = data[f"{measure}_low"].astype(float).to_numpy()
        high = data[f"{measure}_high"].astype(float).to_numpy()
        colour = COLOURS[measure]
        fig.add_scatter(
            x=xs, y=rate, mode="markers", name=OBSERVED[measure],
            marker={"color": colour, "size": 8, "line": {"color": "#FFFFFF", "width": 1}},
            error_y={"type": "data", "array": np.nan_to_num(high - rate), "arrayminus": np.nan_to_num(rate - low),
                     "color": colour, "thickness": 1.5, "width": 0},
            customdata=np.column_stack([low, high, data["firm_years"].astype(float), data[measure].astype(float)]),
            hovertemplate=(f"FY%{{x}}: %{{y:.2f}} {measure} per 100 firm-years<br>95% %{{customdata[0]:.2f}}"
                           "–%{customdata[1]:.2f}<br>%{customdata[3]:,.0f} of %{customdata[2]:,.0f} firm-years"
                           "<extra></extra>"))
        fig.add_scatter(x=xs, y=fitted_per_100(fit, xs), mode="lines", name=FITTED[measure],
                        line={"color": colour, "width": 2.5, "dash": "solid" if measure == "forced" else "dash"},
                        hovertemplate=f"FY%{{x}}: fitted %{{y:.2f}} {measure} per 100<extra></extra>")
        tops.append(float(np.nanmax(high)) if np.isfinite(high).any() else 1.0)
    fig.update_xaxes(title_text="Fiscal year", **_year_ticks([int(y) for y in xs]))
    fig.update_yaxes(title_text="Departures per 100 firm-years", range=[0, max(tops) * 1.08])
    return fig
