"""Hand-off of server-built plotly figures to the page (and the source line each chart carries)."""

from __future__ import annotations

from dataclasses import dataclass

import plotly.graph_objects as go

from app.briefing.charts import PAGE_CONFIG, figure_json, untitled


@dataclass(frozen=True)
class FigureSpec:
    """A figure as JSON text plus the plotly.js config, ready for ``_partials/figure.html``."""

    json: str

    def __str__(self) -> str:
        return self.json


def figure_spec(fig: go.Figure, *, titled: bool = True) -> FigureSpec:
    """The hand-off; ``titled=False`` where the page already states the finding in text above the chart."""
    import json

    if not titled:
        fig = untitled(fig)
    return FigureSpec('{"figure": ' + figure_json(fig) + ', "config": ' + json.dumps(PAGE_CONFIG) + "}")
