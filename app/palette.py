"""Longrun's visual language: colours, pens and the non-colour cues.

Colours come from the Okabe-Ito set (Okabe & Ito, "Color Universal Design",
2008), chosen to stay distinguishable under the common colour-vision
deficiencies.  Colour never carries meaning alone:

* a **closed class** is drawn with a solid outline, a tinted fill and a class
  tag inside the node (``C1``, ``C2``, ...); an absorbing state (a closed class
  of one state) gets a double outline;
* a **transient** state has a dashed outline, a white fill and the tag ``T``;
* a state or transition with a **problem** gets a vermillion mark *and* an
  exclamation badge;
* a **rare** transition (probability below a threshold) is dashed, its label in
  italics; arrow width follows log10(p), so 1e-10 still shows as a hairline.
"""
from __future__ import annotations

import math

from PySide6.QtGui import QColor, QFont, QGuiApplication, QPalette

__all__ = [
    "OKABE_ITO",
    "CLASS_COLOURS",
    "INK",
    "INK_SOFT",
    "PAPER",
    "CANVAS",
    "PROBLEM",
    "SELECT",
    "TRANSIENT",
    "UNKNOWN",
    "class_colour",
    "tint",
    "arrow_width",
    "P_FLOOR",
    "app_palette",
    "ui_font",
]

OKABE_ITO = {
    "black": QColor("#000000"),
    "orange": QColor("#E69F00"),
    "sky_blue": QColor("#56B4E9"),
    "bluish_green": QColor("#009E73"),
    "yellow": QColor("#F0E442"),
    "blue": QColor("#0072B2"),
    "vermillion": QColor("#D55E00"),
    "reddish_purple": QColor("#CC79A7"),
}

#: Closed classes take these in turn (vermillion is kept for problems).
CLASS_COLOURS = tuple(
    OKABE_ITO[k] for k in ("blue", "bluish_green", "reddish_purple", "orange", "sky_blue", "yellow")
)

INK = QColor("#2B3640")          # text and arrows
INK_SOFT = QColor("#5D6B78")     # secondary text
PAPER = QColor("#FFFFFF")
CANVAS = QColor("#F6F5F1")       # canvas background, warm and calm
GRID_DOT = QColor("#DAD7CE")
PROBLEM = OKABE_ITO["vermillion"]
SELECT = QColor(0, 114, 178, 90)  # translucent blue halo
TRANSIENT = QColor("#6F7B85")
UNKNOWN = QColor("#9AA3AB")

#: Smallest probability given its own width; anything smaller is drawn at it.
P_FLOOR = 1e-12


def class_colour(k: int) -> QColor:
    """Colour of the k-th closed class (0-based), cycling through :data:`CLASS_COLOURS`."""
    return QColor(CLASS_COLOURS[k % len(CLASS_COLOURS)])


def tint(colour: QColor, amount: float = 0.78) -> QColor:
    """``colour`` mixed with white (``amount`` = share of white)."""
    r, g, b = colour.redF(), colour.greenF(), colour.blueF()
    return QColor.fromRgbF(r + (1 - r) * amount, g + (1 - g) * amount, b + (1 - b) * amount)


def arrow_width(p: float | None, *, thinnest: float = 0.8, widest: float = 5.0) -> float:
    """Pen width for a transition of probability ``p`` (log scale, 1e-12 .. 1).

    ``None`` (not known yet, or invalid) gives a middle width.
    """
    if p is None or not math.isfinite(p) or p <= 0:
        return (thinnest + widest) / 3
    lo = math.log10(P_FLOOR)
    x = (math.log10(max(min(p, 1.0), P_FLOOR)) - lo) / -lo
    return thinnest + (widest - thinnest) * x ** 3


def ui_font(point_delta: float = 0.0, *, bold: bool = False, italic: bool = False) -> QFont:
    f = QFont(QGuiApplication.font())
    if point_delta:
        f.setPointSizeF(max(6.0, f.pointSizeF() + point_delta))
    f.setBold(bold)
    f.setItalic(italic)
    return f


def app_palette() -> QPalette:
    """A calm light palette for the whole application."""
    pal = QPalette()
    base = QColor("#FFFFFF")
    window = QColor("#EEF0F2")
    text = INK
    pal.setColor(QPalette.ColorRole.Window, window)
    pal.setColor(QPalette.ColorRole.WindowText, text)
    pal.setColor(QPalette.ColorRole.Base, base)
    pal.setColor(QPalette.ColorRole.AlternateBase, QColor("#F5F6F7"))
    pal.setColor(QPalette.ColorRole.Text, text)
    pal.setColor(QPalette.ColorRole.Button, QColor("#F4F5F6"))
    pal.setColor(QPalette.ColorRole.ButtonText, text)
    pal.setColor(QPalette.ColorRole.ToolTipBase, QColor("#FFFDF5"))
    pal.setColor(QPalette.ColorRole.ToolTipText, text)
    pal.setColor(QPalette.ColorRole.Highlight, QColor("#2F6F9F"))
    pal.setColor(QPalette.ColorRole.HighlightedText, QColor("#FFFFFF"))
    pal.setColor(QPalette.ColorRole.PlaceholderText, INK_SOFT)
    pal.setColor(QPalette.ColorRole.Link, OKABE_ITO["blue"])
    for role in (QPalette.ColorRole.Text, QPalette.ColorRole.WindowText, QPalette.ColorRole.ButtonText):
        pal.setColor(QPalette.ColorGroup.Disabled, role, QColor("#A0A7AE"))
    return pal
