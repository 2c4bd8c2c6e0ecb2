"""The client report as a self-contained HTML file or a PDF, drawn with Qt.

:func:`export_report` is the one call for a chain (and an optional plan):
it builds the content with :func:`core.report.build_report`, renders it by the
output's suffix and writes it atomically.  :func:`export_document_report`
does the same for an open :class:`~app.document.Document` (the File menu).

* **HTML** (:func:`render_html`): one file, no scripts, no external files, no
  network: charts and the chain picture are inline SVG images (as ``data:``
  URIs), a Content-Security-Policy forbids anything else, and every piece of
  user-written text is escaped with :func:`html.escape`.
* **PDF** (:func:`render_pdf`): the same content laid out by a
  ``QTextDocument`` on a ``QPdfWriter`` (A4), paged by hand so that every page
  carries the footer (generation time, Longrun version, SHA-256 of the input)
  and its page number.  Charts and the picture are raster images at print
  resolution.

The chain picture is the editor's own scene (:class:`app.canvas.ChainCanvas`
built offscreen on a fresh document), so it shows the chain as drawn, in the
editor's visual language.  Charts are painted with ``QPainter`` in the
Okabe-Ito colours of :mod:`app.palette`; colour is never the only cue
(hatching, dash patterns and labels carry the same meaning).
"""
from __future__ import annotations

import base64
import html
import math
import os
import re
from pathlib import Path
from typing import Any

from PySide6.QtCore import QBuffer, QIODevice, QMarginsF, QPointF, QRectF, QSize, QSizeF, Qt, QUrl
from PySide6.QtGui import (
    QBrush,
    QColor,
    QFont,
    QFontDatabase,
    QFontMetricsF,
    QImage,
    QPageLayout,
    QPageSize,
    QPainter,
    QPdfWriter,
    QPen,
    QPolygonF,
    QTextDocument,
)

from core.errors import LimitError, LongrunError, OptionError
from core.report import (
    BarChart,
    Callout,
    ChainPicture,
    Facts,
    LineChart,
    Paragraph,
    Report,
    Subheading,
    Table,
    build_report,
    file_sha256,
)

from . import palette as pal

__all__ = [
    "SUFFIXES",
    "DEFAULT_MAX_MB",
    "export_report",
    "export_document_report",
    "write_report",
    "render_html",
    "render_pdf",
    "chart_image",
    "chart_svg",
    "chain_picture_svg",
    "chain_picture_image",
    "max_report_bytes",
]

#: Output suffixes and their formats.
SUFFIXES = {".html": "html", ".htm": "html", ".pdf": "pdf"}
#: Default largest report file, in MiB (``LONGRUN_MAX_REPORT_MB`` or ``--max-size-mb`` change it).
DEFAULT_MAX_MB = 25.0

#: Chart size in CSS pixels (HTML) and logical pixels (PDF, at 96 per inch).
CHART_W, CHART_H = 640, 290
#: Raster scale of charts and the picture in the PDF (3 x 96 = 288 dpi).
PDF_SCALE = 3
#: Largest side of the chain picture in the PDF, in logical pixels.
PICTURE_MAX = (640, 440)

_FONT_PREFERENCE = ("Inter", "Source Sans 3", "Source Sans Pro", "Segoe UI", "Helvetica Neue",
                    "Helvetica", "Arial", "Liberation Sans", "Noto Sans", "DejaVu Sans")
_CSS_SANS = ('"Inter", "Source Sans 3", "Segoe UI", "Helvetica Neue", Helvetica, Arial, '
             '"Liberation Sans", "DejaVu Sans", sans-serif')

# Okabe-Ito roles (app.palette); colour names stay out of the meaning.
BLUE = pal.OKABE_ITO["blue"]
ORANGE = pal.OKABE_ITO["orange"]
GREEN = pal.OKABE_ITO["bluish_green"]
VERMILLION = pal.OKABE_ITO["vermillion"]
SKY = pal.OKABE_ITO["sky_blue"]
INK = pal.INK
INK_SOFT = pal.INK_SOFT
GRID = QColor("#E3E6E9")
GRID_MINOR = QColor("#F0F2F4")

_CALLOUT = {  # kind -> (badge text, colour, tint of the box)
    "error": ("PROBLEM", VERMILLION),
    "warning": ("WARNING", ORANGE),
    "note": ("NOTE", SKY),
    "sound": ("SOUND", GREEN),
    "misleading": ("MISLEADING", VERMILLION),
    "valid": ("VALID", GREEN),
    "caution": ("CAUTION", INK_SOFT),
}


def _hex(c: QColor) -> str:
    return c.name(QColor.NameFormat.HexRgb)


def _esc(text: Any) -> str:
    return html.escape(str(text), quote=True)


# ---------------------------------------------------------------------------
# Qt set-up
# ---------------------------------------------------------------------------
def _ensure_app():
    """A QApplication (the canvas is a widget); create one offscreen-capable if none exists."""
    from PySide6.QtWidgets import QApplication

    app = QApplication.instance()
    if app is None:
        app = QApplication(["longrun-report"])
    return app


_FAMILY: str | None = None


def _family() -> str:
    global _FAMILY
    if _FAMILY is None:
        have = set(QFontDatabase.families())
        _FAMILY = next((f for f in _FONT_PREFERENCE if f in have), QFont().defaultFamily())
    return _FAMILY


def _font(px: float, *, bold: bool = False, italic: bool = False) -> QFont:
    f = QFont(_family())
    f.setPixelSize(max(1, int(round(px))))
    f.setBold(bold)
    f.setItalic(italic)
    return f


# ---------------------------------------------------------------------------
# charts
# ---------------------------------------------------------------------------
def _nice_step(span: float, target: int = 5) -> float:
    raw = span / max(1, target)
    mag = 10 ** math.floor(math.log10(raw))
    for m in (1, 2, 2.5, 5, 10):
        if raw <= m * mag:
            return m * mag
    return 10 * mag


def _tick_text(v: float, step: float) -> str:
    if v == 0:
        return "0"
    decimals = max(0, -int(math.floor(math.log10(step) + 1e-9)))
    if step * 10 ** decimals % 1 > 1e-9:
        decimals += 1
    return f"{v:.{decimals}f}"


_SUP = str.maketrans("0123456789-", "\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079\u207b")


def _decade_text(k: int) -> str:
    if 0 <= k <= 5:
        return f"{10 ** k:,}"
    if -3 <= k < 0:
        return f"{10.0 ** k:.{-k}f}"
    return "10" + str(k).translate(_SUP)


def _elide(fm: QFontMetricsF, text: str, width: float) -> str:
    return fm.elidedText(text, Qt.TextElideMode.ElideRight, width)


def _hatch(colour: QColor) -> QBrush:
    b = QBrush(colour.darker(135), Qt.BrushStyle.BDiagPattern)
    return b


def _legend(p: QPainter, items, x_right: float, y: float, font: QFont) -> float:
    """Legend entries right-aligned at ``x_right``; ``items``: (text, painter-fn(rect)). Returns height."""
    fm = QFontMetricsF(font)
    p.setFont(font)
    x = x_right
    h = fm.height()
    for text, swatch in reversed(items):
        w = fm.horizontalAdvance(text)
        x -= w
        p.setPen(INK)
        p.drawText(QPointF(x, y + fm.ascent()), text)
        x -= 22
        swatch(QRectF(x, y + 1, 16, h - 2))
        x -= 16
    return h


def _paint_bar(p: QPainter, W: float, H: float, chart: BarChart) -> None:
    series = chart.series
    cats = chart.categories
    n = len(cats)
    small = _font(11)
    tiny = _font(10)
    fm = QFontMetricsF(small)
    fm_tiny = QFontMetricsF(tiny)
    top_values = [v + (s.errors[i] if s.errors else 0.0) for s in series for i, v in enumerate(s.values)]
    vmax = max(top_values + [1e-12])
    step = _nice_step(vmax * 1.05, 5)
    ymax = step * math.ceil(vmax * 1.05 / step)
    if vmax <= 1 and ymax > 1:
        ymax = 1.0
    ticks = [k * step for k in range(int(round(ymax / step)) + 1)]
    tick_w = max(fm.horizontalAdvance(_tick_text(t, step)) for t in ticks)
    left = tick_w + 30
    right = 12
    # legend
    legend_items = []
    if len(series) > 1:
        for s in series:
            legend_items.append((s.name, _swatch_fn(p, s.role)))
    elif chart.groups and chart.group_names:
        for g, name in enumerate(chart.group_names):
            legend_items.append((name, _swatch_fn(p, "law", g)))
    top = 8 + (fm.height() + 8 if legend_items else 0)
    slot = (W - left - right) / max(1, n)
    label_max = max((fm_tiny.horizontalAdvance(c) for c in cats), default=0)
    rotate = label_max > slot - 4
    elide_w = 120.0 if rotate else slot - 4
    shown = [_elide(fm_tiny, c, elide_w) for c in cats]
    if rotate:
        longest = max((fm_tiny.horizontalAdvance(s) for s in shown), default=0)
        bottom = 14 + longest * math.sin(math.radians(40)) + fm_tiny.height() + fm.height()
    else:
        bottom = 10 + fm_tiny.height() + fm.height() + 6
    plot = QRectF(left, top, W - left - right, H - top - bottom)

    def ypix(v: float) -> float:
        return plot.bottom() - (v / ymax) * plot.height()

    # grid and y axis
    p.setFont(small)
    for t in ticks:
        y = ypix(t)
        p.setPen(QPen(GRID, 1))
        p.drawLine(QPointF(plot.left(), y), QPointF(plot.right(), y))
        p.setPen(INK_SOFT)
        txt = _tick_text(t, step)
        p.drawText(QRectF(0, y - fm.height() / 2, left - 6, fm.height()),
                   Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter, txt)
    p.setPen(QPen(INK, 1.2))
    p.drawLine(QPointF(plot.left(), plot.bottom()), QPointF(plot.right(), plot.bottom()))
    # y title
    p.save()
    p.translate(12, plot.center().y())
    p.rotate(-90)
    p.setPen(INK)
    p.setFont(small)
    p.drawText(QRectF(-plot.height() / 2, -fm.height() / 2 - 2, plot.height(), fm.height()),
               Qt.AlignmentFlag.AlignCenter, chart.y_label)
    p.restore()
    # bars
    k = len(series)
    group_w = slot * (0.74 if k > 1 else 0.62)
    bar_w = group_w / k
    value_labels = n * k <= 12
    for i in range(n):
        x0 = plot.left() + slot * i + (slot - group_w) / 2
        for j, s in enumerate(series):
            v = s.values[i]
            r = QRectF(x0 + j * bar_w + 0.5, ypix(v), bar_w - 1.0, plot.bottom() - ypix(v))
            colour = _role_colour(s.role, chart.groups[i] if chart.groups else 0)
            p.setPen(Qt.PenStyle.NoPen)
            p.setBrush(colour)
            p.drawRect(r)
            if s.role == "estimate":
                p.setBrush(_hatch(colour))
                p.drawRect(r)
            if s.errors:
                e = s.errors[i]
                if e > 0:
                    cx = r.center().x()
                    lo, hi = ypix(max(0.0, v - e)), ypix(min(ymax, v + e))
                    p.setPen(QPen(INK, 1.1))
                    p.drawLine(QPointF(cx, lo), QPointF(cx, hi))
                    cap = min(5.0, bar_w * 0.25)
                    p.drawLine(QPointF(cx - cap, lo), QPointF(cx + cap, lo))
                    p.drawLine(QPointF(cx - cap, hi), QPointF(cx + cap, hi))
            if value_labels:
                txt = f"{v:.3g}" if v >= 1e-3 or v == 0 else f"{v:.1e}"
                tw = fm_tiny.horizontalAdvance(txt)
                if tw <= bar_w + 2:
                    p.setFont(tiny)
                    p.setPen(INK_SOFT)
                    ty = ypix(v + (s.errors[i] if s.errors else 0.0)) - 3
                    p.drawText(QPointF(r.center().x() - tw / 2, ty), txt)
        # category label
        p.setFont(tiny)
        p.setPen(INK)
        cx = plot.left() + slot * (i + 0.5)
        if rotate:
            p.save()
            p.translate(cx + 3, plot.bottom() + 8)
            p.rotate(-40)
            tw = fm_tiny.horizontalAdvance(shown[i])
            p.drawText(QPointF(-tw, fm_tiny.ascent() / 2), shown[i])
            p.restore()
        else:
            tw = fm_tiny.horizontalAdvance(shown[i])
            p.drawText(QPointF(cx - tw / 2, plot.bottom() + 6 + fm_tiny.ascent()), shown[i])
    # x title
    p.setFont(small)
    p.setPen(INK)
    p.drawText(QRectF(plot.left(), H - fm.height() - 2, plot.width(), fm.height()),
               Qt.AlignmentFlag.AlignCenter, chart.x_label)
    if legend_items:
        _legend(p, legend_items, W - right, 4, small)


def _role_colour(role: str, group: int = 0) -> QColor:
    if role == "estimate":
        return QColor(ORANGE)
    if role == "truth":
        return QColor(BLUE)
    return pal.class_colour(group)


def _swatch_fn(p: QPainter, role: str, group: int = 0):
    def draw(r: QRectF) -> None:
        c = _role_colour(role, group)
        p.setPen(Qt.PenStyle.NoPen)
        p.setBrush(c)
        p.drawRect(r)
        if role == "estimate":
            p.setBrush(_hatch(c))
            p.drawRect(r)
    return draw


_MARKER_STYLE = {  # role -> colour, dash pattern
    "plan": (VERMILLION, Qt.PenStyle.DashLine),
    "sound": (GREEN, Qt.PenStyle.DashDotLine),
    "tolerance": (INK_SOFT, Qt.PenStyle.DotLine),
}


def _paint_line(p: QPainter, W: float, H: float, chart: LineChart) -> None:
    small = _font(11)
    tiny = _font(10)
    fm = QFontMetricsF(small)
    fm_tiny = QFontMetricsF(tiny)
    xs = [x for s in chart.series for x in s.x if x > 0]
    xs += [m.value for m in chart.markers if m.axis == "x" and m.value > 0]
    floor = chart.y_floor or 1e-6
    lx0 = math.floor(math.log10(min(xs)) + 1e-12) if xs else 0
    lx1 = math.log10(max(xs)) + 0.03 if xs else 1
    if lx1 <= lx0:
        lx1 = lx0 + 1
    ly0 = math.floor(math.log10(floor) + 1e-12)
    ly1 = 0
    if ly1 <= ly0:
        ly0 = ly1 - 1
    ylabels = [_decade_text(k) for k in range(ly0, ly1 + 1)]
    left = max(fm.horizontalAdvance(t) for t in ylabels) + 30
    right = 14
    vmarks = [m for m in chart.markers if m.axis == "x"]
    row_h = fm_tiny.height() + 4
    top = 8 + row_h * min(2, len(vmarks))   # a band above the plot for the labels of vertical lines
    bottom = fm_tiny.height() + fm.height() + 18
    plot = QRectF(left, top, W - left - right, H - top - bottom)

    def xp(x: float) -> float:
        return plot.left() + (math.log10(x) - lx0) / (lx1 - lx0) * plot.width()

    def yp(y: float) -> float:
        y = max(y, 10.0 ** ly0)
        return plot.bottom() - (math.log10(y) - ly0) / (ly1 - ly0) * plot.height()

    # grid
    xdec = math.ceil(lx1) - lx0
    xevery = 1 if xdec <= 8 else 2 if xdec <= 16 else 3
    ydec = ly1 - ly0
    yevery = 1 if ydec <= 8 else 2
    for k in range(lx0, math.floor(lx1) + 1):
        if xdec <= 10:
            for m in range(2, 10):
                if math.log10(m) + k > lx1:
                    break
                x = xp(m * 10.0 ** k)
                p.setPen(QPen(GRID_MINOR, 1))
                p.drawLine(QPointF(x, plot.top()), QPointF(x, plot.bottom()))
        x = xp(10.0 ** k)
        p.setPen(QPen(GRID, 1))
        p.drawLine(QPointF(x, plot.top()), QPointF(x, plot.bottom()))
        if (k - lx0) % xevery == 0:
            p.setFont(tiny)
            p.setPen(INK_SOFT)
            t = _decade_text(k)
            tw = fm_tiny.horizontalAdvance(t)
            p.drawText(QPointF(min(x - tw / 2, W - tw - 2), plot.bottom() + 5 + fm_tiny.ascent()), t)
    for k in range(ly0, ly1 + 1):
        if ydec <= 6 and k < ly1:
            for m in range(2, 10):
                y = yp(m * 10.0 ** k)
                p.setPen(QPen(GRID_MINOR, 1))
                p.drawLine(QPointF(plot.left(), y), QPointF(plot.right(), y))
        y = yp(10.0 ** k)
        p.setPen(QPen(GRID, 1))
        p.drawLine(QPointF(plot.left(), y), QPointF(plot.right(), y))
        if (ly1 - k) % yevery == 0:
            p.setFont(small)
            p.setPen(INK_SOFT)
            p.drawText(QRectF(0, y - fm.height() / 2, left - 6, fm.height()),
                       Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter, _decade_text(k))
    p.setPen(QPen(INK, 1.2))
    p.setBrush(Qt.BrushStyle.NoBrush)
    p.drawLine(QPointF(plot.left(), plot.bottom()), QPointF(plot.right(), plot.bottom()))
    p.drawLine(QPointF(plot.left(), plot.top()), QPointF(plot.left(), plot.bottom()))
    # titles
    p.setFont(small)
    p.setPen(INK)
    p.drawText(QRectF(plot.left(), H - fm.height() - 2, plot.width(), fm.height()),
               Qt.AlignmentFlag.AlignCenter, chart.x_label)
    p.save()
    p.translate(12, plot.center().y())
    p.rotate(-90)
    p.drawText(QRectF(-plot.height() / 2, -fm.height() / 2 - 2, plot.height(), fm.height()),
               Qt.AlignmentFlag.AlignCenter, chart.y_label)
    p.restore()
    # the curve(s), clipped to the plot
    p.save()
    p.setClipRect(plot.adjusted(-1, -1, 1, 1))
    def yraw(y: float) -> float:  # unclamped: the clip cuts a curve that drops below the grid
        ly = math.log10(y) if y > 0 else ly0 - 4
        return plot.bottom() - (max(ly, ly0 - 4) - ly0) / (ly1 - ly0) * plot.height()

    for s in chart.series:
        pts = [QPointF(xp(x), yraw(y)) for x, y in zip(s.x, s.y) if x > 0]
        pen = QPen(BLUE, 2.2)
        pen.setJoinStyle(Qt.PenJoinStyle.RoundJoin)
        p.setPen(pen)
        if len(pts) > 1:
            p.drawPolyline(QPolygonF(pts))
    # reference lines; the horizontal one is labelled at the end farther from the curve
    for m in chart.markers:
        colour, dash = _MARKER_STYLE.get(m.role, (INK_SOFT, Qt.PenStyle.DashLine))
        p.setPen(QPen(colour, 1.6, dash))
        if m.axis == "y":
            y = yp(m.value)
            p.drawLine(QPointF(plot.left(), y), QPointF(plot.right(), y))
            p.setFont(tiny)
            tw = fm_tiny.horizontalAdvance(m.label)
            at_left = True
            s0 = next((s for s in chart.series if s.y), None)
            if s0 is not None:
                def gap(v):
                    return abs(math.log10(max(v, 10.0 ** ly0)) - math.log10(m.value))
                at_left = gap(s0.y[0]) >= gap(s0.y[-1])
            x0 = plot.left() + 6 if at_left else plot.right() - tw - 10
            _label_box(p, QRectF(x0, y - fm_tiny.height() - 2, tw + 4, fm_tiny.height()), m.label, colour, tiny)
        else:
            x = xp(m.value)
            p.drawLine(QPointF(x, plot.top() - 4), QPointF(x, plot.bottom()))
    p.restore()
    # points on the curve, then the labels of the vertical lines in the band above the plot
    for m in vmarks:
        colour, _dash = _MARKER_STYLE.get(m.role, (INK_SOFT, Qt.PenStyle.DashLine))
        x = xp(m.value)
        if m.point is not None:
            c = QPointF(x, yp(m.point))
            p.setPen(QPen(QColor("#FFFFFF"), 1.5))
            p.setBrush(colour)
            if m.role == "sound":
                d = 6.0
                p.drawPolygon(QPolygonF([QPointF(c.x(), c.y() - d), QPointF(c.x() + d, c.y()),
                                         QPointF(c.x(), c.y() + d), QPointF(c.x() - d, c.y())]))
            else:
                p.drawEllipse(c, 5.0, 5.0)
    h = fm_tiny.height()
    base = plot.top() - 6 - h
    options = []
    for m in vmarks:
        x = xp(m.value)
        tw = fm_tiny.horizontalAdvance(m.label)
        cands = []
        for row in range(2 if len(vmarks) > 1 else 1):
            for side in ("right", "left"):
                r = QRectF(x - 3, base - row * row_h, tw + 6, h)
                if side == "left":
                    r.moveRight(x + 3)
                if r.left() >= 2 and r.right() <= W - 2:
                    cands.append((r, QRectF(x - 1, r.bottom(), 2, plot.top() - r.bottom())))
        if not cands:
            r = QRectF(min(max(2.0, x - 3), W - tw - 8), base, tw + 6, h)
            cands.append((r, QRectF(x - 1, r.bottom(), 2, plot.top() - r.bottom())))
        options.append(cands)

    def clash(a, b) -> bool:
        return (a[0].intersects(b[0]) or a[1].intersects(b[0]) or b[1].intersects(a[0]))

    import itertools

    chosen = [c[0] for c in options]
    for combo in itertools.product(*options):
        if not any(clash(combo[i], combo[j]) for i in range(len(combo)) for j in range(i)):
            chosen = list(combo)
            break
    for m, (r, _stem) in zip(vmarks, chosen):
        colour, _dash = _MARKER_STYLE.get(m.role, (INK_SOFT, Qt.PenStyle.DashLine))
        x = xp(m.value)
        _label_box(p, r, m.label, colour, tiny)
        p.setPen(QPen(colour, 1.2))
        p.drawLine(QPointF(x, r.bottom()), QPointF(x, plot.top()))


def _label_box(p: QPainter, r: QRectF, text: str, colour: QColor, font: QFont) -> None:
    p.setPen(Qt.PenStyle.NoPen)
    p.setBrush(QColor(255, 255, 255, 225))
    p.drawRoundedRect(r, 2, 2)
    p.setPen(colour.darker(125) if colour.lightness() > 150 else colour)
    p.setFont(font)
    p.drawText(r, Qt.AlignmentFlag.AlignCenter, text)


def _paint_chart(p: QPainter, W: float, H: float, chart) -> None:
    p.setRenderHints(QPainter.RenderHint.Antialiasing | QPainter.RenderHint.TextAntialiasing)
    if isinstance(chart, BarChart):
        _paint_bar(p, W, H, chart)
    else:
        _paint_line(p, W, H, chart)


def _svg_bytes(width: float, height: float, paint, *, title: str = "") -> bytes:
    from PySide6.QtSvg import QSvgGenerator

    buf = QBuffer()
    buf.open(QIODevice.OpenModeFlag.WriteOnly)
    gen = QSvgGenerator()
    gen.setOutputDevice(buf)
    gen.setSize(QSize(int(math.ceil(width)), int(math.ceil(height))))
    gen.setViewBox(QRectF(0, 0, width, height))
    gen.setResolution(96)
    if title:
        gen.setTitle(title)
    p = QPainter(gen)
    try:
        paint(p)
    finally:
        p.end()
    data = bytes(buf.data())
    buf.close()
    # widen the font family to a portable stack (the measured font stays first)
    fam = _family()
    data = data.replace(f'font-family="{fam}"'.encode(),
                        f'font-family="{fam}, Helvetica, Arial, sans-serif"'.encode())
    return data


def chart_svg(chart, width: float = CHART_W, height: float = CHART_H) -> bytes:
    """The chart as an SVG document (text kept as text, escaped by Qt's SVG writer)."""
    _ensure_app()
    return _svg_bytes(width, height, lambda p: _paint_chart(p, width, height, chart), title=chart.title)


def chart_image(chart, width: float = CHART_W, height: float = CHART_H, *, scale: float = 2.0) -> QImage:
    """The chart as an image of ``width x height`` logical pixels at ``scale`` device pixels each."""
    _ensure_app()
    img = QImage(int(width * scale), int(height * scale), QImage.Format.Format_ARGB32_Premultiplied)
    img.fill(QColor("#FFFFFF"))
    img.setDevicePixelRatio(scale)
    p = QPainter(img)
    try:
        _paint_chart(p, width, height, chart)
    finally:
        p.end()
    return img


# ---------------------------------------------------------------------------
# the chain picture, from the editor's own scene
# ---------------------------------------------------------------------------
_PICTURE_KEY = ("C1, C2 \u2026: closed classes (own colour, solid rim; double rim: absorbing); "
                "T: transient (dashed rim); arrow width grows with the probability on a log scale; "
                "dashed arrows are rare transitions; ! marks a problem.")


class _Scene:
    """The editor's canvas for ``chain``, built offscreen with its validation and classes applied."""

    def __init__(self, chain):
        _ensure_app()
        from .analysis_service import StructureReport, validate
        from .canvas import ChainCanvas
        from .document import Document

        self.doc = Document()
        self.doc.reset(chain)
        self.canvas = ChainCanvas(self.doc)
        c = self.doc.chain
        self.canvas.apply_validation(validate(c))
        if not c.problems:
            from core.structure import classify

            P = c.matrix()
            self.canvas.apply_structure(StructureReport(0, c, classify(P), P))
        rect = self.canvas.items_rect()
        self.rect = rect.adjusted(-18, -18, 18, 18) if not rect.isNull() else QRectF(0, 0, 10, 10)

    def render(self, painter: QPainter, target: QRectF) -> None:
        painter.setRenderHints(QPainter.RenderHint.Antialiasing | QPainter.RenderHint.TextAntialiasing)
        self.canvas.scene().clearSelection()
        self.canvas.scene().render(painter, target, self.rect, Qt.AspectRatioMode.KeepAspectRatio)

    def close(self) -> None:
        self.canvas.setParent(None)
        self.canvas.deleteLater()
        self.doc.deleteLater()


def _picture_size(rect: QRectF, max_w: float, max_h: float) -> tuple[float, float]:
    s = min(max_w / rect.width(), max_h / rect.height(), 1.25)
    return rect.width() * s, rect.height() * s


def chain_picture_svg(chain, *, max_size: tuple[float, float] = (860, 620)) -> tuple[bytes, float, float]:
    """The chain as drawn in the editor, as SVG; returns ``(svg, width, height)``.

    The scene is drawn at no less than its natural size (so arrow labels stay
    visible) and the SVG's view box lets a browser scale it.
    """
    sc = _Scene(chain)
    try:
        w, h = sc.rect.width(), sc.rect.height()
        data = _svg_bytes(w, h, lambda p: sc.render(p, QRectF(0, 0, w, h)), title="The chain as drawn")
        dw, dh = _picture_size(sc.rect, *max_size)
        return data, dw, dh
    finally:
        sc.close()


def chain_picture_image(chain, *, max_size: tuple[float, float] = PICTURE_MAX, scale: float = PDF_SCALE) -> QImage:
    """The chain as drawn in the editor, as an image (``max_size`` logical pixels at ``scale``)."""
    sc = _Scene(chain)
    try:
        w, h = _picture_size(sc.rect, *max_size)
        # keep the scene at least at natural size on the device so labels stay drawn
        scale = max(scale, sc.rect.width() / w, sc.rect.height() / h)
        img = QImage(int(w * scale), int(h * scale), QImage.Format.Format_ARGB32_Premultiplied)
        img.fill(QColor("#FFFFFF"))
        img.setDevicePixelRatio(scale)
        p = QPainter(img)
        try:
            sc.render(p, QRectF(0, 0, w, h))
        finally:
            p.end()
        return img
    finally:
        sc.close()


# ---------------------------------------------------------------------------
# HTML
# ---------------------------------------------------------------------------
_CSS = """
:root { --ink: #2B3640; --soft: #5D6B78; --rule: #D9DEE3; --paper: #FFFFFF; --wash: #F3F4F1;
        --blue: #0072B2; --orange: #E69F00; --green: #009E73; --verm: #D55E00; --sky: #56B4E9; }
* { box-sizing: border-box; }
html { background: #E9EBE6; }
body { margin: 0; padding: 32px 16px 48px; color: var(--ink); font-family: %(sans)s;
       font-size: 15px; line-height: 1.55; -webkit-font-smoothing: antialiased; }
.page { max-width: 880px; margin: 0 auto; background: var(--paper); padding: 56px 64px 40px;
        box-shadow: 0 1px 3px rgba(0,0,0,.08), 0 8px 28px rgba(0,0,0,.06); border-radius: 3px; }
.kicker { text-transform: uppercase; letter-spacing: .14em; font-size: 12px; color: var(--blue);
          font-weight: 700; margin: 0 0 10px; }
h1 { font-size: 32px; line-height: 1.2; margin: 0 0 6px; font-weight: 700; letter-spacing: -.01em; }
.subtitle { font-size: 18px; color: var(--soft); margin: 0 0 24px; }
.meta { display: grid; grid-template-columns: max-content 1fr; gap: 2px 18px; font-size: 13px;
        color: var(--soft); border-top: 3px solid var(--ink); padding-top: 12px; margin: 0 0 28px; }
.meta dt { font-weight: 600; color: var(--ink); } .meta dd { margin: 0; overflow-wrap: anywhere; }
nav.toc { border: 1px solid var(--rule); border-radius: 4px; padding: 12px 18px; margin: 0 0 36px;
          font-size: 14px; background: #FAFAF8; }
nav.toc ol { margin: 0; padding-left: 22px; columns: 2; column-gap: 32px; }
nav.toc a { color: var(--ink); text-decoration: none; } nav.toc a:hover { text-decoration: underline; }
section { margin: 0 0 36px; }
h2 { font-size: 22px; margin: 0 0 14px; padding-bottom: 6px; border-bottom: 1px solid var(--rule);
     display: flex; align-items: baseline; gap: 12px; }
h2 .num { color: var(--blue); font-variant-numeric: tabular-nums; min-width: 1.2em; }
h3 { font-size: 16px; margin: 26px 0 8px; }
p { margin: 0 0 12px; } p.lead { font-size: 16px; }
p.note { font-size: 12.5px; color: var(--soft); }
dl.facts { display: grid; grid-template-columns: minmax(160px, max-content) 1fr; gap: 0; margin: 8px 0 18px;
           border-top: 1px solid var(--rule); font-size: 14px; }
dl.facts dt, dl.facts dd { margin: 0; padding: 6px 12px 6px 0; border-bottom: 1px solid var(--rule); }
dl.facts dt { color: var(--soft); font-weight: 600; }
.tablewrap { overflow-x: auto; margin: 6px 0 18px; }
table { border-collapse: collapse; width: 100%%; font-size: 13.5px; font-variant-numeric: tabular-nums; }
caption { caption-side: top; text-align: left; color: var(--soft); font-size: 13px; padding: 0 0 6px; }
th { text-align: left; font-weight: 600; font-size: 12px; text-transform: uppercase; letter-spacing: .04em;
     color: var(--soft); border-bottom: 2px solid var(--ink); padding: 6px 10px 5px; vertical-align: bottom; }
td { padding: 5px 10px; border-bottom: 1px solid var(--rule); vertical-align: top; overflow-wrap: anywhere; }
td.r, th.r { text-align: right; } td.r { white-space: nowrap; }
table.matrix td, table.matrix th { padding: 4px 7px; }
table.matrix th.rowhead, table.matrix td.rowhead { text-align: left; font-weight: 600; color: var(--ink);
     text-transform: none; letter-spacing: 0; font-size: 13px; }
table.matrix th { text-transform: none; letter-spacing: 0; font-size: 12.5px; color: var(--ink); }
td.muted { color: #B3BBC2; } td.strong { font-weight: 600; } td.bad { color: var(--verm); font-weight: 700; }
td.good { color: var(--green); font-weight: 700; }
.tnote { font-size: 12.5px; color: var(--soft); margin: 4px 0 0; }
.callout { border-left: 5px solid var(--c); background: var(--t); padding: 12px 16px 12px 16px;
           margin: 12px 0 16px; border-radius: 0 4px 4px 0; }
.callout .badge { display: inline-block; font-size: 11px; font-weight: 800; letter-spacing: .1em;
                  color: #fff; background: var(--c); padding: 1px 7px; border-radius: 3px; margin-right: 8px;
                  vertical-align: 1px; }
.callout .title { font-weight: 700; }
.callout p { margin: 6px 0 0; }
.callout .detail { font-size: 14px; } .callout .detail b { color: var(--ink); }
figure { margin: 12px 0 20px; }
figure .frame { border: 1px solid var(--rule); border-radius: 4px; padding: 10px; background: #fff; }
figure.picture .frame { background: #FBFBF9; }
figure img { display: block; max-width: 100%%; height: auto; margin: 0 auto; }
figure.chart img { width: 100%%; }
figcaption { font-size: 13px; color: var(--soft); margin-top: 6px; }
figcaption b { color: var(--ink); }
footer { margin-top: 40px; padding-top: 10px; border-top: 1px solid var(--rule); font-size: 12px;
         color: var(--soft); overflow-wrap: anywhere; }
@media print {
  html, body { background: #fff; padding: 0; }
  .page { box-shadow: none; padding: 0; max-width: none; }
  nav.toc { display: none; }
  h2, h3 { break-after: avoid; } figure, .callout, tr { break-inside: avoid; }
  @page { size: A4; margin: 18mm 16mm 20mm; }
}
@media (max-width: 640px) { .page { padding: 28px 20px; } nav.toc ol { columns: 1; } }
"""

_CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; form-action 'none'"


def _data_uri(mime: str, data: bytes) -> str:
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


class _Images:
    """Where a renderer gets its images from: SVG data URIs (HTML) or document resources (PDF)."""

    def chart(self, chart) -> str:  # pragma: no cover - interface
        raise NotImplementedError

    def picture(self, chain) -> tuple[str, float, float] | None:  # pragma: no cover - interface
        raise NotImplementedError


class _SvgImages(_Images):
    def chart(self, chart) -> tuple[str, float, float]:
        return _data_uri("image/svg+xml", chart_svg(chart)), CHART_W, CHART_H

    def picture(self, chain):
        data, w, h = chain_picture_svg(chain)
        return _data_uri("image/svg+xml", data), w, h


def _section_id(key: str) -> str:
    return "s-" + re.sub(r"[^a-z0-9-]", "-", key.lower())


def _html_block(b, images: _Images, flavour: str) -> str:
    """One content block as HTML (``flavour`` ``"web"`` or ``"qt"``)."""
    if isinstance(b, Paragraph):
        return f'<p class="{_esc(b.kind)}">{_esc(b.text)}</p>'
    if isinstance(b, Subheading):
        return f"<h3>{_esc(b.text)}</h3>"
    if isinstance(b, Facts):
        if flavour == "web":
            rows = "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in b.items)
            return f'<dl class="facts">{rows}</dl>'
        rows = "".join(f'<tr><td class="fk" width="34%">{_esc(k)}</td><td class="fv">{_esc(v)}</td></tr>'
                       for k, v in b.items)
        return f'<table class="facts" width="100%" cellspacing="0" cellpadding="4">{rows}</table>'
    if isinstance(b, Table):
        return _html_table(b, flavour)
    if isinstance(b, Callout):
        return _html_callout(b, flavour)
    if isinstance(b, (BarChart, LineChart)):
        src, w, h = images.chart(b)
        alt = _esc(b.title)
        cap = f"<b>{_esc(b.title)}.</b> {_esc(b.caption)}"
        if b.note:
            cap += f" {_esc(b.note)}"
        if flavour == "web":
            return (f'<figure class="chart"><div class="frame"><img src="{src}" alt="{alt}" '
                    f'width="{int(w)}" height="{int(h)}"></div><figcaption>{cap}</figcaption></figure>')
        return (f'<p class="fig"><img src="{src}" width="{int(w)}" height="{int(h)}"></p>'
                f'<p class="figcap">{cap}</p>')
    if isinstance(b, ChainPicture):
        got = images.picture(None)
        cap = f"<b>The chain as drawn.</b> {_esc(b.caption)} {_esc(_PICTURE_KEY)}"
        if got is None:
            return f'<p class="note">{_esc("The picture of the chain could not be drawn.")}</p>'
        src, w, h = got
        if flavour == "web":
            return (f'<figure class="picture"><div class="frame"><img src="{src}" alt="The chain as drawn" '
                    f'width="{int(w)}" height="{int(h)}"></div><figcaption>{cap}</figcaption></figure>')
        return (f'<p class="fig"><img src="{src}" width="{int(w)}" height="{int(h)}"></p>'
                f'<p class="figcap">{cap}</p>')
    raise TypeError(f"unknown report block {type(b).__name__}")


def _html_table(t: Table, flavour: str) -> str:
    align = t.align or ("left",) * len(t.columns)
    cls = {"matrix": "matrix", "listing": "listing"}.get(t.kind, "data")
    out = []
    if flavour == "web":
        out.append(f'<div class="tablewrap"><table class="{cls}">')
        if t.caption:
            out.append(f"<caption>{_esc(t.caption)}</caption>")
    else:
        if t.caption:
            out.append(f'<p class="tcap">{_esc(t.caption)}</p>')
        out.append(f'<table class="{cls}" width="100%" cellspacing="0" cellpadding="{3 if cls == "matrix" else 4}">')
    head = []
    for k, col in enumerate(t.columns):
        c = "r" if align[k] == "right" else ""
        if t.kind == "matrix" and k == 0:
            c = "rowhead"
        if t.kind == "matrix" and flavour == "qt" and k > 0:
            c = "r"
        head.append(f'<th class="{c}">{_esc(col)}</th>' if c else f"<th>{_esc(col)}</th>")
    out.append("<thead><tr>" + "".join(head) + "</tr></thead><tbody>")
    for i, row in enumerate(t.rows):
        cells = []
        for k, cell in enumerate(row):
            classes = []
            if align[k] == "right":
                classes.append("r")
            if t.kind == "matrix" and k == 0:
                classes.append("rowhead")
            if t.emphasis and t.emphasis[i][k]:
                classes.append(t.emphasis[i][k])
            attr = f' class="{" ".join(classes)}"' if classes else ""
            if flavour == "qt" and "r" in classes:
                attr += ' align="right"'
            cells.append(f"<td{attr}>{_esc(cell)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    if flavour == "web":
        if t.note:
            out.append(f'<p class="tnote">{_esc(t.note)}</p>')
        out.append("</div>")
    elif t.note:
        out.append(f'<p class="tnote">{_esc(t.note)}</p>')
    return "".join(out)


def _html_callout(c: Callout, flavour: str) -> str:
    badge, colour = _CALLOUT.get(c.kind, ("NOTE", SKY))
    tint = pal.tint(colour, 0.88)
    detail = ""
    if c.detail:
        label = f"<b>{_esc(c.detail_label)}:</b> " if c.detail_label else ""
        detail = f'<p class="detail">{label}{_esc(c.detail)}</p>'
    if flavour == "web":
        return (f'<div class="callout {_esc(c.kind)}" style="--c: {_hex(colour)}; --t: {_hex(tint)}">'
                f'<span class="badge">{badge}</span><span class="title">{_esc(c.title)}</span>'
                f"<p>{_esc(c.text)}</p>{detail}</div>")
    return (f'<table class="callout" width="100%" cellspacing="0" cellpadding="8" bgcolor="{_hex(tint)}">'
            f'<tr><td width="6" bgcolor="{_hex(colour)}"></td><td>'
            f'<span class="badge" style="color: {_hex(colour.darker(115))}">{badge}</span>&nbsp;&nbsp;'
            f'<span class="ctitle">{_esc(c.title)}</span>'
            f'<p class="ctext">{_esc(c.text)}</p>{detail}</td></tr></table>')


def _numbered(report: Report):
    return [(k + 1, s) for k, s in enumerate(report.sections)]


def render_html(report: Report, *, images: _Images | None = None) -> str:
    """The report as one self-contained HTML document (no scripts, no external resources)."""
    images = images or _PictureBound(_SvgImages(), report.chain)
    f = report.footer
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="Longrun {_esc(f.version)}">',
        f"<title>{_esc(report.title)} \u2014 {_esc(report.subtitle)}</title>",
        f"<style>{_CSS % {'sans': _CSS_SANS}}</style></head><body><main class=\"page\">",
        '<header class="cover">',
        '<p class="kicker">Model report</p>',
        f"<h1>{_esc(report.title)}</h1>",
        f'<p class="subtitle">{_esc(report.subtitle)}</p>',
        '<dl class="meta">',
        f"<dt>Prepared</dt><dd>{_esc(f.generated)} with Longrun {_esc(f.version)}</dd>",
        f"<dt>Input</dt><dd>{_esc(f.source)}</dd>",
        f"<dt>SHA-256</dt><dd>{_esc(f.sha256)} ({_esc(f.sha256_of)})</dd>",
        "</dl></header>",
        '<nav class="toc" aria-label="Contents"><ol>',
    ]
    for num, s in _numbered(report):
        parts.append(f'<li><a href="#{_section_id(s.key)}">{_esc(s.title)}</a></li>')
    parts.append("</ol></nav>")
    for num, s in _numbered(report):
        parts.append(f'<section id="{_section_id(s.key)}"><h2><span class="num">{num}</span>{_esc(s.title)}</h2>')
        parts.extend(_html_block(b, images, "web") for b in s.blocks)
        parts.append("</section>")
    parts.append(f"<footer>{_esc(f.line)}</footer></main></body></html>")
    return "\n".join(parts)


class _PictureBound(_Images):
    """Binds the chain to an image source (blocks do not carry the chain)."""

    def __init__(self, inner: _Images, chain):
        self.inner = inner
        self.chain = chain

    def chart(self, chart):
        return self.inner.chart(chart)

    def picture(self, _chain):
        try:
            return self.inner.picture(self.chain)
        except ImportError:
            return None


# ---------------------------------------------------------------------------
# PDF
# ---------------------------------------------------------------------------
_QT_CSS = """
body { color: #2B3640; font-size: 10pt; }
h1 { font-size: 22pt; font-weight: 700; margin: 0; }
h2 { font-size: 14.5pt; font-weight: 700; margin-top: 22px; margin-bottom: 8px; }
h3 { font-size: 11pt; font-weight: 700; margin-top: 14px; margin-bottom: 4px; }
p { margin-top: 0; margin-bottom: 7px; }
p.lead { font-size: 10.5pt; }
p.note, p.tnote, p.tcap, p.figcap { font-size: 8.5pt; color: #5D6B78; }
p.tcap { margin-bottom: 3px; }
p.kicker { font-size: 8.5pt; font-weight: 700; color: #0072B2; margin-bottom: 4px; }
p.subtitle { font-size: 13pt; color: #5D6B78; margin-bottom: 10px; }
span.num { color: #0072B2; }
table.meta td { font-size: 8.5pt; color: #5D6B78; }
table.facts td { border-bottom: 1px solid #D9DEE3; font-size: 9.5pt; }
td.fk { color: #5D6B78; font-weight: 600; }
table.data, table.listing, table.matrix { font-size: 9pt; }
table.matrix { font-size: 8.5pt; }
th { font-size: 8pt; font-weight: 700; color: #5D6B78; border-bottom: 1.5px solid #2B3640; text-align: left; }
th.r { text-align: right; }
td { border-bottom: 1px solid #D9DEE3; }
td.muted { color: #B3BBC2; }
td.strong, td.rowhead, th.rowhead { font-weight: 700; color: #2B3640; }
td.bad { color: #D55E00; font-weight: 700; }
td.good { color: #009E73; font-weight: 700; }
table.callout td { border-bottom: none; }
span.badge { font-size: 8pt; font-weight: 800; }
span.ctitle { font-weight: 700; }
p.ctext { margin-top: 4px; margin-bottom: 0; }
p.detail { margin-top: 4px; margin-bottom: 0; font-size: 9.5pt; }
p.fig { margin-top: 6px; margin-bottom: 2px; }
"""


class _ResourceImages(_Images):
    """Images as named resources of a QTextDocument (raster at print resolution)."""

    def __init__(self, doc: QTextDocument, chain):
        self.doc = doc
        self.chain = chain
        self.count = 0

    def _add(self, img: QImage) -> str:
        self.count += 1
        name = f"longrun-image-{self.count}"
        self.doc.addResource(QTextDocument.ResourceType.ImageResource, QUrl(name), img)
        return name

    def chart(self, chart):
        img = chart_image(chart, CHART_W, CHART_H, scale=PDF_SCALE)
        return self._add(img), CHART_W, CHART_H

    def picture(self, _chain):
        try:
            img = chain_picture_image(self.chain)
        except ImportError:
            return None
        r = img.devicePixelRatio()
        return self._add(img), img.width() / r, img.height() / r


def _qt_html(report: Report, images: _Images) -> str:
    f = report.footer
    parts = [f"<html><head><style>{_QT_CSS}</style></head><body>",
             '<p class="kicker">MODEL REPORT</p>',
             f"<h1>{_esc(report.title)}</h1>",
             f'<p class="subtitle">{_esc(report.subtitle)}</p>',
             '<table class="meta" cellspacing="0" cellpadding="1">',
             f"<tr><td><b>Prepared</b>&nbsp;&nbsp;</td><td>{_esc(f.generated)} with Longrun {_esc(f.version)}</td></tr>",
             f"<tr><td><b>Input</b>&nbsp;&nbsp;</td><td>{_esc(f.source)}</td></tr>",
             f"<tr><td><b>SHA-256</b>&nbsp;&nbsp;</td><td>{_esc(f.sha256)}</td></tr>",
             "</table><hr/>"]
    for num, s in _numbered(report):
        parts.append(f'<h2><span class="num">{num}</span>&nbsp;&nbsp;{_esc(s.title)}</h2>')
        parts.extend(_html_block(b, images, "qt") for b in s.blocks)
    parts.append("</body></html>")
    return "".join(parts)


def _pdf_bytes(report: Report) -> tuple[bytes, int]:
    """Lay the report out on A4 pages; returns the PDF bytes and the page count."""
    _ensure_app()
    buf = QBuffer()
    buf.open(QIODevice.OpenModeFlag.WriteOnly)
    writer = QPdfWriter(buf)
    writer.setResolution(300)
    writer.setPageLayout(QPageLayout(QPageSize(QPageSize.PageSizeId.A4), QPageLayout.Orientation.Portrait,
                                     QMarginsF(18, 16, 18, 14), QPageLayout.Unit.Millimeter))
    writer.setTitle(f"{report.title} \u2014 {report.subtitle}")
    writer.setCreator(f"Longrun {report.footer.version}")
    dpi = writer.resolution()
    page = writer.pageLayout().paintRectPixels(dpi)
    footer_h = int(dpi * 0.42)   # ~10.7 mm for the footer band

    doc = QTextDocument()
    doc.documentLayout().setPaintDevice(writer)
    base = _font(1)
    base.setPointSizeF(10)
    doc.setDefaultFont(base)
    doc.setDocumentMargin(0)
    doc.setPageSize(QSizeF(page.width(), page.height() - footer_h))
    images = _ResourceImages(doc, report.chain)
    doc.setHtml(_qt_html(report, images))
    body_h = page.height() - footer_h
    _keep_headings_with_next(doc, body_h)
    pages = doc.pageCount()

    painter = QPainter()
    if not painter.begin(writer):
        raise LongrunError("could not start the PDF writer")
    try:
        foot = _font(1)
        foot.setPointSizeF(7)
        fm = QFontMetricsF(foot, writer)
        for k in range(pages):
            if k:
                writer.newPage()
            painter.save()
            painter.translate(0, -k * body_h)
            doc.drawContents(painter, QRectF(0, k * body_h, page.width(), body_h))
            painter.restore()
            y = page.height() - footer_h + int(dpi * 0.14)
            painter.setPen(QPen(QColor("#D9DEE3"), max(1, dpi // 150)))
            painter.drawLine(QPointF(0, y), QPointF(page.width(), y))
            painter.setFont(foot)
            painter.setPen(INK_SOFT)
            f = report.footer
            left = f"Generated {f.generated} \u00b7 Longrun {f.version} \u00b7 {f.source}"
            num = f"page {k + 1} of {pages}"
            line2 = f"SHA-256 {f.sha256}"
            ty = y + fm.ascent() + dpi * 0.03
            w_num = fm.horizontalAdvance(num)
            painter.drawText(QPointF(0, ty), fm.elidedText(left, Qt.TextElideMode.ElideMiddle,
                                                         page.width() - w_num - dpi * 0.2))
            painter.drawText(QPointF(page.width() - w_num, ty), num)
            painter.drawText(QPointF(0, ty + fm.height()), line2)
    finally:
        painter.end()
    data = bytes(buf.data())
    buf.close()
    return data, pages


def _keep_headings_with_next(doc: QTextDocument, page_h: float, *, passes: int = 60) -> None:
    """Keep headings, captions and figures with what follows them, and small boxes whole, across pages.

    QTextDocument has no "keep with next": after layout, a heading or a table
    caption whose next block (a paragraph's first lines, a chart, a table's
    first row) lands on a later page gets a page break before it, and so does
    a small table (a callout, a fact list) that would be split; the element
    that followed then loses its own break.  The layout is checked again after
    every move.
    """
    from PySide6.QtGui import QTextBlockFormat, QTextCursor, QTextFormat

    AUTO = QTextFormat.PageBreakFlag.PageBreak_Auto
    BEFORE = QTextFormat.PageBreakFlag.PageBreak_AlwaysBefore
    layout = doc.documentLayout()

    def page(y: float) -> int:
        return int(y // page_h)

    def table_of(block):
        return QTextCursor(block).currentTable()

    def clear_following(block) -> None:
        nxt = block.next()
        if not nxt.isValid():
            return
        t = table_of(nxt)
        if t is not None and table_of(block) is None:
            f = t.format()
            if f.pageBreakPolicy() == BEFORE:
                f.setPageBreakPolicy(AUTO)
                t.setFormat(f)
        elif nxt.blockFormat().pageBreakPolicy() == BEFORE:
            f = QTextBlockFormat(nxt.blockFormat())
            f.setPageBreakPolicy(AUTO)
            QTextCursor(nxt).setBlockFormat(f)

    for _ in range(passes):
        moved = False
        for frame in doc.rootFrame().childFrames():
            r = layout.frameBoundingRect(frame)
            if r.height() < 0.3 * page_h and page(r.top()) != page(r.bottom() - 1) and hasattr(frame, "format"):
                f = frame.format()
                if f.pageBreakPolicy() == AUTO:
                    f.setPageBreakPolicy(BEFORE)
                    frame.setFormat(f)
                    moved = True
                    break
        if moved:
            continue
        block = doc.begin()
        while block.isValid():
            fmt = block.blockFormat()
            nxt = block.next()
            keep = nxt.isValid() and (
                fmt.headingLevel() in (2, 3)
                or (table_of(block) is None and table_of(nxt) is not None)  # a caption just above its table
                or block.text() == "\ufffc")  # a chart or the picture, kept with its caption below
            if keep and fmt.pageBreakPolicy() == AUTO:
                r = layout.blockBoundingRect(block)
                n = layout.blockBoundingRect(nxt)
                lay = nxt.layout()
                follow_bottom = n.bottom()
                if lay is not None and lay.lineCount():  # a pushed line keeps the block's top: use the lines
                    line = lay.lineAt(min(2, lay.lineCount() - 1))
                    follow_bottom = n.top() + line.y() + line.height()
                if r.top() > 0 and page(follow_bottom) > page(r.top()):
                    f = QTextBlockFormat(fmt)
                    f.setPageBreakPolicy(BEFORE)
                    QTextCursor(block).setBlockFormat(f)
                    clear_following(block)
                    moved = True
                    break
            block = nxt
        if not moved:
            return


def render_pdf(report: Report) -> bytes:
    """The report as PDF bytes (A4, a footer and page number on every page)."""
    return _pdf_bytes(report)[0]


# ---------------------------------------------------------------------------
# export
# ---------------------------------------------------------------------------
def max_report_bytes(max_mb: float | None = None) -> int:
    """The output size guard in bytes: ``max_mb``, else ``LONGRUN_MAX_REPORT_MB``, else 25 MiB."""
    if max_mb is None:
        env = os.environ.get("LONGRUN_MAX_REPORT_MB")
        try:
            max_mb = float(env) if env else DEFAULT_MAX_MB
        except ValueError:
            raise OptionError(f"LONGRUN_MAX_REPORT_MB={env!r} is not a number of megabytes") from None
    if not max_mb > 0:
        raise OptionError(f"the largest report size must be positive, not {max_mb} MB")
    return int(max_mb * 1024 * 1024)


def _format_of(path: Path) -> str:
    fmt = SUFFIXES.get(path.suffix.lower())
    if fmt is None:
        raise OptionError(f"{str(path)!r}: the report file name must end in .html or .pdf")
    return fmt


def _write_atomic(path: Path, data: bytes) -> None:
    from core.io import atomic_write_bytes

    atomic_write_bytes(path, data, what="write the report")


def export_report(chain, path, *, plan=None, start=None, epsilon: float = 0.25, source: str | None = None,
                  sha256: str | None = None, max_table_states: int | None = None,
                  max_mb: float | None = None, generated=None) -> dict:
    """Build, render and write the report of ``chain`` (and ``plan``) to ``path``.

    Parameters
    ----------
    chain : core.model.Chain
        Valid or not.
    path : str or Path
        Output file; ``.html`` (or ``.htm``) or ``.pdf`` decides the format.
    plan : core.plan.Plan, optional
    start : int or str, optional
        Start state for the start-specific facts (replaces the plan's start).
    epsilon : float
    source, sha256 : str, optional
        The input's name and its file's SHA-256 (see :func:`core.report.build_report`).
    max_table_states : int, optional
        Largest chain printed in full (default :data:`core.report.MAX_TABLE_STATES`).
    max_mb : float, optional
        Size guard (default ``LONGRUN_MAX_REPORT_MB`` or 25 MiB).

    Returns
    -------
    dict
        ``{"path", "format", "bytes", "pages", "verdict", "valid"}`` (pages for PDF only).

    Raises
    ------
    core.errors.OptionError
        Bad suffix, missing folder, bad options.
    core.errors.LimitError
        The rendered report exceeds the size guard (the message says how to raise it).
    core.errors.LongrunError
        The file could not be written (nothing is left half-written).
    """
    from core.report import MAX_TABLE_STATES

    out = Path(path)
    _format_of(out)
    if str(out.parent) and not out.parent.exists():
        raise OptionError(f"{str(out)!r}: the folder {out.parent} does not exist")
    if out.is_dir():
        raise OptionError(f"{str(out)!r} is a folder; give a file name ending in .html or .pdf")
    max_report_bytes(max_mb)  # a bad limit is refused before the work starts
    report = build_report(chain, plan=plan, start=start, epsilon=epsilon, source=source, sha256=sha256,
                          generated=generated,
                          max_table_states=MAX_TABLE_STATES if max_table_states is None else max_table_states)
    return write_report(report, out, max_mb=max_mb)


def write_report(report: Report, path, *, max_mb: float | None = None) -> dict:
    """Render a built :class:`~core.report.Report` by the suffix of ``path`` and write it atomically.

    The app can build the report in a worker thread (:func:`core.report.build_report`
    is Qt-free) and call this on the GUI thread, which draws the picture and charts.
    Returns and raises as :func:`export_report`.
    """
    out = Path(path)
    fmt = _format_of(out)
    if str(out.parent) and not out.parent.exists():
        raise OptionError(f"{str(out)!r}: the folder {out.parent} does not exist")
    limit = max_report_bytes(max_mb)
    pages = None
    if fmt == "html":
        data = render_html(report).encode("utf-8")
    else:
        data, pages = _pdf_bytes(report)
    if len(data) > limit:
        raise LimitError(
            f"the report would be {len(data) / 2**20:.3g} MiB, more than the limit of {limit / 2**20:.3g} MiB; "
            "raise it with --max-size-mb (or the LONGRUN_MAX_REPORT_MB environment variable), or lower "
            "--max-table-states to summarise large tables and leave out the picture"
        )
    _write_atomic(out, data)
    return {"path": str(out), "format": fmt, "bytes": len(data), "pages": pages,
            "verdict": report.verdict, "valid": report.valid}


def export_document_report(document, path, *, plan=None, start=None, epsilon: float = 0.25, **options) -> dict:
    """Export the report of an open document (the app's File menu entry).

    The SHA-256 in the footer is that of the document's file when it is saved
    and unchanged; with unsaved edits (or no file) it is that of the current
    chain's file text, and the footer says so.
    """
    chain = document.chain
    p = document.path
    sha = None
    source = document.display_name if hasattr(document, "display_name") else None
    if p is not None:
        source = Path(p).name
        if not document.is_dirty and Path(p).is_file():
            sha = file_sha256(p)
        else:
            source += " (with unsaved edits)"
    return export_report(chain, path, plan=plan, start=start, epsilon=epsilon, source=source, sha256=sha,
                         **options)
