"""The long-run panel: the exact long-run behaviour of the chain, updated after every edit.

The analysis is :func:`core.analysis.iter_analyze` (the ``longrun analyze``
computation), registered with the window's debounced, threaded
:class:`~app.analysis_service.AnalysisService`: it runs ~150 ms after the
last edit, in the worker thread, and a result for a superseded chain is
dropped.  For a chain fitted from data (one whose file records its transition
counts, :func:`core.estimate.fit_from_chain`), a second job runs
:func:`core.estimate.iter_derived_uncertainty` and the panel shows the
intervals next to the point values.

Shown: the communicating classes (closed or transient, period, cyclic
subclasses), the stationary law of each closed class as a table and a bar
chart, the absorption probabilities and expected steps to absorption from
the transient states, the mixing time at the user's epsilon, the relaxation
time, Kemeny's constant, and the mean return times; every time is given in
steps and in the chain's own step unit (``~27 million years``).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QSizePolicy,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from . import palette as pal
from .panels import PanelSpec, Workspace, fact_rows, scroll_into, separator
from .plan_form import PlanFields, fmt_p, preload_core, shared_plan, table_filling
from .plot_export import ChartBox, nice_upper, state_ticks

__all__ = ["LongRunPanel", "split_time", "steps_text", "PANELS", "JOB", "INTERVAL_JOB", "INTERVAL_DRAWS"]

JOB = "longrun"
INTERVAL_JOB = "longrun-intervals"
#: Matrices drawn for the intervals of a fitted chain (as ``longrun fit --draws``).
INTERVAL_DRAWS = 1000
#: Rows a table shows before it scrolls.
TABLE_ROWS = 10


def _plural(unit: str, value: float) -> str:
    if value == 1 or unit.endswith("s") or len(unit) <= 3:
        return unit
    return unit + "s"


def split_time(x: float | None, step) -> tuple[str, str]:
    """A number of steps as two cells: the count, and its meaning in the chain's step unit.

    >>> from core.model import Step
    >>> split_time(1e12, Step(1, "day"))
    ('1.00e12', '~2.74 billion years')
    """
    from core.units import format_count, format_duration, step_seconds

    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "—", ""
    x = float(x)
    if math.isinf(x):
        return "never", ""
    head = format_count(x)
    if step is None:
        return head, ""
    secs = step_seconds(step)
    if secs is not None:
        return head, "~" + format_duration(x * secs)
    total = x * float(step.value)
    return head, f"{format_count(total)} {_plural(str(step.unit).strip(), total)}"


def steps_text(x: float | None, step) -> str:
    """``core.units.format_steps`` (one phrase with the unit)."""
    from core.units import format_steps

    return format_steps(x, step)


def _interval_text(lo: float | None, hi: float | None, kind: str = "p") -> str:
    if lo is None or hi is None:
        return ""
    if kind == "p":
        return f"[{fmt_p(lo)}, {fmt_p(hi)}]"
    from core.units import format_count

    return f"[{format_count(lo)}, {format_count(hi)}]"


@dataclass
class _Params:
    """What the worker jobs read (a plain object, never the widget)."""

    epsilon: float = 0.25


def _table(columns: list[str], name: str) -> QTableWidget:
    t = QTableWidget(0, len(columns))
    t.setObjectName(name)
    t.setHorizontalHeaderLabels(columns)
    t.verticalHeader().setVisible(False)
    t.setEditTriggers(QTableWidget.EditTrigger.NoEditTriggers)
    t.setSelectionBehavior(QTableWidget.SelectionBehavior.SelectRows)
    t.setAlternatingRowColors(True)
    t.setWordWrap(False)
    t.verticalHeader().setDefaultSectionSize(t.fontMetrics().height() + 8)
    hh = t.horizontalHeader()
    hh.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
    hh.setStretchLastSection(True)
    t.setSizeAdjustPolicy(QTableWidget.SizeAdjustPolicy.AdjustIgnored)
    return t


def _fit_height(t: QTableWidget, rows_max: int = TABLE_ROWS) -> None:
    rows = min(t.rowCount(), rows_max)
    h = t.horizontalHeader().height() + 2 * t.frameWidth() + 2
    h += sum(t.rowHeight(r) for r in range(rows))
    if t.rowCount() > rows_max:
        h += 4
    t.setFixedHeight(max(h, t.horizontalHeader().height() + 8))


def _cell(text: str, *, right: bool = False, tip: str = "", bold: bool = False,
          colour: QColor | None = None) -> QTableWidgetItem:
    it = QTableWidgetItem(text)
    if right:
        it.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
    if tip:
        it.setToolTip(tip)
    if bold:
        f = it.font()
        f.setBold(True)
        it.setFont(f)
    if colour is not None:
        it.setForeground(colour)
    return it


def _section(text: str) -> QLabel:
    lab = QLabel(text)
    lab.setStyleSheet(f"font-weight: 700; color: {pal.INK.name()}; padding-top: 6px;")
    return lab


def _note(text: str = "") -> QLabel:
    lab = QLabel(text)
    lab.setWordWrap(True)
    lab.setStyleSheet(f"color: {pal.INK_SOFT.name()};")
    lab.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
    return lab


class LongRunPanel(QWidget):
    """Exact long-run answers for the current chain (a dock panel).

    Attributes
    ----------
    report : core.analysis.LongRunReport or None
        The analysis on screen (of ``chain``).
    chain : core.model.Chain or None
    uncertainty : core.estimate.DerivedUncertainty or None
        Intervals of a fitted chain's answers (None for other chains).
    """

    def __init__(self, workspace: Workspace):
        super().__init__()
        preload_core()
        self.workspace = workspace
        self.run_plan = shared_plan(workspace)
        self.report = None
        self.chain = None
        self.uncertainty = None
        self._params = _Params(self.run_plan.values.epsilon)

        self.title = QLabel("Long run")
        self.title.setObjectName("longrunTitle")
        self.title.setStyleSheet(f"font-size: 13pt; font-weight: 700; color: {pal.INK.name()};")
        self.title.setWordWrap(True)
        self.summary = QLabel("Waiting for the analysis…")
        self.summary.setObjectName("longrunSummary")
        self.summary.setWordWrap(True)
        self.summary.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.busy_label = QLabel("")
        self.busy_label.setStyleSheet(f"color: {pal.INK_SOFT.name()};")
        self.eps_fields = PlanFields(workspace, self.run_plan, ("epsilon",), columns=1)
        self.eps_fields.setSizePolicy(QSizePolicy.Policy.Maximum, QSizePolicy.Policy.Fixed)

        self.classes = _table(["Class", "Kind", "Period", "States"], "longrunClasses")
        self.law_chart = ChartBox("Stationary law of each closed class", name="longrunLawChart")
        self.law_chart.set_labels("", "long-run share")
        self.law_chart.setMinimumHeight(200)
        self.law_chart.setMaximumHeight(250)
        self.law_bars = pg.BarGraphItem(x=[], height=[], width=0.7, brush=pal.tint(pal.class_colour(0), 0.35),
                                       pen=pg.mkPen(pal.class_colour(0)))
        self.law_err = pg.ErrorBarItem(x=np.zeros(0), y=np.zeros(0), top=np.zeros(0), bottom=np.zeros(0),
                                       beam=0.2, pen=pg.mkPen(pal.INK, width=1.3))
        self.law_chart.item.addItem(self.law_bars)
        self.law_chart.item.addItem(self.law_err)
        self.law_note = _note()
        self.laws = _table(["State", "Class", "Long-run share", "Mean return time (steps)", "in real time"],
                           "longrunLaws")
        self.absorb_title = _section("Leaving the transient states")
        self.absorb = _table(["From", "Steps to absorption", "in real time"], "longrunAbsorption")
        self.absorb_note = _note()
        self.times, self.time_labels = fact_rows(
            (("mixing", "Mixing time"), ("relaxation", "Relaxation time"),
             ("gap", "Spectral gap"), ("kemeny", "Kemeny's constant"),
             ("reversible", "Detailed balance")), prefix="longrunTime_")
        self.interval_note = _note()
        self.interval_note.setObjectName("longrunIntervals")
        self.caution = _note("Results describe the model, not the world; decisions on money, maintenance or "
                             "safety need qualified review and follow local codes and licensed practice.")

        body = QWidget()
        self.body = body
        lay = QVBoxLayout(body)
        lay.setContentsMargins(8, 6, 8, 8)
        lay.setSpacing(5)
        head = QHBoxLayout()
        head.addWidget(self.title, 1)
        head.addWidget(self.eps_fields, 0, Qt.AlignmentFlag.AlignTop)
        lay.addLayout(head)
        lay.addWidget(self.summary)
        lay.addWidget(self.busy_label)
        lay.addWidget(_section("Classes"))
        lay.addWidget(self.classes)
        lay.addWidget(_section("Stationary laws and mean return times"))
        lay.addWidget(self.law_chart)
        lay.addWidget(self.law_note)
        lay.addWidget(self.laws)
        lay.addWidget(self.absorb_title)
        lay.addWidget(self.absorb)
        lay.addWidget(self.absorb_note)
        lay.addWidget(_section("Times"))
        lay.addLayout(self.times)
        lay.addWidget(self.interval_note)
        lay.addWidget(separator())
        lay.addWidget(self.caution)
        lay.addStretch(1)
        scroll_into(self, body)

        an = workspace.analysis
        an.resultReady.connect(self._on_result)
        an.jobFailed.connect(self._on_failed)
        an.structureReady.connect(self._on_structure)
        an.busyChanged.connect(lambda b: self.busy_label.setText("updating…" if b else ""))
        self.run_plan.changed.connect(self._plan_changed)
        params = self._params

        def longrun_job(chain, P, structure):
            from core.analysis import iter_analyze

            return (yield from iter_analyze(chain, epsilon=params.epsilon))

        def interval_job(chain, P, structure):
            from core.estimate import fit_from_chain, iter_derived_uncertainty

            fit = fit_from_chain(chain)
            if fit is None or not fit.complete:
                return None
            return (yield from iter_derived_uncertainty(fit, draws=INTERVAL_DRAWS, epsilon=params.epsilon))

        self._show_empty("Waiting for the analysis…")
        an.register(JOB, longrun_job)
        an.register(INTERVAL_JOB, interval_job)
        for name in (JOB, INTERVAL_JOB):
            res = an.results.get(name)
            if res is not None and res.chain is workspace.document.chain:
                self._on_result(name, res)

    # -- inputs ----------------------------------------------------------------------
    def _plan_changed(self, values) -> None:
        if values.epsilon != self._params.epsilon:
            self._params.epsilon = values.epsilon
            self.workspace.analysis.request(force=True)

    def _on_structure(self, report) -> None:
        if report.chain is not self.workspace.document.chain:
            return
        if report.structure is None:
            self.report = None
            self.uncertainty = None
            chain = report.chain
            if chain.n == 0:
                self._show_empty("Add states to see the chain's long-run behaviour.")
            else:
                k = len(chain.problems)
                self._show_empty(f"The chain has {k} problem{'s' if k != 1 else ''} (see Checks): the long run is "
                                 "computed once every row sums to 1.")

    def _on_failed(self, name: str, message: str) -> None:
        if name == JOB:
            self.report = None
            self._show_empty("The analysis failed: " + message.split("\n")[0])
        elif name == INTERVAL_JOB:
            self.uncertainty = None
            self.interval_note.setText("Intervals not available: " + message.split("\n")[0])

    def _on_result(self, name: str, result) -> None:
        if result.chain is not self.workspace.document.chain:
            return
        if name == JOB:
            self.chain = result.chain
            self.report = result.value
            if self.uncertainty is not None and getattr(self, "_unc_chain", None) is not result.chain:
                self.uncertainty = None
            self._show()
        elif name == INTERVAL_JOB:
            self.uncertainty = result.value
            self._unc_chain = result.chain
            if self.report is not None and self.chain is result.chain:
                self._show()

    # -- display ------------------------------------------------------------------------
    def _show_empty(self, text: str) -> None:
        chain = self.workspace.document.chain
        self.title.setText(f"Long run of “{chain.name}”" if chain.name else "Long run")
        self.summary.setText(text)
        for t in (self.classes, self.laws, self.absorb):
            t.setRowCount(0)
            _fit_height(t)
        self.law_bars.setOpts(x=[], height=[])
        self.law_err.setData(x=np.zeros(0), y=np.zeros(0), top=np.zeros(0), bottom=np.zeros(0))
        self.law_note.setText("")
        self.absorb_note.setText("")
        self.absorb.setVisible(False)
        self.absorb_title.setVisible(False)
        for lab in self.time_labels.values():
            lab.setText("—")
        self.interval_note.setText("")

    def _intervals(self) -> dict:
        out: dict = {"stationary": {}, "expected_steps": {}, "absorption": {}, "mixing_time": None}
        u = self.uncertainty
        if u is None:
            return out
        for v in u.values:
            if v.quantity == "mixing_time":
                out["mixing_time"] = (v.low, v.high)
            elif v.quantity == "absorption":
                out["absorption"][(v.state, v.target)] = (v.low, v.high)
            else:
                out[v.quantity][v.state] = (v.low, v.high)
        return out

    def _show(self) -> None:
        r = self.report
        chain = self.chain
        if r is None or chain is None:
            return
        s = r.structure
        step = r.step
        iv = self._intervals()
        self.title.setText(f"Long run of “{r.name}”" if r.name else "Long run")
        closed_rank = {ci: k for k, ci in enumerate(s.closed)}

        # summary
        ncl = len(s.closed)
        periods = [s.classes[ci].period for ci in s.closed]
        if s.irreducible:
            per = periods[0]
            text = ("Irreducible and aperiodic: every state leads to every other, and from any start the chain "
                    "settles to one stationary law." if per == 1 else
                    f"Irreducible with period {per}: the law at step t keeps cycling through {per} groups of "
                    "states; only the share of time settles to the stationary law.")
        elif ncl == 1:
            text = (f"One closed class (C1, {s.classes[s.closed[0]].size} states) and "
                    f"{len(s.transient_states)} transient state{'s' if len(s.transient_states) != 1 else ''}: "
                    "from any start the chain ends up in C1.")
        else:
            text = (f"{ncl} closed classes and {len(s.transient_states)} transient "
                    f"state{'s' if len(s.transient_states) != 1 else ''}: where the chain ends up depends on the "
                    "start.")
        unit = f" One step is {step.value:g} {step.unit}." if step is not None else ""
        self.summary.setText(text + unit)

        # classes
        with table_filling(self.classes):
            self._fill_classes(r, closed_rank)
        _fit_height(self.classes)
        order: list[tuple[int, int]] = []  # (state, closed rank)
        for k, ci in enumerate(s.closed):
            for i in s.classes[ci].states:
                order.append((i, k))
        with table_filling(self.laws):
            self._fill_laws(r, chain, order, iv)
        self.laws.setColumnHidden(4, step is None)  # "in real time" needs the file's step unit
        _fit_height(self.laws)
        self._chart_laws(r, order, iv)
        T = s.transient_states
        self.absorb.setVisible(bool(T))
        self.absorb_title.setVisible(bool(T))
        if T:
            cols = ["From"] + [f"ends in C{k + 1}" for k in range(ncl)] + ["Steps to absorption", "in real time"]
            self.absorb.setColumnCount(len(cols))
            self.absorb.setHorizontalHeaderLabels(cols)
            with table_filling(self.absorb):
                self._fill_absorb(r, chain, iv)
            for c in range(len(cols)):
                self.absorb.setColumnHidden(c, c == len(cols) - 1 and step is None)
            _fit_height(self.absorb)
            self.absorb_note.setText("Each transient state is left for good sooner or later: the probability of "
                                     "ending in each closed class, and the expected steps until a closed class "
                                     "is entered.")
        else:
            self.absorb_note.setText("")
        self._show_times(r, iv)

    def _fill_classes(self, r, closed_rank) -> None:
        s = r.structure
        ids = r.ids
        t = self.classes
        t.setRowCount(len(s.classes))
        for row, cls in enumerate(s.classes):
            if cls.closed:
                k = closed_rank[row]
                tag = f"C{k + 1}"
                kind = "absorbing" if cls.size == 1 else "closed"
                colour = pal.class_colour(k).darker(115)
            else:
                tag, kind, colour = "T", "transient", pal.TRANSIENT
            per = "no cycle" if cls.period is None else ("aperiodic" if cls.period == 1 else f"period {cls.period}")
            names = ", ".join(ids[i] for i in cls.states[:12]) + (f", … ({cls.size - 12} more)"
                                                                   if cls.size > 12 else "")
            tip = ""
            if cls.period is not None and cls.period > 1:
                subs = [", ".join(ids[i] for i in sub[:8]) + ("…" if len(sub) > 8 else "")
                        for sub in cls.cyclic_subclasses]
                names += "   cycle: " + " → ".join("{" + x + "}" for x in subs)
                tip = "Cyclic subclasses (the chain moves from each to the next):\n" + "\n".join(
                    f"  {j + 1}: {x}" for j, x in enumerate(subs))
            t.setItem(row, 0, _cell(tag, bold=True, colour=colour))
            t.setItem(row, 1, _cell(kind))
            t.setItem(row, 2, _cell(per))
            t.setItem(row, 3, _cell(names, tip=tip or ", ".join(ids[i] for i in cls.states)))

    def _fill_laws(self, r, chain, order, iv) -> None:
        s = r.structure
        ids = r.ids
        step = r.step
        t = self.laws
        t.setRowCount(len(order))
        for row, (i, k) in enumerate(order):
            cls = s.classes[s.closed[k]]
            share = r.stationary[k][i]
            lo_hi = iv["stationary"].get(ids[i])
            share_txt = fmt_p(share) + ("  " + _interval_text(*lo_hi) if lo_hi else "")
            ret_steps, ret_time = split_time(r.return_times[i], step)
            label = chain.states[i].display_name
            t.setItem(row, 0, _cell(ids[i], tip=label if label != ids[i] else ""))
            t.setItem(row, 1, _cell(f"C{k + 1}" + (" (absorbing)" if cls.size == 1 else ""),
                                    colour=pal.class_colour(k).darker(115)))
            t.setItem(row, 2, _cell(share_txt, right=True))
            t.setItem(row, 3, _cell(ret_steps, right=True))
            t.setItem(row, 4, _cell(ret_time))

    def _fill_absorb(self, r, chain, iv) -> None:
        s = r.structure
        ids = r.ids
        step = r.step
        ncl = len(s.closed)
        T = s.transient_states
        t = self.absorb
        t.setRowCount(len(T))
        names = ["+".join(ids[j] for j in s.classes[ci].states) for ci in s.closed]
        for row, i in enumerate(T):
            t.setItem(row, 0, _cell(ids[i], tip=chain.states[i].display_name))
            for m in range(ncl):
                p = r.absorption.probabilities[i, m]
                lo_hi = iv["absorption"].get((ids[i], names[m]))
                t.setItem(row, 1 + m, _cell(fmt_p(p) + ("  " + _interval_text(*lo_hi) if lo_hi else ""),
                                            right=True))
            e = r.absorption.expected_steps[i]
            lo_hi = iv["expected_steps"].get(ids[i])
            e_steps, e_time = split_time(e, step)
            t.setItem(row, 1 + ncl, _cell(e_steps + ("  " + _interval_text(*lo_hi, kind="n") if lo_hi else ""),
                                          right=True))
            t.setItem(row, 2 + ncl, _cell(e_time))

    def _show_times(self, r, iv) -> None:
        s = r.structure
        step = r.step
        mx = r.mixing
        if mx.steps is not None:
            txt = steps_text(mx.steps, step)
            lo_hi = iv["mixing_time"]
            if lo_hi:
                txt += f"  {_interval_text(*lo_hi, kind='n')}"
            self.time_labels["mixing"].setText(f"{txt} — until the law is within ε = {r.epsilon:g} of the "
                                               "long-run law (total variation), from the worst start")
        elif mx.reason == "periodic":
            d = s.classes[s.closed[0]].period
            self.time_labels["mixing"].setText(f"not defined: the closed class has period {d}, so the law at step "
                                               "t keeps cycling (the share of time still converges)")
        elif mx.reason == "several closed classes":
            self.time_labels["mixing"].setText("not defined: with several closed classes the long-run law "
                                               "depends on the start")
        else:
            self.time_labels["mixing"].setText("beyond 4.6e18 steps (more than can be computed)")
        sp = r.spectrum
        if sp.relaxation_time is not None:
            self.time_labels["relaxation"].setText(f"{steps_text(_whole(sp.relaxation_time), step)} (1 / spectral gap)")
        else:
            self.time_labels["relaxation"].setText("not defined: the spectral gap is 0 (a periodic closed class)")
        self.time_labels["gap"].setText(f"{_num(sp.gap)}  (second-largest eigenvalue modulus {_num(sp.slem)})")
        kem = [f"C{k + 1}: {steps_text(_whole(K), None)}" for k, K in enumerate(r.kemeny) if s.classes[s.closed[k]].size > 1]
        self.time_labels["kemeny"].setText("; ".join(kem) + " (expected steps to a state drawn from the "
                                           "stationary law)" if kem else "— (no closed class of two or more states)")
        if s.irreducible:
            if sp.reversible:
                rev = "holds: the chain is reversible"
            else:
                v = sp.balance_violation
                rev = ("fails: some transition has no reverse" if v == float("inf")
                       else f"fails: off by up to {_num(v)} (relative)")
            if sp.bounds is not None:
                b = sp.bounds
                rev += (f"; for a reversible chain {_num(b.lower)} ≤ t_mix({b.epsilon:g}) ≤ {_num(b.upper)} steps "
                        "(Levin–Peres–Wilmer, Thms 12.4 and 12.5)")
            self.time_labels["reversible"].setText(rev)
        else:
            self.time_labels["reversible"].setText("— (checked for irreducible chains)")
        u = self.uncertainty
        if u is not None:
            text = "Intervals in brackets: " + u.describe() + "."
            if u.notes:
                text += " " + " ".join(n[0].upper() + n[1:] + "." for n in u.notes)
            self.interval_note.setText(text)
        else:
            self.interval_note.setText("")

    def _chart_laws(self, r, order, iv) -> None:
        s = r.structure
        ids = r.ids
        nontrivial = [(i, k) for i, k in order if s.classes[s.closed[k]].size > 1]
        if not nontrivial:
            self.law_bars.setOpts(x=[], height=[])
            self.law_err.setData(x=np.zeros(0), y=np.zeros(0), top=np.zeros(0), bottom=np.zeros(0))
            self.law_chart.item.getAxis("bottom").setTicks([[], []])
            self.law_note.setText("Every closed class is a single absorbing state: where the chain ends up is "
                                  "decided by absorption (below).")
            self.law_chart.setVisible(False)
            return
        self.law_chart.setVisible(True)
        xs, hs, brushes, pens, labels = [], [], [], [], []
        x = 0.0
        last_k = None
        err_x, err_y, err_lo, err_hi = [], [], [], []
        for i, k in nontrivial:
            if last_k is not None and k != last_k:
                x += 0.6  # a gap between classes
            c = pal.class_colour(k)
            xs.append(x)
            hs.append(float(r.stationary[k][i]))
            brushes.append(pg.mkBrush(pal.tint(c, 0.35)))
            pens.append(pg.mkPen(c.darker(120), width=1.2))
            labels.append((x, ids[i]))
            lo_hi = iv["stationary"].get(ids[i])
            if lo_hi and lo_hi[0] is not None:
                err_x.append(x)
                err_y.append(hs[-1])
                err_lo.append(max(0.0, hs[-1] - lo_hi[0]))
                err_hi.append(max(0.0, lo_hi[1] - hs[-1]))
            x += 1.0
            last_k = k
        self.law_bars.setOpts(x=np.array(xs), height=np.array(hs), brushes=brushes, pens=pens, width=0.7)
        self.law_err.setData(x=np.array(err_x), y=np.array(err_y), top=np.array(err_hi), bottom=np.array(err_lo))
        ticks = state_ticks([lab for _x, lab in labels], max_labels=16)
        ax_ticks = [(xs[int(p)], text) for p, text in ticks]
        it = self.law_chart.item
        it.getAxis("bottom").setTicks([ax_ticks, []])
        it.setXRange(-0.6, x - 0.4, padding=0)
        top = max(hs + [h + e for h, e in zip(err_y, err_hi)])
        it.setYRange(0, nice_upper(top * 1.05), padding=0)
        k_used = sorted({k for _i, k in nontrivial})
        self.law_chart.set_legend([("fill", pal.tint(pal.class_colour(k), 0.35), f"closed class C{k + 1}")
                                   for k in k_used]
                                  + ([("band", pal.INK, "interval")] if err_x else []))
        single = [f"C{k + 1} ({ids[s.classes[ci].states[0]]})" for k, ci in enumerate(s.closed)
                  if s.classes[ci].size == 1]
        self.law_note.setText(("Absorbing, not charted (once entered, never left): " + ", ".join(single) + ".")
                              if single else "")

    @property
    def busy(self) -> bool:
        """The analysis of the current chain is not on screen yet."""
        return not self.workspace.analysis.is_idle

    def shutdown(self) -> None:
        an = self.workspace.analysis
        an.unregister(JOB)
        an.unregister(INTERVAL_JOB)


def _whole(x: float) -> float:
    """Times of a thousand steps and more shown to the whole step (``1,317`` rather than ``1317.4``)."""
    return float(round(x)) if math.isfinite(x) and 1000 <= abs(x) < 1e6 else x


def _num(x: float | None) -> str:
    if x is None:
        return "—"
    x = float(x)
    if x == 0:
        return "0"
    if math.isinf(x):
        return "infinite"
    if 1e-4 <= abs(x) < 1e7:
        return f"{x:.4g}"
    m, e = f"{x:.3e}".split("e")
    return f"{m}e{int(e)}"


PANELS = [
    PanelSpec("longrun", "Long run", LongRunPanel, area=Qt.DockWidgetArea.RightDockWidgetArea,
              shortcut="Ctrl+Shift+L"),
]
