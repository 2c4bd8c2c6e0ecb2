"""The "Checks" panel: every validation problem of the chain, in one list.

Selecting a problem selects its state or transition on the canvas and in the
grid (through the document's shared selection).
"""
from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtGui import QColor
from PySide6.QtWidgets import QLabel, QListWidget, QListWidgetItem, QVBoxLayout, QWidget

from . import palette as pal
from .panels import PanelSpec, Workspace

__all__ = ["ChecksPanel", "PANELS"]


class ChecksPanel(QWidget):
    """Lists the current chain's validation problems, or says it is valid."""

    def __init__(self, workspace: Workspace):
        super().__init__()
        self.workspace = workspace
        self.summary = QLabel("Checking…")
        self.summary.setObjectName("checksSummary")
        self.summary.setWordWrap(True)
        self.summary.setStyleSheet("padding: 6px 6px 4px 6px; font-weight: 600;")
        self.list = QListWidget()
        self.list.setObjectName("checksList")
        self.list.setWordWrap(True)
        self.list.setAlternatingRowColors(True)
        self.list.itemSelectionChanged.connect(self._selected)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(0)
        lay.addWidget(self.summary)
        lay.addWidget(self.list)
        workspace.analysis.validated.connect(self.show_report)
        if workspace.analysis.report is not None:
            self.show_report(workspace.analysis.report)

    def show_report(self, report) -> None:
        self.list.blockSignals(True)
        self.list.clear()
        chain = report.chain
        if chain.n == 0:
            self.summary.setText("An empty chain: double-click the canvas to add a first state.")
            self.summary.setStyleSheet(f"padding: 6px; font-weight: 600; color: {pal.INK_SOFT.name()};")
        elif report.valid:
            n, m = chain.n, len(chain.transitions)
            self.summary.setText(f"✓ Valid: {n} state{'s' if n != 1 else ''}, "
                                 f"{m} transition{'s' if m != 1 else ''}, every row sums to 1.")
            self.summary.setStyleSheet("padding: 6px; font-weight: 600; color: #00785A;")
            for line in ("Checked: every probability is a number in [0, 1]",
                         "Checked: at most one 'rest' per state, none negative",
                         "Checked: every state has outgoing probability",
                         "Checked: every row sums to 1 (exact arithmetic, tolerance 1e-9)",
                         "Checked: state names are unique; transitions name existing states"):
                item = QListWidgetItem(line)
                item.setForeground(QColor(pal.INK_SOFT))
                item.setFlags(Qt.ItemFlag.ItemIsEnabled)
                self.list.addItem(item)
        else:
            k = len(report.problems)
            self.summary.setText(f"⚠ {k} problem{'s' if k != 1 else ''} to fix before the chain can be analysed:")
            self.summary.setStyleSheet(f"padding: 6px; font-weight: 600; color: {pal.PROBLEM.darker(115).name()};")
            for p in report.problems:
                item = QListWidgetItem(p.message)
                item.setData(Qt.ItemDataRole.UserRole, (p.state, p.transition))
                item.setForeground(QColor(pal.INK))
                item.setToolTip(f"{p.code}: {p.message}")
                self.list.addItem(item)
        self.list.blockSignals(False)

    def _selected(self) -> None:
        items = self.list.selectedItems()
        if not items:
            return
        state, transition = items[0].data(Qt.ItemDataRole.UserRole)
        doc = self.workspace.document
        ids = set(doc.chain.ids)
        if transition is not None and transition[0] in ids and transition[1] in ids:
            doc.set_selection((), [tuple(transition)])
        elif state is not None and state in ids:
            doc.set_selection([state], ())


PANELS = [
    PanelSpec("checks", "Checks", ChecksPanel, area=Qt.DockWidgetArea.BottomDockWidgetArea,
              tab_with="matrix", shortcut="Ctrl+Shift+K"),
]
