"""Figures: house look, content of each chart, escaping, page hand-off, provenance text."""

from __future__ import annotations

import dataclasses
import json
import math
from datetime import UTC, datetime

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import plotly.io as pio
import pytest
from statsmodels.stats.proportion import proportion_confint

from app.analysis.provenance import CAUTIONS, Provenance
from app.briefing import charts

SOURCE = "Source: roster Demo [abc123] · mapping Standard v2"


def provenance(**changes: object) -> Provenance:
    base = Provenance(
        roster="Demo roster", roster_fingerprint="0123456789abcdef0123", mapping_name="Standard",
        mapping_version=2, window=(2004, 2020), model="binomial GLM, logit linear in year",
        interval_method="profile likelihood", resamples=1000, seed=42, unit="firm",
        created=datetime(2024, 5, 6, 7, 8, tzinfo=UTC),
    )
    return dataclasses.replace(base, **changes)  # type: ignore[arg-type]


def coverage_table() -> pd.DataFrame:
    return pd.DataFrame({"year": [2001, 2002, 2003, 2004], "forced": [2, 10, 12, 3],
                         "voluntary": [5, 30, 33, 6], "excluded": [1, 2, 3, 1], "unmapped": [0, 0, 1, 2]})


def trend_frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    forced = np.array([5, 9, 14, 20])
    total = np.array([40, 50, 60, 40])
    low, high = proportion_confint(forced, total, method="wilson")  # statsmodels as the interval oracle
    observed = pd.DataFrame({"year": [2001, 2002, 2003, 2004], "share": forced / total, "low": low,
                             "high": high, "total": total})
    fit = np.array([0.13, 0.19, 0.26, 0.35])
    fitted = pd.DataFrame({"year": [2001, 2002, 2003, 2004], "fit": fit, "low": fit - 0.05, "high": fit + 0.05})
    return observed, fitted


def forest_rows() -> pd.DataFrame:
    return pd.DataFrame({
        "label": ["All", "Energy", "Banks <HQ>", "Strict mapping"],
        "odds_ratio": [1.05, 1.10, np.nan, 1.02], "low": [1.01, 0.97, np.nan, 0.99],
        "high": [1.09, 1.25, np.nan, 1.06], "group": ["common", "sector", "sector", "mapping"],
    })


def all_figures() -> dict[str, go.Figure]:
    observed, fitted = trend_frames()
    boot = np.array([1.01, 1.03, np.nan, 1.05, 1.04, np.nan, 1.06, 1.02])
    return {
        "coverage": charts.coverage_figure(coverage_table(), (2002, 2003), [2001], title="Coverage", source=SOURCE),
        "trend": charts.trend_figure(observed, fitted, title="Trend", source=SOURCE),
        "boot": charts.bootstrap_histogram(boot, 1.04, (1.015, 1.058), method_label="BCa 95%", title="Boot",
                                           source=SOURCE),
        "forest": charts.forest_figure(forest_rows(), title="Forest", source=SOURCE),
    }


@pytest.mark.parametrize("name", ["coverage", "trend", "boot", "forest"])
def test_house_look_replaces_plotly_defaults(name: str) -> None:
    fig = all_figures()[name]
    layout = fig.layout
    assert list(layout.template.layout.colorway) == list(charts.COLORWAY)
    default = pio.templates["plotly"].layout
    as_json = fig.to_json().lower()
    for colour in default.colorway:  # plotly's default cycle must not leak in anywhere
        assert colour.lower() not in as_json
    assert layout.template.layout.plot_bgcolor == "#FFFFFF"
    assert default.plot_bgcolor.lower() not in as_json  # the blue-grey #E5ECF6 ground
    assert layout.template.layout.xaxis.gridcolor is None or layout.template.layout.xaxis.showgrid is False
    assert layout.title.text and layout.xaxis.title.text
    assert layout.yaxis.title.text or name == "forest"  # a forest's rows are labelled one by one
    sources = [a for a in layout.annotations if a.name == "source"]
    assert len(sources) == 1 and "Source: roster Demo [abc123]" in sources[0].text


def test_titles_and_labels_escape_html_but_wrap_long_text() -> None:
    long = "Forced exits <script>alert(1)</script> & more " + "word " * 30
    fig = charts.coverage_figure(coverage_table(), None, [], title=long, source="a < b")
    text = fig.layout.title.text
    assert "<script>" not in text and "&lt;script&gt;" in text and "&amp; more" in text
    assert text.count("<br>") >= 1  # wrapped onto more than one line
    assert "a &lt; b" in [a for a in fig.layout.annotations if a.name == "source"][0].text


def test_coverage_stacks_categories_shades_window_and_marks_flagged_years() -> None:
    fig = charts.coverage_figure(coverage_table(), (2002, 2003), [2001, 2004], title="t", source="s")
    bars = [t for t in fig.data if t.type == "bar"]
    assert [b.name.split(" ")[0] for b in bars] == ["Forced", "Voluntary", "Excluded", "Unmapped"]
    assert bars[0].marker.color == charts.CATEGORY_COLOURS["forced"]
    assert bars[3].marker.pattern.shape == "/"  # unmapped is hatched as a warning
    assert fig.layout.barmode == "stack"
    (shade,) = fig.layout.shapes
    assert (shade.x0, shade.x1) == (2001.5, 2003.5)
    assert any("FY2002–2003" in a.text for a in fig.layout.annotations)
    flagged = [t for t in fig.data if t.type == "scatter"][0]
    assert list(flagged.x) == [2001, 2004]
    assert fig.layout.yaxis.title.text == "Departures (count)"


def test_coverage_without_unmapped_codes_has_no_unmapped_bar_and_rejects_missing_columns() -> None:
    table = coverage_table().assign(unmapped=0)
    fig = charts.coverage_figure(table, None, [], title="t", source="s")
    assert [t.name for t in fig.data if t.type == "bar"][-1].startswith("Excluded")
    assert not fig.layout.shapes
    with pytest.raises(ValueError, match="missing unmapped"):
        charts.coverage_figure(table.drop(columns="unmapped"), None, [], title="t", source="s")


def test_trend_error_bars_are_the_wilson_interval_and_axis_is_percent() -> None:
    observed, fitted = trend_frames()
    fig = charts.trend_figure(observed, fitted, title="t", source="s")
    points = [t for t in fig.data if t.mode == "markers"][0]
    # 5/40: statsmodels Wilson interval, recomputed independently here with the closed form
    p, n, z = 5 / 40, 40, 1.959963984540054
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    assert points.y[0] - points.error_y.arrayminus[0] == pytest.approx(centre - half, abs=1e-12)
    assert points.y[0] + points.error_y.array[0] == pytest.approx(centre + half, abs=1e-12)
    sizes = list(points.marker.size)
    assert sizes[2] == max(sizes) and sizes[0] == min(sizes)  # 60 departures biggest, 40 smallest
    assert fig.layout.yaxis.tickformat == ".0%"
    band = [t for t in fig.data if t.fill == "tonexty"]
    assert len(band) == 1 and list(band[0].y) == list(fitted["low"])


def test_bootstrap_histogram_drops_and_counts_failed_resamples() -> None:
    fig = all_figures()["boot"]
    (hist,) = [t for t in fig.data if t.type == "histogram"]
    assert len(hist.x) == 6 and all(math.isfinite(v) for v in hist.x)
    notes = [a.text for a in fig.layout.annotations if a.name == "notes"]
    assert notes and "8 resamples; 2 failed" in notes[0]
    lines = {round(s.x0, 6): s for s in fig.layout.shapes}
    assert lines[1.0].line.dash == "dash"
    assert lines[1.04].line.dash is None  # the estimate is solid
    assert {1.015, 1.058} <= set(lines)
    with pytest.raises(ValueError, match="every resample failed"):
        charts.bootstrap_histogram(np.array([np.nan]), 1.0, (1.0, 1.0), method_label="m", title="t", source="s")


def test_forest_uses_log_axis_and_says_not_estimable_instead_of_plotting() -> None:
    fig = all_figures()["forest"]
    assert fig.layout.xaxis.type == "log"
    plotted = [label for t in fig.data for label in (t.text or ())]
    assert "Banks &lt;HQ&gt;" not in plotted and "Energy" in plotted
    assert any("not estimable" in a.text for a in fig.layout.annotations)
    assert "Banks &lt;HQ&gt;" in fig.layout.yaxis.ticktext  # the row keeps its label
    common = [t for t in fig.data if t.name == "All departures"][0]
    assert common.marker.color == charts.OKABE_ITO["vermillion"]
    assert all(t.marker.color != common.marker.color for t in fig.data if t.name != "All departures")


def test_untitled_and_without_source_copies_leave_the_original_alone() -> None:
    fig = all_figures()["trend"]
    bare = charts.untitled(fig)
    assert not bare.layout.title.text and fig.layout.title.text == "Trend"
    slim = charts.without_source(fig)
    assert [a.name for a in slim.layout.annotations] == ["notes"]
    assert slim.layout.margin.b < fig.layout.margin.b
    assert [a.name for a in fig.layout.annotations] == ["source", "notes"]


def test_page_hand_off_is_plotly_json_and_config_shows_only_download() -> None:
    fig = all_figures()["coverage"]
    payload = json.loads(charts.figure_json(fig))
    assert payload["layout"]["title"]["text"] == "Coverage"
    assert charts.PAGE_CONFIG["displaylogo"] is False
    assert charts.PAGE_CONFIG["modeBarButtons"] == [["toImage"]]
    assert charts.PAGE_CONFIG["responsive"] is True


def test_provenance_lines_short_form_and_frozen() -> None:
    prov = provenance()
    text = prov.text()
    for fragment in ("Demo roster", "0123456789abcdef0123", "Standard, version 2", "2004–2020",
                     "B = 1,000 resamples, by firm, seed 42", "Helmshift"):
        assert fragment in text
    short = prov.short()
    assert "[0123456789ab]" in short and "v2" in short and "\n" not in short
    assert "Resampling" not in provenance(resamples=None).text()
    with pytest.raises(dataclasses.FrozenInstanceError):
        prov.roster = "other"  # type: ignore[misc]
    assert len(CAUTIONS) == 4 and any("not a cause" in c for c in CAUTIONS)


def test_year_axis_labels_only_years_inside_the_data() -> None:
    # plotly pads a bar axis by half a bar; a linear tick rule then labels a year with no data
    table = pd.DataFrame({"year": range(1995, 2025), "forced": 1, "voluntary": 2, "excluded": 0, "unmapped": 0})
    fig = charts.coverage_figure(table, (1998, 2022), [], title="t", source="s")
    ticks = list(fig.layout.xaxis.tickvals)
    assert ticks[0] == 1995 and ticks[-1] <= 2024 and all(1995 <= t <= 2024 for t in ticks)
