"""The matrix grid: the document's transition matrix as a table.

Rows are "from" states, columns "to" states, and a last column holds the
exact row sum.  Cells show the probabilities as typed (``1/3``, ``rest``);
cells and rows with validation problems are tinted, with the message in the
tooltip.  Editing a cell, pasting a block (tab-, comma- or semicolon-separated,
as spreadsheets copy it) or clearing cells edits the document, one undo step
each.
"""
from __future__ import annotations

from fractions import Fraction
from typing import Any

from PySide6.QtCore import (
    QAbstractTableModel,
    QItemSelection,
    QItemSelectionModel,
    QModelIndex,
    QPersistentModelIndex,
    Qt,
    Signal,
)
from PySide6.QtGui import QAction, QColor, QGuiApplication, QKeySequence
from PySide6.QtWidgets import QAbstractItemView, QHeaderView, QMenu, QTableView, QVBoxLayout, QWidget, QLabel

from core.model import Chain, Transition, parse_probability

from . import palette as pal
from .document import Document, probability_text, transition_changes
from .panels import PanelSpec, Workspace

__all__ = ["MatrixModel", "MatrixView", "MatrixPanel", "parse_block", "PANELS"]

CELL_PROBLEM = QColor("#F9D9C4")
ROW_PROBLEM = QColor("#FDEEE4")
ZERO_TEXT = QColor("#B4BBC1")
SUM_BG = QColor("#F1F3F5")


def _typed_text(p: Any) -> str:
    if isinstance(p, str):
        return p
    if isinstance(p, float):
        return repr(p)
    return str(p)


def _fmt_sum(v: Fraction) -> str:
    if v == 1:
        return "1"
    if v == 0:
        return "0"
    return f"{float(v):.12g}"


def parse_block(text: str) -> list[list[str]]:
    """Split clipboard text into rows of cells (tab, else comma, else semicolon)."""
    lines = text.replace("\r\n", "\n").replace("\r", "\n").split("\n")
    while lines and not lines[-1].strip():
        lines.pop()
    if not lines:
        return []
    if "\t" in text:
        sep = "\t"
    elif "," in text:
        sep = ","
    elif ";" in text:
        sep = ";"
    else:
        sep = None
    rows = [[c.strip() for c in (ln.split(sep) if sep else [ln])] for ln in lines]
    width = max(len(r) for r in rows)
    return [r + [""] * (width - len(r)) for r in rows]


def _is_number(cell: str) -> bool:
    if not cell.strip():
        return True
    try:
        parse_probability(cell)
    except ValueError:
        return False
    return True


class MatrixModel(QAbstractTableModel):
    """``QAbstractTableModel`` over the document's chain (n rows, n + 1 columns)."""

    message = Signal(str)

    def __init__(self, document: Document, analysis=None, parent=None):
        super().__init__(parent)
        self.document = document
        self._chain = document.chain
        self._ids: tuple[str, ...] = self._chain.ids
        self._names: tuple[str, ...] = tuple(s.display_name for s in self._chain.states)
        self._cells: dict[tuple[str, str], Transition] = {}
        self._report = None
        self._index_cells()
        document.chainChanged.connect(self._on_chain_changed)
        if analysis is not None:
            analysis.validated.connect(self.apply_validation)
            if analysis.report is not None:
                self._report = analysis.report

    # -- sync ----------------------------------------------------------------
    def _index_cells(self) -> None:
        cells: dict[tuple[str, str], Transition] = {}
        for t in self._chain.transitions:
            cells.setdefault((t.source, t.target), t)
        self._cells = cells

    def _on_chain_changed(self, old: Chain, new: Chain) -> None:
        ids = new.ids
        names = tuple(s.display_name for s in new.states)
        if ids != self._ids:
            self.beginResetModel()
            self._chain, self._ids, self._names = new, ids, names
            self._index_cells()
            self.endResetModel()
            return
        self._chain = new
        if names != self._names:
            self._names = names
            self.headerDataChanged.emit(Qt.Orientation.Horizontal, 0, len(ids) - 1)
            self.headerDataChanged.emit(Qt.Orientation.Vertical, 0, len(ids) - 1)
        if old.transitions is not new.transitions:
            changes = transition_changes(old, new)
            if changes is None:
                self._index_cells()
                self._all_changed()
                return
            rows = set()
            for key, t in changes.items():
                if t is None:
                    self._cells.pop(key, None)
                else:
                    self._cells[key] = t
                rows.add(key[0])
            index = new.index
            for sid in rows:
                r = index.get(sid)
                if r is not None:
                    self.dataChanged.emit(self.index(r, 0), self.index(r, len(ids)))

    def apply_validation(self, report) -> None:
        self._report = report
        self._all_changed()

    def _all_changed(self) -> None:
        n = len(self._ids)
        if n:
            self.dataChanged.emit(self.index(0, 0), self.index(n - 1, n))

    # -- Qt model API ---------------------------------------------------------------
    def rowCount(self, parent: QModelIndex | QPersistentModelIndex = QModelIndex()) -> int:  # noqa: N802
        return 0 if parent.isValid() else len(self._ids)

    def columnCount(self, parent: QModelIndex | QPersistentModelIndex = QModelIndex()) -> int:  # noqa: N802
        return 0 if parent.isValid() else len(self._ids) + (1 if self._ids else 0)

    @property
    def sum_column(self) -> int:
        return len(self._ids)

    def state_at(self, row: int) -> str:
        return self._ids[row]

    def headerData(self, section: int, orientation: Qt.Orientation, role: int = Qt.ItemDataRole.DisplayRole):  # noqa: N802
        if section < 0:
            return None
        if orientation == Qt.Orientation.Horizontal and section == len(self._ids):
            if role == Qt.ItemDataRole.DisplayRole:
                return "Row sum"
            if role == Qt.ItemDataRole.ToolTipRole:
                return "exact sum of the row ('rest' resolved); every row must sum to 1"
            return None
        if section >= len(self._ids):
            return None
        if role == Qt.ItemDataRole.DisplayRole:
            return self._names[section]
        if role == Qt.ItemDataRole.ToolTipRole:
            sid = self._ids[section]
            kind = "to" if orientation == Qt.Orientation.Horizontal else "from"
            return f"{kind} state ‘{sid}’" + (f" ({self._names[section]})" if self._names[section] != sid else "")
        if role == Qt.ItemDataRole.ForegroundRole and orientation == Qt.Orientation.Vertical:
            if self._report is not None and self._ids[section] in self._report.by_state:
                return pal.PROBLEM
        return None

    def flags(self, index: QModelIndex) -> Qt.ItemFlag:
        f = Qt.ItemFlag.ItemIsEnabled | Qt.ItemFlag.ItemIsSelectable
        if index.isValid() and index.column() < len(self._ids):
            f |= Qt.ItemFlag.ItemIsEditable
        return f

    def data(self, index: QModelIndex, role: int = Qt.ItemDataRole.DisplayRole):
        if not index.isValid():
            return None
        i, j = index.row(), index.column()
        n = len(self._ids)
        if i >= n or j > n:
            return None
        a = self._ids[i]
        report = self._report
        row_problems = report.by_state.get(a, ()) if report is not None else ()
        if j == n:
            return self._sum_data(a, row_problems, role)
        b = self._ids[j]
        t = self._cells.get((a, b))
        cell_problems = report.by_transition.get((a, b), ()) if report is not None else ()
        if role in (Qt.ItemDataRole.DisplayRole, Qt.ItemDataRole.EditRole):
            return _typed_text(t.p) if t is not None else ("" if role == Qt.ItemDataRole.EditRole else "·")
        if role == Qt.ItemDataRole.TextAlignmentRole:
            return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        if role == Qt.ItemDataRole.ForegroundRole:
            if cell_problems:
                return pal.PROBLEM.darker(120)
            return ZERO_TEXT if t is None else None
        if role == Qt.ItemDataRole.BackgroundRole:
            if cell_problems:
                return CELL_PROBLEM
            if row_problems:
                return ROW_PROBLEM
            return None
        if role == Qt.ItemDataRole.ToolTipRole:
            lines = [f"P({a} → {b}) = {_typed_text(t.p) if t is not None else '0'}"]
            if report is not None and t is not None and report.chain.transition(a, b) is t:
                v = report.values.get((a, b))
                if v is not None and _typed_text(t.p) != repr(v):
                    lines.append(f"value: {v:.15g}")
            lines += [f"⚠ {p.message}" for p in cell_problems]
            lines += [f"⚠ {p.message}" for p in row_problems if p not in cell_problems]
            return "\n".join(lines)
        return None

    def _sum_data(self, a: str, row_problems, role: int):
        report = self._report
        if role == Qt.ItemDataRole.DisplayRole:
            if report is None or report.chain.ids != self._ids:
                return "…"
            v = report.row_sums.get(a)
            return "—" if v is None else _fmt_sum(v)
        if role == Qt.ItemDataRole.TextAlignmentRole:
            return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        if role == Qt.ItemDataRole.BackgroundRole:
            return ROW_PROBLEM if row_problems else SUM_BG
        if role == Qt.ItemDataRole.ForegroundRole:
            return pal.PROBLEM.darker(120) if row_problems else None
        if role == Qt.ItemDataRole.FontRole:
            return pal.ui_font(bold=True)
        if role == Qt.ItemDataRole.ToolTipRole:
            if row_problems:
                return "\n".join(f"⚠ {p.message}" for p in row_problems)
            return f"row ‘{a}’ sums to 1"
        return None

    def setData(self, index: QModelIndex, value: Any, role: int = Qt.ItemDataRole.EditRole) -> bool:  # noqa: N802
        if role != Qt.ItemDataRole.EditRole or not index.isValid() or index.column() >= len(self._ids):
            return False
        a, b = self._ids[index.row()], self._ids[index.column()]
        try:
            p = probability_text("" if value is None else str(value))
        except ValueError as exc:
            self.message.emit(f"P({a} → {b}): {exc}")
            return False
        self.document.set_transition(a, b, p)
        return True


class MatrixView(QTableView):
    """The grid widget: copy, paste and clear blocks; per-row actions."""

    message = Signal(str)

    def __init__(self, document: Document, analysis=None, parent=None):
        super().__init__(parent)
        self.document = document
        self.setObjectName("matrixGrid")
        self._model = MatrixModel(document, analysis, self)
        self._model.message.connect(self.message)
        self.setModel(self._model)
        self.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.setEditTriggers(QAbstractItemView.EditTrigger.DoubleClicked
                             | QAbstractItemView.EditTrigger.EditKeyPressed
                             | QAbstractItemView.EditTrigger.AnyKeyPressed)
        self.setAlternatingRowColors(False)
        self.setWordWrap(False)
        h = self.horizontalHeader()
        h.setDefaultSectionSize(78)
        h.setMinimumSectionSize(40)
        h.setSectionResizeMode(QHeaderView.ResizeMode.Interactive)
        h.setHighlightSections(True)
        h.setTextElideMode(Qt.TextElideMode.ElideRight)
        self.setTextElideMode(Qt.TextElideMode.ElideRight)
        self._model.modelReset.connect(self.fit_columns)
        self.fit_columns()
        document.selectionChanged.connect(self.show_document_selection)
        self.verticalHeader().setDefaultSectionSize(24)
        self.verticalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Fixed)
        self.setContextMenuPolicy(Qt.ContextMenuPolicy.CustomContextMenu)
        self.customContextMenuRequested.connect(self._context_menu)
        self.setStyleSheet("QTableView#matrixGrid { gridline-color: #E1E4E8; }")
        for text, seq, slot in (
            ("Copy cells", QKeySequence.StandardKey.Copy, self.copy_selection),
            ("Paste cells", QKeySequence.StandardKey.Paste, self.paste),
            ("Clear cells", QKeySequence.StandardKey.Delete, self.clear_selection),
        ):
            act = QAction(text, self)
            act.setShortcut(seq)
            act.setShortcutContext(Qt.ShortcutContext.WidgetWithChildrenShortcut)
            act.triggered.connect(lambda _checked=False, f=slot: f())
            self.addAction(act)
        backspace = QAction("Clear cells", self)
        backspace.setShortcut(QKeySequence(Qt.Key.Key_Backspace))
        backspace.setShortcutContext(Qt.ShortcutContext.WidgetWithChildrenShortcut)
        backspace.triggered.connect(lambda _checked=False: self.clear_selection())
        self.addAction(backspace)

    def fit_columns(self) -> None:
        """Size columns to their headers (56-150 px); skipped for big matrices."""
        m = self._model
        n = m.columnCount()
        if n == 0 or n > 120:
            return
        fm = self.horizontalHeader().fontMetrics()
        for c in range(n):
            text = str(m.headerData(c, Qt.Orientation.Horizontal) or "")
            self.setColumnWidth(c, int(min(150, max(56, fm.horizontalAdvance(text) + 22))))

    def show_document_selection(self) -> None:
        """Select the rows of the document's selected states and the cells of its transitions."""
        if self.hasFocus() or self.state() == QAbstractItemView.State.EditingState:
            return  # the user is working in the grid: leave its selection alone
        doc = self.document
        m = self._model
        index = doc.chain.index
        sel = QItemSelection()
        for sid in doc.selected_states:
            r = index.get(sid)
            if r is not None and r < m.rowCount():
                sel.select(m.index(r, 0), m.index(r, m.columnCount() - 1))
        for a, b in doc.selected_transitions:
            r, c = index.get(a), index.get(b)
            if r is not None and c is not None and r < m.rowCount():
                sel.select(m.index(r, c), m.index(r, c))
        sm = self.selectionModel()
        sm.select(sel, QItemSelectionModel.SelectionFlag.ClearAndSelect)
        if not sel.isEmpty():
            self.scrollTo(sel.indexes()[0])

    @property
    def matrix_model(self) -> MatrixModel:
        return self._model

    # -- blocks --------------------------------------------------------------------
    def _selected_block(self) -> tuple[int, int, int, int] | None:
        idx = self.selectedIndexes()
        if not idx:
            cur = self.currentIndex()
            if not cur.isValid():
                return None
            idx = [cur]
        rows = [i.row() for i in idx]
        cols = [i.column() for i in idx]
        return min(rows), min(cols), max(rows), max(cols)

    def copy_selection(self) -> str:
        """Copy the selected block as tab-separated text (zeros as 0); returns the text."""
        block = self._selected_block()
        if block is None:
            return ""
        r0, c0, r1, c1 = block
        m = self._model
        lines = []
        for r in range(r0, r1 + 1):
            cells = []
            for c in range(c0, c1 + 1):
                if c == m.sum_column:
                    v = m.data(m.index(r, c))
                    cells.append("" if v in ("…", "—") else str(v))
                else:
                    cells.append(m.data(m.index(r, c), Qt.ItemDataRole.EditRole) or "0")
            lines.append("\t".join(cells))
        text = "\n".join(lines) + "\n"
        QGuiApplication.clipboard().setText(text)
        self.message.emit(f"Copied {r1 - r0 + 1} × {c1 - c0 + 1} cells")
        return text

    def paste(self, text: str | None = None) -> bool:
        """Paste a block at the selection's top-left cell (one undo step).

        A single value pasted over a selection of several cells fills them all.
        A header row or column of state names is skipped.
        """
        if text is None:
            text = QGuiApplication.clipboard().text()
        block = parse_block(text or "")
        if not block:
            self.message.emit("Nothing to paste: the clipboard has no text")
            return False
        sel = self._selected_block()
        if sel is None:
            self.message.emit("Select the cell where the pasted block should start")
            return False
        if len(block) > 1 and not all(_is_number(c) for c in block[0][1:] or block[0]):
            block = block[1:]
        if block and len(block[0]) > 1 and not all(_is_number(r[0]) for r in block):
            block = [r[1:] for r in block]
        m = self._model
        n = m.sum_column
        r0, c0, r1, c1 = sel
        ids = self.document.chain.ids
        items: list[tuple[str, str, Any]] = []
        bad: list[str] = []
        if len(block) == 1 and len(block[0]) == 1 and (r1 > r0 or c1 > c0):
            targets = [(i.row(), i.column(), block[0][0]) for i in self.selectedIndexes()]
        else:
            targets = [(r0 + dr, c0 + dc, cell) for dr, row in enumerate(block) for dc, cell in enumerate(row)]
        outside = 0
        for r, c, cell in targets:
            if r >= n or c >= n:
                outside += 1
                continue
            try:
                p = probability_text(cell)
            except ValueError as exc:
                bad.append(f"row {r - r0 + 1}, column {c - c0 + 1} of the pasted block: {exc}")
                continue
            items.append((ids[r], ids[c], p))
        if bad:
            self.message.emit("Nothing pasted. " + "; ".join(bad[:3]) + (" …" if len(bad) > 3 else ""))
            return False
        if not items:
            self.message.emit("Nothing pasted: the block falls outside the matrix")
            return False
        rows = len({a for a, _, _ in items})
        cols = len({b for _, b, _ in items})
        self.document.set_transitions(items, f"Paste {rows} × {cols} cells")
        msg = f"Pasted {len(items)} cells"
        if outside:
            msg += f"; {outside} cells outside the matrix were left out"
        self.message.emit(msg)
        return True

    def clear_selection(self) -> None:
        ids = self.document.chain.ids
        n = self._model.sum_column
        items = [(ids[i.row()], ids[i.column()], None) for i in self.selectedIndexes() if i.column() < n]
        if items:
            self.document.set_transitions(items, f"Clear {len(items)} cells")

    def rest_on_diagonal(self, row: int | None = None) -> None:
        if row is None:
            cur = self.currentIndex()
            if not cur.isValid():
                return
            row = cur.row()
        msg = self.document.rest_on_diagonal(self._model.state_at(row))
        self.message.emit(msg)

    def _context_menu(self, pos) -> None:
        index = self.indexAt(pos)
        menu = QMenu(self)
        if index.isValid():
            sid = self._model.state_at(index.row())
            act = menu.addAction(f"Put the rest of ‘{sid}’ on its diagonal")
            act.triggered.connect(lambda: self.rest_on_diagonal(index.row()))
            menu.addSeparator()
        menu.addAction("Copy cells", self.copy_selection)
        menu.addAction("Paste cells", self.paste)
        menu.addAction("Clear cells", self.clear_selection)
        menu.exec(self.viewport().mapToGlobal(pos))

    def keyPressEvent(self, event) -> None:  # noqa: N802
        if event.matches(QKeySequence.StandardKey.Copy):
            self.copy_selection()
            return
        if event.matches(QKeySequence.StandardKey.Paste):
            self.paste()
            return
        if event.key() in (Qt.Key.Key_Delete, Qt.Key.Key_Backspace) and self.state() != QAbstractItemView.State.EditingState:
            self.clear_selection()
            return
        super().keyPressEvent(event)


class MatrixPanel(QWidget):
    """The grid with a one-line caption."""

    def __init__(self, workspace: Workspace):
        super().__init__()
        self.view = MatrixView(workspace.document, workspace.analysis, self)
        self.view.message.connect(workspace.status)
        caption = QLabel("Rows: from · columns: to · type 0.3, 1/3, 2.5e-11, 5% or rest · "
                         "paste blocks from a spreadsheet · right-click a row for more")
        caption.setObjectName("panelCaption")
        caption.setStyleSheet("color: #5D6B78; padding: 2px 4px;")
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(0)
        lay.addWidget(caption)
        lay.addWidget(self.view)


PANELS = [
    PanelSpec("matrix", "Matrix", MatrixPanel, area=Qt.DockWidgetArea.BottomDockWidgetArea,
              shortcut="Ctrl+Shift+M"),
]
