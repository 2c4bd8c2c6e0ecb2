"""The node-and-arrow editor: a view of the document's chain.

Gestures (also shown in the status bar while hovering):

* double-click empty space: add a state (then type its name);
* drag a state: move it (one undo step per drag); rubber-band on empty space
  selects;
* drag from a state's **rim** (or with Shift from anywhere on it) to another
  state, or back to itself, to draw a transition; then type its probability;
* double-click a state to rename it, an arrow or its label to edit the
  probability (``0.3``, ``1/3``, ``2.5e-11``, ``5%``, ``rest``; empty removes);
* Delete / Backspace deletes the selection; F2 edits the selected item;
* wheel or pinch zooms, middle button or Space + drag pans.

The canvas updates incrementally: on ``Document.chainChanged`` it diffs the old
and new chains and touches only the states and arrows that changed.
"""
from __future__ import annotations

import heapq
import itertools
import math
from dataclasses import dataclass
from fractions import Fraction
from typing import Callable, Iterable

from PySide6.QtCore import QEvent, QLineF, QPointF, QRect, QRectF, Qt, Signal
from PySide6.QtGui import (
    QBrush,
    QColor,
    QFontMetricsF,
    QKeySequence,
    QPainter,
    QPainterPath,
    QPainterPathStroker,
    QPen,
    QPixmap,
    QPolygonF,
    QStaticText,
    QTransform,
)
from PySide6.QtWidgets import (
    QGraphicsItem,
    QGraphicsLineItem,
    QGraphicsScene,
    QGraphicsView,
    QLabel,
    QLineEdit,
    QStyleOptionGraphicsItem,
    QWidget,
)

from core.model import REST, Chain, State, Transition, parse_probability

from . import palette as pal
from .document import Document, probability_text, transition_changes

__all__ = ["ChainCanvas", "StateItem", "ArrowItem", "NodeStyle", "NODE_RADIUS"]

NODE_RADIUS = 24.0
RIM = 0.62            # inner share of the radius that moves; outside it connects
LABEL_LOD = 0.6       # arrow labels are hidden below this zoom (too small to read)
SMOOTH_LOD = 0.6      # arrows are antialiased from this zoom on (and not while dragging)
OVERVIEW_LOD = 0.3    # below this zoom arrows are drawn as one batch of plain lines
#: Chains with more transitions than this are drawn as states and plain lines, without arrow items
#: (an arrow item with its label costs about a millisecond and tens of kilobytes; a dense matrix of
#: 500 states would take minutes and gigabytes); their probabilities are edited in the matrix grid.
MAX_DRAWN_ARROWS = 3000
#: In that mode, at most this many lines (the most probable transitions): a paint costs about
#: 16 us a line, and a quarter of a million lines is a grey disc anyway.
MAX_DRAWN_LINES = 6000
MAX_ZOOM = 4.0
MIN_ZOOM = 0.05
_drag_tokens = itertools.count(1)
_CURVE_OFFSET = math.atan(0.5)  # where a curved arrow meets its state, off the centre line


# ---------------------------------------------------------------------------
# styles
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class NodeStyle:
    """How a state is drawn: colours plus the non-colour cues."""

    fill: QColor
    outline: QColor
    dashed: bool = False
    double: bool = False
    tag: str = ""
    kind: str = "unknown"         # "closed", "transient", "unknown"
    description: str = "not analysed yet"


UNKNOWN_STYLE = NodeStyle(QColor("#FBFBFA"), pal.UNKNOWN, tag="", kind="unknown",
                          description="class unknown until the chain is valid")


def styles_from_structure(chain: Chain, structure) -> dict[str, NodeStyle]:
    """One :class:`NodeStyle` per state id from a ``core.structure.Structure``."""
    out: dict[str, NodeStyle] = {}
    closed_rank = {ci: k for k, ci in enumerate(structure.closed)}
    for i, sid in enumerate(chain.ids):
        ci = int(structure.class_of[i])
        cls = structure.classes[ci]
        if cls.closed:
            k = closed_rank[ci]
            colour = pal.class_colour(k)
            absorbing = len(cls.states) == 1
            per = cls.period
            what = "absorbing state" if absorbing else f"closed class C{k + 1} ({len(cls.states)} states)"
            if per is not None and per > 1:
                what += f", period {per}"
            elif not absorbing:
                what += ", aperiodic"
            out[sid] = NodeStyle(pal.tint(colour, 0.72), colour, dashed=False, double=absorbing,
                                 tag=f"C{k + 1}", kind="closed", description=what)
        else:
            out[sid] = NodeStyle(pal.PAPER, pal.TRANSIENT, dashed=True, tag="T", kind="transient",
                                 description="transient (left for good sooner or later)")
    return out


def _fmt_value(v: float) -> str:
    if v == 0:
        return "0"
    if 0.9999 < v < 1:
        return f"1 − {1 - v:.2g}"  # keep the tiny remainder visible
    if 1e-4 <= abs(v) < 1e4:
        return f"{v:.4g}"
    return f"{v:.3g}"


def arrow_label(t: Transition, resolved: float | None) -> str:
    p = t.p
    text = p if isinstance(p, str) else repr(p) if isinstance(p, float) else str(p)
    text = text.strip()
    if text.lower() == REST and resolved is not None:
        return f"rest = {_fmt_value(resolved)}"
    return text


def typed_value(p) -> float | None:
    """The float of a typed probability, or None (rest, unparseable)."""
    try:
        v = parse_probability(p)
    except ValueError:
        return None
    return float(v) if isinstance(v, Fraction) else None


# ---------------------------------------------------------------------------
# items
# ---------------------------------------------------------------------------
class StateItem(QGraphicsItem):
    """A state: a circle with its class tag inside and its name below."""

    def __init__(self, canvas: "ChainCanvas", state: State):
        super().__init__()
        self.canvas = canvas
        self.sid = state.id
        self.name = state.display_name
        self.style = UNKNOWN_STYLE
        self.problems: tuple[str, ...] = ()
        self.row_sum: Fraction | None = None
        self.hover_target = False
        self.setFlag(QGraphicsItem.GraphicsItemFlag.ItemIsSelectable, True)
        self.setAcceptHoverEvents(True)
        self.setZValue(10)
        self._label_rect = QRectF()
        self._bounds = QRectF()
        self.plate_side = "below"
        self.loop_angle = -math.pi / 2
        self._measure()
        self.setPos(state.x or 0.0, state.y or 0.0)
        self._update_tooltip()

    # geometry ------------------------------------------------------------------
    def _measure(self) -> None:
        fm = self.canvas.name_metrics
        text = fm.elidedText(self.name, Qt.TextElideMode.ElideRight, 170.0)
        self._shown_name = text
        w = fm.horizontalAdvance(text) + 10
        h = fm.height() + 4
        gap = NODE_RADIUS + 5
        side = self.plate_side
        if side == "above":
            self._label_rect = QRectF(-w / 2, -gap - h, w, h)
        elif side == "right":
            self._label_rect = QRectF(gap + 2, -h / 2, w, h)
        elif side == "left":
            self._label_rect = QRectF(-gap - 2 - w, -h / 2, w, h)
        else:
            self._label_rect = QRectF(-w / 2, gap, w, h)
        r = NODE_RADIUS + 9
        self._bounds = QRectF(-r, -r, 2 * r, 2 * r).united(self._label_rect).adjusted(-2, -2, 2, 2)

    def set_plate_side(self, side: str) -> None:
        if side != self.plate_side:
            self.prepareGeometryChange()
            self.plate_side = side
            self._measure()
            self.update()

    def set_name(self, name: str) -> None:
        if name != self.name:
            self.prepareGeometryChange()
            self.name = name
            self._measure()
            self._update_tooltip()
            self.update()

    def boundingRect(self) -> QRectF:  # noqa: N802
        return self._bounds

    def shape(self) -> QPainterPath:
        path = QPainterPath()
        path.addEllipse(QPointF(0, 0), NODE_RADIUS + 4, NODE_RADIUS + 4)
        path.addRect(self._label_rect)
        return path

    def on_rim(self, scene_pos: QPointF) -> bool:
        d = scene_pos - self.pos()
        return math.hypot(d.x(), d.y()) > NODE_RADIUS * RIM

    # appearance ------------------------------------------------------------------
    def set_style(self, style: NodeStyle) -> None:
        if style != self.style:
            self.style = style
            self._update_tooltip()
            self.update()

    def set_problems(self, problems: tuple[str, ...], row_sum: Fraction | None) -> None:
        if problems != self.problems or row_sum != self.row_sum:
            self.problems = problems
            self.row_sum = row_sum
            self._update_tooltip()
            self.update()

    def _update_tooltip(self) -> None:
        lines = [f"<b>{_esc(self.name)}</b>"]
        if self.name != self.sid:
            lines.append(f"id: {_esc(self.sid)}")
        lines.append(_esc(self.style.description))
        if self.row_sum is not None:
            lines.append(f"row sum: {float(self.row_sum):.12g}")
        for p in self.problems:
            lines.append(f"<span style='color:{pal.PROBLEM.name()}'>⚠ {_esc(p)}</span>")
        self.setToolTip("<br>".join(lines))

    def paint(self, painter: QPainter, option: QStyleOptionGraphicsItem, widget: QWidget | None = None) -> None:
        lod = option.levelOfDetailFromTransform(painter.worldTransform())
        st = self.style
        r = NODE_RADIUS
        selected = self.isSelected()
        if selected or self.hover_target:
            painter.setPen(Qt.PenStyle.NoPen)
            painter.setBrush(pal.SELECT if selected else QColor(0, 158, 115, 80))
            painter.drawEllipse(QPointF(0, 0), r + 7, r + 7)
        outline = pal.PROBLEM if self.problems else st.outline
        pen = QPen(outline, 2.6 if st.kind != "unknown" or self.problems else 1.6)
        if st.dashed and not self.problems:
            pen.setStyle(Qt.PenStyle.CustomDashLine)
            pen.setDashPattern([3.0, 2.2])
        painter.setPen(pen)
        painter.setBrush(QBrush(st.fill))
        painter.drawEllipse(QPointF(0, 0), r, r)
        if st.double:
            painter.setBrush(Qt.BrushStyle.NoBrush)
            painter.setPen(QPen(outline, 1.4))
            painter.drawEllipse(QPointF(0, 0), r - 5, r - 5)
        if lod < 0.25:
            return
        if st.tag:
            painter.setFont(self.canvas.tag_font)
            painter.setPen(st.outline.darker(135) if st.kind == "closed" else pal.INK_SOFT)
            painter.drawText(QRectF(-r, -r, 2 * r, 2 * r), Qt.AlignmentFlag.AlignCenter, st.tag)
        # name plate under the node
        painter.setPen(QPen(QColor(0, 0, 0, 28), 1))
        painter.setBrush(QColor(255, 255, 255, 225))
        painter.drawRoundedRect(self._label_rect, 4, 4)
        painter.setPen(pal.INK)
        painter.setFont(self.canvas.name_font)
        painter.drawText(self._label_rect, Qt.AlignmentFlag.AlignCenter, self._shown_name)
        if self.problems:
            c = QPointF(r * 0.72, -r * 0.72)
            painter.setPen(QPen(pal.PAPER, 1.5))
            painter.setBrush(pal.PROBLEM)
            painter.drawEllipse(c, 8.5, 8.5)
            painter.setPen(pal.PAPER)
            painter.setFont(self.canvas.badge_font)
            painter.drawText(QRectF(c.x() - 8.5, c.y() - 8.5, 17, 17), Qt.AlignmentFlag.AlignCenter, "!")

    def hoverMoveEvent(self, event) -> None:  # noqa: N802
        self.canvas.hover_state(self, event.scenePos())

    def hoverLeaveEvent(self, event) -> None:  # noqa: N802
        self.canvas.hover_state(None, event.scenePos())


def _esc(s: str) -> str:
    return s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def _unit(x: float, y: float) -> tuple[float, float]:
    L = math.hypot(x, y)
    return (x / L, y / L) if L > 1e-9 else (1.0, 0.0)


def _rot(u: tuple[float, float], a: float) -> tuple[float, float]:
    c, s = math.cos(a), math.sin(a)
    return (u[0] * c - u[1] * s, u[0] * s + u[1] * c)


class ArrowItem(QGraphicsItem):
    """A transition: a straight arrow, a curve (when the reverse exists) or a loop."""

    def __init__(self, canvas: "ChainCanvas", t: Transition):
        super().__init__()
        self.canvas = canvas
        self.key = (t.source, t.target)
        self.transition = t
        self.resolved: float | None = None
        self.problems: tuple[str, ...] = ()
        self.setFlag(QGraphicsItem.GraphicsItemFlag.ItemIsSelectable, True)
        self.setZValue(0)
        self._path = QPainterPath()
        self._head = QPolygonF()
        self._label_rect = QRectF()
        self._bounds = QRectF()
        self._shape: QPainterPath | None = None
        self._text = ""
        self.overview_line: QLineF | None = None
        self.setVisible(canvas.lod >= OVERVIEW_LOD)
        self.label_t = 0.5
        self._loop_label = QPointF()
        self._width = pal.arrow_width(None)
        self._rare = False
        self._set_value_style()

    @property
    def is_loop(self) -> bool:
        return self.key[0] == self.key[1]

    # values ------------------------------------------------------------------------
    def set_transition(self, t: Transition) -> None:
        self.transition = t
        self.resolved = None  # until the next validation
        self._set_value_style()

    def set_resolved(self, value: float | None, problems: tuple[str, ...]) -> bool:
        """Take the validated value; True when the arrow's width changed (re-layout needed)."""
        if value == self.resolved and problems == self.problems:
            return False
        self.resolved = value
        self.problems = problems
        return self._set_value_style()

    def _value(self) -> float | None:
        if self.resolved is not None:
            return self.resolved
        return typed_value(self.transition.p)

    def _set_value_style(self) -> bool:
        v = self._value()
        text = arrow_label(self.transition, self.resolved)
        width = pal.arrow_width(v)
        rare = v is not None and 0 < v < self.canvas.rare_below
        width_changed = width != self._width
        if text != self._text or width_changed or rare != self._rare:
            self.prepareGeometryChange()
            self._text, self._width, self._rare = text, width, rare
            self._shape = None
            self._relabel()
        self._make_pens()
        self._update_tooltip()
        self.update()
        self.canvas._overview_changed(self)
        return width_changed

    def _update_tooltip(self) -> None:
        a, b = self.key
        lines = [f"<b>P({_esc(a)} → {_esc(b)})</b> = {_esc(str(self.transition.p))}"]
        v = self._value()
        if v is not None:
            lines.append(f"value: {v:.15g}")
        if self._rare:
            lines.append(f"rare: below {self.canvas.rare_below:g}")
        for p in self.problems:
            lines.append(f"<span style='color:{pal.PROBLEM.name()}'>⚠ {_esc(p)}</span>")
        self.setToolTip("<br>".join(lines))

    # geometry ------------------------------------------------------------------------
    def _relabel(self) -> None:
        fm = self.canvas.italic_metrics if self._rare else self.canvas.label_metrics
        w = fm.horizontalAdvance(self._text) + 8
        h = fm.height() + 2
        c = self._label_center if hasattr(self, "_label_center") else QPointF()
        self._label_rect = QRectF(c.x() - w / 2, c.y() - h / 2, w, h)
        self._bounds = self._path.boundingRect().united(self._head.boundingRect()).united(
            self._label_rect).adjusted(-self._width - 4, -self._width - 4, self._width + 4, self._width + 4)

    def layout(self, pa: QPointF, pb: QPointF, *, curved: bool, loop_angle: float) -> None:
        """Recompute the path from the two state centres."""
        self.prepareGeometryChange()
        self._shape = None
        r = NODE_RADIUS
        w = self._width
        head_len = 7.0 + 1.6 * w
        head_half = 3.6 + 1.1 * w
        path = QPainterPath()
        ax, ay = pa.x(), pa.y()
        if self.is_loop:
            u = (math.cos(loop_angle), math.sin(loop_angle))
            s1, s2 = _rot(u, -0.42), _rot(u, 0.42)
            c1, c2 = _rot(u, -0.78), _rot(u, 0.78)
            reach = r + 64
            p1 = (ax + r * s1[0], ay + r * s1[1])
            tip = (ax + r * s2[0], ay + r * s2[1])
            q1 = (ax + reach * c1[0], ay + reach * c1[1])
            q2 = (ax + reach * c2[0], ay + reach * c2[1])
            tu = _unit(tip[0] - q2[0], tip[1] - q2[1])
            base = (tip[0] - tu[0] * head_len, tip[1] - tu[1] * head_len)
            path.moveTo(*p1)
            path.cubicTo(QPointF(*q1), QPointF(*q2), QPointF(*base))
            mid = (0.125 * p1[0] + 0.375 * q1[0] + 0.375 * q2[0] + 0.125 * tip[0],
                   0.125 * p1[1] + 0.375 * q1[1] + 0.375 * q2[1] + 0.125 * tip[1])
            fm = self.canvas.label_metrics
            half = 0.5 * abs(u[0]) * (fm.horizontalAdvance(self._text) + 8) + 0.5 * abs(u[1]) * (fm.height() + 2)
            label = (mid[0] + u[0] * (half + 3), mid[1] + u[1] * (half + 3))
        else:
            bx, by = pb.x(), pb.y()
            u = _unit(bx - ax, by - ay)
            dist = math.hypot(bx - ax, by - ay)
            n = (-u[1], u[0])
            if curved:
                bend = min(0.22 * dist, 70.0) if dist > 1 else 30.0
                su = _unit(u[0] + 0.5 * n[0], u[1] + 0.5 * n[1])
                eu = _unit(-u[0] + 0.5 * n[0], -u[1] + 0.5 * n[1])
                start = (ax + r * su[0], ay + r * su[1])
                tip = (bx + (r + 1.5) * eu[0], by + (r + 1.5) * eu[1])
                ctrl = ((ax + bx) / 2 + n[0] * bend, (ay + by) / 2 + n[1] * bend)
                tu = _unit(tip[0] - ctrl[0], tip[1] - ctrl[1])
                base = (tip[0] - tu[0] * head_len, tip[1] - tu[1] * head_len)
                path.moveTo(*start)
                path.quadTo(QPointF(*ctrl), QPointF(*base))
                label = (0.25 * start[0] + 0.5 * ctrl[0] + 0.25 * tip[0],
                         0.25 * start[1] + 0.5 * ctrl[1] + 0.25 * tip[1])
            else:
                start = (ax + r * u[0], ay + r * u[1])
                tip = (bx - (r + 1.5) * u[0], by - (r + 1.5) * u[1])
                tu = u
                if dist < 2 * r + head_len:
                    tip = (bx - r * u[0] * 0.2, by - r * u[1] * 0.2)
                base = (tip[0] - tu[0] * head_len, tip[1] - tu[1] * head_len)
                path.moveTo(*start)
                path.lineTo(*base)
                label = ((start[0] + tip[0]) / 2, (start[1] + tip[1]) / 2)
        perp = (-tu[1], tu[0])
        self._head = QPolygonF([
            QPointF(*tip),
            QPointF(base[0] + perp[0] * head_half, base[1] + perp[1] * head_half),
            QPointF(base[0] - perp[0] * head_half, base[1] - perp[1] * head_half),
        ])
        self._path = path
        if self.overview_line is not None:
            self.canvas._overview_changed(self)  # where it was
        self.overview_line = QLineF(QPointF(*(p1 if self.is_loop else start)), QPointF(*tip))
        self.canvas._overview_changed(self)
        self._loop_label = QPointF(*label)
        if self.is_loop:
            self._label_center = self._loop_label
        else:
            self._label_center = path.pointAtPercent(self.label_t)
        self._relabel()
        self.update()

    def label_rect_at(self, t: float) -> QRectF:
        """Where the label would be at fraction ``t`` of the path (scene coordinates)."""
        c = self._loop_label if self.is_loop else self._path.pointAtPercent(t)
        r = QRectF(self._label_rect)
        r.moveCenter(c)
        return r

    def set_label_t(self, t: float) -> None:
        if self.is_loop or abs(t - self.label_t) < 1e-9:
            return
        self.prepareGeometryChange()
        self._shape = None
        self.label_t = t
        self._label_center = self._path.pointAtPercent(t)
        self._relabel()
        self.update()

    def boundingRect(self) -> QRectF:  # noqa: N802
        return self._bounds

    def shape(self) -> QPainterPath:
        if self._shape is None:
            stroker = QPainterPathStroker()
            stroker.setWidth(max(9.0, self._width + 6))
            s = stroker.createStroke(self._path)
            s.addPolygon(self._head)
            s.addRect(self._label_rect)
            self._shape = s
        return self._shape

    def label_scene_rect(self) -> QRectF:
        return self.mapRectToScene(self._label_rect)

    def _make_pens(self) -> None:
        colour = pal.PROBLEM if self.problems else pal.INK
        pen = QPen(colour, self._width)
        pen.setCapStyle(Qt.PenCapStyle.FlatCap)
        if self._rare:
            pen.setStyle(Qt.PenStyle.CustomDashLine)
            pen.setDashPattern([4.0 / max(self._width, 0.5), 3.0 / max(self._width, 0.5)])
        halo = QPen(pal.SELECT, self._width + 8)
        halo.setCapStyle(Qt.PenCapStyle.RoundCap)
        self._colour = colour
        self._pen = pen
        self._halo = halo
        self._frame = QPen(colour if self.problems else QColor(38, 49, 59, 70), 1)
        self._static = QStaticText(self._text)
        self._static.setTextFormat(Qt.TextFormat.PlainText)
        self._static_font = self.canvas.italic_font if self._rare else self.canvas.label_font
        self._static.prepare(QTransform(), self._static_font)

    def paint(self, painter: QPainter, option: QStyleOptionGraphicsItem, widget: QWidget | None = None) -> None:
        canvas = self.canvas
        smooth = canvas.lod >= SMOOTH_LOD or canvas.interacting  # while moving, the view is aliased already
        if not smooth:
            painter.setRenderHint(QPainter.RenderHint.Antialiasing, False)
        if self.isSelected():
            painter.setPen(self._halo)
            painter.setBrush(Qt.BrushStyle.NoBrush)
            painter.drawPath(self._path)
        painter.setPen(self._pen)
        painter.setBrush(Qt.BrushStyle.NoBrush)
        painter.drawPath(self._path)
        painter.setPen(Qt.PenStyle.NoPen)
        painter.setBrush(self._colour)
        painter.drawPolygon(self._head)
        if not smooth:
            painter.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        if canvas.lod < LABEL_LOD or not self._text or canvas.interacting:
            return
        painter.setPen(self._frame)
        painter.setBrush(_LABEL_BG)
        r = self._label_rect
        painter.drawRoundedRect(r, 3, 3)
        painter.setPen(self._colour)
        painter.setFont(self._static_font)
        size = self._static.size()
        painter.drawStaticText(QPointF(r.center().x() - size.width() / 2, r.center().y() - size.height() / 2),
                               self._static)


_LABEL_BG = QColor(255, 255, 255, 235)


class OverviewEdges(QGraphicsItem):
    """Every arrow as a plain line, drawn in one call, when the view is zoomed far out.

    Below :data:`OVERVIEW_LOD` the arrow items are hidden (no per-arrow
    painting), so a chain of thousands of transitions stays quick to redraw.
    """

    def __init__(self, canvas: "ChainCanvas"):
        super().__init__()
        self.canvas = canvas
        self.setZValue(-1)
        self.setAcceptedMouseButtons(Qt.MouseButton.NoButton)
        self._lines: dict[tuple[str, str], tuple[int, QLineF]] = {}
        self._groups: tuple[list, list, list] | None = None

    def invalidate(self) -> None:
        self._groups = None

    def replace_all(self, lines: dict[tuple[str, str], tuple[int, QLineF]]) -> None:
        """Hold exactly ``lines`` (key: (kind, line)), as the plain-line mode draws them."""
        self._lines = dict(lines)
        self._groups = None

    def set_line(self, key: tuple[str, str], kind: int, line: QLineF | None) -> None:
        """Record an arrow's line (kind 0 normal, 1 rare, 2 problem); None removes it."""
        if line is None:
            if self._lines.pop(key, None) is not None:
                self._groups = None
        else:
            self._lines[key] = (kind, line)
            self._groups = None

    def boundingRect(self) -> QRectF:  # noqa: N802
        return self.canvas.sceneRect()

    def _build(self) -> tuple[list, list, list]:
        groups: tuple[list, list, list] = ([], [], [])
        for kind, line in self._lines.values():
            groups[kind].append(line)
        self._groups = groups
        return groups

    def paint(self, painter: QPainter, option: QStyleOptionGraphicsItem, widget: QWidget | None = None) -> None:
        if self.canvas.lod >= OVERVIEW_LOD and not self.canvas.lines_only:
            return
        normal, rare, bad = self._groups or self._build()
        # thin, opaque, aliased lines take the raster engine's fast path (tens of times
        # faster than antialiased translucent ones for thousands of lines)
        painter.setRenderHint(QPainter.RenderHint.Antialiasing, False)
        pen = QPen(_OVERVIEW_INK, 1)
        pen.setCosmetic(True)
        painter.setPen(pen)
        if normal:
            painter.drawLines(normal)
        if rare:
            pen.setStyle(Qt.PenStyle.DashLine)
            painter.setPen(pen)
            painter.drawLines(rare)
        if bad:
            pen = QPen(pal.PROBLEM, 1)
            pen.setCosmetic(True)
            painter.setPen(pen)
            painter.drawLines(bad)
        painter.setRenderHint(QPainter.RenderHint.Antialiasing, True)


_OVERVIEW_INK = QColor("#7D8791")


# ---------------------------------------------------------------------------
# in-place editor
# ---------------------------------------------------------------------------
class InlineEditor(QLineEdit):
    """A one-line editor floating over the canvas; Return commits, Escape cancels."""

    def __init__(self, view: "ChainCanvas"):
        super().__init__(view.viewport())
        self._view = view
        self._commit: Callable[[str], str | None] | None = None
        self.setObjectName("canvasEditor")
        self.hide()
        self.setStyleSheet(
            "QLineEdit#canvasEditor { border: 2px solid #0072B2; border-radius: 4px; padding: 2px 4px;"
            " background: white; selection-background-color: #56B4E9; }"
            "QLineEdit#canvasEditor[bad='true'] { border-color: #D55E00; }"
        )

    def open(self, scene_pos: QPointF, text: str, commit: Callable[[str], str | None], *, hint: str = "") -> None:
        self._commit = commit
        self.setProperty("bad", False)
        self.style().unpolish(self)
        self.style().polish(self)
        self.setText(text)
        self.setPlaceholderText(hint)
        self.setToolTip(hint)
        fm = self.fontMetrics()
        w = max(120, fm.horizontalAdvance(text) + 40)
        self.resize(w, fm.height() + 12)
        p = self._view.mapFromScene(scene_pos)
        self.move(int(p.x() - w / 2), int(p.y() - self.height() / 2))
        self.show()
        self.raise_()
        self.setFocus(Qt.FocusReason.OtherFocusReason)
        self.selectAll()

    @property
    def active(self) -> bool:
        return self.isVisible()

    def keyPressEvent(self, event) -> None:  # noqa: N802
        if event.key() in (Qt.Key.Key_Return, Qt.Key.Key_Enter):
            self.accept()
            return
        if event.key() == Qt.Key.Key_Escape:
            self.cancel()
            return
        super().keyPressEvent(event)

    def accept(self) -> bool:
        if self._commit is None:
            return True
        error = self._commit(self.text())
        if error:
            self.setProperty("bad", True)
            self.style().unpolish(self)
            self.style().polish(self)
            self.setToolTip(error)
            self._view.message.emit(error)
            return False
        self._close()
        return True

    def cancel(self) -> None:
        self._close()

    def _close(self) -> None:
        self._commit = None
        self.hide()
        self._view.setFocus(Qt.FocusReason.OtherFocusReason)

    def focusOutEvent(self, event) -> None:  # noqa: N802
        super().focusOutEvent(event)
        if self._commit is not None and event.reason() != Qt.FocusReason.PopupFocusReason:
            if not self.accept():
                self.cancel()


# ---------------------------------------------------------------------------
# the view
# ---------------------------------------------------------------------------
class ChainCanvas(QGraphicsView):
    """The chain editor view (it owns its scene).

    Parameters
    ----------
    document : Document
    analysis : AnalysisService, optional
        Source of validation marks and class colours.

    Signals
    -------
    message(str)
        A short text for the status bar (hints, refused edits).
    zoomChanged(float)
    """

    message = Signal(str)
    zoomChanged = Signal(float)

    def __init__(self, document: Document, analysis=None, parent: QWidget | None = None, *,
                 rare_below: float = 1e-3):
        super().__init__(parent)
        self.document = document
        self.analysis = analysis
        self.rare_below = rare_below
        self.name_font = pal.ui_font(0.0)
        self.tag_font = pal.ui_font(-0.5, bold=True)
        self.badge_font = pal.ui_font(-1.0, bold=True)
        self.label_font = pal.ui_font(-1.0)
        self.italic_font = pal.ui_font(-1.0, italic=True)
        self.name_metrics = QFontMetricsF(self.name_font)
        self.label_metrics = QFontMetricsF(self.label_font)
        self.italic_metrics = QFontMetricsF(self.italic_font)
        self._scene = QGraphicsScene(self)
        self._scene.setItemIndexMethod(QGraphicsScene.ItemIndexMethod.BspTreeIndex)
        self.setScene(self._scene)
        self.setObjectName("chainCanvas")
        self.setRenderHints(QPainter.RenderHint.Antialiasing | QPainter.RenderHint.TextAntialiasing)
        self.setViewportUpdateMode(QGraphicsView.ViewportUpdateMode.MinimalViewportUpdate)
        self.setTransformationAnchor(QGraphicsView.ViewportAnchor.AnchorUnderMouse)
        self.setResizeAnchor(QGraphicsView.ViewportAnchor.AnchorViewCenter)
        self.setDragMode(QGraphicsView.DragMode.RubberBandDrag)
        self.setBackgroundBrush(pal.CANVAS)
        self.setMouseTracking(True)
        self.setFocusPolicy(Qt.FocusPolicy.StrongFocus)
        self.viewport().grabGesture(Qt.GestureType.PinchGesture)
        self.setSceneRect(QRectF(-2000, -2000, 4000, 4000))

        self.lod = 1.0
        self.interacting = False
        self.lines_only = False  # more than MAX_DRAWN_ARROWS transitions: no arrow items
        self.notice = QLabel(self)
        self.notice.setObjectName("canvasNotice")
        self.notice.setWordWrap(True)
        self.notice.setStyleSheet("QLabel#canvasNotice { background: rgba(255, 255, 255, 235); "
                                  "border: 1px solid rgba(0, 0, 0, 40); border-radius: 6px; padding: 6px; }")
        self.notice.hide()
        self._deferred: set[str] = set()
        self._bg_cache: tuple[float, QBrush] | None = None
        self._overview = OverviewEdges(self)
        self._scene.addItem(self._overview)
        self.states: dict[str, StateItem] = {}
        self.arrows: dict[tuple[str, str], ArrowItem] = {}
        self._incident: dict[str, set[tuple[str, str]]] = {}
        self._styles: dict[str, NodeStyle] = {}
        self._label_cells: dict[tuple[int, int], set[tuple[str, str]]] = {}
        self._label_home: dict[tuple[str, str], list[tuple[int, int]]] = {}
        self._report = None
        self.editor = InlineEditor(self)
        self._press: dict | None = None       # the gesture in progress
        self._rubber: QGraphicsLineItem | None = None
        self._space = False
        self._syncing_selection = False
        self._hover_hint = ""

        self.legend = Legend(self)
        self.legend.show()

        self._scene.selectionChanged.connect(self._scene_selection_changed)
        document.chainChanged.connect(self.sync)
        document.selectionChanged.connect(self._doc_selection_changed)
        if analysis is not None:
            analysis.validated.connect(self.apply_validation)
            analysis.structureReady.connect(self.apply_structure)
        self.rebuild()

    # -- building and syncing --------------------------------------------------
    def rebuild(self) -> None:
        """Drop every item and draw the current chain from scratch."""
        self._press = None
        for item in list(self.states.values()) + list(self.arrows.values()):
            self._scene.removeItem(item)
        self.states.clear()
        self.arrows.clear()
        self._incident.clear()
        self._overview.replace_all({})
        chain = self.document.chain
        for s in chain.states:
            if s.id not in self.states:
                self._add_state_item(s)
        self.lines_only = len(chain.transitions) > MAX_DRAWN_ARROWS
        self._show_notice(chain)
        if self.lines_only:
            self._draw_lines(chain)
            return
        for t in chain.transitions:
            key = (t.source, t.target)
            if key not in self.arrows and t.source in self.states and t.target in self.states:
                self._add_arrow_item(t)
        for sid in self.states:
            self._arrange_node(sid)
        for key in self.arrows:
            self._layout_arrow(key)
        self._label_cells.clear()
        self._label_home.clear()
        self._place_labels(list(self.arrows))
        self._apply_report_marks()
        self._doc_selection_changed()
        self._scene.update()

    def _show_notice(self, chain: Chain) -> None:
        if not self.lines_only:
            self.notice.hide()
            return
        shown = ("they are shown as plain lines" if len(chain.transitions) <= MAX_DRAWN_LINES
                 else f"the {MAX_DRAWN_LINES:,} most probable are shown as plain lines")
        self.notice.setText(
            f"{len(chain.transitions):,} transitions, more than the {MAX_DRAWN_ARROWS:,} drawn as arrows: "
            f"{shown}. Read and edit every probability in the matrix grid.")
        self._place_legend()
        self.notice.show()

    def _draw_lines(self, chain: Chain) -> None:
        """States, and every transition between two of them as one plain line (one batch)."""
        pos = {sid: item.pos() for sid, item in self.states.items()}
        keys = [(t.source, t.target) for t in chain.transitions if t.source != t.target]
        if len(keys) > MAX_DRAWN_LINES:
            exact = chain._analysis[1]  # the parsed positive entries (also of an invalid chain)
            keys = heapq.nlargest(MAX_DRAWN_LINES, (k for k in keys if k in exact),
                                  key=lambda k: exact[k].numerator / exact[k].denominator)
        self._overview.replace_all({(a, b): (0, QLineF(pos[a], pos[b])) for a, b in keys
                                    if a in pos and b in pos})
        for sid in self.states:
            self._arrange_node(sid)
        self._apply_report_marks()
        self._doc_selection_changed()
        self._scene.update()

    def _add_state_item(self, s: State) -> StateItem:
        item = StateItem(self, s)
        item.set_style(self._styles.get(s.id, UNKNOWN_STYLE))
        self._scene.addItem(item)
        self.states[s.id] = item
        self._incident.setdefault(s.id, set())
        return item

    def _add_arrow_item(self, t: Transition) -> ArrowItem:
        item = ArrowItem(self, t)
        self._scene.addItem(item)
        key = item.key
        self.arrows[key] = item
        self._incident.setdefault(key[0], set()).add(key)
        self._incident.setdefault(key[1], set()).add(key)
        return item

    def _remove_arrow_item(self, key: tuple[str, str]) -> None:
        item = self.arrows.pop(key, None)
        if item is None:
            return
        self._unplace(key)
        self._overview_changed(item)
        self._scene.removeItem(item)
        for sid in key:
            inc = self._incident.get(sid)
            if inc is not None:
                inc.discard(key)

    _SIDES = (("below", math.pi / 2, math.radians(42)), ("above", -math.pi / 2, math.radians(42)),
              ("right", 0.0, math.radians(24)), ("left", math.pi, math.radians(24)))

    def _arrange_node(self, sid: str) -> None:
        """Choose the self-loop direction (widest gap between neighbours) and the name plate's side."""
        item = self.states.get(sid)
        if item is None:
            return
        c = item.pos()
        dirs = []
        for a, b in self._incident.get(sid, ()):
            other = b if a == sid else a
            if other == sid or other not in self.states:
                continue
            d = self.states[other].pos() - c
            if math.hypot(d.x(), d.y()) > 1e-6:
                ang = math.atan2(d.y(), d.x())
                if (b, a) in self.arrows:  # a curved pair leaves and enters off the straight line
                    ang += _CURVE_OFFSET if a == sid else -_CURVE_OFFSET
                dirs.append(ang)
        loop = (sid, sid) in self.arrows
        angle = -math.pi / 2
        if dirs:
            ds = sorted(dirs)
            gaps = [((ds[(k + 1) % len(ds)] - ds[k]) % (2 * math.pi) or 2 * math.pi, ds[k]) for k in range(len(ds))]
            width, start = max(gaps, key=lambda g: (round(g[0], 6), -abs(math.remainder(g[1] + g[0] / 2 + math.pi / 2, 2 * math.pi))))
            angle = math.remainder(start + width / 2, 2 * math.pi)
        item.loop_angle = angle
        occupied = list(dirs) + ([angle - 0.5, angle, angle + 0.5] if loop else [])
        best, best_hits = "below", math.inf
        for name, theta, half in self._SIDES:
            hits = sum(1 for d in occupied if abs(math.remainder(d - theta, 2 * math.pi)) < half)
            if hits < best_hits:
                best, best_hits = name, hits
            if hits == 0:
                break
        item.set_plate_side(best)

    # label placement: each label takes the first free spot along its arrow
    _CELL = 90.0
    _SPOTS = (0.5, 0.38, 0.62, 0.3, 0.7, 0.44, 0.56)

    def _cells_of(self, rect: QRectF) -> list[tuple[int, int]]:
        c = self._CELL
        return [(i, j) for i in range(math.floor(rect.left() / c), math.floor(rect.right() / c) + 1)
                for j in range(math.floor(rect.top() / c), math.floor(rect.bottom() / c) + 1)]

    def _unplace(self, key: tuple[str, str]) -> None:
        for cell in self._label_home.pop(key, ()):
            bucket = self._label_cells.get(cell)
            if bucket is not None:
                bucket.discard(key)
                if not bucket:
                    del self._label_cells[cell]

    def _label_free(self, key, rect: QRectF) -> bool:
        for cell in self._cells_of(rect):
            for other in self._label_cells.get(cell, ()):
                if other == key:
                    continue
                item = self.arrows.get(other)
                if item is not None and item.label_scene_rect().adjusted(-2, -2, 2, 2).intersects(rect):
                    return False
        r2 = (NODE_RADIUS + 4) ** 2
        for sid in (key[0], key[1]):
            c = self.states[sid].pos() if sid in self.states else None
            if c is not None:
                dx = max(rect.left() - c.x(), 0, c.x() - rect.right())
                dy = max(rect.top() - c.y(), 0, c.y() - rect.bottom())
                if dx * dx + dy * dy < r2:
                    return False
        return True

    def _place_labels(self, keys: Iterable[tuple[str, str]]) -> None:
        for key in keys:
            self._unplace(key)
        for key in keys:
            item = self.arrows.get(key)
            if item is None:
                continue
            if not item.is_loop:
                chosen = self._SPOTS[0]
                for t in self._SPOTS:
                    if self._label_free(key, item.label_rect_at(t)):
                        chosen = t
                        break
                item.set_label_t(chosen)
            cells = self._cells_of(item.label_scene_rect())
            self._label_home[key] = cells
            for cell in cells:
                self._label_cells.setdefault(cell, set()).add(key)

    def _layout_arrow(self, key: tuple[str, str]) -> None:
        item = self.arrows.get(key)
        if item is None:
            return
        a, b = key
        pa, pb = self.states[a].pos(), self.states[b].pos()
        curved = a != b and (b, a) in self.arrows
        angle = self.states[a].loop_angle if a == b else 0.0
        item.layout(pa, pb, curved=curved, loop_angle=angle)

    def sync(self, old: Chain, new: Chain) -> None:
        """Bring the scene from ``old`` to ``new``, touching only what changed."""
        if self._press is not None and self._press.get("mode") == "connect":
            self._end_connect(None)
        if self.lines_only or len(new.transitions) > MAX_DRAWN_ARROWS:
            self.rebuild()  # plain lines: redrawn whole (cheap), or leaving that mode
            return
        moved: set[str] = set()        # states whose position changed
        rewired: set[str] = set()      # states that gained or lost an arrow
        relayout: set[tuple[str, str]] = set()
        if old.states is not new.states:
            old_map = {s.id: s for s in old.states}
            new_map: dict[str, State] = {}
            for s in new.states:
                new_map.setdefault(s.id, s)
            for sid in list(self.states):
                if sid not in new_map:
                    for key in list(self._incident.get(sid, ())):
                        self._remove_arrow_item(key)
                        rewired.update(key)
                    self._scene.removeItem(self.states.pop(sid))
                    self._incident.pop(sid, None)
            for sid, s in new_map.items():
                item = self.states.get(sid)
                if item is None:
                    self._add_state_item(s)
                    moved.add(sid)
                    continue
                o = old_map.get(sid)
                if o is s:
                    continue
                if o is None or (o.x, o.y) != (s.x, s.y):
                    item.setPos(s.x or 0.0, s.y or 0.0)
                    moved.add(sid)
                item.set_name(s.display_name)
        changes = transition_changes(old, new)
        if changes is None:  # a big change: compare every pair
            new_t: dict[tuple[str, str], Transition] = {}
            for t in new.transitions:
                new_t.setdefault((t.source, t.target), t)
            changes = {k: None for k in self.arrows if k not in new_t}
            changes.update(new_t)
        for key, t in changes.items():
            item = self.arrows.get(key)
            if t is None or key[0] not in self.states or key[1] not in self.states:
                if item is not None:
                    self._remove_arrow_item(key)
                    relayout.add((key[1], key[0]))
                    rewired.update(key)
            elif item is None:
                self._add_arrow_item(t)
                relayout.add(key)
                relayout.add((key[1], key[0]))
                rewired.update(key)
            elif item.transition is not t:
                item.set_transition(t)
                relayout.add(key)
        # a moved state changes the direction its neighbours see it in; a rewired one only itself
        arrange: set[str] = set(rewired)
        for sid in moved:
            arrange.add(sid)
            for key in self._incident.get(sid, ()):
                relayout.add(key)
                if self.interacting:  # neighbours' loops and plates are tidied when the drag ends
                    self._deferred.update(key)
                else:
                    arrange.update(key)
        for sid in arrange:
            if sid in self.states:
                self._arrange_node(sid)
                if (sid, sid) in self.arrows:
                    relayout.add((sid, sid))
        for key in relayout:
            if key in self.arrows:
                self._layout_arrow(key)
        self._place_labels(relayout)
        if self._report is not None and self._report.chain is not new:
            self._apply_report_marks(only=moved)

    # -- analysis marks ------------------------------------------------------------
    def apply_validation(self, report) -> None:
        self._report = report
        self._apply_report_marks()

    def _apply_report_marks(self, only: Iterable[str] | None = None) -> None:
        report = self._report
        if report is None:
            return
        if only is not None:  # new items get the marks known so far
            for sid in only:
                item = self.states.get(sid)
                if item is not None:
                    item.set_problems(tuple(p.message for p in report.by_state.get(sid, ())),
                                      report.row_sums.get(sid))
            return
        for sid, item in self.states.items():
            item.set_problems(tuple(p.message for p in report.by_state.get(sid, ())), report.row_sums.get(sid))
        typed = {}
        moved: list[tuple[str, str]] = []
        for t in report.chain.transitions:
            typed.setdefault((t.source, t.target), t)
        for key, item in self.arrows.items():
            probs = tuple(p.message for p in report.by_transition.get(key, ()))
            same = typed.get(key) is item.transition
            if item.set_resolved(report.values.get(key) if same else None, probs if same else item.problems):
                self._layout_arrow(key)
                moved.append(key)
        self._place_labels(moved)

    def apply_structure(self, report) -> None:
        if report.structure is None:
            self._styles = {}
        else:
            self._styles = styles_from_structure(report.chain, report.structure)
        for sid, item in self.states.items():
            item.set_style(self._styles.get(sid, UNKNOWN_STYLE))

    def style_of(self, sid: str) -> NodeStyle:
        return self.states[sid].style

    # -- selection -------------------------------------------------------------------
    def _scene_selection_changed(self) -> None:
        if self._syncing_selection:
            return
        states, trans = [], []
        for it in self._scene.selectedItems():
            if isinstance(it, StateItem):
                states.append(it.sid)
            elif isinstance(it, ArrowItem):
                trans.append(it.key)
        self._syncing_selection = True
        try:
            self.document.set_selection(states, trans)
        finally:
            self._syncing_selection = False

    def _doc_selection_changed(self) -> None:
        if self._syncing_selection:
            return
        self._syncing_selection = True
        try:
            want_s = self.document.selected_states
            want_t = self.document.selected_transitions
            for sid, item in self.states.items():
                sel = sid in want_s
                if item.isSelected() != sel:
                    item.setSelected(sel)
            for key, item in self.arrows.items():
                sel = key in want_t
                if item.isSelected() != sel:
                    item.setSelected(sel)
        finally:
            self._syncing_selection = False

    def reveal_selection(self) -> None:
        """Scroll so the selected states and arrows are in view (for panels that select)."""
        rect = QRectF()
        for it in self._scene.selectedItems():
            rect = rect.united(it.mapRectToScene(it.boundingRect()))
        if not rect.isNull():
            self.ensureVisible(rect, 40, 40)

    def select_only(self, item: QGraphicsItem | None) -> None:
        self._scene.clearSelection()
        if item is not None:
            item.setSelected(True)

    # -- editing helpers ---------------------------------------------------------------
    def add_state_at(self, scene_pos: QPointF, *, edit: bool = True) -> str:
        sid = self.document.add_state(scene_pos.x(), scene_pos.y())
        self.select_only(self.states.get(sid))
        if edit:
            self.edit_state_name(sid)
        return sid

    def edit_state_name(self, sid: str) -> None:
        item = self.states[sid]
        state = self.document.chain.state(sid)
        uses_label = bool(state.label)

        def commit(text: str) -> str | None:
            text = text.strip()
            if sid not in self.document.chain.index:
                return None
            try:
                if uses_label:
                    self.document.set_label(sid, text)
                else:
                    self.document.rename_state(sid, text)
            except ValueError as exc:
                return str(exc)
            return None

        pos = item.mapToScene(item._label_rect.center())
        self.editor.open(pos, state.display_name, commit,
                         hint="name of the state" if not uses_label else "label of the state")

    def edit_probability(self, key: tuple[str, str]) -> None:
        item = self.arrows[key]
        t = item.transition
        a, b = key

        def commit(text: str) -> str | None:
            try:
                p = probability_text(text)
            except ValueError as exc:
                return f"P({a} → {b}): {exc}"
            if (a, b) not in self.arrows and p is None:
                return None
            self.document.set_transition(a, b, p)
            return None

        shown = t.p if isinstance(t.p, str) else repr(t.p) if isinstance(t.p, float) else str(t.p)
        self.editor.open(item.label_scene_rect().center(), shown, commit,
                         hint="0.3, 1/3, 2.5e-11, 5% or rest; empty removes")

    def connect_states(self, a: str, b: str, *, edit: bool = True) -> None:
        if self.document.chain.transition(a, b) is None:
            self.document.set_transition(a, b, self.document.default_probability(a))
        item = self.arrows.get((a, b))
        self.select_only(item)
        if edit and item is not None:
            self.edit_probability((a, b))

    def delete_selection(self) -> None:
        doc = self.document
        if doc.selected_states or doc.selected_transitions:
            doc.delete(sorted(doc.selected_states, key=doc.chain.ids.index), sorted(doc.selected_transitions))

    def edit_selected(self) -> None:
        sel = self._scene.selectedItems()
        if len(sel) != 1:
            return
        it = sel[0]
        if isinstance(it, StateItem):
            self.edit_state_name(it.sid)
        elif isinstance(it, ArrowItem):
            self.edit_probability(it.key)

    # -- view helpers ----------------------------------------------------------------------
    @property
    def zoom(self) -> float:
        return self.transform().m11()

    def set_zoom(self, z: float) -> None:
        z = min(max(z, MIN_ZOOM), MAX_ZOOM)
        cur = self.zoom
        if abs(z - cur) > 1e-9:
            self.scale(z / cur, z / cur)
            self._sync_lod()
            self.zoomChanged.emit(self.zoom)

    def reset_view(self) -> None:
        """100 % zoom, centred on the origin."""
        self.resetTransform()
        self.centerOn(0, 0)
        self._sync_lod()
        self.zoomChanged.emit(self.zoom)

    def zoom_by(self, factor: float) -> None:
        self.set_zoom(self.zoom * factor)

    def items_rect(self) -> QRectF:
        rect = QRectF()
        for item in itertools.chain(self.states.values(), self.arrows.values()):
            rect = rect.united(item.mapRectToScene(item.boundingRect()))
        return rect

    def fit_to_view(self) -> None:
        rect = self.items_rect()
        if rect.isNull():
            self.reset_view()
            return
        else:
            rect = rect.adjusted(-30, -30, 30, 30)
            self._grow_scene_rect(rect)
            vp = self.viewport().rect()
            reserve = self.legend.height() + 14 if self.legend.isVisible() else 0
            avail_h = max(60, vp.height() - reserve)
            z = min(vp.width() / rect.width(), avail_h / rect.height(), 1.6)
            z = min(max(z, MIN_ZOOM), MAX_ZOOM)
            self.resetTransform()
            self.scale(z, z)
            # centre the chain in the part of the view above the legend
            self.centerOn(rect.center() + QPointF(0, reserve / 2 / z))
        self._sync_lod()
        self.zoomChanged.emit(self.zoom)

    def _grow_scene_rect(self, rect: QRectF) -> None:
        sr = self.sceneRect()
        if not sr.contains(rect):
            self.setSceneRect(sr.united(rect.adjusted(-1000, -1000, 1000, 1000)))

    def state_at(self, view_pos) -> StateItem | None:
        for it in self.items(view_pos):
            if isinstance(it, StateItem):
                return it
        return None

    def arrow_at(self, view_pos) -> ArrowItem | None:
        for it in self.items(view_pos):
            if isinstance(it, ArrowItem):
                return it
            if isinstance(it, StateItem):
                return None
        return None

    def hover_state(self, item: StateItem | None, scene_pos: QPointF) -> None:
        if self._press is not None:
            return
        if item is None:
            self.viewport().unsetCursor()
            hint = ""
        elif item.on_rim(scene_pos):
            self.viewport().setCursor(Qt.CursorShape.CrossCursor)
            hint = "Drag from the rim to another state (or back to this one) to draw a transition"
        else:
            self.viewport().setCursor(Qt.CursorShape.OpenHandCursor)
            hint = "Drag to move · double-click to rename · Shift-drag to draw a transition"
        if hint != self._hover_hint:
            self._hover_hint = hint
            if hint:
                self.message.emit(hint)

    # -- events ---------------------------------------------------------------------------
    def mousePressEvent(self, event) -> None:  # noqa: N802
        if self.editor.active:
            self.editor.accept() or self.editor.cancel()
        pos = event.position().toPoint()
        sp = self.mapToScene(pos)
        if event.button() == Qt.MouseButton.MiddleButton or (
                event.button() == Qt.MouseButton.LeftButton and self._space):
            self._press = {"mode": "pan", "last": event.position()}
            self.viewport().setCursor(Qt.CursorShape.ClosedHandCursor)
            event.accept()
            return
        if event.button() != Qt.MouseButton.LeftButton:
            super().mousePressEvent(event)
            return
        additive = bool(event.modifiers() & (Qt.KeyboardModifier.ControlModifier | Qt.KeyboardModifier.MetaModifier))
        state = self.state_at(pos)
        if state is not None:
            if (event.modifiers() & Qt.KeyboardModifier.ShiftModifier) or state.on_rim(sp):
                self._begin_connect(state, sp)
            else:
                if additive:
                    state.setSelected(not state.isSelected())
                elif not state.isSelected():
                    self.select_only(state)
                moving = [sid for sid in self.document.selected_states if sid in self.states]
                if state.sid not in moving:
                    moving = [state.sid]
                self._press = {
                    "mode": "move", "start": sp, "token": ("move", next(_drag_tokens)),
                    "origin": {sid: QPointF(self.states[sid].pos()) for sid in moving},
                }
                if len(self.arrows) > 300:  # quick drawing while a big chain moves
                    self._begin_interaction()
                self.viewport().setCursor(Qt.CursorShape.ClosedHandCursor)
            event.accept()
            return
        arrow = self.arrow_at(pos)
        if arrow is not None:
            if additive:
                arrow.setSelected(not arrow.isSelected())
            else:
                self.select_only(arrow)
            event.accept()
            return
        super().mousePressEvent(event)  # rubber band on empty space

    def mouseMoveEvent(self, event) -> None:  # noqa: N802
        press = self._press
        if press is None:
            super().mouseMoveEvent(event)
            return
        mode = press["mode"]
        if mode == "pan":
            d = event.position() - press["last"]
            press["last"] = event.position()
            self.horizontalScrollBar().setValue(self.horizontalScrollBar().value() - int(d.x()))
            self.verticalScrollBar().setValue(self.verticalScrollBar().value() - int(d.y()))
        elif mode == "move":
            sp = self.mapToScene(event.position().toPoint())
            d = sp - press["start"]
            if abs(d.x()) + abs(d.y()) < 0.5:
                return
            self.document.move_states(
                {sid: (p.x() + d.x(), p.y() + d.y()) for sid, p in press["origin"].items()},
                merge=press["token"])
        elif mode == "connect":
            sp = self.mapToScene(event.position().toPoint())
            target = self.state_at(event.position().toPoint())
            self._set_connect_target(target)
            start = self.states[press["source"]].pos()
            end = target.pos() if target is not None else sp
            if self._rubber is not None:
                self._rubber.setLine(start.x(), start.y(), end.x(), end.y())
        event.accept()

    def mouseReleaseEvent(self, event) -> None:  # noqa: N802
        press = self._press
        if press is None:
            super().mouseReleaseEvent(event)
            return
        mode = press["mode"]
        if mode == "connect":
            target = self.state_at(event.position().toPoint())
            self._end_connect(target)
        else:
            self._press = None
        if self.interacting:
            self._end_interaction()
        self.viewport().unsetCursor()
        event.accept()

    def _begin_connect(self, state: StateItem, sp: QPointF) -> None:
        self._press = {"mode": "connect", "source": state.sid, "target": None}
        line = QGraphicsLineItem(state.pos().x(), state.pos().y(), sp.x(), sp.y())
        pen = QPen(pal.OKABE_ITO["bluish_green"], 2.0, Qt.PenStyle.DashLine)
        line.setPen(pen)
        line.setZValue(20)
        self._scene.addItem(line)
        self._rubber = line
        self.viewport().setCursor(Qt.CursorShape.CrossCursor)
        self.message.emit(f"Release on a state to draw a transition from ‘{state.sid}’ (on itself for a self-loop)")

    def _set_connect_target(self, target: StateItem | None) -> None:
        press = self._press
        old = press.get("target")
        if old is not target:
            if old is not None and old.scene() is self._scene:
                old.hover_target = False
                old.update()
            if target is not None:
                target.hover_target = True
                target.update()
            press["target"] = target

    def _end_connect(self, target: StateItem | None) -> None:
        press = self._press
        self._press = None
        if press is None:
            return
        old = press.get("target")
        if old is not None and old.scene() is self._scene:
            old.hover_target = False
            old.update()
        if self._rubber is not None:
            self._scene.removeItem(self._rubber)
            self._rubber = None
        if target is not None and press["source"] in self.states:
            self.connect_states(press["source"], target.sid)

    def mouseDoubleClickEvent(self, event) -> None:  # noqa: N802
        if event.button() != Qt.MouseButton.LeftButton:
            super().mouseDoubleClickEvent(event)
            return
        self._press = None
        pos = event.position().toPoint()
        state = self.state_at(pos)
        if state is not None:
            self.select_only(state)
            self.edit_state_name(state.sid)
        else:
            arrow = self.arrow_at(pos)
            if arrow is not None:
                self.select_only(arrow)
                self.edit_probability(arrow.key)
            else:
                self.add_state_at(self.mapToScene(pos))
        event.accept()

    def keyPressEvent(self, event) -> None:  # noqa: N802
        key = event.key()
        if key in (Qt.Key.Key_Delete, Qt.Key.Key_Backspace) or event.matches(QKeySequence.StandardKey.Delete):
            self.delete_selection()
            event.accept()
            return
        if key == Qt.Key.Key_F2 or key in (Qt.Key.Key_Return, Qt.Key.Key_Enter):
            self.edit_selected()
            event.accept()
            return
        if key == Qt.Key.Key_Escape:
            if self._press is not None and self._press.get("mode") == "connect":
                self._end_connect(None)
            else:
                self._scene.clearSelection()
            event.accept()
            return
        if key == Qt.Key.Key_Space and not event.isAutoRepeat():
            self._space = True
            self.viewport().setCursor(Qt.CursorShape.OpenHandCursor)
            event.accept()
            return
        if event.matches(QKeySequence.StandardKey.ZoomIn) or key == Qt.Key.Key_Plus:
            self.zoom_by(1.25)
            return
        if event.matches(QKeySequence.StandardKey.ZoomOut) or key == Qt.Key.Key_Minus:
            self.zoom_by(0.8)
            return
        super().keyPressEvent(event)

    def keyReleaseEvent(self, event) -> None:  # noqa: N802
        if event.key() == Qt.Key.Key_Space and not event.isAutoRepeat():
            self._space = False
            self.viewport().unsetCursor()
        super().keyReleaseEvent(event)

    def wheelEvent(self, event) -> None:  # noqa: N802
        dy = event.angleDelta().y() or event.angleDelta().x()
        if dy == 0:
            event.ignore()
            return
        self.zoom_by(math.pow(1.0015, dy))
        event.accept()

    def viewportEvent(self, event) -> bool:  # noqa: N802
        et = event.type()
        if et == QEvent.Type.Gesture:
            pinch = event.gesture(Qt.GestureType.PinchGesture)
            if pinch is not None:
                f = pinch.scaleFactor()
                if f > 0:
                    self.zoom_by(f)
                event.accept()
                return True
        elif et == QEvent.Type.NativeGesture:
            if event.gestureType() == Qt.NativeGestureType.ZoomNativeGesture:
                self.zoom_by(1.0 + event.value())
                return True
        return super().viewportEvent(event)

    def resizeEvent(self, event) -> None:  # noqa: N802
        super().resizeEvent(event)
        self._place_legend()

    def _place_legend(self) -> None:
        vp = self.viewport().geometry()
        self.legend.move(vp.left() + 10, vp.bottom() - self.legend.height() - 10)
        if self.notice.isVisible() or self.lines_only:
            w = max(200, min(560, vp.width() - 20))
            text = self.notice.fontMetrics().boundingRect(QRect(0, 0, w - 16, 10000), Qt.TextFlag.TextWordWrap,
                                                          self.notice.text())
            self.notice.setFixedSize(w, text.height() + 16)  # padding 6 and border 1, each side
            self.notice.move(vp.left() + 10, vp.top() + 10)

    def _begin_interaction(self) -> None:
        """Big chain being dragged: aliased drawing, no arrow labels, neighbours tidied at the end."""
        self.interacting = True
        self.setRenderHint(QPainter.RenderHint.Antialiasing, False)

    def _end_interaction(self) -> None:
        self.interacting = False
        self.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        pending, self._deferred = self._deferred, set()
        relayout = set()
        for sid in pending:
            if sid in self.states:
                self._arrange_node(sid)
                if (sid, sid) in self.arrows:
                    relayout.add((sid, sid))
        for key in relayout:
            self._layout_arrow(key)
        self._place_labels(relayout)
        self.viewport().update()  # full quality again

    @property
    def smooth(self) -> bool:
        """Antialiased arrows: close enough to see the difference, and not in the middle of a drag."""
        return self.lod >= SMOOTH_LOD and not self.interacting

    def _overview_changed(self, item: "ArrowItem | None" = None) -> None:
        ov = getattr(self, "_overview", None)
        if ov is None:
            return
        if item is not None:
            gone = self.arrows.get(item.key) is not item
            kind = 2 if item.problems else 1 if item._rare else 0
            ov.set_line(item.key, kind, None if gone else item.overview_line)
        else:
            ov.invalidate()
        if self.lod < OVERVIEW_LOD:
            if item is not None and item.overview_line is not None:
                ov.update(QRectF(item.overview_line.p1(), item.overview_line.p2()).normalized().adjusted(-2, -2, 2, 2))
            elif item is None:
                ov.update()

    def _sync_lod(self) -> None:
        """Follow the zoom: arrows become one batch of lines far out, items again closer in."""
        lod = self.transform().m11()
        was_far = self.lod < OVERVIEW_LOD
        self.lod = lod
        far = lod < OVERVIEW_LOD
        if far != was_far:
            for item in self.arrows.values():
                item.setVisible(not far)
            self._overview.update()

    def drawBackground(self, painter: QPainter, rect: QRectF) -> None:  # noqa: N802
        if abs(self.transform().m11() - self.lod) > 1e-12:
            self._sync_lod()
        painter.fillRect(rect, pal.CANVAS)
        z = self.lod
        if z < 0.35:
            return
        # a dotted grid every 40 scene units, as a texture in device pixels (cached per zoom)
        if self._bg_cache is None or abs(self._bg_cache[0] - z) > 1e-9:
            step = max(4, round(40.0 * z))
            pm = QPixmap(step, step)
            pm.fill(pal.CANVAS)
            p = QPainter(pm)
            p.setRenderHint(QPainter.RenderHint.Antialiasing)
            p.setPen(Qt.PenStyle.NoPen)
            p.setBrush(pal.GRID_DOT)
            p.drawEllipse(QPointF(0.0, 0.0), 1.1, 1.1)
            p.drawEllipse(QPointF(step, 0.0), 1.1, 1.1)
            p.drawEllipse(QPointF(0.0, step), 1.1, 1.1)
            p.drawEllipse(QPointF(step, step), 1.1, 1.1)
            p.end()
            brush = QBrush(pm)
            brush.setTransform(QTransform.fromScale(40.0 / step, 40.0 / step))
            self._bg_cache = (z, brush)
        painter.fillRect(rect, self._bg_cache[1])

    def drawForeground(self, painter: QPainter, rect: QRectF) -> None:  # noqa: N802
        if self.states:
            return
        painter.save()
        painter.resetTransform()
        vr = self.viewport().rect()
        painter.setPen(pal.INK_SOFT)
        painter.setFont(pal.ui_font(2.0))
        painter.drawText(vr, Qt.AlignmentFlag.AlignCenter,
                         "Double-click anywhere to add a state\n"
                         "then drag from its rim to another state to draw a transition")
        painter.restore()


class Legend(QWidget):
    """A small key to the canvas's visual language, floating in a corner."""

    ROW = 22

    def __init__(self, canvas: ChainCanvas):
        super().__init__(canvas)
        self.canvas = canvas
        self.setObjectName("canvasLegend")
        self.setAttribute(Qt.WidgetAttribute.WA_TransparentForMouseEvents, True)
        self._rows = (
            ("closed", "closed class (C1, C2, …: own colour, solid rim)"),
            ("absorbing", "absorbing state (double rim)"),
            ("transient", "transient state (T, dashed rim)"),
            ("problem", "problem in the row (! badge; hover for why)"),
            ("wide", "arrow width: log of the probability"),
            ("rare", f"rare transition (p < {canvas.rare_below:g}, dashed)"),
        )
        fm = QFontMetricsF(canvas.label_font)
        self._col = max(fm.horizontalAdvance(t) for _, t in self._rows) + 52
        rows = (len(self._rows) + 1) // 2
        self.resize(int(2 * self._col + 8), self.ROW * rows + 10)

    def paintEvent(self, event) -> None:  # noqa: N802
        p = QPainter(self)
        p.setRenderHint(QPainter.RenderHint.Antialiasing)
        p.setPen(QPen(QColor(0, 0, 0, 30), 1))
        p.setBrush(QColor(255, 255, 255, 230))
        p.drawRoundedRect(QRectF(self.rect()).adjusted(0.5, 0.5, -0.5, -0.5), 6, 6)
        p.setFont(self.canvas.label_font)
        blue = pal.class_colour(0)
        green = pal.class_colour(1)
        half = (len(self._rows) + 1) // 2
        for k, (kind, text) in enumerate(self._rows):
            col, row = divmod(k, half)
            p.save()
            p.translate(col * self._col, 0)
            self._paint_row(p, kind, text, 5 + self.ROW * row + self.ROW / 2, blue, green)
            p.restore()
        p.end()

    def _paint_row(self, p: QPainter, kind: str, text: str, cy: float, blue: QColor, green: QColor) -> None:
        if True:
            c = QPointF(20, cy)
            r = 7.0
            if kind in ("closed", "absorbing", "transient", "problem"):
                if kind == "closed":
                    p.setPen(QPen(blue, 1.8))
                    p.setBrush(pal.tint(blue, 0.72))
                elif kind == "absorbing":
                    p.setPen(QPen(green, 1.8))
                    p.setBrush(pal.tint(green, 0.72))
                elif kind == "transient":
                    pen = QPen(pal.TRANSIENT, 1.8)
                    pen.setStyle(Qt.PenStyle.CustomDashLine)
                    pen.setDashPattern([2.0, 1.6])
                    p.setPen(pen)
                    p.setBrush(pal.PAPER)
                else:
                    p.setPen(QPen(pal.PROBLEM, 1.8))
                    p.setBrush(QColor("#FBFBFA"))
                p.drawEllipse(c, r, r)
                if kind == "absorbing":
                    p.setBrush(Qt.BrushStyle.NoBrush)
                    p.setPen(QPen(green, 1.0))
                    p.drawEllipse(c, r - 3, r - 3)
                if kind == "problem":
                    p.setPen(Qt.PenStyle.NoPen)
                    p.setBrush(pal.PROBLEM)
                    p.drawEllipse(QPointF(c.x() + 6, c.y() - 5), 4.5, 4.5)
            elif kind == "wide":
                for j, w in enumerate((0.9, 2.2, 4.5)):
                    p.setPen(QPen(pal.INK, w))
                    y = cy - 5 + 5 * j
                    p.drawLine(QPointF(8, y), QPointF(32, y))
            else:
                pen = QPen(pal.INK, 1.0)
                pen.setStyle(Qt.PenStyle.CustomDashLine)
                pen.setDashPattern([4.0, 3.0])
                p.setPen(pen)
                p.drawLine(QPointF(8, cy), QPointF(32, cy))
            p.setPen(pal.INK)
            p.drawText(QRectF(42, cy - self.ROW / 2, self._col - 44, self.ROW),
                       Qt.AlignmentFlag.AlignVCenter | Qt.AlignmentFlag.AlignLeft, text)
