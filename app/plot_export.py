"""Charts of the analysis panels: one house style, a legend, and PNG/SVG export.

Every chart of the long-run panel, the simulation panel and the plan check is
a :class:`ChartBox`: a title row (title, legend swatches, a "Save" button)
over a pyqtgraph :class:`~pyqtgraph.PlotWidget` drawn in the app's palette.
The Save button and the chart's own right-click menu both offer "Save chart as
PNG…" and "Save chart as SVG…" (:func:`export_plot`: PNG through pyqtgraph's
image exporter, SVG through Qt's SVG paint device); pyqtgraph's generic export
dialog is replaced by these two.

The legend is drawn by Qt widgets above the plot, never inside it, so it
cannot hide a bar or a point.  Series are told apart by fill, outline and
line style as well as colour (solid fill, outline only, solid line, dashed
line, dots), following :mod:`app.palette`.
"""
from __future__ import annotations

import contextlib
import math
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np
import pyqtgraph as pg
import pyqtgraph.exporters  # noqa: F401  (registers the exporters)
from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QAction, QColor, QPainter, QPen, QPixmap
from PySide6.QtWidgets import (QGraphicsItem, QHBoxLayout, QLabel, QMenu, QSizePolicy, QToolButton, QVBoxLayout,
                               QWidget)

from . import dialogs
from . import palette as pal

__all__ = [
    "SIM", "EXACT", "LONG_RUN", "CURVE", "AVG_CURVE", "GUIDE",
    "ChartBox", "export_plot", "swatch", "log_ticks", "nice_upper", "state_ticks",
]

#: Series colours (Okabe-Ito), each with a second cue besides colour.
SIM = QColor(pal.OKABE_ITO["blue"])            # simulated: solid blue fill / blue dots
EXACT = QColor(pal.OKABE_ITO["orange"])        # exact now: solid orange fill / line
LONG_RUN = QColor(pal.INK)                     # long-run law: outline only, ink
CURVE = QColor(pal.OKABE_ITO["reddish_purple"])
AVG_CURVE = QColor(pal.OKABE_ITO["bluish_green"])
GUIDE = QColor(pal.INK_SOFT)

PNG_FILTER = "PNG image (*.png);;All files (*)"
SVG_FILTER = "SVG drawing (*.svg);;All files (*)"
#: Width in pixels of an exported PNG (the height follows the chart's shape).
PNG_WIDTH = 1600


def swatch(kind: str, colour: QColor, size: int = 14) -> QPixmap:
    """A small legend sample: ``"fill"``, ``"outline"``, ``"line"``, ``"dash"``, ``"dotline"``, ``"dots"`` or ``"band"``."""
    pix = QPixmap(size * 2, size)
    pix.fill(Qt.GlobalColor.transparent)
    p = QPainter(pix)
    p.setRenderHint(QPainter.RenderHint.Antialiasing)
    c = QColor(colour)
    r = QRectF(size * 0.5 + 1, 1.5, size - 3, size - 3)
    if kind == "fill":
        p.setPen(QPen(c.darker(125), 1))
        p.setBrush(c)
        p.drawRect(r)
    elif kind == "outline":
        p.setPen(QPen(c, 1.8))
        p.setBrush(pal.tint(c, 0.92))
        p.drawRect(r)
    elif kind in ("line", "dash", "dotline"):
        pen = QPen(c, 2.2)
        if kind == "dash":
            pen.setStyle(Qt.PenStyle.DashLine)
        elif kind == "dotline":
            pen.setStyle(Qt.PenStyle.DotLine)
        p.setPen(pen)
        p.drawLine(QPointF(1, size / 2), QPointF(size * 2 - 1, size / 2))
    elif kind == "dots":
        p.setPen(QPen(c.darker(120), 1))
        p.setBrush(c)
        for x in (size * 0.5, size, size * 1.5):
            p.drawEllipse(QPointF(x, size / 2), 2.6, 2.6)
    elif kind == "band":
        p.setPen(QPen(c, 1.6))
        p.drawLine(QPointF(size, 2), QPointF(size, size - 2))
        p.drawLine(QPointF(size - 4, 2), QPointF(size + 4, 2))
        p.drawLine(QPointF(size - 4, size - 2), QPointF(size + 4, size - 2))
    p.end()
    return pix


def nice_upper(x: float) -> float:
    """A round upper limit for an axis showing values up to ``x`` (0.1, 0.2, 0.25, 0.5, 1 ...)."""
    if not math.isfinite(x) or x <= 0:
        return 1.0
    e = 10 ** math.floor(math.log10(x))
    for m in (1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8, 10):
        if m * e >= x:
            return m * e
    return 10 * e


def log_ticks(lo: float, hi: float) -> list[list[tuple[float, str]]]:
    """Ticks for a log10 axis showing ``lo .. hi`` (view coordinates are log10 of the values).

    Powers of ten are labelled; over a short span (under about two and a half
    decades) 2 and 5 times the powers are labelled too, and 2..9 are minor ticks.
    """
    a, b = math.floor(lo), math.ceil(hi)
    span = hi - lo
    step = math.ceil((b - a) / 8) if b - a > 8 else 1
    major = [(float(k), _pow_label(k)) for k in range(a, b + 1, step)]
    minor: list[tuple[float, str]] = []
    if step == 1:
        for k in range(a, b + 1):
            for m in range(2, 10):
                x = k + math.log10(m)
                if lo - 1e-9 <= x <= hi + 1e-9:
                    if span < 2.5 and m in (2, 5):
                        major.append((x, _value_label(m * 10.0 ** k)))
                    else:
                        minor.append((x, ""))
    major.sort()
    return [major, minor]


def _value_label(x: float) -> str:
    if 1 <= x < 1e6:
        return f"{x:,.0f}"
    if 1e-3 <= x < 1:
        return f"{x:g}"
    m, e = f"{x:.0e}".split("e")
    return f"{m}e{int(e)}"


def _pow_label(k: int) -> str:
    if 0 <= k <= 5:
        return f"{10 ** k:,}"
    if -3 <= k < 0:
        return f"{10.0 ** k:g}"
    return f"1e{k}"


def state_ticks(ids: Sequence[str], *, max_labels: int = 14, width: int = 9) -> list[tuple[float, str]]:
    """Tick labels for states at x = 0, 1, ...: ids (shortened), every k-th when there are many."""
    n = len(ids)
    every = max(1, math.ceil(n / max_labels))
    out = []
    for i in range(0, n, every):
        s = str(ids[i])
        out.append((float(i), s if len(s) <= width else s[: width - 1] + "…"))
    return out


def export_plot(plot_item, path: str | Path) -> Path:
    """Write ``plot_item`` (a PlotItem) to ``path``: PNG (``.png``) or SVG (``.svg``).

    Raises
    ------
    ValueError
        For another suffix.
    OSError
        When the file cannot be written.
    """
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in (".png", ".svg"):
        raise ValueError(f"{p.name}: a chart is saved as .png or .svg")
    with _uncached(plot_item):
        _export(plot_item, p, suffix)
    if not p.is_file():
        raise OSError(f"{p} was not written")
    return p


@contextlib.contextmanager
def _uncached(plot_item):
    """Items painted afresh (not from their on-screen pixmap cache) while a chart is exported."""
    items, stack = [], [plot_item]
    while stack:
        it = stack.pop()
        stack.extend(it.childItems())
        if it.cacheMode() != QGraphicsItem.CacheMode.NoCache:
            items.append(it)
    modes = [it.cacheMode() for it in items]
    for it in items:
        it.setCacheMode(QGraphicsItem.CacheMode.NoCache)
    try:
        yield
    finally:
        for it, mode in zip(items, modes):
            it.setCacheMode(mode)


def _export(plot_item, p: Path, suffix: str) -> None:
    from pyqtgraph.exporters import ImageExporter

    if suffix == ".png":
        ex = ImageExporter(plot_item)
        rect = plot_item.sceneBoundingRect()
        w = max(1.0, rect.width())
        ex.parameters()["width"] = PNG_WIDTH
        ex.parameters()["height"] = int(round(PNG_WIDTH * rect.height() / w))
        ex.parameters()["antialias"] = True
        ex.export(str(p))
    else:
        _export_svg(plot_item, p)


def _export_svg(plot_item, path: Path) -> None:
    """Render the plot item's part of its scene into an SVG drawing (vector shapes, text kept as text).

    pyqtgraph's own SVG exporter rewrites the path data Qt writes, and cannot
    read the path syntax of the Qt 6 versions this app runs on (it fails on
    bar charts), so the scene is rendered through Qt's SVG paint device
    directly; the result is the same picture as on screen.
    """
    from PySide6.QtCore import QRect, QSize
    from PySide6.QtSvg import QSvgGenerator

    scene = plot_item.scene()
    if scene is None:
        raise ValueError("the chart is not on screen")
    src = plot_item.sceneBoundingRect()
    w, h = max(1, int(round(src.width()))), max(1, int(round(src.height())))
    gen = QSvgGenerator()
    gen.setFileName(str(path))
    gen.setSize(QSize(w, h))
    gen.setViewBox(QRect(0, 0, w, h))
    gen.setTitle("Longrun chart")
    gen.setDescription("Exported from Longrun. Results describe the model, not the world.")
    painter = QPainter()
    if not painter.begin(gen):
        raise OSError(f"{path} could not be opened for writing")
    try:
        painter.setRenderHint(QPainter.RenderHint.Antialiasing)
        scene.render(painter, QRectF(0, 0, w, h), src)
    finally:
        painter.end()


def _plain_name(text: str) -> str:
    keep = "".join(ch if ch.isalnum() or ch in "-_ " else " " for ch in text).strip()
    return "_".join(keep.lower().split())[:60] or "chart"


class ChartBox(QWidget):
    """A titled chart with a legend row and PNG/SVG export.

    Parameters
    ----------
    title : str
        Shown above the chart (and the default file name of an export).
    parent : QWidget, optional
    grid : bool
        Horizontal grid lines (off for charts redrawn many times a second).

    Attributes
    ----------
    plot : pyqtgraph.PlotWidget
    item : pyqtgraph.PlotItem
        ``plot.getPlotItem()``; add data items here once and update them
        with ``setData``/``setOpts``.

    Signals
    -------
    exported(str)
        A chart was saved (the path).
    """

    exported = Signal(str)

    def __init__(self, title: str, parent: QWidget | None = None, *, name: str = "", grid: bool = True):
        super().__init__(parent)
        self._title = title
        self.setObjectName(name or f"chart_{_plain_name(title)}")
        self.title_label = QLabel(title)
        self.title_label.setObjectName("chartTitle")
        self.title_label.setStyleSheet(f"font-weight: 600; color: {pal.INK.name()};")
        # one line, never wider than the chart: a live title changes without moving the chart
        self.title_label.setWordWrap(False)
        self.title_label.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Fixed)
        self.legend_row = QHBoxLayout()
        self.legend_row.setContentsMargins(0, 0, 0, 0)
        self.legend_row.setSpacing(10)
        self.save_button = QToolButton()
        self.save_button.setText("Save…")
        self.save_button.setToolTip("Save this chart as a PNG picture or an SVG drawing")
        self.save_button.setPopupMode(QToolButton.ToolButtonPopupMode.InstantPopup)
        self.save_button.setAutoRaise(True)
        menu = QMenu(self.save_button)
        self.png_action = QAction("Save chart as PNG…", self)
        self.svg_action = QAction("Save chart as SVG…", self)
        self.png_action.triggered.connect(lambda _c=False: self.save_dialog("png"))
        self.svg_action.triggered.connect(lambda _c=False: self.save_dialog("svg"))
        menu.addActions([self.png_action, self.svg_action])
        self.save_button.setMenu(menu)

        self.plot = pg.PlotWidget(background=pal.PAPER)
        self.plot.setObjectName(self.objectName() + "_plot")
        self.plot.setMinimumHeight(50)
        self.item = self.plot.getPlotItem()
        self.item.setMenuEnabled(True)
        self.item.hideButtons()
        if grid:  # (live charts go without: grid lines make the axes repaint with every frame)
            self.item.showGrid(x=False, y=True, alpha=0.18)
        font = pal.ui_font(-1)
        for side in ("left", "bottom"):
            ax = self.item.getAxis(side)
            ax.setPen(pg.mkPen(pal.INK_SOFT))
            ax.setTextPen(pg.mkPen(pal.INK))
            ax.setTickFont(font)
            ax.label.setFont(font)
            ax.enableAutoSIPrefix(False)
            # drawn once into a pixmap, blitted on repaints, redrawn only when its ticks change
            ax.setCacheMode(QGraphicsItem.CacheMode.DeviceCoordinateCache)
        self.item.getAxis("left").setWidth(52)
        vb = self.item.getViewBox()
        vb.setMouseEnabled(x=False, y=False)
        vb.menu.addSeparator()
        vb.menu.addAction(self.png_action)
        vb.menu.addAction(self.svg_action)
        # pyqtgraph's generic export dialog is replaced by the two actions above
        self.plot.scene().contextMenu = []

        head = QHBoxLayout()
        head.setContentsMargins(0, 0, 0, 0)
        head.setSpacing(8)
        head.addWidget(self.title_label, 1)
        head.addWidget(self.save_button, 0, Qt.AlignmentFlag.AlignTop)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 2)
        lay.setSpacing(2)
        lay.addLayout(head)
        lay.addLayout(self.legend_row)
        lay.addWidget(self.plot, 1)
        self._legend_widgets: list[QWidget] = []

    # -- appearance ------------------------------------------------------------------
    def set_title(self, title: str) -> None:
        if title == self._title:
            return
        self._title = title
        self.title_label.setText(title)
        self.title_label.setToolTip(title)

    def title(self) -> str:
        return self._title

    def sizeHint(self):  # noqa: N802 - Qt's name
        from PySide6.QtCore import QSize

        return QSize(480, 230)

    def set_labels(self, bottom: str = "", left: str = "") -> None:
        label_style = {"color": pal.INK_SOFT.name(), "font-size": f"{max(8, pal.ui_font(-1).pointSize())}pt"}
        self.item.setLabel("bottom", bottom, **label_style)
        self.item.setLabel("left", left, **label_style)

    def set_legend(self, entries: Iterable[tuple[str, QColor, str]]) -> None:
        """Legend entries ``(kind, colour, text)``; kinds as for :func:`swatch`."""
        while self.legend_row.count():
            item = self.legend_row.takeAt(0)
            w = item.widget()
            if w is not None:
                w.hide()
                w.deleteLater()
        self._legend_widgets = []
        for kind, colour, text in entries:
            box = QWidget(self)
            row = QHBoxLayout(box)
            row.setContentsMargins(0, 0, 0, 0)
            row.setSpacing(3)
            icon = QLabel()
            icon.setPixmap(swatch(kind, colour))
            label = QLabel(text)
            label.setStyleSheet(f"color: {pal.INK.name()};")
            label.setFont(pal.ui_font(-1))
            row.addWidget(icon)
            row.addWidget(label)
            box.setToolTip(text)
            self.legend_row.addWidget(box)
            self._legend_widgets.append(box)
        self.legend_row.addStretch(1)

    def legend_texts(self) -> list[str]:
        return [w.toolTip() for w in self._legend_widgets]

    # -- export ------------------------------------------------------------------------
    def save(self, path: str | Path) -> Path:
        """Save the chart to ``path`` (.png or .svg); see :func:`export_plot`."""
        out = export_plot(self.item, path)
        self.exported.emit(str(out))
        return out

    def save_dialog(self, kind: str) -> None:
        """Ask for a file name and save the chart (PNG or SVG); problems are shown, never raised."""
        suffix = "." + kind
        suggested = str(Path.home() / (_plain_name(self._title) + suffix))
        p = dialogs.save_file(self, f"Save the chart as {kind.upper()}", suggested,
                              PNG_FILTER if kind == "png" else SVG_FILTER, (suffix,))
        if p is None:
            return
        try:
            self.save(p)
        except (OSError, ValueError, RuntimeError) as exc:
            dialogs.show_problems(self, "Could not save the chart",
                                  f"“{p.name}” was not written.", [str(exc)])


def finite_positive(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The points of ``(x, y)`` with both coordinates finite and positive (for log axes)."""
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y) & (x > 0) & (y > 0)
    return x[ok], y[ok]
