"""The dock registry: how a panel plugs into the main window.

A panel module exposes ``PANELS``, a list of :class:`PanelSpec`.  The window
imports every module in :data:`PANEL_MODULES`, calls each spec's ``factory``
with the :class:`Workspace` and puts the widget in a dock (listed in the View
menu, its place remembered between sessions).  A panel widget:

* reads ``workspace.document.chain`` and listens to
  ``workspace.document.chainChanged`` / ``changed`` / ``selectionChanged``;
* edits only through the document's edit methods (so every edit is undoable);
* gets validation and classes from ``workspace.analysis`` (``validated``,
  ``structureReady``) and adds heavier work with
  ``workspace.analysis.register(name, fn)`` + ``resultReady``;
* may define ``shutdown()``: the window calls it before closing (stop
  threads and timers there).

To add a panel, write the module and add its name to :data:`PANEL_MODULES`.
"""
from __future__ import annotations

import importlib
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QFormLayout, QFrame, QLabel, QScrollArea, QVBoxLayout, QWidget

if TYPE_CHECKING:  # pragma: no cover
    from .analysis_service import AnalysisService
    from .document import Document
    from .settings import Settings

__all__ = ["PanelSpec", "Workspace", "PANEL_MODULES", "panel_specs"]

#: Modules that define ``PANELS`` (in the order their docks are created).
PANEL_MODULES: tuple[str, ...] = ("app.grid", "app.checks", "app.longrun_panel", "app.simulation_panel",
                                   "app.plan_form", "app.findings_pane")


@dataclass
class Workspace:
    """What a panel gets: the document and the services around it."""

    document: "Document"
    analysis: "AnalysisService"
    settings: "Settings"
    window: QWidget | None = None
    status: Callable[[str], None] = field(default=lambda text: None)
    canvas: QWidget | None = None


@dataclass(frozen=True)
class PanelSpec:
    """A dockable panel.

    Attributes
    ----------
    key : str
        Stable name (the dock's object name, used to remember its place).
    title : str
        Shown on the dock and in the View menu.
    factory : callable
        ``factory(workspace) -> QWidget``.
    area : Qt.DockWidgetArea
        Where it docks the first time.
    visible : bool
        Shown the first time.
    tab_with : str, optional
        Key of a panel to share a tabbed dock area with.
    beside : str, optional
        Key of a panel to split the dock area with (side by side).
    shortcut : str, optional
        Key sequence that shows and focuses the panel.
    """

    key: str
    title: str
    factory: Callable[[Workspace], QWidget]
    area: Qt.DockWidgetArea = Qt.DockWidgetArea.RightDockWidgetArea
    visible: bool = True
    tab_with: str | None = None
    beside: str | None = None
    shortcut: str | None = None


def panel_specs(modules: tuple[str, ...] | None = None) -> list[PanelSpec]:
    """Every panel of the listed modules (default :data:`PANEL_MODULES`)."""
    specs: list[PanelSpec] = []
    for name in PANEL_MODULES if modules is None else modules:
        mod = importlib.import_module(name)
        specs.extend(getattr(mod, "PANELS", ()))
    return specs


def fact_rows(items, *, prefix: str, vertical_spacing: int = 4) -> tuple[QFormLayout, dict[str, QLabel]]:
    """A right-aligned form of read-only facts: one selectable, word-wrapped label per
    ``(key, caption)`` in ``items``, named ``f"{prefix}{key}"`` (showing "—" until filled).
    Returns the layout and ``{key: label}``."""
    form = QFormLayout()
    form.setLabelAlignment(Qt.AlignmentFlag.AlignRight)
    form.setHorizontalSpacing(10)
    form.setVerticalSpacing(vertical_spacing)
    labels: dict[str, QLabel] = {}
    for key, caption in items:
        lab = QLabel("—")
        lab.setObjectName(f"{prefix}{key}")
        lab.setWordWrap(True)
        lab.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        labels[key] = lab
        form.addRow(caption, lab)
    return form, labels


def separator() -> QFrame:
    """The thin horizontal rule the panels put between their controls and their results."""
    line = QFrame()
    line.setFrameShape(QFrame.Shape.HLine)
    line.setStyleSheet("color: #D5DADF;")
    return line


def scroll_into(panel: QWidget, body: QWidget) -> None:
    """Make ``body`` the frameless, resizable, scrolling content of ``panel`` (no margins)."""
    scroll = QScrollArea()
    scroll.setWidgetResizable(True)
    scroll.setFrameShape(QFrame.Shape.NoFrame)
    scroll.setWidget(body)
    outer = QVBoxLayout(panel)
    outer.setContentsMargins(0, 0, 0, 0)
    outer.addWidget(scroll)
