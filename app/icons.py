"""Longrun's own toolbar icons, drawn with QPainter (no image files)."""
from __future__ import annotations

import math
from functools import lru_cache

from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import QColor, QIcon, QPainter, QPainterPath, QPen, QPixmap, QPolygonF

from . import palette as pal

__all__ = ["icon"]

_SIZE = 64


def _pen(w: float = 4.5, colour: QColor | None = None) -> QPen:
    p = QPen(colour or pal.INK, w)
    p.setCapStyle(Qt.PenCapStyle.RoundCap)
    p.setJoinStyle(Qt.PenJoinStyle.RoundJoin)
    return p


def _arrow_head(p: QPainter, tip: QPointF, angle: float, size: float = 11.0) -> None:
    a1, a2 = angle + math.pi * 0.8, angle - math.pi * 0.8
    poly = QPolygonF([tip, tip + QPointF(size * math.cos(a1), size * math.sin(a1)),
                      tip + QPointF(size * math.cos(a2), size * math.sin(a2))])
    p.setBrush(p.pen().color())
    p.drawPolygon(poly)


def _draw(kind: str, p: QPainter) -> None:
    blue = pal.OKABE_ITO["blue"]
    green = pal.OKABE_ITO["bluish_green"]
    if kind == "new":
        p.setPen(_pen())
        p.setBrush(pal.PAPER)
        p.drawRoundedRect(QRectF(14, 8, 36, 48), 4, 4)
        p.setPen(_pen(5, green))
        p.drawLine(QPointF(32, 22), QPointF(32, 42))
        p.drawLine(QPointF(22, 32), QPointF(42, 32))
    elif kind == "open":
        p.setPen(_pen())
        p.setBrush(pal.tint(pal.OKABE_ITO["orange"], 0.55))
        path = QPainterPath(QPointF(8, 16))
        path.lineTo(26, 16)
        path.lineTo(31, 22)
        path.lineTo(56, 22)
        path.lineTo(56, 52)
        path.lineTo(8, 52)
        path.closeSubpath()
        p.drawPath(path)
    elif kind == "save":
        p.setPen(_pen())
        p.setBrush(pal.PAPER)
        p.drawRoundedRect(QRectF(10, 10, 44, 44), 5, 5)
        p.setPen(_pen(5, blue))
        p.drawLine(QPointF(32, 18), QPointF(32, 38))
        _arrow_head(p, QPointF(32, 44), math.pi / 2, 12)
    elif kind in ("undo", "redo"):
        p.setPen(_pen(5))
        p.setBrush(Qt.BrushStyle.NoBrush)
        path = QPainterPath(QPointF(18, 26))
        path.cubicTo(QPointF(30, 12), QPointF(54, 18), QPointF(50, 38))
        path.cubicTo(QPointF(47, 50), QPointF(36, 52), QPointF(28, 50))
        if kind == "redo":
            p.translate(64, 0)
            p.scale(-1, 1)
        p.drawPath(path)
        _arrow_head(p, QPointF(14, 30), math.pi * 0.82, 13)
    elif kind == "add":
        p.setPen(_pen(4, blue))
        p.setBrush(pal.tint(blue, 0.75))
        p.drawEllipse(QPointF(32, 32), 22, 22)
        p.setPen(_pen(5, blue))
        p.drawLine(QPointF(32, 21), QPointF(32, 43))
        p.drawLine(QPointF(21, 32), QPointF(43, 32))
    elif kind == "delete":
        p.setPen(_pen(4, pal.PROBLEM))
        p.setBrush(pal.tint(pal.PROBLEM, 0.8))
        p.drawEllipse(QPointF(32, 32), 22, 22)
        p.setPen(_pen(5, pal.PROBLEM))
        p.drawLine(QPointF(24, 24), QPointF(40, 40))
        p.drawLine(QPointF(40, 24), QPointF(24, 40))
    elif kind == "fit":
        p.setPen(_pen(5))
        for sx, sy in ((1, 1), (-1, 1), (1, -1), (-1, -1)):
            cx, cy = 32 - sx * 20, 32 - sy * 20
            p.drawLine(QPointF(cx, cy), QPointF(cx + sx * 10, cy))
            p.drawLine(QPointF(cx, cy), QPointF(cx, cy + sy * 10))
        p.setPen(_pen(3, blue))
        p.setBrush(pal.tint(blue, 0.7))
        p.drawEllipse(QPointF(32, 32), 8, 8)
    elif kind == "arrange":
        pts = [QPointF(16, 46), QPointF(32, 16), QPointF(48, 46)]
        p.setPen(_pen(3.5))
        for a, b in ((0, 1), (1, 2), (2, 0)):
            p.drawLine(pts[a], pts[b])
        p.setBrush(pal.tint(green, 0.6))
        p.setPen(_pen(3.5, green))
        for q in pts:
            p.drawEllipse(q, 8, 8)
    elif kind == "app":
        p.setBrush(pal.tint(blue, 0.7))
        p.setPen(_pen(4, blue))
        p.drawEllipse(QPointF(20, 40), 12, 12)
        p.setBrush(pal.tint(green, 0.6))
        p.setPen(_pen(4, green))
        p.drawEllipse(QPointF(46, 22), 12, 12)
        p.setPen(_pen(4))
        p.drawLine(QPointF(30, 33), QPointF(36, 29))
        _arrow_head(p, QPointF(36, 29), -0.6, 8)


@lru_cache(maxsize=None)
def icon(kind: str) -> QIcon:
    """A QIcon of the given kind (new, open, save, undo, redo, add, delete, fit, arrange, app)."""
    ic = QIcon()
    for size in (16, 24, 32, 48, 64):
        pm = QPixmap(size, size)
        pm.fill(QColor(0, 0, 0, 0))
        p = QPainter(pm)
        p.setRenderHint(QPainter.RenderHint.Antialiasing)
        p.scale(size / _SIZE, size / _SIZE)
        _draw(kind, p)
        p.end()
        ic.addPixmap(pm)
    return ic
