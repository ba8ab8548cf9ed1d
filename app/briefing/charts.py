"""Plotly figures for the pages and the exports: each chart is built once and serves both.

The house look (Okabe-Ito colours, white ground, one light value grid, titles that state the finding,
a source line under every chart) lives in one template here so no plotly default shows through.
"""

from __future__ import annotations

import html
import math
import textwrap
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import plotly.graph_objects as go

# Okabe & Ito (2008), "Color Universal Design": distinguishable under the common colour-vision
# deficiencies. Yellow is left out of the cycle: too faint on white for lines and markers.
OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}
COLORWAY: tuple[str, ...] = tuple(
    OKABE_ITO[k] for k in ("blue", "vermillion", "bluish_green", "reddish_purple", "orange", "sky_blue", "black")
)
INK = "#1F2328"
MUTED = "#5A6270"
GRID = "#E3E6EA"
FONT_FAMILY = "Arial, 'Liberation Sans', 'Helvetica Neue', Helvetica, sans-serif"

# forced is the quantity of interest, so it gets the strongest colour and sits on the baseline;
# unmapped is a warning (yellow with a dark hatch), not a category.
CATEGORY_COLOURS: dict[str, str] = {
    "forced": OKABE_ITO["vermillion"],
    "voluntary": "#9CC7E6",
    "excluded": "#CFD3D8",
    "unmapped": OKABE_ITO["yellow"],
}
GROUP_STYLES: dict[str, tuple[str, str, str]] = {
    # group -> (legend name, colour, marker symbol)
    "common": ("All departures", OKABE_ITO["vermillion"], "diamond"),
    "sector": ("One sector", OKABE_ITO["blue"], "circle"),
    "mapping": ("Other mapping", OKABE_ITO["bluish_green"], "square"),
}

#: Browser config for the page: no plotly logo, a modebar with only the download-image button.
PAGE_CONFIG: dict[str, Any] = {
    "displaylogo": False,
    "responsive": True,
    "modeBarButtons": [["toImage"]],
    "toImageButtonOptions": {"format": "png", "scale": 2, "width": 1100, "height": 620,
                             "filename": "helmshift-chart"},
}

TITLE_SIZE = 21
BASE_SIZE = 15
NOTE_SIZE = 12
_TITLE_WRAP = 80
_NOTE_WRAP = 112
_LINE_PX = 1.3
_EDGE = 14


def _house_template() -> go.layout.Template:
    axis = {
        "showgrid": False, "zeroline": False, "showline": True, "linecolor": INK, "linewidth": 1,
        "ticks": "outside", "tickcolor": INK, "ticklen": 5, "automargin": True,
        "title": {"font": {"size": BASE_SIZE, "color": INK}, "standoff": 12},
        "tickfont": {"size": BASE_SIZE - 1, "color": INK},
    }
    layout = go.Layout(
        colorway=list(COLORWAY),
        font={"family": FONT_FAMILY, "size": BASE_SIZE, "color": INK},
        paper_bgcolor="#FFFFFF",
        plot_bgcolor="#FFFFFF",
        xaxis=axis,
        yaxis={**axis, "showgrid": True, "gridcolor": GRID, "gridwidth": 1, "showline": False},
        legend={"orientation": "h", "x": 0, "xanchor": "left", "y": 1.01, "yanchor": "bottom",
                "font": {"size": BASE_SIZE - 1}, "bgcolor": "rgba(0,0,0,0)", "traceorder": "normal"},
        hoverlabel={"font": {"family": FONT_FAMILY, "size": 13}, "bgcolor": "#FFFFFF", "bordercolor": INK},
        hovermode="closest",
        bargap=0.18,
    )
    return go.layout.Template(layout=layout)


HOUSE_TEMPLATE = _house_template()


def _wrap(text: str, width: int) -> list[str]:
    """Wrap plain text and escape it for plotly's small HTML subset (so a '<' in a name stays a '<')."""
    lines = textwrap.wrap(" ".join(text.split()), width=width, break_long_words=True) or [""]
    return [html.escape(line, quote=False) for line in lines]


def _base_figure(title: str, source: str, notes: Sequence[str] = (), *, left: int = 78, right: int = 30,
                 legend: bool = True) -> go.Figure:
    """An empty figure with the house look, the finding as title and notes + source under the plot."""
    title_lines = _wrap(title, _TITLE_WRAP)
    note_lines = [line for note in notes for line in _wrap(note, _NOTE_WRAP)]
    source_lines = _wrap(source, _NOTE_WRAP)
    title_px = len(title_lines) * TITLE_SIZE * _LINE_PX
    top = int(26 + title_px + (40 if legend else 14))
    source_px = int(len(source_lines) * NOTE_SIZE * _LINE_PX)
    bottom = int(62 + len(note_lines) * NOTE_SIZE * _LINE_PX) + source_px
    fig = go.Figure()
    fig.update_layout(
        template=HOUSE_TEMPLATE,
        # plotly.js drops the 0.7em first-line offset once a title has several lines (each line gets
        # its own y), so a wrapped title needs its baseline pushed down by hand or its top is clipped
        title={"text": "<br>".join(title_lines), "x": 0, "xref": "container", "xanchor": "left",
               "y": 1, "yref": "container", "yanchor": "top",
               "pad": {"t": 18 + (int(TITLE_SIZE * 0.8) if len(title_lines) > 1 else 0), "l": _EDGE},
               "font": {"size": TITLE_SIZE, "color": INK}},
        margin={"t": top, "b": bottom, "l": left, "r": right},
        showlegend=legend,
        meta={"source_px": source_px},
    )
    # the source line sits at the very bottom; notes (if any) stack just above it
    for name, lines, shift in (("source", source_lines, bottom - 6),
                               ("notes", note_lines, bottom - 6 - source_px)):
        if lines:
            fig.add_annotation(
                # shifted from the plot's left edge to the figure's, in line with the title
                text="<br>".join(lines), xref="paper", yref="paper", x=0, y=0, xanchor="left",
                xshift=-(left - _EDGE), yanchor="bottom", yshift=-shift, showarrow=False, align="left",
                font={"size": NOTE_SIZE, "color": MUTED}, name=name,
            )
    return fig


def _require(df: pd.DataFrame, columns: Sequence[str], what: str) -> None:
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise ValueError(f"{what} needs columns {', '.join(columns)}; missing {', '.join(missing)}.")


def _year_ticks(years: Sequence[int]) -> dict[str, Any]:
    span = (max(years) - min(years)) if len(years) else 0
    step = 1 if span <= 16 else 2 if span <= 32 else 5
    # explicit ticks: a linear tick rule would label a year past the data in the axis padding
    ticks = list(range(min(years), max(years) + 1, step)) if len(years) else []
    return {"tickmode": "array", "tickvals": ticks, "ticktext": [str(t) for t in ticks]}


def coverage_figure(table: pd.DataFrame, window: tuple[int, int] | None, flagged: Sequence[int], *,
                    title: str, source: str, window_label: str = "Analysis window") -> go.Figure:
    """Departures per fiscal year stacked by category, with the window shaded and flagged years marked."""
    cats = ["forced", "voluntary", "excluded", "unmapped"]
    _require(table, ["year", *cats], "coverage_figure")
    data = table.sort_values("year")
    years = [int(y) for y in data["year"]]
    fig = _base_figure(title, source)
    names = {"forced": "Forced", "voluntary": "Voluntary", "excluded": "Excluded (not counted)",
             "unmapped": "Unmapped code (not counted)"}
    for cat in cats:
        counts = data[cat].astype(float)
        if cat == "unmapped" and not (counts > 0).any():
            continue
        pattern = ({"shape": "/", "fgcolor": INK, "bgcolor": CATEGORY_COLOURS[cat], "fillmode": "overlay",
                    "size": 7, "solidity": 0.2} if cat == "unmapped" else {})
        fig.add_bar(
            x=years, y=counts, name=names[cat],
            marker={"color": CATEGORY_COLOURS[cat], "line": {"width": 0}, "pattern": pattern},
            hovertemplate=f"FY%{{x}}<br>{names[cat]}: %{{y:,.0f}}<extra></extra>",
        )
    totals = data[cats].sum(axis=1).astype(float)
    top = float(totals.max()) if len(totals) else 0.0
    flagged_set = {int(y) for y in flagged}
    marks = data.assign(total=totals)[data["year"].astype(int).isin(flagged_set)]
    if len(marks):
        fig.add_scatter(
            x=marks["year"].astype(int), y=marks["total"] + 0.05 * max(top, 1.0), mode="markers",
            name="Low coverage (flagged)", cliponaxis=False,
            marker={"symbol": "triangle-down", "size": 13, "color": INK},
            hovertemplate="FY%{x}: flagged for low coverage<extra></extra>",
        )
    if window is not None:
        lo, hi = int(window[0]), int(window[1])
        fig.add_vrect(
            x0=lo - 0.5, x1=hi + 0.5, fillcolor=OKABE_ITO["blue"], opacity=0.08, line_width=0, layer="below",
        )
        fig.add_annotation(
            # inside the plot's head-room (the y range leaves 14% above the tallest bar), clear of the legend
            x=(lo + hi) / 2, y=1, xref="x", yref="paper", yanchor="top", yshift=-4, showarrow=False,
            text=html.escape(f"{window_label}: FY{lo}–{hi}", quote=False),
            font={"size": NOTE_SIZE + 1, "color": OKABE_ITO["blue"]},
        )
    fig.update_layout(barmode="stack")
    fig.update_xaxes(title_text="Fiscal year", **_year_ticks(years))
    fig.update_yaxes(title_text="Departures (count)", rangemode="tozero",
                     range=[0, max(top, 1.0) * 1.14])
    return fig


def trend_figure(observed: pd.DataFrame, fitted: pd.DataFrame, *, title: str, source: str) -> go.Figure:
    """Observed forced share per year with Wilson intervals, and the fitted trend with its band."""
    _require(observed, ["year", "share", "low", "high", "total"], "trend_figure observed")
    _require(fitted, ["year", "fit", "low", "high"], "trend_figure fitted")
    obs = observed.sort_values("year")
    fit = fitted.sort_values("year")
    fig = _base_figure(title, source, notes=["Marker area is proportional to the departures counted that year."])
    band = OKABE_ITO["blue"]
    fig.add_scatter(x=fit["year"], y=fit["high"], mode="lines", line={"width": 0}, showlegend=False,
                    hoverinfo="skip")
    fig.add_scatter(x=fit["year"], y=fit["low"], mode="lines", line={"width": 0}, fill="tonexty",
                    fillcolor="rgba(0,114,178,0.16)", name="95% band of the fit", hoverinfo="skip")
    fig.add_scatter(x=fit["year"], y=fit["fit"], mode="lines", line={"color": band, "width": 3},
                    name="Fitted logistic trend", hovertemplate="FY%{x}: fitted %{y:.1%}<extra></extra>")
    totals = obs["total"].astype(float).to_numpy()
    biggest = float(np.nanmax(totals)) if len(totals) and np.isfinite(totals).any() else 1.0
    sizes = 6 + 16 * np.sqrt(np.clip(totals, 0, None) / max(biggest, 1.0))
    share = obs["share"].astype(float).to_numpy()
    up = np.nan_to_num(obs["high"].astype(float).to_numpy() - share)
    down = np.nan_to_num(share - obs["low"].astype(float).to_numpy())
    fig.add_scatter(
        x=obs["year"], y=share, mode="markers", name="Observed forced share (95% Wilson interval)",
        marker={"color": OKABE_ITO["vermillion"], "size": sizes, "line": {"color": "#FFFFFF", "width": 1}},
        error_y={"type": "data", "array": up, "arrayminus": down, "color": OKABE_ITO["vermillion"],
                 "thickness": 1.5, "width": 0},
        customdata=np.column_stack([obs["low"], obs["high"], totals]),
        hovertemplate=("FY%{x}: %{y:.1%} forced<br>95% Wilson %{customdata[0]:.1%}–%{customdata[1]:.1%}"
                       "<br>%{customdata[2]:,.0f} departures<extra></extra>"),
    )
    highs = pd.concat([obs["high"], fit["high"]]).astype(float)
    ceiling = min(1.0, float(np.nanmax(highs)) * 1.1) if highs.notna().any() else 1.0
    years = [int(y) for y in pd.concat([obs["year"], fit["year"]]).unique()]
    fig.update_xaxes(title_text="Fiscal year", **_year_ticks(sorted(years)))
    fig.update_yaxes(title_text="Forced share of departures (%)", tickformat=".0%", range=[0, ceiling])
    return fig


def histogram_edges(values: np.ndarray) -> np.ndarray:
    """Equal-width bin edges for the bootstrap histogram: about sqrt(n) bins, 10 to 60 of them."""
    bins = int(min(60, max(10, math.sqrt(values.size))))
    lo, hi = float(values.min()), float(values.max())
    if hi <= lo:
        lo, hi = lo - 0.005, hi + 0.005
    # the top edge lies just above the largest value, so left-closed bins (plotly's) and numpy's agree
    return np.linspace(lo, hi + (hi - lo) * 1e-9, bins + 1)


def bootstrap_histogram(odds_ratios: np.ndarray, estimate: float, interval: tuple[float, float], *,
                        method_label: str, title: str, source: str, what: str = "Odds ratio per year",
                        reference: float | None = 1.0, reference_label: str = "No change (OR = 1)") -> go.Figure:
    """Histogram of bootstrap odds ratios (or of another statistic: ``what``, with its no-change ``reference``
    or None) with the no-change line, the estimate and the interval ends."""
    values = np.asarray(odds_ratios, dtype=float).ravel()
    ok = values[np.isfinite(values)]
    failed = int(values.size - ok.size)
    if ok.size == 0:
        raise ValueError("bootstrap_histogram needs at least one finite odds ratio; every resample failed.")
    note = (f"{values.size:,} resamples; {failed:,} failed (separation or no convergence) and are left out."
            if failed else f"{values.size:,} resamples; none failed.")
    fig = _base_figure(title, source, notes=[note])
    odds = reference == 1.0 and what.lower().startswith("odds ratio")
    edges = histogram_edges(ok)
    # explicit bins (not plotly's own choice) so the deck's native chart counts the very same bins
    fig.add_histogram(x=ok, xbins={"start": float(edges[0]), "end": float(edges[-1]),
                                   "size": float(edges[1] - edges[0])},
                      name="Bootstrap odds ratios" if odds else "Bootstrap values",
                      marker={"color": OKABE_ITO["sky_blue"], "line": {"color": "#FFFFFF", "width": 0.6}},
                      hovertemplate=("OR" if odds else "value") + " %{x}<br>%{y:,} resamples<extra></extra>")
    lo, hi = float(interval[0]), float(interval[1])
    if reference is not None:
        fig.add_vline(x=reference, line={"color": INK, "dash": "dash", "width": 2}, showlegend=True,
                      name=reference_label)
    fig.add_vline(x=float(estimate), line={"color": OKABE_ITO["vermillion"], "width": 3}, showlegend=True,
                  name=f"Estimate {estimate:.3f}")
    label = html.escape(f"{method_label}: {lo:.3f} to {hi:.3f}", quote=False)
    for i, end in enumerate((lo, hi)):
        if math.isfinite(end):
            fig.add_vline(x=end, line={"color": OKABE_ITO["blue"], "dash": "dot", "width": 2.5},
                          showlegend=i == 0, name=label, legendgroup="interval")
    spread = [float(ok.min()), float(ok.max()), float(estimate)] + ([] if reference is None else [reference])
    span = max(spread) - min(spread) or 0.1
    fig.update_xaxes(title_text=f"{what} (one per bootstrap resample)",
                     range=[min(spread) - 0.05 * span, max(spread) + 0.05 * span])
    fig.update_yaxes(title_text="Resamples (count)", rangemode="tozero")
    fig.update_layout(bargap=0.02)
    return fig


_LOG_TICKS = (0.1, 0.2, 0.25, 0.33, 0.5, 0.67, 0.75, 0.8, 0.85, 0.9, 0.95, 1.0, 1.05, 1.1, 1.15, 1.2,
              1.25, 1.33, 1.5, 2.0, 3.0, 4.0, 5.0, 10.0)


def _log_ticks(lo: float, hi: float) -> list[float]:
    inside = [t for t in _LOG_TICKS if lo <= t <= hi]
    while len(inside) > 7:
        # thin out from both sides of 1 so the reference always keeps its tick
        keep = inside.index(1.0) if 1.0 in inside else 0
        inside = [t for i, t in enumerate(inside) if (i - keep) % 2 == 0]
    return inside


def forest_figure(rows: pd.DataFrame, *, title: str, source: str, reference: float = 1.0,
                  notes: Sequence[str] = ()) -> go.Figure:
    """Odds ratios with intervals, one row each, on a log axis; rows without an estimate say so in words.
    ``notes`` go under the plot (e.g. what the numbers in the labels are)."""
    _require(rows, ["label", "odds_ratio", "low", "high", "group"], "forest_figure")
    n = len(rows)
    if n == 0:
        raise ValueError("forest_figure needs at least one row.")
    # a fixed left margin sized to the labels (not automargin) keeps the footer in line with the title
    longest = max(len(str(s)) for s in rows["label"])
    fig = _base_figure(title, source, notes, left=int(min(360, 24 + 8.2 * longest)), right=190)
    data = rows.reset_index(drop=True).assign(pos=[float(n - 1 - i) for i in range(n)])
    estimable = data[np.isfinite(data["odds_ratio"].astype(float))]
    bounds = pd.concat([estimable["low"], estimable["high"], estimable["odds_ratio"]]).astype(float)
    bounds = bounds[np.isfinite(bounds) & (bounds > 0)]
    lo = min([reference, *bounds.tolist()]) / 1.04
    hi = max([reference, *bounds.tolist()]) * 1.04
    # labelled on the plot rather than in the legend, which must fit one row beside the value column
    fig.add_vline(x=reference, line={"color": INK, "dash": "dash", "width": 1.5})
    fig.add_annotation(x=math.log10(reference), y=n - 0.15, xref="x", yref="y", xanchor="left", yanchor="middle",
                       xshift=4, text=f"no change (OR = {reference:g})", showarrow=False,
                       font={"size": NOTE_SIZE, "color": MUTED})
    extra = iter(c for c in COLORWAY if c not in {s[1] for s in GROUP_STYLES.values()})
    for group in dict.fromkeys(data["group"].astype(str)):
        part = estimable[estimable["group"].astype(str) == group]
        if part.empty:
            continue
        name, colour, symbol = GROUP_STYLES.get(group, (group.capitalize(), next(extra, INK), "circle"))
        ors = part["odds_ratio"].astype(float)
        fig.add_scatter(
            x=ors, y=part["pos"], mode="markers", name=html.escape(name, quote=False),
            marker={"color": colour, "symbol": symbol, "size": 14 if group == "common" else 10},
            error_x={"type": "data", "array": np.nan_to_num(part["high"].astype(float) - ors),
                     "arrayminus": np.nan_to_num(ors - part["low"].astype(float)), "color": colour,
                     "thickness": 3 if group == "common" else 2, "width": 0},
            customdata=np.column_stack([part["low"], part["high"]]),
            text=[html.escape(str(s), quote=False) for s in part["label"]],
            hovertemplate="%{text}<br>OR %{x:.3f} (%{customdata[0]:.3f}–%{customdata[1]:.3f})<extra></extra>",
        )
    for pos, est, low, high in zip(data["pos"], data["odds_ratio"].astype(float), data["low"].astype(float),
                                   data["high"].astype(float), strict=True):
        finite = math.isfinite(est)
        text = f"{est:.3f} ({low:.3f}\u2013{high:.3f})" if finite else "<i>not estimable</i>"
        fig.add_annotation(x=1, xref="paper", xanchor="left", xshift=12, y=pos, yref="y", text=text,
                           showarrow=False, font={"size": BASE_SIZE - 1, "color": INK if finite else MUTED})
    fig.add_annotation(x=1, xref="paper", xanchor="left", xshift=12, y=1, yref="paper", yanchor="bottom",
                       text="<b>OR (95% CI)</b>", showarrow=False, font={"size": BASE_SIZE - 1})
    labels = [html.escape(str(s), quote=False) for s in data["label"]]
    fig.update_yaxes(tickmode="array", tickvals=data["pos"].tolist(), ticktext=labels, showgrid=False,
                     range=[-0.7, n + 0.1], ticks="", automargin=False)
    fig.update_xaxes(type="log", range=[math.log10(lo), math.log10(hi)], tickvals=_log_ticks(lo, hi),
                     tickformat="~g", showgrid=True, gridcolor=GRID,
                     title_text="Odds ratio per year (log scale)")
    return fig


def untitled(fig: go.Figure) -> go.Figure:
    """A copy without the finding title, for places (a slide) where the title is set as text beside it."""
    copy = go.Figure(fig)
    legend = bool(copy.layout.showlegend is not False)
    copy.update_layout(title_text="", margin_t=48 if legend else 20)
    return copy


def without_source(fig: go.Figure) -> go.Figure:
    """A copy without the source line, for a page (the brief) whose footer carries the full provenance."""
    copy = go.Figure(fig)
    source_px = int((copy.layout.meta or {}).get("source_px", 0))
    # notes keep their offset from the figure's bottom edge, which moves up with the smaller margin
    copy.layout.annotations = [a for a in copy.layout.annotations if a.name != "source"]
    copy.update_layout(margin_b=(copy.layout.margin.b or 0) - source_px)
    return copy


def figure_json(fig: go.Figure) -> str:
    """The figure as plotly JSON for the page's data hand-off."""
    return str(fig.to_json())
