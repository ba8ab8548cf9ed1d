"""The age and tenure mix of counted departures by year: the composition diagnostic beside the adjusted trend."""

from __future__ import annotations

from typing import Any

import plotly.graph_objects as go

from app.analysis.adjusted import MixSection
from app.analysis.inputs import AnalysisInput
from app.analysis.provenance import provenance_for
from app.briefing.charts import COLORWAY, _base_figure, _year_ticks


def mix_figure(rows: list[dict[str, Any]], field: str, *, title: str, source: str) -> go.Figure:
    """Stacked shares of each band per year (rows: ``year``, ``departures``, ``shares`` band -> share)."""
    fig = _base_figure(title, source, notes=[f"Departures with a known {field}, counted as forced or voluntary."])
    years = [r["year"] for r in rows]
    bands = list(rows[0]["shares"]) if rows else []
    for i, name in enumerate(bands):
        fig.add_bar(x=years, y=[r["shares"][name] for r in rows], name=f"{field} {name}",
                    marker={"color": COLORWAY[i % len(COLORWAY)]},
                    customdata=[r["departures"] for r in rows],
                    hovertemplate=f"FY%{{x}}: %{{y:.0%}} {field} {name}<br>of %{{customdata:,}} departures<extra></extra>")
    fig.update_layout(barmode="stack")
    fig.update_xaxes(title_text="Fiscal year", **_year_ticks(years))
    fig.update_yaxes(title_text=f"Share of departures by {field} band", tickformat=".0%", range=[0, 1])
    return fig


def mix_figures(inp: AnalysisInput, mix: MixSection) -> dict[str, go.Figure]:
    """One figure per field with departures of known value; titled by the sentence that says whether it moved."""
    source = provenance_for(inp, model="composition of departures (age and tenure bands)",
                            interval_method="none").short()
    out = {}
    for field, rows, sentence in (("age", mix.age, mix.sentences[0]), ("tenure", mix.tenure, mix.sentences[1])):
        if rows:
            out[field] = mix_figure(rows, field, title=sentence, source=source)
    return out
