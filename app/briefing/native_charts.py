"""Native, editable PowerPoint charts (python-pptx chart objects) built from the numbers of the page figures.

Each finding's plotly figure is the single source of its numbers: the coverage bars, the trend's observed
shares, fitted line and band, and the bootstrap replicates are read back out of the figure's traces, and a
forest chart (sectors, robustness, adjusted) from the finding's rows, so the slide can never show other numbers than the page.

python-pptx has no API for error bars, so :func:`_error_bars` writes the DrawingML ``c:errBars`` element
(ECMA-376 Part 1, 21.2.2.55, custom plus/minus values as literals) into the series by hand.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from lxml import etree
from pptx.chart.chart import Chart
from pptx.chart.data import CategoryChartData, XyChartData
from pptx.dml.color import RGBColor
from pptx.enum.chart import XL_CHART_TYPE, XL_LEGEND_POSITION, XL_MARKER_STYLE, XL_TICK_LABEL_POSITION
from pptx.enum.dml import MSO_LINE_DASH_STYLE
from pptx.oxml.ns import qn
from pptx.slide import Slide
from pptx.util import Inches, Pt

from app.briefing.charts import INK, MUTED, OKABE_ITO, histogram_edges
from app.briefing.rate_chart import COLOURS, FITTED, OBSERVED

FONT = "Arial"



def _year_axis(x_axis: Any, years: list[float]) -> None:
    """A fiscal-year value axis: ticks every 1, 2 or 5 years by the span, at whole multiples of the step at
    both ends (so every tick sits on a year and is labelled with it), labels below the plot."""
    span = max(years) - min(years)
    unit = 1 if span <= 12 else 2 if span <= 24 else 5
    x_axis.minimum_scale = math.floor((min(years) - 1) / unit) * unit
    x_axis.maximum_scale = math.ceil((max(years) + 1) / unit) * unit
    x_axis.major_unit = unit
    x_axis.tick_labels.number_format = "0"
    x_axis.tick_labels.number_format_is_linked = False
    x_axis.tick_label_position = XL_TICK_LABEL_POSITION.LOW

def _rgb(hex_colour: str) -> RGBColor:
    return RGBColor.from_string(hex_colour.lstrip("#"))


def _trace(fig: go.Figure, name: str) -> Any:
    for trace in fig.data:
        if trace.name == name:
            return trace
    raise ValueError(f"the figure has no trace named {name!r}; it was not drawn by app.briefing.charts.")


def _floats(values: Any) -> list[float]:
    return [float(v) for v in np.asarray(values, dtype=float)]


def _house(chart: Chart, *, legend: bool = True, size: float = 13) -> None:
    chart.font.name = FONT
    chart.font.size = Pt(size)
    chart.font.color.rgb = _rgb(INK)
    chart.has_title = False  # the slide title states the finding; a chart title would repeat a series name
    chart.has_legend = legend
    if legend:
        chart.legend.position = XL_LEGEND_POSITION.TOP
        chart.legend.include_in_layout = False
        chart.legend.font.size = Pt(size - 1)


def _axis_title(axis: Any, text: str) -> None:
    axis.has_title = True
    axis.axis_title.text_frame.text = text
    run = axis.axis_title.text_frame.paragraphs[0].runs[0]
    run.font.size = Pt(12)
    run.font.bold = False
    run.font.color.rgb = _rgb(MUTED)


def _num_lit(values: Sequence[float]) -> etree._Element:
    lit = etree.Element(qn("c:numLit"))
    etree.SubElement(lit, qn("c:formatCode")).text = "General"
    etree.SubElement(lit, qn("c:ptCount")).set("val", str(len(values)))
    for i, v in enumerate(values):
        pt = etree.SubElement(lit, qn("c:pt"))
        pt.set("idx", str(i))
        etree.SubElement(pt, qn("c:v")).text = repr(float(v)) if math.isfinite(v) else "0"
    return lit


def _error_bars(series: Any, plus: Sequence[float], minus: Sequence[float], colour: str, *,
                direction: str | None, width_pt: float = 1.5) -> None:
    """Custom error bars on one series (``direction`` "x"/"y" for scatter series, None for bar series)."""
    bars = etree.Element(qn("c:errBars"))
    if direction is not None:
        etree.SubElement(bars, qn("c:errDir")).set("val", direction)
    etree.SubElement(bars, qn("c:errBarType")).set("val", "both")
    etree.SubElement(bars, qn("c:errValType")).set("val", "cust")
    etree.SubElement(bars, qn("c:noEndCap")).set("val", "0")
    etree.SubElement(bars, qn("c:plus")).append(_num_lit(plus))
    etree.SubElement(bars, qn("c:minus")).append(_num_lit(minus))
    sp = etree.SubElement(bars, qn("c:spPr"))
    line = etree.SubElement(sp, qn("a:ln"))
    line.set("w", str(int(width_pt * 12700)))
    etree.SubElement(etree.SubElement(line, qn("a:solidFill")), qn("a:srgbClr")).set("val", colour.lstrip("#"))
    ser = series._element
    # schema order: ... dLbls, trendline*, errBars*, cat/xVal, val/yVal ...
    anchor = next((ser.find(qn(t)) for t in ("c:cat", "c:xVal", "c:val", "c:yVal") if ser.find(qn(t)) is not None),
                  None)
    if anchor is None:
        ser.append(bars)
    else:
        anchor.addprevious(bars)


def _add(slide: Slide, kind: XL_CHART_TYPE, box: tuple[float, float, float, float], data: Any) -> Chart:
    left, top, width, height = (Inches(v) for v in box)
    # add_chart returns the graphic frame that holds the chart (python-pptx's annotation says Chart)
    frame: Any = slide.shapes.add_chart(kind, left, top, width, height, data)
    chart: Chart = frame.chart
    return chart


def coverage_chart(slide: Slide, fig: go.Figure, box: tuple[float, float, float, float]) -> Chart:
    """Stacked columns of departures per fiscal year by category (the bars of the Coverage figure)."""
    bars = [t for t in fig.data if t.type == "bar"]
    if not bars:
        raise ValueError("the coverage figure has no bars.")
    data = CategoryChartData(number_format="#,##0")
    data.categories = [str(int(y)) for y in bars[0].x]
    colours = []
    for trace in bars:
        data.add_series(trace.name, [float(v) for v in trace.y])
        colours.append(trace.marker.color)
    chart = _add(slide, XL_CHART_TYPE.COLUMN_STACKED, box, data)
    _house(chart)
    plot = chart.plots[0]
    plot.gap_width = 25
    plot.overlap = 100
    for series, colour in zip(plot.series, colours, strict=True):
        series.format.fill.solid()
        series.format.fill.fore_color.rgb = _rgb(colour)
    chart.value_axis.has_major_gridlines = True
    chart.value_axis.major_gridlines.format.line.color.rgb = _rgb("#E3E6EA")
    chart.value_axis.tick_labels.number_format = "#,##0"
    chart.value_axis.tick_labels.number_format_is_linked = False
    _axis_title(chart.value_axis, "Departures (count)")
    _axis_title(chart.category_axis, "Fiscal year")
    return chart


def trend_chart(slide: Slide, fig: go.Figure, box: tuple[float, float, float, float]) -> Chart:
    """Observed shares with their Wilson intervals, the fitted line and its band (the Trend figure's traces)."""
    fitted = _trace(fig, "Fitted logistic trend")
    band_low = _trace(fig, "95% band of the fit")
    band_high = fig.data[list(fig.data).index(band_low) - 1]
    observed = next(t for t in fig.data if str(t.name).startswith("Observed forced share"))
    data = XyChartData()
    series_spec: list[tuple[str, Any, Any]] = [
        ("Observed forced share (95% Wilson interval)", observed.x, observed.y),
        ("Fitted logistic trend", fitted.x, fitted.y),
        ("95% band of the fit (lower)", band_low.x, band_low.y),
        ("95% band of the fit (upper)", band_high.x, band_high.y),
    ]
    for name, xs, ys in series_spec:
        series = data.add_series(name, number_format="0.0%")
        for x, y in zip(_floats(xs), _floats(ys), strict=True):
            if math.isfinite(y):
                series.add_data_point(x, y)
    chart = _add(slide, XL_CHART_TYPE.XY_SCATTER_LINES_NO_MARKERS, box, data)
    _house(chart)
    obs, line, low, high = chart.plots[0].series
    obs.format.line.fill.background()
    obs.marker.style = XL_MARKER_STYLE.CIRCLE
    obs.marker.size = 7
    obs.marker.format.fill.solid()
    obs.marker.format.fill.fore_color.rgb = _rgb(OKABE_ITO["vermillion"])
    obs.marker.format.line.color.rgb = _rgb("#FFFFFF")
    share = np.asarray(observed.y, dtype=float)
    keep = np.isfinite(share)
    _error_bars(obs, _floats(np.asarray(observed.error_y.array, dtype=float)[keep]),
                _floats(np.asarray(observed.error_y.arrayminus, dtype=float)[keep]), OKABE_ITO["vermillion"],
                direction="y")
    line.format.line.color.rgb = _rgb(OKABE_ITO["blue"])
    line.format.line.width = Pt(3)
    for edge in (low, high):
        edge.format.line.color.rgb = _rgb(OKABE_ITO["blue"])
        edge.format.line.width = Pt(1)
        edge.format.line.dash_style = MSO_LINE_DASH_STYLE.DASH
    for series in (line, low, high):
        series.marker.style = XL_MARKER_STYLE.NONE
        series.smooth = False
    years = _floats(fitted.x) + _floats(observed.x)
    x_axis, y_axis = chart.category_axis, chart.value_axis
    _year_axis(x_axis, years)
    y_axis.minimum_scale = 0
    y_axis.maximum_scale = float(fig.layout.yaxis.range[1]) if fig.layout.yaxis.range else 1.0
    y_axis.tick_labels.number_format = "0%"
    y_axis.tick_labels.number_format_is_linked = False
    y_axis.has_major_gridlines = True
    y_axis.major_gridlines.format.line.color.rgb = _rgb("#E3E6EA")
    _axis_title(x_axis, "Fiscal year")
    _axis_title(y_axis, "Forced share of departures")
    return chart


def bootstrap_chart(slide: Slide, fig: go.Figure, box: tuple[float, float, float, float]) -> Chart:
    """Resamples per odds-ratio bin: the histogram of the Bootstrap figure, same replicates, same bins."""
    hist = _trace(fig, "Bootstrap odds ratios")
    values = np.asarray(hist.x, dtype=float)
    edges = histogram_edges(values)
    counts, _ = np.histogram(values, bins=edges)
    data = CategoryChartData(number_format="#,##0")
    data.categories = [f"{(a + b) / 2:.3f}" for a, b in zip(edges[:-1], edges[1:], strict=True)]
    data.add_series("Bootstrap resamples", [float(c) for c in counts])
    chart = _add(slide, XL_CHART_TYPE.COLUMN_CLUSTERED, box, data)
    _house(chart, legend=False)
    plot = chart.plots[0]
    plot.gap_width = 8
    series = plot.series[0]
    series.format.fill.solid()
    series.format.fill.fore_color.rgb = _rgb(OKABE_ITO["sky_blue"])
    # highlight the bin holding the estimate, so the chart reads without the plotly figure's vertical lines
    estimate = next((float(s.x0) for s in fig.layout.shapes if s.line.color == OKABE_ITO["vermillion"]), None)
    if estimate is not None:
        index = int(np.clip(np.searchsorted(edges, estimate, side="right") - 1, 0, len(counts) - 1))
        point = series.points[index]
        point.format.fill.solid()
        point.format.fill.fore_color.rgb = _rgb(OKABE_ITO["vermillion"])
    chart.category_axis.tick_labels.font.size = Pt(10)
    _axis_title(chart.category_axis, "Odds ratio per year (bin centre; the estimate's bin in orange)")
    _axis_title(chart.value_axis, "Resamples (count)")
    return chart


def forest_chart(slide: Slide, rows: pd.DataFrame, box: tuple[float, float, float, float]) -> Chart:
    """Horizontal bars from "no change" (odds ratio 1) to each estimate, with the 95% interval as error bars.

    Rows that could not be estimated keep their place with no bar and "(not estimable)" in the label.
    """
    estimates = rows["odds_ratio"].astype(float).to_numpy()
    low = rows["low"].astype(float).to_numpy()
    high = rows["high"].astype(float).to_numpy()
    labels = [f"{label}" if math.isfinite(e) else f"{label} (not estimable)"
              for label, e in zip(rows["label"].astype(str), estimates, strict=True)]
    data = CategoryChartData(number_format="0.000")
    data.categories = labels
    data.add_series("Odds ratio per year", [float(e) if math.isfinite(e) else None for e in estimates])
    chart = _add(slide, XL_CHART_TYPE.BAR_CLUSTERED, box, data)
    _house(chart, legend=False)
    plot = chart.plots[0]
    plot.gap_width = 60
    series = plot.series[0]
    series.format.fill.solid()
    series.format.fill.fore_color.rgb = _rgb(OKABE_ITO["blue"])
    first = str(rows["group"].iloc[0]) if len(rows) else ""
    if first in ("common", "Reference mapping"):
        point = series.points[0]
        point.format.fill.solid()
        point.format.fill.fore_color.rgb = _rgb(OKABE_ITO["vermillion"])
    finite = np.isfinite(estimates) & np.isfinite(low) & np.isfinite(high)
    _error_bars(series, [float(h - e) if ok else 0.0 for e, h, ok in zip(estimates, high, finite, strict=True)],
                [float(e - lo) if ok else 0.0 for e, lo, ok in zip(estimates, low, finite, strict=True)], INK,
                direction=None)
    plot.has_data_labels = True
    labels_fmt = plot.data_labels
    labels_fmt.number_format = "0.000"
    labels_fmt.number_format_is_linked = False
    labels_fmt.font.size = Pt(11)
    chart.category_axis.reverse_order = True  # the first row (the common or reference estimate) on top
    chart.category_axis.tick_labels.font.size = Pt(11)
    chart.category_axis.tick_label_position = XL_TICK_LABEL_POSITION.LOW  # labels at the edge, not at 1
    value_axis = chart.value_axis
    value_axis.crosses_at = 1.0  # bars grow from "no change"
    bounds = [1.0, *(float(v) for v in np.concatenate([low[finite], high[finite]]))]
    pad = (max(bounds) - min(bounds)) * 0.08 or 0.05
    value_axis.minimum_scale = round(min(bounds) - pad, 2)
    value_axis.maximum_scale = round(max(bounds) + pad, 2)
    value_axis.tick_labels.number_format = "0.00"
    value_axis.tick_labels.number_format_is_linked = False
    value_axis.has_major_gridlines = True
    value_axis.major_gridlines.format.line.color.rgb = _rgb("#E3E6EA")
    value_axis.tick_label_position = XL_TICK_LABEL_POSITION.LOW
    _axis_title(value_axis, "Odds ratio per year (bars start at 1 = no change; lines: 95% interval)")
    return chart


def rates_chart(slide: Slide, fig: go.Figure, box: tuple[float, float, float, float]) -> Chart:
    """Forced and voluntary rates per 100 firm-years with their exact intervals, and both fitted Poisson
    trends (the rates figure's traces)."""
    data = XyChartData()
    for measure in ("forced", "voluntary"):
        for name in (OBSERVED[measure], FITTED[measure]):
            trace = _trace(fig, name)
            series = data.add_series(name, number_format="0.00")
            for x, y in zip(_floats(trace.x), _floats(trace.y), strict=True):
                if math.isfinite(y):
                    series.add_data_point(x, y)
    chart = _add(slide, XL_CHART_TYPE.XY_SCATTER_LINES_NO_MARKERS, box, data)
    _house(chart)
    plotted = chart.plots[0].series
    for i, measure in enumerate(("forced", "voluntary")):
        obs, line = plotted[2 * i], plotted[2 * i + 1]
        colour = COLOURS[measure]
        obs.format.line.fill.background()
        obs.marker.style = XL_MARKER_STYLE.CIRCLE
        obs.marker.size = 7
        obs.marker.format.fill.solid()
        obs.marker.format.fill.fore_color.rgb = _rgb(colour)
        obs.marker.format.line.color.rgb = _rgb("#FFFFFF")
        trace = _trace(fig, OBSERVED[measure])
        keep = np.isfinite(np.asarray(trace.y, dtype=float))
        _error_bars(obs, _floats(np.asarray(trace.error_y.array, dtype=float)[keep]),
                    _floats(np.asarray(trace.error_y.arrayminus, dtype=float)[keep]), colour, direction="y")
        line.marker.style = XL_MARKER_STYLE.NONE
        line.smooth = False
        line.format.line.color.rgb = _rgb(colour)
        line.format.line.width = Pt(2.5)
        if measure == "voluntary":
            line.format.line.dash_style = MSO_LINE_DASH_STYLE.DASH
    years = _floats(_trace(fig, OBSERVED["forced"]).x)
    x_axis, y_axis = chart.category_axis, chart.value_axis
    _year_axis(x_axis, years)
    y_axis.minimum_scale = 0
    if fig.layout.yaxis.range:
        y_axis.maximum_scale = float(fig.layout.yaxis.range[1])
    y_axis.has_major_gridlines = True
    y_axis.major_gridlines.format.line.color.rgb = _rgb("#E3E6EA")
    _axis_title(x_axis, "Fiscal year")
    _axis_title(y_axis, "Departures per 100 firm-years")
    return chart


def native_chart(slide: Slide, name: str, fig: go.Figure, rows: pd.DataFrame | None,
                 box: tuple[float, float, float, float]) -> Chart:
    """The finding ``name``'s chart as a native chart in ``box`` (left, top, width, height in inches)."""
    if name == "coverage":
        return coverage_chart(slide, fig, box)
    if name == "trend":
        return trend_chart(slide, fig, box)
    if name == "bootstrap":
        return bootstrap_chart(slide, fig, box)
    if name == "rates":
        return rates_chart(slide, fig, box)
    if rows is None:
        raise ValueError(f"the {name} finding carries no rows for its forest chart.")
    return forest_chart(slide, rows, box)
