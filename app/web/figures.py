"""Hand-off of server-built plotly figures to the page (and the source line each chart carries)."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, TypeVar

import plotly.graph_objects as go

from app.analysis.cellstore import memoised
from app.briefing.charts import PAGE_CONFIG, figure_json, untitled
from app.store import Store

T = TypeVar("T")


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


def page_memo(store: Store, key: tuple[Any, ...], compute: Callable[[], T]) -> T:
    """A page's drawn findings, memoised per store: building plotly figures costs more than the statistics.

    ``key`` must name everything the value depends on (``AnalysisInput.key``, options, the runs it reads);
    the day is added because every chart's source line carries the date it was made.
    """
    return memoised(store, ("page", datetime.now(UTC).date().isoformat(), *key), compute)
