"""The slide deck (16:9 .pptx): title, one slide per finding, methods and provenance, cautions.

Findings of the product (coverage, trend, bootstrap, sectors, robustness, rates, adjusted) get native, editable charts
(app.briefing.native_charts); any other figure goes in as a picture. Every slide has speaker notes: the
method, the interval and the caveat. The analyst's title, author, date and marking sit on the title slide,
and the marking in every footer.

Every text box is sized from an estimate of how its text wraps and boxes are stacked top to bottom, so
text never overlaps a picture or another box; text that would not fit shrinks to a floor size and is then
cut with an ellipsis rather than spilling.
"""

from __future__ import annotations

import functools
import io
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date

import pandas as pd
import plotly.graph_objects as go
from PIL import ImageFont
from pptx import Presentation
from pptx.dml.color import RGBColor
from pptx.enum.shapes import MSO_SHAPE
from pptx.enum.text import MSO_ANCHOR, MSO_AUTO_SIZE, PP_ALIGN
from pptx.slide import Slide
from pptx.util import Emu, Inches, Pt

from app.analysis.provenance import CAUTIONS, Provenance
from app.briefing.charts import INK, MUTED, OKABE_ITO, untitled
from app.briefing.native_charts import native_chart
from app.briefing.render import figure_bytes

SLIDE_W_IN = 13.333
SLIDE_H_IN = 7.5
MARGIN_IN = 0.55
FONT = "Arial"
# Liberation Sans has Arial's metrics, so measuring with it predicts PowerPoint's and LibreOffice's line
# breaks; without it, an average advance of 0.55 em (0.6 bold) errs towards an extra line.
_METRIC_FONTS = {
    False: ("/usr/share/fonts/truetype/liberation/LiberationSans-Regular.ttf", "LiberationSans-Regular.ttf",
            "Arial.ttf", "arial.ttf"),
    True: ("/usr/share/fonts/truetype/liberation/LiberationSans-Bold.ttf", "LiberationSans-Bold.ttf",
           "Arial Bold.ttf", "arialbd.ttf"),
}
_EM_FALLBACK = {False: 0.55, True: 0.6}
_SAFETY = 1.06
_LEADING = 1.2
# python-pptx's default template: layout 5 is "Title Only" (a real title placeholder, for the outline view)
_LAYOUT_TITLE_ONLY = 5


@functools.cache
def _metric_font(bold: bool) -> ImageFont.FreeTypeFont | None:
    for candidate in _METRIC_FONTS[bold]:
        try:
            return ImageFont.truetype(candidate, 100)
        except OSError:
            continue
    return None


def text_width_pt(text: str, size: float, *, bold: bool = False) -> float:
    """Estimated width of one line of Arial text in points."""
    font = _metric_font(bold)
    if font is None:
        return len(text) * size * _EM_FALLBACK[bold]
    return float(font.getlength(text)) / 100 * size * _SAFETY


def _wrap_measured(paragraph: str, width_pt: float, size: float, bold: bool) -> list[str]:
    lines: list[str] = []
    current = ""
    for word in paragraph.split():
        trial = f"{current} {word}" if current else word
        if current and text_width_pt(trial, size, bold=bold) > width_pt:
            lines.append(current)
            current = word
        else:
            current = trial
    lines.append(current)
    return lines


def _rgb(hex_colour: str) -> RGBColor:
    return RGBColor.from_string(hex_colour.lstrip("#"))


NATIVE = ("coverage", "trend", "bootstrap", "sectors", "robustness", "rates", "adjusted")


@dataclass(frozen=True)
class Finding:
    """One finding: the slide title (a sentence), a one-sentence takeaway and the chart that shows it.

    ``name`` one of ``NATIVE`` draws a native chart from the figure's numbers (``rows`` for the forest
    charts of sectors and robustness); any other name places the figure as a picture. ``notes`` become the
    slide's speaker notes.
    """

    title: str
    takeaway: str
    figure: go.Figure
    name: str = ""
    rows: pd.DataFrame | None = field(default=None, compare=False)
    notes: str = ""


@dataclass(frozen=True)
class Byline:
    """Who signs the deck: shown on the title slide; the marking also in every footer."""

    author: str = ""
    marking: str = ""
    date: date | None = None


@dataclass(frozen=True)
class _Fit:
    lines: tuple[str, ...]
    size: float

    @property
    def height_in(self) -> float:
        return len(self.lines) * self.size * _LEADING / 72


def fit_text(text: str, width_in: float, max_height_in: float, size: float, *, min_size: float = 12,
             bold: bool = False) -> _Fit:
    """Wrap ``text`` for a box ``width_in`` wide, shrinking to ``min_size`` and then truncating to fit."""
    paragraphs = text.split("\n")
    current = size
    while True:
        lines = [line for p in paragraphs for line in _wrap_measured(p, width_in * 72, current, bold)]
        if len(lines) * current * _LEADING / 72 <= max_height_in or current <= min_size:
            break
        current = max(min_size, current - 1)
    keep = max(1, math.floor(max_height_in * 72 / (current * _LEADING)))
    if len(lines) > keep:
        lines = lines[:keep]
        last = lines[-1] + " \u2026"
        while text_width_pt(last, current, bold=bold) > width_in * 72 and " " in last[:-2]:
            last = last[:-2].rsplit(" ", 1)[0] + " \u2026"
        lines[-1] = last
    return _Fit(tuple(lines), current)


def _fill(frame: object, fit: _Fit, *, bold: bool = False, colour: str = INK,
          align: PP_ALIGN = PP_ALIGN.LEFT) -> None:
    """Write pre-wrapped lines (one paragraph each, so the renderer's own wrapping cannot add lines)."""
    tf = frame.text_frame  # type: ignore[attr-defined]
    tf.word_wrap = True
    tf.auto_size = MSO_AUTO_SIZE.NONE
    tf.vertical_anchor = MSO_ANCHOR.TOP
    tf.margin_left = tf.margin_right = tf.margin_top = tf.margin_bottom = 0
    for i, line in enumerate(fit.lines):
        para = tf.paragraphs[0] if i == 0 else tf.add_paragraph()
        para.alignment = align
        para.line_spacing = 1.0
        para.space_before = para.space_after = Pt(0)
        run = para.add_run()
        run.text = line
        run.font.name = FONT
        run.font.size = Pt(fit.size)
        run.font.bold = bold
        run.font.color.rgb = _rgb(colour)


class _Stack:
    """Hands out vertical bands top to bottom so boxes cannot overlap."""

    def __init__(self, top_in: float, bottom_in: float) -> None:
        self.cursor = top_in
        self.bottom = bottom_in

    def take(self, height_in: float, gap_in: float = 0.0) -> float:
        top = self.cursor
        self.cursor = top + height_in + gap_in
        return top

    @property
    def left(self) -> float:
        return self.bottom - self.cursor


def _box(slide: Slide, left: float, top: float, width: float, height: float) -> object:
    return slide.shapes.add_textbox(Inches(left), Inches(top), Inches(width), Inches(height))


def _place_title(slide: Slide, fit: _Fit, left: float, top: float, width: float) -> None:
    """Fill the layout's title placeholder (kept so outline views and screen readers see the title)."""
    shape = slide.shapes.title
    if shape is None:
        raise RuntimeError("the deck template's Title Only layout has no title placeholder")
    shape.left, shape.top = Inches(left), Inches(top)
    shape.width, shape.height = Inches(width), Inches(fit.height_in + 0.04)
    shape.text_frame.clear()
    _fill(shape, fit, bold=True)


def _title(slide: Slide, text: str, stack: _Stack, size: float = 28, max_height: float = 1.25) -> None:
    width = SLIDE_W_IN - 2 * MARGIN_IN
    fit = fit_text(text, width, max_height, size, min_size=20, bold=True)
    _place_title(slide, fit, MARGIN_IN, stack.take(fit.height_in + 0.04, 0.22), width)


def _footer(slide: Slide, provenance: Provenance, number: int, marking: str = "") -> None:
    top = SLIDE_H_IN - 0.42
    width = SLIDE_W_IN - 2 * MARGIN_IN
    # the brief pack's name goes before the roster, so a long roster name cannot push it off the line
    left_text = ((f"{marking} \u00b7 " if marking else "")
                 + (f"brief pack sha256 {provenance.brief_pack[:16]} \u00b7 " if provenance.brief_pack else "")
                 + f"{provenance.roster} \u00b7 {provenance.mapping_label} "
                 f"\u00b7 FY{provenance.window[0]}\u2013{provenance.window[1]}")
    fit = fit_text(left_text, width - 0.8, 0.2, 10, min_size=8)
    _fill(_box(slide, MARGIN_IN, top, width - 0.8, 0.2), _Fit(fit.lines[:1], fit.size), colour=MUTED)
    _fill(_box(slide, SLIDE_W_IN - MARGIN_IN - 0.6, top, 0.6, 0.2), _Fit((str(number),), 10), colour=MUTED,
          align=PP_ALIGN.RIGHT)


def _accent(slide: Slide, top: float, height: float) -> None:
    bar = slide.shapes.add_shape(MSO_SHAPE.RECTANGLE, Inches(0.22), Inches(top), Inches(0.09), Inches(height))
    bar.fill.solid()
    bar.fill.fore_color.rgb = _rgb(OKABE_ITO["vermillion"])
    bar.line.fill.background()


def _notes(slide: Slide, text: str) -> None:
    frame = slide.notes_slide.notes_text_frame
    if frame is None:
        raise RuntimeError("the deck template's notes master has no body placeholder")
    frame.text = text


def _title_slide(prs: object, title: str, subtitle: str, provenance: Provenance, byline: Byline) -> None:
    slide = prs.slides.add_slide(prs.slide_layouts[_LAYOUT_TITLE_ONLY])  # type: ignore[attr-defined]
    width = SLIDE_W_IN - 2 * MARGIN_IN
    if byline.marking:
        mark = fit_text(byline.marking, width, 0.3, 14, min_size=11, bold=True)
        _fill(_box(slide, MARGIN_IN, 0.45, width, mark.height_in), mark, bold=True,
              colour=OKABE_ITO["vermillion"], align=PP_ALIGN.RIGHT)
    stack = _Stack(2.0, SLIDE_H_IN - 0.8)
    title_fit = fit_text(title, width, 1.7, 40, min_size=28, bold=True)
    _place_title(slide, title_fit, MARGIN_IN, stack.take(title_fit.height_in + 0.04, 0.25), width)
    sub_fit = fit_text(subtitle, width, 1.0, 22, min_size=16)
    _fill(_box(slide, MARGIN_IN, stack.take(sub_fit.height_in, 0.45), width, sub_fit.height_in), sub_fit,
          colour=MUTED)
    when = byline.date or provenance.created.date()
    meta = "\n".join([
        (f"Prepared by {byline.author}, " if byline.author else "Prepared ") + f"{when.day} {when:%B %Y}",
        f"Roster: {provenance.roster}",
        f"Fiscal years {provenance.window[0]}\u2013{provenance.window[1]} \u00b7 {provenance.mapping_label}",
    ])
    meta_fit = fit_text(meta, width, max(0.5, stack.left), 16, min_size=12)
    _fill(_box(slide, MARGIN_IN, stack.take(meta_fit.height_in), width, meta_fit.height_in), meta_fit)
    _accent(slide, 2.0, stack.cursor - 2.0)
    _notes(slide, f"{title}. {subtitle}. Every number in this deck comes from: {provenance.short()}.")


def _finding_slide(prs: object, finding: Finding, provenance: Provenance, number: int, marking: str) -> None:
    slide = prs.slides.add_slide(prs.slide_layouts[_LAYOUT_TITLE_ONLY])  # type: ignore[attr-defined]
    width = SLIDE_W_IN - 2 * MARGIN_IN
    stack = _Stack(0.4, SLIDE_H_IN - 0.6)
    _title(slide, finding.title, stack)
    take_fit = fit_text(finding.takeaway, width, 0.95, 20, min_size=15)
    picture_h = stack.left - take_fit.height_in - 0.2
    top = stack.take(picture_h, 0.2)
    if finding.name in NATIVE:
        native_chart(slide, finding.name, finding.figure, finding.rows, (MARGIN_IN, top, width, picture_h))
    else:
        # render at the box's own aspect ratio so the chart fills it instead of floating in white space
        # 960 px across ~12 in keeps the chart's 15 px type at ~14 pt on the slide
        px_w = 960
        px_h = int(min(640, max(400, px_w * picture_h / width)))
        png = figure_bytes(untitled(finding.figure), "png", width=px_w, height=px_h)
        shown_w = min(width, picture_h * px_w / px_h)
        shown_h = shown_w * px_h / px_w
        slide.shapes.add_picture(io.BytesIO(png), Inches(MARGIN_IN + (width - shown_w) / 2),
                                 Inches(top + (picture_h - shown_h) / 2), Inches(shown_w), Inches(shown_h))
    _fill(_box(slide, MARGIN_IN, stack.take(take_fit.height_in), width, take_fit.height_in), take_fit)
    _footer(slide, provenance, number, marking)
    if finding.notes:
        _notes(slide, finding.notes)


def _column(slide: Slide, left: float, top: float, width: float, height: float, heading: str,
            body: str, size: float) -> None:
    head = fit_text(heading, width, 0.6, 17, min_size=14, bold=True)
    _fill(_box(slide, left, top, width, head.height_in), head, bold=True)
    body_top = top + head.height_in + 0.12
    fit = fit_text(body, width, top + height - body_top, size, min_size=10)
    _fill(_box(slide, left, body_top, width, fit.height_in), fit)


def _methods_slide(prs: object, provenance: Provenance, number: int, marking: str) -> None:
    slide = prs.slides.add_slide(prs.slide_layouts[_LAYOUT_TITLE_ONLY])  # type: ignore[attr-defined]
    stack = _Stack(0.4, SLIDE_H_IN - 0.6)
    _title(slide, "Methods and provenance", stack)
    gap = 0.5
    col_w = (SLIDE_W_IN - 2 * MARGIN_IN - gap) / 2
    _column(slide, MARGIN_IN, stack.cursor, col_w, stack.left, "Data, model and intervals",
            provenance.text(), 16)
    if provenance.categories:
        body = "\n".join(f"{category.capitalize()}: {', '.join(codes) if codes else 'no codes'}"
                          for category, codes in provenance.categories)
    else:
        body = "The categories of this mapping version were not supplied with the export."
    _column(slide, MARGIN_IN + col_w + gap, stack.cursor, col_w, stack.left,
            f"{provenance.mapping_label.capitalize()}: reason codes by category",
            body, 15)
    _footer(slide, provenance, number, marking)
    rows = f"Rows used: {provenance.rows_used}. " if provenance.rows_used else ""
    _notes(slide, f"{rows}Method: {provenance.model}. Interval: {provenance.interval_method}. Caveat: the "
                  "classification of reason codes into forced and voluntary is a judgement; the mapping version "
                  "named here is the one every number used.")


def _cautions_slide(prs: object, provenance: Provenance, number: int, marking: str) -> None:
    slide = prs.slides.add_slide(prs.slide_layouts[_LAYOUT_TITLE_ONLY])  # type: ignore[attr-defined]
    stack = _Stack(0.4, SLIDE_H_IN - 0.6)
    _title(slide, "Cautions", stack)
    width = SLIDE_W_IN - 2 * MARGIN_IN
    share = stack.left / len(CAUTIONS)
    for caution in CAUTIONS:
        fit = fit_text(f"\u2022 {caution}", width, share - 0.2, 22, min_size=14)
        _fill(_box(slide, MARGIN_IN, stack.take(fit.height_in, 0.2), width, fit.height_in), fit)
    _footer(slide, provenance, number, marking)
    _notes(slide, f"Method: {provenance.model}. Interval: {provenance.interval_method}. Caveat: "
                  + " ".join(CAUTIONS))


def build_deck(findings: Sequence[Finding], provenance: Provenance, *, title: str, subtitle: str,
               byline: Byline | None = None) -> bytes:
    """A 16:9 deck: title slide, one slide per finding (chart + takeaway), methods, cautions.

    Raises app.briefing.render.ExportUnavailable when a picture chart cannot be rendered (no browser).
    """
    byline = byline or Byline()
    prs = Presentation()
    prs.slide_width = Emu(Inches(SLIDE_W_IN))
    prs.slide_height = Emu(Inches(SLIDE_H_IN))
    prs.core_properties.title = title
    prs.core_properties.author = byline.author or "Helmshift"
    prs.core_properties.subject = subtitle
    prs.core_properties.keywords = byline.marking
    prs.core_properties.comments = provenance.short()[:255]
    _title_slide(prs, title, subtitle, provenance, byline)
    for i, finding in enumerate(findings, start=2):
        _finding_slide(prs, finding, provenance, i, byline.marking)
    _methods_slide(prs, provenance, len(findings) + 2, byline.marking)
    _cautions_slide(prs, provenance, len(findings) + 3, byline.marking)
    out = io.BytesIO()
    prs.save(out)
    return out.getvalue()
