"""The findings pane: what in the chain and in the plan can mislead, in plain words.

Lists :func:`core.findings.find_all` for the current chain and the shared plan
(:mod:`app.plan_form`), most serious first, each with its severity, title,
explanation and remedy.  Selecting a finding selects its states and
transitions in the document, so the canvas and the matrix grid highlight them
(and the canvas scrolls to them).  The list is recomputed in a worker thread
(debounced) after every edit of the chain and every change of the plan.
"""
from __future__ import annotations

import html

from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QFont, QIcon, QPainter, QPainterPath, QPen, QPixmap
from PySide6.QtWidgets import (
    QHeaderView,
    QLabel,
    QSplitter,
    QTextBrowser,
    QTreeWidget,
    QTreeWidgetItem,
    QVBoxLayout,
)

from . import palette as pal
from .panels import PanelSpec, Workspace
from .plan_form import BackgroundJob, JobPanel, PlanValues, resolve_plan, shared_plan

__all__ = ["FindingsPane", "FindingsOutcome", "findings_job", "severity_icon", "PANELS"]

SEVERITY_TEXT = {"error": "Error", "warning": "Warning", "note": "Note"}
SEVERITY_COLOUR = {"error": pal.OKABE_ITO["vermillion"], "warning": pal.OKABE_ITO["orange"],
                   "note": pal.OKABE_ITO["blue"]}


def severity_icon(severity: str, size: int = 18) -> QIcon:
    """Error: a round mark with '!'; warning: a triangle with '!'; note: a rounded square with 'i'."""
    pix = QPixmap(size, size)
    pix.fill(Qt.GlobalColor.transparent)
    p = QPainter(pix)
    p.setRenderHint(QPainter.RenderHint.Antialiasing)
    c = QColor(SEVERITY_COLOUR.get(severity, pal.INK_SOFT))
    p.setPen(QPen(c.darker(130), 1.2))
    p.setBrush(c)
    m = 1.5
    if severity == "error":
        p.drawEllipse(QRectF(m, m, size - 2 * m, size - 2 * m))
        mark = "!"
    elif severity == "warning":
        path = QPainterPath(QPointF(size / 2, m))
        path.lineTo(size - m, size - m)
        path.lineTo(m, size - m)
        path.closeSubpath()
        p.drawPath(path)
        mark = "!"
    else:
        p.drawRoundedRect(QRectF(m, m, size - 2 * m, size - 2 * m), 3, 3)
        mark = "i"
    f = QFont(pal.ui_font(bold=True))
    f.setPixelSize(int(size * 0.62))
    p.setFont(f)
    p.setPen(QColor("#FFFFFF") if severity != "warning" else QColor("#1E1E1E"))
    r = QRectF(0, size * 0.12 if severity == "warning" else 0, size, size)
    p.drawText(r, Qt.AlignmentFlag.AlignCenter, mark)
    p.end()
    return QIcon(pix)


class FindingsOutcome:
    """Findings of one chain and plan (built in the worker)."""

    def __init__(self, chain, values: PlanValues, findings: tuple, plan_text: str, note: str = ""):
        self.chain = chain
        self.values = values
        self.findings = findings
        self.plan_text = plan_text
        self.note = note


def findings_job(chain, values: PlanValues) -> FindingsOutcome:
    """``core.findings.find_all`` for ``chain`` and the plan ``values`` (worker thread)."""
    from core.findings import find_all
    from core.units import format_count

    if chain.n == 0:
        return FindingsOutcome(chain, values, (), "", "the chain has no states yet")
    if not chain.is_valid:
        return FindingsOutcome(chain, values, find_all(chain), "")
    P = chain.matrix()
    from core.structure import classify

    st = classify(P)
    res = resolve_plan(chain, values, P, st)
    if res.plan is None:
        found = find_all(chain, epsilon=values.epsilon)
        return FindingsOutcome(chain, values, found, "",
                               f"the plan is left out: {res.error}" if res.error else "")
    est = "final step" if values.estimator == "final" else "time average"
    text = (f"{format_count(values.replicates)} replicates, burn-in {format_count(values.burn_in)} then "
            f"{format_count(values.steps)} steps from {res.start_text}, {est}")
    found = find_all(chain, plan=res.plan, epsilon=values.epsilon)
    return FindingsOutcome(chain, values, found, text)


class FindingsPane(JobPanel):
    """The list of findings and the selected one's explanation (a dock panel).

    Signals
    -------
    findingsShown(int)
        The list was refreshed (number of findings).
    """

    findingsShown = Signal(int)

    def __init__(self, workspace: Workspace):
        super().__init__()
        self.workspace = workspace
        self.run_plan = shared_plan(workspace)
        self.outcome: FindingsOutcome | None = None
        self.job = BackgroundJob("findings", delay_ms=workspace.settings.get("analysis/delay_ms"), parent=self)
        self.job.resultReady.connect(self._show)
        self.job.failed.connect(self._failed)

        self.summary = QLabel("Looking for findings…")
        self.summary.setObjectName("findingsSummary")
        self.summary.setWordWrap(True)
        self.summary.setStyleSheet("padding: 6px 6px 4px 6px; font-weight: 600;")
        self.tree = QTreeWidget()
        self.tree.setObjectName("findingsList")
        self.tree.setColumnCount(2)
        self.tree.setHeaderLabels(["Severity", "Finding"])
        self.tree.setRootIsDecorated(False)
        self.tree.setUniformRowHeights(True)
        self.tree.setAlternatingRowColors(True)
        self.tree.header().setSectionResizeMode(0, QHeaderView.ResizeMode.ResizeToContents)
        self.tree.header().setStretchLastSection(True)
        self.tree.itemSelectionChanged.connect(self._selected)
        self.detail = QTextBrowser()
        self.detail.setObjectName("findingsDetail")
        self.detail.setOpenLinks(False)
        self._hint = (f"<p style='color:{pal.INK_SOFT.name()}'>Select a finding to read its explanation and remedy; "
                      "its states and transitions are highlighted on the canvas and in the matrix.</p>")
        self.detail.setHtml(self._hint)
        split = QSplitter(Qt.Orientation.Vertical)
        split.addWidget(self.tree)
        split.addWidget(self.detail)
        split.setStretchFactor(0, 2)
        split.setStretchFactor(1, 3)
        split.setChildrenCollapsible(False)
        self.splitter = split
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(0)
        lay.addWidget(self.summary)
        lay.addWidget(split, 1)

        self.run_plan.changed.connect(self._plan_changed)
        workspace.analysis.structureReady.connect(self._chain_ready)
        if workspace.analysis.structure_report is not None:
            self.request()

    # -- requests --------------------------------------------------------------------
    def _plan_changed(self, values: PlanValues) -> None:
        o = self.outcome
        if o is not None and o.chain is self.workspace.document.chain and o.values.check_key() == values.check_key() \
                and o.values.epsilon == values.epsilon:
            return
        self.request()

    def _chain_ready(self, report) -> None:
        if report.chain is self.workspace.document.chain:
            self.request()

    def request(self) -> None:
        self.job.submit(findings_job, self.workspace.document.chain, self.run_plan.values)

    # -- display -------------------------------------------------------------------------
    def _failed(self, message: str) -> None:
        self.summary.setText("Findings could not be computed: " + message.split("\n")[0])
        self.summary.setToolTip(message)

    def _show(self, out: FindingsOutcome) -> None:
        if out.chain is not self.workspace.document.chain or out.values != self.run_plan.values:
            return
        self.outcome = out
        keep = self._current_key()
        self.tree.blockSignals(True)
        self.tree.clear()
        for f in out.findings:
            item = QTreeWidgetItem([SEVERITY_TEXT.get(f.severity, f.severity), f.title])
            item.setIcon(0, severity_icon(f.severity))
            item.setData(0, Qt.ItemDataRole.UserRole, f)
            item.setToolTip(1, f.explanation)
            if f.severity == "error":
                font = item.font(1)
                font.setBold(True)
                item.setFont(1, font)
            self.tree.addTopLevelItem(item)
        self.tree.blockSignals(False)
        counts = {s: sum(1 for f in out.findings if f.severity == s) for s in ("error", "warning", "note")}
        k = len(out.findings)
        if k == 0:
            text = "✓ No findings: nothing in this chain" + (" or plan" if out.plan_text else "") + " is known to mislead."
            self.summary.setStyleSheet("padding: 6px; font-weight: 600; color: #00785A;")
        else:
            parts = [f"{counts[s]} {s}{'s' if counts[s] != 1 else ''}" for s in ("error", "warning", "note")
                     if counts[s]]
            text = ", ".join(parts) if len(parts) == 1 else f"{k} findings: " + ", ".join(parts)
            self.summary.setStyleSheet("padding: 6px 6px 4px 6px; font-weight: 600;")
        if out.plan_text:
            text += f" — with the plan: {out.plan_text}."
        elif out.note:
            text += f" ({out.note})."
        self.summary.setText(text)
        self.detail.setHtml(self._overview(out))
        rows = max(1, min(len(out.findings), 8))
        head = self.tree.header().sizeHint().height()
        row_h = self.tree.sizeHintForRow(0) if len(out.findings) else 20
        total = sum(self.splitter.sizes()) or 400
        list_h = min(head + rows * max(row_h, 18) + 8, total // 2)
        self.splitter.setSizes([list_h, max(80, total - list_h)])
        if keep is not None:
            for row in range(self.tree.topLevelItemCount()):
                it = self.tree.topLevelItem(row)
                f = it.data(0, Qt.ItemDataRole.UserRole)
                if (f.code, f.state_ids) == keep:
                    self.tree.blockSignals(True)
                    it.setSelected(True)
                    self.tree.setCurrentItem(it)
                    self.tree.blockSignals(False)
                    self._show_detail(f)
                    break
        self.findingsShown.emit(k)

    def _overview(self, out: FindingsOutcome) -> str:
        """Every finding's title and first sentence (shown while none is selected)."""
        if not out.findings:
            return self._hint
        parts = [self._hint]
        for f in out.findings:
            colour = SEVERITY_COLOUR.get(f.severity, pal.INK_SOFT).darker(120).name()
            first = f.explanation.split(". ")[0].rstrip(".") + "."
            parts.append(f"<p style='margin:6px 0 0 0'><b style='color:{colour}'>{SEVERITY_TEXT.get(f.severity, '')}"
                         f"</b> · <b>{html.escape(f.title)}</b><br>{html.escape(first)}</p>")
        return "".join(parts)

    def _current_key(self):
        items = self.tree.selectedItems()
        if not items:
            return None
        f = items[0].data(0, Qt.ItemDataRole.UserRole)
        return (f.code, f.state_ids)

    def finding_items(self) -> list[QTreeWidgetItem]:
        return [self.tree.topLevelItem(i) for i in range(self.tree.topLevelItemCount())]

    def select_finding(self, code: str) -> bool:
        """Select the first finding with ``code`` (as a click would); False when there is none."""
        for it in self.finding_items():
            if it.data(0, Qt.ItemDataRole.UserRole).code == code:
                self.tree.setCurrentItem(it)
                it.setSelected(True)
                return True
        return False

    def _show_detail(self, f) -> None:
        colour = SEVERITY_COLOUR.get(f.severity, pal.INK_SOFT).darker(120).name()
        parts = [f"<p style='margin:0'><b style='color:{colour}'>{SEVERITY_TEXT.get(f.severity, '')}</b> · "
                 f"<span style='color:{pal.INK_SOFT.name()}'>{html.escape(f.code)}</span></p>",
                 f"<h3 style='margin:4px 0'>{html.escape(f.title)}</h3>",
                 f"<p>{html.escape(f.explanation)}</p>"]
        if f.remedy:
            parts.append(f"<p><b>What to do:</b> {html.escape(f.remedy)}</p>")
        if f.state_ids:
            shown = ", ".join(f.state_ids[:16]) + (" …" if len(f.state_ids) > 16 else "")
            parts.append(f"<p style='color:{pal.INK_SOFT.name()}'>States: {html.escape(shown)}</p>")
        if f.transition_ids:
            shown = ", ".join(f"{a} → {b}" for a, b in f.transition_ids[:12])
            parts.append(f"<p style='color:{pal.INK_SOFT.name()}'>Transitions: {html.escape(shown)}</p>")
        self.detail.setHtml("".join(parts))

    def _selected(self) -> None:
        items = self.tree.selectedItems()
        if not items:
            return
        f = items[0].data(0, Qt.ItemDataRole.UserRole)
        self._show_detail(f)
        doc = self.workspace.document
        ids = set(doc.chain.ids)
        pairs = {(t.source, t.target) for t in doc.chain.transitions}
        states = [s for s in f.state_ids if s in ids]
        trans = [tuple(t) for t in f.transition_ids if tuple(t) in pairs]
        doc.set_selection(states, trans)
        self._reveal(states, trans)

    def _reveal(self, states, trans) -> None:
        """Scroll the canvas so the highlighted states and transitions are in view."""
        reveal = getattr(self.workspace.canvas, "reveal_selection", None)
        if callable(reveal) and (states or trans):
            reveal()



PANELS = [
    PanelSpec("findings", "Findings", FindingsPane, area=Qt.DockWidgetArea.RightDockWidgetArea,
              tab_with="plan", shortcut="Ctrl+Shift+F"),
]
