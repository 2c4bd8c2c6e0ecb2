"""The main window: the canvas in the middle, panels in docks, files and safety.

Opening never loses anything: a file is read completely before the current
document is replaced, a file that cannot be read shows every problem in a
dialog and leaves the document untouched, and a file that reads but breaks
the rules opens with its problems marked.  Saves are atomic; a failed save
says why and the document stays unsaved.  Unsaved work is autosaved for
crash recovery (:mod:`app.recovery`).
"""
from __future__ import annotations

import os
import sys
from pathlib import Path

from PySide6.QtCore import QPointF, Qt, QTimer
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import (
    QApplication,
    QDockWidget,
    QLabel,
    QMainWindow,
    QMenu,
    QToolBar,
    QToolButton,
    QWidget,
)

from core.errors import ChainFileError, LongrunError
from core.model import Chain

from . import dialogs
from . import palette as pal
from .analysis_service import AnalysisService
from .canvas import ChainCanvas
from .document import Document, blank_chain
from .icons import icon
from .layout import LAYOUTS
from .panels import PANEL_MODULES, PanelSpec, Workspace, panel_specs
from .recovery import Autosaver, find_orphans
from .settings import Settings

__all__ = ["MainWindow", "CAUTION"]

CAUTION = ("Results describe the model, not the world. Decisions on money, maintenance or safety "
           "need qualified review, and follow local codes and licensed practice.")

CHAIN_SUFFIXES = (".json",)
CSV_SUFFIXES = (".csv", ".tsv", ".txt")


def _problem_lines(exc: LongrunError) -> tuple[str, list[str]]:
    """A one-line summary and the list of problems of a file error."""
    if isinstance(exc, ChainFileError):
        head, *rest = exc.message.split("\n")
        items = [ln.strip().lstrip("-").strip() for ln in rest if ln.strip()]
        where = f" ({exc.where})" if exc.where else ""
        if items:
            return head.rstrip(":") + where, items
        return head + where, [head + where]
    msg = str(exc)
    return msg.split("\n")[0], [ln.strip().lstrip("-").strip() for ln in msg.split("\n")[1:] if ln.strip()] or [msg]


class MainWindow(QMainWindow):
    """One window, one document.

    Parameters
    ----------
    settings : Settings, optional
    autosave : bool
        Keep a recovery copy of unsaved work (off for screenshots).
    restore_layout : bool
        Restore the window size and dock places of the last session.
    panels : tuple of str, optional
        Panel modules to dock (default :data:`app.panels.PANEL_MODULES`).
    """

    def __init__(self, settings: Settings | None = None, *, autosave: bool = True,
                 restore_layout: bool = True, panels: tuple[str, ...] | None = None,
                 parent: QWidget | None = None):
        super().__init__(parent)
        self.settings = settings or Settings()
        self.setObjectName("longrunMainWindow")
        self.setWindowIcon(icon("app"))
        self.setAcceptDrops(True)
        self.setDockOptions(QMainWindow.DockOption.AnimatedDocks | QMainWindow.DockOption.AllowTabbedDocks)
        self.document = Document(parent=self)
        self.analysis = AnalysisService(self.document, delay_ms=self.settings.get("analysis/delay_ms"), parent=self)
        self.canvas = ChainCanvas(self.document, self.analysis, self,
                                  rare_below=self.settings.get("canvas/rare_below"))
        self.canvas.setAcceptDrops(False)
        self.canvas.viewport().setAcceptDrops(False)
        self.setCentralWidget(self.canvas)
        self.workspace = Workspace(self.document, self.analysis, self.settings, self, self.show_message, self.canvas)
        self.docks: dict[str, QDockWidget] = {}
        self.panels: dict[str, QWidget] = {}
        self.panel_errors: dict[str, str] = {}
        self._closed = False
        self.autosaver: Autosaver | None = None

        try:
            self._build_actions()
            self._build_menus()
            self._build_toolbar()
            self._build_status()
            self._build_docks(self._panel_specs(panels))
        except BaseException:
            self.analysis.shutdown()  # no thread outlives a window that failed to build
            raise

        if autosave:
            self.autosaver = Autosaver(self.document, interval_s=self.settings.get("recovery/interval_s"),
                                       settle_ms=self.settings.get("recovery/settle_ms"), parent=self)
            self.autosaver.failed.connect(self._autosave_failed)

        self.document.fileChanged.connect(self._update_title)
        self.document.changed.connect(self._update_actions)
        self.document.selectionChanged.connect(self._update_actions)
        self.analysis.validated.connect(self._show_validation)
        self.analysis.structureReady.connect(self._show_structure)
        self.analysis.busyChanged.connect(self._show_busy)
        self.canvas.message.connect(self.show_message)
        self.canvas.zoomChanged.connect(self._show_zoom)
        self.resize(1360, 860)
        if restore_layout:
            geo = self.settings.get("window/geometry")
            if not geo.isEmpty():
                self.restoreGeometry(geo)
            st = self.settings.get("window/state")
            if not st.isEmpty():
                self.restoreState(st)
        self._update_title()
        self._update_actions()
        if self.panel_errors:
            self.show_message("Some panels could not start: " + ", ".join(self.panel_errors), 15000)

    # -- construction -------------------------------------------------------------
    def _action(self, text: str, slot, shortcut=None, *, tip: str = "", icon_name: str | None = None) -> QAction:
        act = QAction(text, self)
        if shortcut is not None:
            act.setShortcut(shortcut if isinstance(shortcut, QKeySequence) else QKeySequence(shortcut))
        if tip:
            act.setStatusTip(tip)
            act.setToolTip(tip)
        if icon_name:
            act.setIcon(icon(icon_name))
        act.triggered.connect(lambda _checked=False: slot())
        self.addAction(act)
        return act

    def _build_actions(self) -> None:
        K = QKeySequence.StandardKey
        a = self.actions_by_name = {}
        a["new"] = self._action("&New", self.file_new, K.New, tip="Start an empty chain", icon_name="new")
        a["open"] = self._action("&Open…", self.file_open, K.Open, tip="Open a chain file", icon_name="open")
        a["import_csv"] = self._action("&Import Matrix CSV…", self.import_csv, "Ctrl+Shift+I",
                                       tip="Read a transition matrix from a CSV file")
        a["new_from_data"] = self._action("New Chain from &Data…", self.new_from_data,
                                          tip="Fit a chain to observed states in a CSV file (opens as a new, "
                                              "unsaved chain)")
        a["save"] = self._action("&Save", self.file_save, K.Save, tip="Save the chain", icon_name="save")
        a["save_as"] = self._action("Save &As…", self.file_save_as, K.SaveAs, tip="Save under a new name")
        a["revert"] = self._action("&Revert to Saved", self.file_revert,
                                   tip="Go back to the file on disk (undoable)")
        a["export_json"] = self._action("Validated Matrix (&JSON)…", self.export_json,
                                        tip="Hand over the validated matrix with its SHA-256")
        a["export_csv"] = self._action("Matrix (&CSV)…", self.export_csv, tip="The validated matrix as CSV")
        a["export_report"] = self._action("Export &Report…", self.export_report,
                                          tip="Write the client report (HTML or PDF) of the chain and the plan "
                                              "in the Plan check panel")
        a["quit"] = self._action("&Quit", self.close, K.Quit)
        undo = self.document.undo_stack.createUndoAction(self, "&Undo")
        undo.setShortcut(QKeySequence(K.Undo))
        undo.setIcon(icon("undo"))
        redo = self.document.undo_stack.createRedoAction(self, "&Redo")
        redo.setShortcut(QKeySequence(K.Redo))
        redo.setIcon(icon("redo"))
        self.addAction(undo)
        self.addAction(redo)
        a["undo"], a["redo"] = undo, redo
        a["add_state"] = self._action("Add &State", self.add_state, "Ctrl+Shift+A",
                                      tip="Add a state in the middle of the view (or double-click the canvas)",
                                      icon_name="add")
        a["delete"] = self._action("&Delete Selection", self.canvas.delete_selection,
                                   tip="Delete the selected states (with their transitions) and transitions",
                                   icon_name="delete")
        a["rename"] = self._action("Re&name / Edit…", self.canvas.edit_selected,
                                   tip="Rename the selected state or edit the selected transition (F2)")
        a["rest_diag"] = self._action("Put the Rest on the &Diagonal", self.rest_on_diagonal,
                                      tip="Make each selected state's self-loop 'rest' (1 minus its other entries)")
        a["select_all"] = self._action("Select &All States", self.select_all, K.SelectAll)
        a["fit"] = self._action("&Fit to View", self.canvas.fit_to_view, "Ctrl+0", tip="Show the whole chain",
                                icon_name="fit")
        a["zoom_in"] = self._action("Zoom &In", lambda: self.canvas.zoom_by(1.25), K.ZoomIn)
        a["zoom_out"] = self._action("Zoom &Out", lambda: self.canvas.zoom_by(0.8), K.ZoomOut)
        legend = QAction("Show &Legend", self, checkable=True, checked=True)
        legend.toggled.connect(self.canvas.legend.setVisible)
        a["legend"] = legend
        self.layout_actions = {}
        for kind, text in LAYOUTS.items():
            act = self._action(text, lambda k=kind: self.arrange(k), tip=f"Arrange the states: {text.lower()}")
            self.layout_actions[kind] = act
        a["guide"] = self._action("&Quick Guide", self.show_guide, K.HelpContents)
        a["about"] = self._action("&About Longrun", self.show_about)

    def _build_menus(self) -> None:
        a = self.actions_by_name
        mb = self.menuBar()
        f = mb.addMenu("&File")
        f.addActions([a["new"], a["new_from_data"], a["open"]])
        self.recent_menu = f.addMenu("Open &Recent")
        self.recent_menu.aboutToShow.connect(self._fill_recent)
        f.addAction(a["import_csv"])
        f.addSeparator()
        f.addActions([a["save"], a["save_as"], a["revert"]])
        f.addSeparator()
        exp = f.addMenu("&Export")
        exp.addActions([a["export_json"], a["export_csv"]])
        f.addAction(a["export_report"])
        f.addSeparator()
        f.addAction(a["quit"])
        e = mb.addMenu("&Edit")
        e.addActions([a["undo"], a["redo"]])
        e.addSeparator()
        e.addActions([a["add_state"], a["rename"], a["delete"], a["rest_diag"]])
        e.addSeparator()
        e.addAction(a["select_all"])
        v = mb.addMenu("&View")
        v.addActions([a["fit"], a["zoom_in"], a["zoom_out"]])
        v.addSeparator()
        v.addAction(a["legend"])
        v.addSeparator()
        self.panels_menu = v
        ar = mb.addMenu("&Arrange")
        ar.addActions(list(self.layout_actions.values()))
        h = mb.addMenu("&Help")
        h.addActions([a["guide"], a["about"]])

    def _build_toolbar(self) -> None:
        a = self.actions_by_name
        tb = QToolBar("Main tools", self)
        tb.setObjectName("mainTools")
        tb.setMovable(False)
        tb.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextBesideIcon)
        tb.setIconSize(tb.iconSize().scaled(20, 20, Qt.AspectRatioMode.KeepAspectRatio))
        tb.addActions([a["new"], a["open"], a["save"]])
        tb.addSeparator()
        tb.addActions([a["undo"], a["redo"]])
        tb.addSeparator()
        tb.addActions([a["add_state"], a["delete"]])
        tb.addSeparator()
        tb.addAction(a["fit"])
        arrange = QToolButton(tb)
        arrange.setText("Arrange")
        arrange.setIcon(icon("arrange"))
        arrange.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextBesideIcon)
        arrange.setPopupMode(QToolButton.ToolButtonPopupMode.InstantPopup)
        menu = QMenu(arrange)
        menu.addActions(list(self.layout_actions.values()))
        arrange.setMenu(menu)
        tb.addWidget(arrange)
        self.addToolBar(Qt.ToolBarArea.TopToolBarArea, tb)
        self.toolbar = tb

    def _build_status(self) -> None:
        sb = self.statusBar()
        self.validity_label = QToolButton()
        self.validity_label.setText("Checking…")
        self.validity_label.setAutoRaise(True)
        self.validity_label.setCursor(Qt.CursorShape.PointingHandCursor)
        self.validity_label.clicked.connect(self.show_checks)
        self.validity_label.setObjectName("validityLabel")
        self.structure_label = QLabel("")
        self.structure_label.setObjectName("structureLabel")
        self.zoom_label = QLabel("100 %")
        self.zoom_label.setObjectName("zoomLabel")
        self.zoom_label.setMinimumWidth(48)
        self.zoom_label.setAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        for w in (self.validity_label, self.structure_label, self.zoom_label):
            w.setContentsMargins(8, 0, 8, 0)
            sb.addPermanentWidget(w)

    def _panel_specs(self, modules: tuple[str, ...] | None) -> list[PanelSpec]:
        specs: list[PanelSpec] = []
        for name in (PANEL_MODULES if modules is None else modules):
            try:
                specs.extend(panel_specs((name,)))
            except Exception as exc:  # a broken panel module must not take the editor down
                self._panel_failed(name, exc)
        return specs

    def _panel_failed(self, name: str, exc: BaseException) -> None:
        import traceback

        self.panel_errors[name] = f"{type(exc).__name__}: {exc}"
        sys.stderr.write(f"longrun: the panel {name!r} could not start:\n{traceback.format_exc()}")

    def _build_docks(self, specs: list[PanelSpec]) -> None:
        for spec in specs:
            try:
                widget = spec.factory(self.workspace)
            except Exception as exc:
                self._panel_failed(spec.key, exc)
                continue
            dock = QDockWidget(spec.title, self)
            dock.setObjectName(f"dock_{spec.key}")
            dock.setWidget(widget)
            dock.setFeatures(QDockWidget.DockWidgetFeature.DockWidgetMovable
                             | QDockWidget.DockWidgetFeature.DockWidgetClosable
                             | QDockWidget.DockWidgetFeature.DockWidgetFloatable)
            if spec.tab_with and spec.tab_with in self.docks:
                self.tabifyDockWidget(self.docks[spec.tab_with], dock)
            elif spec.beside and spec.beside in self.docks:
                self.splitDockWidget(self.docks[spec.beside], dock, Qt.Orientation.Horizontal)
            else:
                self.addDockWidget(spec.area, dock)
            dock.setVisible(spec.visible)
            toggle = dock.toggleViewAction()
            if spec.shortcut:
                toggle.setShortcut(QKeySequence(spec.shortcut))
            self.panels_menu.addAction(toggle)
            self.docks[spec.key] = dock
            self.panels[spec.key] = widget
        if "matrix" in self.docks:
            self.resizeDocks([self.docks["matrix"]], [240], Qt.Orientation.Vertical)
            self.docks["matrix"].raise_()
        self._arrange_analysis_docks()

    def _arrange_analysis_docks(self) -> None:
        """The analysis panels (long run, simulation, plan check, findings) take the right side, full height."""
        if "longrun" not in self.docks:
            return
        self.setCorner(Qt.Corner.TopRightCorner, Qt.DockWidgetArea.RightDockWidgetArea)
        self.setCorner(Qt.Corner.BottomRightCorner, Qt.DockWidgetArea.RightDockWidgetArea)
        self.resizeDocks([self.docks["longrun"]], [600], Qt.Orientation.Horizontal)
        if "matrix" in self.docks and "checks" in self.docks:
            self.resizeDocks([self.docks["matrix"], self.docks["checks"]], [560, 300], Qt.Orientation.Horizontal)
        self.docks["longrun"].raise_()

    # -- status -------------------------------------------------------------------
    def show_checks(self) -> None:
        """Bring the Checks panel to the front (clicking the validity in the status bar)."""
        dock = self.docks.get("checks")
        if dock is not None:
            dock.show()
            dock.raise_()

    def _autosave_failed(self, message: str) -> None:
        self.show_message(f"Autosave failed: {message}")

    def _show_zoom(self, z: float) -> None:
        self.zoom_label.setText(f"{z * 100:.0f} %")

    def show_message(self, text: str, ms: int = 6000) -> None:
        self.statusBar().showMessage(text, ms)

    def _show_validation(self, report) -> None:
        if report.chain.n == 0:
            self.validity_label.setText("empty chain")
            self.validity_label.setStyleSheet(f"color: {pal.INK_SOFT.name()};")
            self.validity_label.setToolTip("double-click the canvas to add a state")
        elif report.valid:
            self.validity_label.setText("✓ valid")
            self.validity_label.setStyleSheet("color: #00785A; font-weight: 600;")
            self.validity_label.setToolTip("every row sums to 1 and every entry is a probability")
        else:
            k = len(report.problems)
            self.validity_label.setText(f"⚠ {k} problem{'s' if k != 1 else ''}")
            self.validity_label.setStyleSheet(f"color: {pal.PROBLEM.darker(115).name()}; font-weight: 600;")
            self.validity_label.setToolTip("\n".join(p.message for p in report.problems[:20]))

    def _show_structure(self, report) -> None:
        s = report.structure
        if s is None:
            self.structure_label.setText("classes: —" if report.chain.n else "")
            self.structure_label.setToolTip(report.error or "")
            return
        closed = [s.classes[i] for i in s.closed]
        n_trans = sum(len(s.classes[i].states) for i in s.transient)
        parts = [f"{len(closed)} closed class{'es' if len(closed) != 1 else ''}"]
        periods = sorted({c.period for c in closed if c.period and c.period > 1})
        if periods:
            parts.append("period " + ", ".join(map(str, periods)))
        elif closed:
            parts.append("aperiodic")
        parts.append(f"{n_trans} transient state{'s' if n_trans != 1 else ''}")
        if s.irreducible:
            parts.append("irreducible")
        self.structure_label.setText(" · ".join(parts))
        self.structure_label.setToolTip("")

    def _show_busy(self, busy: bool) -> None:
        if busy and not self.validity_label.text().startswith("…"):
            self.validity_label.setToolTip("analysing…")

    def _update_title(self) -> None:
        doc = self.document
        name = doc.chain.name
        base = doc.display_name
        title = f"{base}[*]"
        if name and name != base:
            title += f" · {name}"
        self.setWindowTitle(f"{title} — Longrun")
        self.setWindowModified(doc.is_dirty)
        self.actions_by_name["revert"].setEnabled(doc.path is not None)

    def _update_actions(self) -> None:
        doc = self.document
        has_sel = bool(doc.selected_states or doc.selected_transitions)
        self.actions_by_name["delete"].setEnabled(has_sel)
        self.actions_by_name["rest_diag"].setEnabled(bool(doc.selected_states))

    # -- edits from menus ---------------------------------------------------------------
    def add_state(self) -> str:
        c = self.canvas
        centre = c.mapToScene(c.viewport().rect().center())
        taken = [it.pos() for it in c.states.values()]
        pos = QPointF(centre)
        k = 0
        while any((p - pos).manhattanLength() < 60 for p in taken) and k < 50:
            k += 1
            pos = centre + QPointF(70 * (k % 5), 70 * (k // 5))
        return c.add_state_at(pos)

    def select_all(self) -> None:
        self.document.set_selection(self.document.chain.ids, ())

    def rest_on_diagonal(self) -> None:
        doc = self.document
        msgs = []
        with doc.macro("Put the rest on the diagonal"):
            for sid in [s for s in doc.chain.ids if s in doc.selected_states]:
                msgs.append(doc.rest_on_diagonal(sid))
        if msgs:
            self.show_message(msgs[-1] if len(msgs) == 1 else f"Self-loops of {len(msgs)} states set to ‘rest’")

    def arrange(self, kind: str) -> None:
        rep = self.analysis.structure_report
        classes = closed = None
        if rep is not None and rep.structure is not None and rep.chain.ids == self.document.chain.ids:
            classes = [c.states for c in rep.structure.classes]
            closed = [c.closed for c in rep.structure.classes]
        self.document.arrange(kind, classes=classes, closed=closed)
        self.canvas.fit_to_view()

    # -- files ------------------------------------------------------------------------
    def _folder(self) -> str:
        last = self.settings.get("files/last_folder")
        if last and os.path.isdir(last):
            return last
        if self.document.path is not None:
            return str(self.document.path.parent)
        return str(Path.home())

    def _remember_folder(self, path: str | os.PathLike) -> None:
        self.settings.set("files/last_folder", str(Path(path).resolve().parent))

    def maybe_save(self) -> bool:
        """Ask about unsaved changes; True when it is fine to go on."""
        if not self.document.is_dirty:
            return True
        answer = dialogs.ask_save_changes(self, self.document.display_name)
        if answer == "save":
            return self.file_save()
        return answer == "discard"

    def load_file(self, path: str | os.PathLike) -> Chain:
        """Read a chain file or matrix CSV (by extension); raises LongrunError."""
        from core.io import load_chain, read_matrix_csv

        p = Path(path)
        if p.suffix.lower() in CSV_SUFFIXES:
            return read_matrix_csv(p)
        return load_chain(p)

    def open_path(self, path: str | os.PathLike, *, ask: bool = True, as_copy: bool = False) -> bool:
        """Open a chain file (or import a matrix CSV); False when nothing changed.

        With ``as_copy`` the chain opens untitled (Save asks where), as the
        sample model does, so the original file is never overwritten.
        """
        p = Path(path)
        try:
            chain = self.load_file(p)
        except LongrunError as exc:
            summary, items = _problem_lines(exc)
            dialogs.show_problems(self, "Cannot open the file",
                                  f"“{p.name}” could not be opened: {summary}. "
                                  "The current chain was left as it was.", items)
            if not p.exists():
                self.settings.remove_recent(p)
            return False
        if ask and not self.maybe_save():
            return False
        is_csv = p.suffix.lower() in CSV_SUFFIXES
        untitled = is_csv or as_copy
        self.document.reset(chain, None if untitled else p)
        self.document.set_selection()
        if not untitled:
            self.settings.add_recent(p)
            self._remember_folder(p)
        self.canvas.fit_to_view()
        n = chain.n
        what = "Imported" if is_csv else "Opened"
        msg = f"{what} {p.name}: {n} state{'s' if n != 1 else ''}, {len(chain.transitions)} transitions"
        k = len(chain.problems)
        if k:
            msg += f" — {k} problem{'s' if k != 1 else ''} marked on the canvas (see Checks)"
        self.show_message(msg, 10000)
        return True

    def file_new(self) -> None:
        if not self.maybe_save():
            return
        chain, problem = blank_chain()
        self.document.reset(chain)
        self.canvas.reset_view()
        if problem:
            dialogs.inform(self, "State limit", problem[0].upper() + problem[1:] + ".")
        self.show_message("New chain: double-click the canvas to add a state")

    def file_open(self) -> None:
        path = dialogs.open_path(self, "Open a chain", self._folder(),
                                 "Chains and matrices (*.json *.csv *.tsv *.txt);;All files (*)")
        if path:
            self.open_path(path)

    def import_csv(self) -> None:
        path = dialogs.open_path(self, "Import a matrix CSV", self._folder(), dialogs.CSV_FILTER)
        if path:
            self.open_path(path)

    def file_save(self) -> bool:
        if self.document.path is None:
            return self.file_save_as()
        return self._save_to(self.document.path)

    def file_save_as(self) -> bool:
        suggested = str(Path(self._folder()) / (self.document.path.name if self.document.path
                                                 else _safe_name(self.document.chain.name) + ".json"))
        p = dialogs.save_file(self, "Save the chain as", suggested, dialogs.CHAIN_FILTER, (".json",))
        if p is None:
            return False
        return self._save_to(p)

    def _save_to(self, path: Path) -> bool:
        try:
            saved = self.document.save(path)
        except (LongrunError, ValueError) as exc:
            summary, items = _problem_lines(exc) if isinstance(exc, LongrunError) else (str(exc), [str(exc)])
            dialogs.show_problems(self, "Could not save",
                                  f"“{Path(path).name}” was not saved: {summary}. "
                                  "Your changes are still here, not saved yet.", items)
            return False
        if self.autosaver is not None:
            self.autosaver.discard()
        self.settings.add_recent(saved)
        self._remember_folder(saved)
        self.show_message(f"Saved {saved}")
        return True

    def file_revert(self) -> None:
        try:
            self.document.revert()
        except LongrunError as exc:
            summary, items = _problem_lines(exc)
            dialogs.show_problems(self, "Cannot revert", f"Could not read the saved file: {summary}", items)
            return
        self.show_message("Back to the saved file (Undo brings your changes back)")

    def _export(self, kind: str) -> None:
        chain = self.document.chain
        if chain.problems:
            dialogs.show_problems(self, "Cannot export yet",
                                  "Only a valid matrix is exported. Fix these first:",
                                  [p.message for p in chain.problems])
            return
        stem = self.document.path.stem if self.document.path else _safe_name(chain.name)
        suffix = ".json" if kind == "json" else ".csv"
        suggested = str(Path(self._folder()) / f"{stem}-validated{suffix}")
        p = dialogs.save_file(self, "Export the validated matrix", suggested,
                              dialogs.JSON_FILTER if kind == "json" else dialogs.CSV_FILTER, (suffix,))
        if p is None:
            return
        from core.io import atomic_write_text, matrix_csv_text, write_validated_matrix

        try:
            if kind == "json":
                doc = write_validated_matrix(chain, p)
                self.show_message(f"Exported {p.name} (sha256 {doc['sha256'][:16]}…)", 10000)
            else:
                atomic_write_text(p, matrix_csv_text(chain))
                self.show_message(f"Exported {p.name}", 10000)
        except LongrunError as exc:
            summary, items = _problem_lines(exc)
            dialogs.show_problems(self, "Export failed", f"“{p.name}” was not written: {summary}", items)

    def export_json(self) -> None:
        self._export("json")

    def export_csv(self) -> None:
        self._export("csv")

    def export_report(self) -> bool:
        """File ▸ Export Report…: the client report with the plan of the Plan check panel."""
        from .report import export_document_report

        stem = self.document.path.stem if self.document.path else _safe_name(self.document.chain.name)
        suggested = str(Path(self._folder()) / f"{stem}-report.html")
        p = dialogs.save_file(self, "Export the report", suggested,
                              "Report, HTML or PDF (*.html *.pdf);;HTML page (*.html);;PDF document (*.pdf)",
                              (".html", ".htm", ".pdf"))
        if p is None:
            return False
        plan, epsilon = self.current_plan()
        QApplication.setOverrideCursor(Qt.CursorShape.WaitCursor)
        try:
            info = export_document_report(self.document, p, plan=plan, epsilon=epsilon)
        except LongrunError as exc:
            QApplication.restoreOverrideCursor()
            summary, items = _problem_lines(exc)
            dialogs.show_problems(self, "Report not written", f"“{p.name}” was not written: {summary}", items)
            return False
        QApplication.restoreOverrideCursor()
        self._remember_folder(p)
        what = "with the plan check" if plan is not None else "without a plan"
        self.show_message(f"Wrote the report {p.name} ({what})", 10000)
        return bool(info)

    def current_plan(self):
        """``(core.plan.Plan or None, epsilon)`` from the shared plan of the analysis panels."""
        rp = getattr(self.workspace, "run_plan", None)
        if rp is None:
            return None, 0.25
        chain = self.document.chain
        if not chain.n or not chain.is_valid:
            return None, rp.values.epsilon
        from .plan_form import resolve_plan

        return resolve_plan(chain, rp.values).plan, rp.values.epsilon

    def new_from_data(self) -> bool:
        """File ▸ New Chain from Data…: fit a chain to observations; it opens as a new, unsaved chain."""
        if not self.maybe_save():
            return False
        from .fit_dialog import FitDialog

        chain = FitDialog.get_chain(self, folder=self._folder())
        if chain is None:
            return False
        self.document.reset(chain)
        self.document.undo_stack.resetClean()  # fitted but never saved: closing asks to save it
        self.document.fileChanged.emit()
        self.document.set_selection()
        self.canvas.fit_to_view()
        n = chain.n
        self.show_message(f"New chain fitted from data: {n} state{'s' if n != 1 else ''} (not saved yet)", 10000)
        return True

    def _fill_recent(self) -> None:
        self.recent_menu.clear()
        items = self.settings.recent_files()
        if not items:
            act = self.recent_menu.addAction("(no recent files)")
            act.setEnabled(False)
            return
        for k, path in enumerate(items):
            label = f"&{k + 1}  {Path(path).name}" if k < 9 else Path(path).name
            act = self.recent_menu.addAction(label)
            act.setToolTip(path)
            act.setStatusTip(path)
            act.triggered.connect(lambda _c=False, p=path: self.open_path(p))
        self.recent_menu.addSeparator()
        self.recent_menu.addAction("Clear the list", lambda: self.settings.set("files/recent", []))

    # -- recovery --------------------------------------------------------------------
    def offer_recovery(self) -> bool:
        """Offer unsaved work left by a crash; True when something was recovered."""
        entries = find_orphans(self.autosaver.folder if self.autosaver else None)
        if not entries:
            return False
        answer = dialogs.ask_recovery(self, [e.describe() for e in entries])
        if answer == "discard":
            for e in entries:
                e.discard()
            return False
        if answer != "recover":
            for e in entries:
                e.release()
            return False
        entry, rest = entries[0], entries[1:]
        base = blank_chain(entry.chain.name)[0]
        path = entry.original
        if path and os.path.exists(path):
            try:
                base = self.load_file(path)
            except LongrunError:
                path = None
        elif path:
            path = None
        self.document.restore(base, entry.chain, path)
        self.canvas.fit_to_view()
        entry.discard()
        for e in rest:
            e.release()
        if self.autosaver is not None:
            self.autosaver.save_now()
        more = f" ({len(rest)} more will be offered next time)" if rest else ""
        self.show_message(f"Recovered unsaved work: {entry.describe()}{more}", 12000)
        return True

    # -- help ---------------------------------------------------------------------------
    def show_guide(self) -> None:
        dialogs.inform(self, "Quick guide", (
            "Canvas\n"
            "• Double-click empty space to add a state; type its name, Return.\n"
            "• Drag a state to move it. Drag from its rim (or Shift-drag) to another state to draw a "
            "transition, or back to itself for a self-loop; then type the probability.\n"
            "• Probabilities: 0.3, 1/3, 2.5e-11, 5% or rest (one minus the rest of the row).\n"
            "• Double-click a state to rename it, an arrow to change it. Delete removes the selection.\n"
            "• Wheel or pinch to zoom, middle button or Space + drag to pan, Ctrl+0 to fit.\n\n"
            "Matrix\n"
            "• Rows are 'from', columns 'to'. Paste blocks from a spreadsheet; right-click a row to put "
            "its rest on the diagonal.\n\n"
            "Every edit can be undone. Unsaved work is autosaved and offered back after a crash."))

    def show_about(self) -> None:
        from core import __version__

        dialogs.inform(self, "About Longrun", (
            f"Longrun {__version__}\n\n"
            "Sketch a finite Markov chain, validate it, and get its long-run behaviour exactly.\n\n"
            f"Caution: {CAUTION}"))

    # -- drag and drop ------------------------------------------------------------------
    @staticmethod
    def _dropped_path(mime) -> str | None:
        if not mime.hasUrls():
            return None
        for url in mime.urls():
            if url.isLocalFile():
                p = url.toLocalFile()
                if Path(p).suffix.lower() in CHAIN_SUFFIXES + CSV_SUFFIXES:
                    return p
        return None

    def dragEnterEvent(self, event) -> None:  # noqa: N802
        if self._dropped_path(event.mimeData()):
            event.acceptProposedAction()
        else:
            event.ignore()

    def dragMoveEvent(self, event) -> None:  # noqa: N802
        if self._dropped_path(event.mimeData()):
            event.acceptProposedAction()
        else:
            event.ignore()

    def dropEvent(self, event) -> None:  # noqa: N802
        p = self._dropped_path(event.mimeData())
        if p is None:
            event.ignore()
            return
        event.acceptProposedAction()
        QTimer.singleShot(0, self, lambda: self.open_path(p))

    # -- closing ----------------------------------------------------------------------------
    def closeEvent(self, event) -> None:  # noqa: N802
        if self._closed:
            event.accept()
            return
        if not self.maybe_save():
            event.ignore()
            return
        self.shutdown()
        event.accept()

    def shutdown(self) -> None:
        """Stop threads and timers, save the layout, remove the recovery file."""
        if self._closed:
            return
        self._closed = True
        try:
            self.settings.set("window/geometry", self.saveGeometry())
            self.settings.set("window/state", self.saveState())
            self.settings.sync()
        except RuntimeError:
            pass
        for widget in self.panels.values():
            stop = getattr(widget, "shutdown", None)
            if callable(stop):
                stop()
        self.analysis.shutdown()
        if self.autosaver is not None:
            self.autosaver.close()
        # nothing may react to the document any more (it is torn down with the window)
        self.canvas.editor.cancel()
        self.canvas.scene().blockSignals(True)
        self.document.undo_stack.blockSignals(True)
        self.document.blockSignals(True)


def _safe_name(name: str) -> str:
    keep = "".join(ch if ch.isalnum() or ch in "-_ " else "_" for ch in (name or "untitled")).strip()
    return (keep or "untitled").replace(" ", "_").lower()[:60]
