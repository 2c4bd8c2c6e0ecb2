"""The "New chain from data" dialog: a CSV of observations in, a fitted chain out.

The dialog reads the file once (:func:`core.datafile.read_table`), lets the user
pick the state, sequence-id and time columns and how states are made (labels as
written, or numbers cut at given points or at quantiles), previews the parsed
rows with the state each one becomes, and shows the estimate table with its
intervals and the findings (:func:`core.estimate.fit_observations`).  Every
computation is the command line's (``longrun fit``); the dialog only displays.

Use it standalone::

    dlg = FitDialog(parent, path="observations.csv")
    dlg.chainFitted.connect(open_in_editor)      # emitted with the Chain on accept
    dlg.open()                                    # or: chain = FitDialog.get_chain(parent)

It knows nothing of the main window: on "Create chain" it emits
:attr:`FitDialog.chainFitted` with the fitted :class:`core.model.Chain` (its
counts and data source recorded in ``chain.extra``) and closes; :meth:`chain`
returns the same object afterwards.  Nothing is written to disk.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
from PySide6.QtCore import QAbstractTableModel, QModelIndex, QPersistentModelIndex, Qt, QTimer, Signal
from PySide6.QtGui import QGuiApplication
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QDoubleSpinBox,
    QFormLayout,
    QGroupBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QPlainTextEdit,
    QPushButton,
    QSpinBox,
    QSplitter,
    QTableView,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from core.datafile import Table, observations_from_table, parse_number, read_table
from core.errors import LongrunError
from core.estimate import DEFAULT_MIN_DEPARTURES, Fit, fit_observations

from . import dialogs

__all__ = ["FitDialog", "EstimateModel", "DATA_FILTER", "PREVIEW_ROWS"]

DATA_FILTER = "Observation data (*.csv *.tsv *.txt);;All files (*)"
#: Rows shown in the preview table.
PREVIEW_ROWS = 200
#: Up to this many states every entry is listed; above it only observed ones.
LIST_ALL_UP_TO = 30

NO_COLUMN = "(none)"
MODES = (
    ("labels", "labels as written"),
    ("cuts", "numbers cut at points"),
    ("quantiles", "numbers cut at quantiles"),
)
_TIME_NAMES = {"date", "time", "timestamp", "datetime", "day", "when", "t"}
_ID_NAMES = {"id", "unit", "machine", "asset", "sequence", "series", "fund", "ticker", "patient", "run"}


def _fmt(v: float) -> str:
    return "–" if not np.isfinite(v) else f"{v:.4f}"


class EstimateModel(QAbstractTableModel):
    """The entries of a :class:`~core.estimate.Fit` as table rows (virtual, any size).

    Columns: from, to, count, departures, estimate, interval low, interval high,
    and the simultaneous and posterior intervals when the fit has them.  All
    entries are listed up to :data:`LIST_ALL_UP_TO` states; beyond, only the
    observed ones (the findings list the unobserved ones).
    """

    def __init__(self, parent=None):
        super().__init__(parent)
        self._fit: Fit | None = None
        self._rows: np.ndarray = np.zeros((0, 2), dtype=int)
        self._cols: list[str] = []

    def set_fit(self, fit: Fit | None) -> None:
        self.beginResetModel()
        self._fit = fit
        if fit is None:
            self._rows = np.zeros((0, 2), dtype=int)
            self._cols = []
        else:
            n = fit.n
            if n <= LIST_ALL_UP_TO:
                ii, jj = np.divmod(np.arange(n * n), n)
            else:
                ii, jj = np.nonzero(fit.counts)
            self._rows = np.column_stack([ii, jj]).astype(int)
            pct = f"{fit.level * 100:g}%"
            self._cols = ["From", "To", "Count", "Departures", "Estimate", f"{pct} low", f"{pct} high"]
            if fit.simultaneous is not None:
                self._cols += ["Simult. low", "Simult. high"]
            if fit.posterior is not None:
                self._cols += ["Posterior low", "Posterior high"]
        self.endResetModel()

    def rowCount(self, parent: QModelIndex | QPersistentModelIndex = QModelIndex()) -> int:  # noqa: N802
        return 0 if parent.isValid() else len(self._rows)

    def columnCount(self, parent: QModelIndex | QPersistentModelIndex = QModelIndex()) -> int:  # noqa: N802
        return 0 if parent.isValid() else len(self._cols)

    def headerData(self, section: int, orientation, role: int = Qt.ItemDataRole.DisplayRole) -> Any:  # noqa: N802
        if role == Qt.ItemDataRole.DisplayRole and orientation == Qt.Orientation.Horizontal:
            return self._cols[section] if 0 <= section < len(self._cols) else None
        return None

    def value(self, row: int, column: int) -> Any:
        """The raw value of a cell (str for names, int for counts, float otherwise)."""
        f = self._fit
        i, j = (int(v) for v in self._rows[row])
        name = self._cols[column]
        if column == 0:
            return f.labels[i]
        if column == 1:
            return f.labels[j]
        if name == "Count":
            return int(f.counts[i, j])
        if name == "Departures":
            return int(f.departures[i])
        if name == "Estimate":
            return float(f.estimate[i, j])
        if name.endswith(" low") and not name.startswith(("Simult", "Posterior")):
            return float(f.low[i, j])
        if name.endswith(" high") and not name.startswith(("Simult", "Posterior")):
            return float(f.high[i, j])
        if name.startswith("Simult"):
            return float(f.simultaneous[0 if name.endswith("low") else 1][i, j])
        return float(f.posterior[0 if name.endswith("low") else 1][i, j])

    def data(self, index: QModelIndex | QPersistentModelIndex, role: int = Qt.ItemDataRole.DisplayRole) -> Any:
        if not index.isValid() or self._fit is None:
            return None
        v = self.value(index.row(), index.column())
        if role == Qt.ItemDataRole.DisplayRole:
            return _fmt(v) if isinstance(v, float) else str(v)
        if role == Qt.ItemDataRole.TextAlignmentRole and index.column() >= 2:
            return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        if role == Qt.ItemDataRole.ToolTipRole and index.column() >= 4:
            f = self._fit
            i, j = (int(x) for x in self._rows[index.row()])
            return (f"{f.labels[i]} → {f.labels[j]}: {int(f.counts[i, j])} of {int(f.departures[i])} departures; "
                    f"Wilson {f.level * 100:g}% interval {_fmt(f.low[i, j])} to {_fmt(f.high[i, j])}")
        return None


class FitDialog(QDialog):
    """Build a chain from a CSV of observed states.

    Parameters
    ----------
    parent : QWidget, optional
    path : str or PathLike, optional
        A data file to open at once.
    folder : str
        Where the "Choose…" file dialog starts.

    Signals
    -------
    chainFitted(object)
        Emitted with the fitted :class:`~core.model.Chain` when the user
        presses "Create chain".
    """

    chainFitted = Signal(object)

    def __init__(self, parent: QWidget | None = None, *, path: str | os.PathLike | None = None, folder: str = ""):
        super().__init__(parent)
        self.setObjectName("fitDialog")
        self.setWindowTitle("New chain from data")
        self.setModal(True)
        self.resize(980, 720)
        self._folder = folder
        self._table: Table | None = None
        self._path: str | None = None
        self._fit: Fit | None = None
        self._obs = None
        self._chain = None
        self._error: str | None = None
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(200)
        self._timer.timeout.connect(self.refresh_now)
        self._build()
        if path is not None:
            self.set_path(path)

    # -- layout -----------------------------------------------------------
    def _build(self) -> None:
        outer = QVBoxLayout(self)

        file_row = QHBoxLayout()
        self.path_edit = QLineEdit()
        self.path_edit.setObjectName("fitPath")
        self.path_edit.setPlaceholderText("A CSV file of observed states, one row per observation")
        self.path_edit.editingFinished.connect(self._path_typed)
        self.browse_button = QPushButton("Choose…")
        self.browse_button.clicked.connect(self.choose_file)
        self.header_check = QCheckBox("First row holds column names")
        self.header_check.setChecked(True)
        self.header_check.toggled.connect(self._reload)
        file_row.addWidget(QLabel("Data file:"))
        file_row.addWidget(self.path_edit, 1)
        file_row.addWidget(self.browse_button)
        file_row.addWidget(self.header_check)
        outer.addLayout(file_row)

        opts = QHBoxLayout()
        cols = QGroupBox("Columns")
        cf = QFormLayout(cols)
        self.state_combo = QComboBox()
        self.id_combo = QComboBox()
        self.time_combo = QComboBox()
        self.state_combo.setToolTip("The column holding the observed state of each row")
        self.id_combo.setToolTip("Each value is its own sequence; no transition is counted across two of them")
        self.time_combo.setToolTip("Each sequence is sorted by it (ISO dates/times or numbers); "
                                   "equal times keep their order in the file")
        cf.addRow("State:", self.state_combo)
        cf.addRow("Sequence id:", self.id_combo)
        cf.addRow("Sort by time:", self.time_combo)
        opts.addWidget(cols)

        states = QGroupBox("States")
        sf = QFormLayout(states)
        self.mode_combo = QComboBox()
        for key, text in MODES:
            self.mode_combo.addItem(text, key)
        self.cuts_edit = QLineEdit()
        self.cuts_edit.setPlaceholderText("e.g. -1%, 1%")
        self.cuts_edit.setToolTip("Cut points, increasing. Bands are closed on the left, [a, b): "
                                  "a value equal to a cut point belongs to the band above it.")
        self.quantile_spin = QSpinBox()
        self.quantile_spin.setRange(2, 50)
        self.quantile_spin.setValue(3)
        self.states_edit = QLineEdit()
        self.states_edit.setPlaceholderText("optional fixed list: a, b, c")
        self.states_edit.setToolTip("Any other label in the data is an error; listed states never seen get a row")
        sf.addRow("Make states from:", self.mode_combo)
        sf.addRow("Cut points:", self.cuts_edit)
        sf.addRow("Bands (quantiles):", self.quantile_spin)
        sf.addRow("Fixed state list:", self.states_edit)
        opts.addWidget(states)

        est = QGroupBox("Estimate")
        ef = QFormLayout(est)
        self.prior_check = QCheckBox("Add a pseudo-count α")
        self.prior_check.setToolTip("A symmetric Dirichlet prior added to every entry: estimates become "
                                    "posterior means and no transition is exactly impossible. Off unless chosen.")
        self.prior_spin = QDoubleSpinBox()
        self.prior_spin.setDecimals(3)
        self.prior_spin.setRange(0.001, 100.0)
        self.prior_spin.setValue(0.5)
        self.prior_spin.setEnabled(False)
        self.level_spin = QDoubleSpinBox()
        self.level_spin.setDecimals(3)
        self.level_spin.setRange(0.5, 0.999)
        self.level_spin.setSingleStep(0.01)
        self.level_spin.setValue(0.95)
        self.simultaneous_check = QCheckBox("Simultaneous row intervals (Goodman)")
        self.min_dep_spin = QSpinBox()
        self.min_dep_spin.setRange(1, 1_000_000)
        self.min_dep_spin.setValue(DEFAULT_MIN_DEPARTURES)
        self.min_dep_spin.setToolTip("States left fewer times are reported as poorly estimated")
        pr = QHBoxLayout()
        pr.addWidget(self.prior_check)
        pr.addWidget(self.prior_spin)
        ef.addRow(pr)
        ef.addRow("Confidence level:", self.level_spin)
        ef.addRow(self.simultaneous_check)
        ef.addRow("Few departures below:", self.min_dep_spin)
        opts.addWidget(est)
        outer.addLayout(opts)

        self.error_label = QLabel()
        self.error_label.setObjectName("fitError")
        self.error_label.setWordWrap(True)
        self.error_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.error_label.setStyleSheet("QLabel { color: #b00020; font-weight: bold; }")
        self.error_label.hide()
        outer.addWidget(self.error_label)
        self.summary_label = QLabel("Choose a data file to begin.")
        self.summary_label.setObjectName("fitSummary")
        self.summary_label.setWordWrap(True)
        outer.addWidget(self.summary_label)

        split = QSplitter(Qt.Orientation.Vertical)
        top = QSplitter(Qt.Orientation.Horizontal)
        prev_box = QGroupBox(f"Preview (first {PREVIEW_ROWS} rows, with the state each becomes)")
        pv = QVBoxLayout(prev_box)
        self.preview = QTableWidget()
        self.preview.setObjectName("fitPreview")
        self.preview.setEditTriggers(QTableWidget.EditTrigger.NoEditTriggers)
        self.preview.setAlternatingRowColors(True)
        pv.addWidget(self.preview)
        top.addWidget(prev_box)
        est_box = QGroupBox("Estimated transition probabilities")
        ev = QVBoxLayout(est_box)
        self.estimate_model = EstimateModel(self)
        self.estimate_view = QTableView()
        self.estimate_view.setObjectName("fitEstimates")
        self.estimate_view.setModel(self.estimate_model)
        self.estimate_view.setAlternatingRowColors(True)
        self.estimate_view.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.estimate_view.verticalHeader().hide()
        ev.addWidget(self.estimate_view)
        top.addWidget(est_box)
        top.setSizes([420, 560])
        split.addWidget(top)
        find_box = QGroupBox("Findings")
        fv = QVBoxLayout(find_box)
        self.findings_text = QPlainTextEdit()
        self.findings_text.setObjectName("fitFindings")
        self.findings_text.setReadOnly(True)
        fv.addWidget(self.findings_text)
        split.addWidget(find_box)
        split.setSizes([480, 160])
        outer.addWidget(split, 1)

        caution = QLabel("Estimates describe the data, not necessarily the system that produced them; "
                         "decisions on money, maintenance or safety deserve qualified review.")
        caution.setWordWrap(True)
        caution.setStyleSheet("QLabel { color: palette(mid); }")
        outer.addWidget(caution)

        self.buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        self.ok_button = self.buttons.button(QDialogButtonBox.StandardButton.Ok)
        self.ok_button.setText("Create chain")
        self.ok_button.setEnabled(False)
        self.buttons.accepted.connect(self.accept)
        self.buttons.rejected.connect(self.reject)
        outer.addWidget(self.buttons)

        for combo in (self.state_combo, self.id_combo, self.time_combo, self.mode_combo):
            combo.currentIndexChanged.connect(self._changed)
        for edit in (self.cuts_edit, self.states_edit):
            edit.textChanged.connect(self._changed)
        for spin in (self.quantile_spin, self.prior_spin, self.level_spin, self.min_dep_spin):
            spin.valueChanged.connect(self._changed)
        for check in (self.prior_check, self.simultaneous_check):
            check.toggled.connect(self._changed)
        self._update_mode_widgets()

    # -- file -------------------------------------------------------------
    def choose_file(self) -> None:
        """Ask for a data file (through :func:`app.dialogs.open_path`) and open it."""
        path = dialogs.open_path(self, "Choose a data file", self._folder, DATA_FILTER)
        if path:
            self.set_path(path)

    def _path_typed(self) -> None:
        text = self.path_edit.text().strip()
        if text and text != self._path:
            self.set_path(text)

    def _reload(self) -> None:
        if self._path:
            self.set_path(self._path)

    def set_path(self, path: str | os.PathLike) -> bool:
        """Read a data file, fill the column choices, and fit. Returns False if the file cannot be read."""
        self._path = str(path)
        self._folder = str(Path(path).parent)
        self.path_edit.blockSignals(True)
        self.path_edit.setText(self._path)
        self.path_edit.blockSignals(False)
        QGuiApplication.setOverrideCursor(Qt.CursorShape.WaitCursor)
        try:
            self._table = read_table(path, header=self.header_check.isChecked())
        except LongrunError as exc:
            self._table = None
            self._set_columns(())
            self._show_error(str(exc))
            self._set_fit(None, None)
            return False
        finally:
            QGuiApplication.restoreOverrideCursor()
        self._set_columns(self._table.columns)
        self._guess_mode()
        self.refresh_now()
        return True

    def _guess_mode(self) -> None:
        """Start numeric-looking state columns in quantile mode (a visible default the user can change)."""
        t = self._table
        name = self.state_combo.currentText()
        if t is None or name not in t.columns:
            return
        k = t.columns.index(name)
        cells = [r[k] for r in t.rows[:PREVIEW_ROWS] if k < len(r) and r[k]]
        try:
            numeric = bool(cells) and all(parse_number(c) is not None for c in cells)
        except ValueError:
            numeric = False
        mode = "quantiles" if numeric and len(set(cells)) > 12 else "labels"
        self.mode_combo.blockSignals(True)
        self.mode_combo.setCurrentIndex([m for m, _ in MODES].index(mode))
        self.mode_combo.blockSignals(False)
        self._update_mode_widgets()

    def _set_columns(self, columns) -> None:
        combos = (self.state_combo, self.id_combo, self.time_combo)
        for c in combos:
            c.blockSignals(True)
            c.clear()
        self.state_combo.addItems(list(columns))
        self.id_combo.addItem(NO_COLUMN)
        self.id_combo.addItems(list(columns))
        self.time_combo.addItem(NO_COLUMN)
        self.time_combo.addItems(list(columns))
        folded = [c.casefold() for c in columns]
        time_k = next((k for k, c in enumerate(folded) if c in _TIME_NAMES), None)
        id_k = next((k for k, c in enumerate(folded) if c in _ID_NAMES), None)
        if time_k is not None:
            self.time_combo.setCurrentIndex(time_k + 1)
        if id_k is not None and id_k != time_k:
            self.id_combo.setCurrentIndex(id_k + 1)
        taken = {time_k, id_k}
        state_k = next((k for k in range(len(columns) - 1, -1, -1) if k not in taken), 0)
        if columns:
            self.state_combo.setCurrentIndex(state_k)
        for c in combos:
            c.blockSignals(False)

    # -- options ----------------------------------------------------------
    def set_options(self, **options: Any) -> None:
        """Set several choices at once (keys as in :meth:`options`) and fit once."""
        widgets = {
            "column": self.state_combo,
            "id_column": self.id_combo,
            "time_column": self.time_combo,
        }
        for w in (*widgets.values(), self.mode_combo, self.cuts_edit, self.states_edit, self.quantile_spin,
                  self.prior_check, self.prior_spin, self.level_spin, self.simultaneous_check, self.min_dep_spin):
            w.blockSignals(True)
        try:
            for key, value in options.items():
                if key in widgets:
                    combo = widgets[key]
                    k = combo.findText(NO_COLUMN if value is None else str(value))
                    if k < 0:
                        raise KeyError(f"no column {value!r}")
                    combo.setCurrentIndex(k)
                elif key == "mode":
                    self.mode_combo.setCurrentIndex([m for m, _ in MODES].index(value))
                elif key == "cuts":
                    self.cuts_edit.setText(str(value))
                elif key == "quantiles":
                    self.quantile_spin.setValue(int(value))
                elif key == "states":
                    self.states_edit.setText("" if value is None else ", ".join(value))
                elif key == "prior":
                    self.prior_check.setChecked(value is not None)
                    if value is not None:
                        self.prior_spin.setValue(float(value))
                elif key == "level":
                    self.level_spin.setValue(float(value))
                elif key == "simultaneous":
                    self.simultaneous_check.setChecked(bool(value))
                elif key == "min_departures":
                    self.min_dep_spin.setValue(int(value))
                else:
                    raise KeyError(f"unknown option {key!r}")
        finally:
            for w in (*widgets.values(), self.mode_combo, self.cuts_edit, self.states_edit, self.quantile_spin,
                      self.prior_check, self.prior_spin, self.level_spin, self.simultaneous_check,
                      self.min_dep_spin):
                w.blockSignals(False)
        self._update_mode_widgets()
        self.refresh_now()

    def options(self) -> dict:
        """The current choices, as keyword arguments of the core functions."""
        mode = self.mode_combo.currentData()

        def col(combo):
            t = combo.currentText()
            return None if (not t or t == NO_COLUMN) else t

        states_text = self.states_edit.text().strip()
        return {
            "column": col(self.state_combo),
            "id_column": col(self.id_combo),
            "time_column": col(self.time_combo),
            "mode": mode,
            "cuts": self.cuts_edit.text().strip() if mode == "cuts" else None,
            "quantiles": self.quantile_spin.value() if mode == "quantiles" else None,
            "states": [s.strip() for s in states_text.split(",")] if (mode == "labels" and states_text) else None,
            "prior": self.prior_spin.value() if self.prior_check.isChecked() else None,
            "level": round(self.level_spin.value(), 3),
            "simultaneous": self.simultaneous_check.isChecked(),
            "min_departures": self.min_dep_spin.value(),
        }

    def _update_mode_widgets(self) -> None:
        mode = self.mode_combo.currentData()
        self.cuts_edit.setEnabled(mode == "cuts")
        self.quantile_spin.setEnabled(mode == "quantiles")
        self.states_edit.setEnabled(mode == "labels")
        self.prior_spin.setEnabled(self.prior_check.isChecked())

    def _changed(self, *_: Any) -> None:
        self._update_mode_widgets()
        self._timer.start()

    @property
    def pending(self) -> bool:
        """A refit is scheduled (choices changed less than 200 ms ago)."""
        return self._timer.isActive()

    # -- fitting ----------------------------------------------------------
    def refresh_now(self) -> None:
        """Re-read the observations with the current choices and refit (synchronously)."""
        self._timer.stop()
        if self._table is None:
            return
        o = self.options()
        if o["mode"] == "cuts" and not o["cuts"]:
            self._show_error("Type the cut points, e.g. -1%, 1%.")
            self._set_fit(None, None)
            return
        try:
            obs = observations_from_table(
                self._table,
                column=o["column"],
                id_column=o["id_column"],
                time_column=o["time_column"],
                cuts=o["cuts"],
                quantiles=o["quantiles"],
                states=o["states"],
            )
            fit = fit_observations(
                obs,
                prior=o["prior"],
                level=o["level"],
                simultaneous=o["simultaneous"],
                min_departures=o["min_departures"],
            )
        except LongrunError as exc:
            self._show_error(str(exc))
            self._set_fit(None, None)
            return
        self._show_error(None)
        self._set_fit(obs, fit)

    def _show_error(self, message: str | None) -> None:
        self._error = message
        self.error_label.setText(message or "")
        self.error_label.setVisible(bool(message))

    def _set_fit(self, obs, fit: Fit | None) -> None:
        self._obs = obs
        self._fit = fit
        self._chain = None
        self.estimate_model.set_fit(fit)
        self.ok_button.setEnabled(fit is not None)
        self._fill_preview(obs)
        if fit is None:
            self.summary_label.setText("No chain can be fitted with these choices." if self._table else
                                       "Choose a data file to begin.")
            self.findings_text.setPlainText("")
            return
        self.summary_label.setText(self._summary(obs, fit))
        lines = [f"{f.level}: {f.message}" for f in fit.findings]
        t = fit.order_test
        if t is not None and t.df > 0:
            verdict = "rejected" if t.rejected else "not rejected"
            lines.append(f"order test (Anderson & Goodman): G² = {t.g2:.4g}, df = {t.df}, p = {t.p_value:.3g}; "
                         f"first order {verdict} at {t.alpha:g}")
        self.findings_text.setPlainText("\n".join(lines) if lines else "No findings.")

    def _summary(self, obs, fit: Fit) -> str:
        parts = [
            f"{obs.rows} rows",
            f"{obs.n_ids} sequence{'s' if obs.n_ids != 1 else ''}",
            f"{fit.n_transitions} transitions",
            f"{fit.n} states",
        ]
        text = ", ".join(parts) + "."
        if obs.binning is not None:
            b = obs.binning
            cuts = ", ".join(f"{c * 100:.6g}%" if b.percent else f"{c:.6g}" for c in b.cuts)
            text += (f" Cut points: {cuts} → bands: " + " | ".join(b.labels) +
                     ". Bands are [a, b): a value on a cut point goes to the band above.")
        if not fit.complete:
            text += " Some states are never left: their rows stay empty until you add a pseudo-count or write them."
        return text

    def _fill_preview(self, obs) -> None:
        t = self._table
        self.preview.clear()
        if t is None:
            self.preview.setRowCount(0)
            self.preview.setColumnCount(0)
            return
        rows = t.rows[:PREVIEW_ROWS]
        headers = list(t.columns) + ["→ state"]
        self.preview.setColumnCount(len(headers))
        self.preview.setRowCount(len(rows))
        self.preview.setHorizontalHeaderLabels(headers)
        self.preview.setVerticalHeaderLabels([str(ln) for ln in t.lines[:PREVIEW_ROWS]])
        col = None
        if obs is not None:
            col = t.columns.index(obs.column)
        for r, row in enumerate(rows):
            for c in range(len(t.columns)):
                self.preview.setItem(r, c, QTableWidgetItem(row[c] if c < len(row) else ""))
            self.preview.setItem(r, len(t.columns), QTableWidgetItem(self._state_of(obs, row, col)))
        self.preview.resizeColumnsToContents()

    @staticmethod
    def _state_of(obs, row, col) -> str:
        if obs is None or col is None:
            return ""
        cell = row[col] if col < len(row) else ""
        if not cell:
            return "(gap)"
        if obs.binning is None:
            return cell
        try:
            v, _ = parse_number(cell)
        except ValueError:
            return "?"
        return obs.binning.labels[int(obs.binning.assign(np.array([v]))[0])]

    # -- results ----------------------------------------------------------
    def fit(self) -> Fit | None:
        """The current :class:`~core.estimate.Fit` (None when the choices do not give one)."""
        return self._fit

    def observations(self):
        """The current :class:`~core.datafile.Observations`, or None."""
        return self._obs

    def error(self) -> str | None:
        """The message shown when the current choices fail, or None."""
        return self._error

    def chain(self):
        """The fitted :class:`~core.model.Chain` (built on demand; None without a fit)."""
        if self._fit is None:
            return None
        if self._chain is None:
            name = f"Fitted from {Path(self._path).name}" if self._path else ""
            self._chain = self._fit.to_chain(name=name)
        return self._chain

    def accept(self) -> None:
        if self.pending:
            self.refresh_now()
        chain = self.chain()
        if chain is None:
            return
        self.chainFitted.emit(chain)
        super().accept()

    @classmethod
    def get_chain(cls, parent: QWidget | None = None, *, path: str | os.PathLike | None = None,
                  folder: str = ""):
        """Run the dialog modally; return the fitted chain, or None if cancelled."""
        dlg = cls(parent, path=path, folder=folder)
        try:
            if dlg.exec() == QDialog.DialogCode.Accepted:
                return dlg.chain()
            return None
        finally:
            dlg.deleteLater()
