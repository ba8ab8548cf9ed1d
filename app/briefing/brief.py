"""The one-page printable brief: HTML from templates/brief.html (autoescaped) to an A4 PDF with WeasyPrint.

The two charts are inlined as SVG so they stay sharp in print. If the content runs past one page the
brief is laid out again more compactly (shorter charts, smaller type, fewer table rows) until it fits.
"""

from __future__ import annotations

import base64
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import plotly.graph_objects as go
from jinja2 import Environment, FileSystemLoader, select_autoescape
from markupsafe import Markup

from app.analysis.provenance import CAUTIONS, Provenance
from app.briefing.charts import without_source
from app.briefing.render import figure_bytes
from app.briefing.signature import Signature, default_title

TEMPLATE_DIR = Path(__file__).resolve().parents[2] / "templates"
_env = Environment(loader=FileSystemLoader(str(TEMPLATE_DIR)), autoescape=select_autoescape(default=True))

# wider than the page's 182 mm text block needs, so chart type prints at ~8-11 pt
CHART_WIDTH_PX = 1000


@dataclass(frozen=True)
class _Layout:
    chart_height_px: int
    base_pt: float
    max_rows: int


# tried in order until the brief fits on one page
_LAYOUTS: tuple[_Layout, ...] = (
    _Layout(470, 9.0, 10),
    _Layout(430, 8.5, 8),
    _Layout(390, 8.0, 6),
    _Layout(350, 7.5, 5),
)


@dataclass(frozen=True)
class BriefRow:
    """One table row, already formatted for print."""

    label: str
    odds_ratio: str
    interval: str
    method: str
    estimable: bool


def _rows(table: pd.DataFrame) -> list[BriefRow]:
    missing = [c for c in ("label", "odds_ratio", "low", "high", "method") if c not in table.columns]
    if missing:
        raise ValueError(f"build_brief table needs columns label, odds_ratio, low, high, method; "
                         f"missing {', '.join(missing)}.")
    rows = []
    for label, est, low, high, method in zip(table["label"], table["odds_ratio"].astype(float),
                                             table["low"].astype(float), table["high"].astype(float),
                                             table["method"], strict=True):
        ok = math.isfinite(est)
        rows.append(BriefRow(
            label=str(label), odds_ratio=f"{est:.3f}" if ok else "",
            interval=f"{low:.3f} to {high:.3f}" if ok and math.isfinite(low) and math.isfinite(high) else "n/a",
            method=str(method), estimable=ok,
        ))
    return rows


def _inline_svg(svg: bytes) -> Markup:
    # a data: URI keeps the SVG inside the one HTML file and sends it straight to WeasyPrint's SVG
    # renderer; as inline <svg> markup its style attributes also pass through the HTML CSS parser,
    # which logs a warning for every SVG-only property
    encoded = base64.b64encode(svg).decode("ascii")
    return Markup(f'<img alt="" src="data:image/svg+xml;base64,{encoded}">')


def render_brief_html(*, headline: str, chart_svgs: Sequence[bytes], table: pd.DataFrame, method_text: str,
                      provenance: Provenance, base_pt: float = 9.0, max_rows: int = 12,
                      signature: Signature | None = None, captions: Sequence[str] = (), data_text: str = "") -> str:
    """The brief's HTML (autoescaped), from already rendered SVG charts."""
    rows = _rows(table)
    sign = signature or Signature(default_title(provenance.roster), "", "", provenance.created.date())
    return _env.get_template("brief.html").render(
        headline=headline, charts=list(zip([_inline_svg(s) for s in chart_svgs],
                                           [*captions, *[""] * len(chart_svgs)], strict=False)),
        rows=rows[:max_rows], hidden_rows=max(0, len(rows) - max_rows), method_text=method_text,
        cautions=CAUTIONS, provenance=provenance, base_pt=base_pt, sign=sign, data_text=data_text,
    )


def build_brief(*, headline: str, charts: Sequence[go.Figure], table: pd.DataFrame, method_text: str,
                provenance: Provenance, signature: Signature | None = None, captions: Sequence[str] = (),
                data_text: str = "", spare_page: bool = False) -> bytes:
    """An A4 PDF: the analyst's title, byline and marking, the headline, the charts with their takeaways,
    the odds-ratio table, data used and rejected, method, cautions and the provenance footer. One page for
    one or two charts, one more page for every two more; ``spare_page`` (findings with long captions and
    notes: rates, the adjusted trend): when even the most compact layout overflows, the roomiest layout that
    fits one page more.

    Raises app.briefing.render.ExportUnavailable when charts cannot be rendered (no browser), ValueError when
    there is no chart or the content cannot be fitted on its pages.
    """
    from weasyprint import HTML

    if not charts:
        raise ValueError("build_brief needs at least one chart.")
    pages = math.ceil(len(charts) / 2)
    tries = [(layout, pages) for layout in _LAYOUTS]
    if spare_page:
        tries += [(layout, pages + 1) for layout in _LAYOUTS]
    for layout, allowed in tries:
        # the page footer carries the full provenance, so the charts drop their own source line
        svgs = [figure_bytes(without_source(fig), "svg", width=CHART_WIDTH_PX, height=layout.chart_height_px)
                for fig in charts]
        html = render_brief_html(headline=headline, chart_svgs=svgs, table=table, method_text=method_text,
                                 provenance=provenance, base_pt=layout.base_pt, max_rows=layout.max_rows,
                                 signature=signature, captions=captions, data_text=data_text)
        document = HTML(string=html, base_url=str(TEMPLATE_DIR)).render()
        if len(document.pages) <= allowed:
            return bytes(document.write_pdf())
    raise ValueError(f"The brief does not fit on {pages} A4 page(s) even in its most compact layout; "
                     "shorten the headline or the method text, or tick fewer findings.")
