"""The simulation plan: one shared model, its fields, and the exact plan check.

:class:`RunPlan` is the single source of truth for the plan of a simulation
(start, replicates, run length ``T``, burn-in ``B``, stride ``s``, estimator,
tolerance) and the run's own settings (seed, speed) and the analysis
threshold ``epsilon``.  The simulation panel's controls, this plan check form,
the findings pane and the long-run panel all edit and read the same object
(:func:`shared_plan`), so what the form checks is exactly what the simulation
runs.  The run convention is that of DEVELOPERS.md "Simulation": a burn-in of
``B`` steps, then ``T`` steps; the final-step estimate is the ensemble at step
``B + T``, the time average keeps the states at ``B, B + s, ..., B + (m-1) s``
with ``m = floor(T / s)``.

:class:`PlanForm` shows the verdict of :func:`core.plan.check_plan` before
anything runs: the law the plan's estimate converges to next to the long-run
law, their total variation distance, the smallest sound run length and
burn-in, the Monte Carlo noise, and the plain sentence; a chart of
:func:`core.plan.bias_curve` shows how the bias falls with the run length.
"Run this plan live" hands the plan to the simulation panel; "Run the
recommended plan" first sets the run length (or the burn-in) the check asks
for.  The check runs in a worker thread (:class:`BackgroundJob`), debounced,
and results of a superseded request are dropped.
"""
from __future__ import annotations

import contextlib
import math
import threading
import traceback
import weakref
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Sequence

import numpy as np
from PySide6.QtCore import QObject, Qt, QThread, QTimer, Signal, Slot
from PySide6.QtGui import QValidator
from PySide6.QtWidgets import (
    QAbstractSpinBox,
    QComboBox,
    QDoubleSpinBox,
    QGridLayout,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QMenu,
    QPushButton,
    QSizePolicy,
    QTableWidget,
    QTableWidgetItem,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from core.errors import LongrunError
from core.units import format_tv

from . import palette as pal
from .panels import PanelSpec, Workspace, fact_rows, scroll_into, separator
from .simulation_worker import SIM_MAX_REPLICATES, SIM_MAX_STEPS, PlanValues, ResolvedPlan, resolve_plan

__all__ = [
    "PlanValues",
    "RunPlan",
    "ResolvedPlan",
    "PlanCheckOutcome",
    "BackgroundJob",
    "CountSpinBox",
    "PlanFields",
    "PlanForm",
    "shared_plan",
    "resolve_plan",
    "plan_check_job",
    "preload_core",
    "live_job_threads",
    "SPEEDS",
    "PANELS",
]

#: Speed presets: (label, steps per second or None for as fast as possible).
SPEEDS: tuple[tuple[str, float | None], ...] = (
    ("As fast as possible", None),
    ("1 step per second", 1.0),
    ("2 steps per second", 2.0),
    ("5 steps per second", 5.0),
    ("10 steps per second", 10.0),
    ("25 steps per second", 25.0),
    ("100 steps per second", 100.0),
    ("1,000 steps per second", 1000.0),
    ("10,000 steps per second", 10000.0),
)
ESTIMATOR_TEXT = {
    "final": "Final step across replicates",
    "average": "Time average along each replicate",
}


# ---------------------------------------------------------------------------
# imports for the worker threads
# ---------------------------------------------------------------------------
_PRELOADED = False


def preload_core() -> None:
    """Import (and run once on a tiny chain) everything the workers use, on the GUI thread.

    A first import inside a worker thread runs PySide's import hook there,
    concurrently with the GUI thread, which is unsafe; so the core modules
    and the scipy parts they import lazily are imported here first, and the
    main computations are run once on a two-state chain so that every lazy
    import on their paths has happened.
    """
    global _PRELOADED
    if _PRELOADED:
        return
    import scipy.linalg  # noqa: F401
    import scipy.sparse  # noqa: F401
    import scipy.sparse.csgraph  # noqa: F401
    import scipy.sparse.linalg  # noqa: F401
    import scipy.special  # noqa: F401
    import scipy.stats  # noqa: F401

    import core.analysis  # noqa: F401
    import core.diagnostics  # noqa: F401
    import core.estimate  # noqa: F401
    import core.evolution  # noqa: F401
    import core.findings  # noqa: F401
    import core.jsonout  # noqa: F401
    import core.passage  # noqa: F401
    import core.plan  # noqa: F401
    import core.simulate  # noqa: F401
    import core.spectral  # noqa: F401
    import core.stationary  # noqa: F401
    import core.structure  # noqa: F401
    import core.units  # noqa: F401
    from core.analysis import analyze
    from core.findings import find_all
    from core.model import Chain
    from core.plan import Plan, bias_curve, check_plan
    from core.simulate import ReplicateSimulation, compare

    for rows in ([[0.5, 0.5], [0.25, 0.75]], [[0.0, 1.0], [1.0, 0.0]], [[0.5, 0.5], [0.0, 1.0]]):
        chain = Chain.from_matrix(rows, ["a", "b"])
        analyze(chain, start=0)
        for est in ("final", "average"):
            plan = Plan(0, 20, burn_in=2, stride=2, replicates=20, estimator=est)
            check_plan(chain, plan)
            bias_curve(chain, plan, [2, 4, 8])
            find_all(chain, plan=plan, start=0)
        sim = ReplicateSimulation(chain.matrix(), replicates=40, steps=20, start=0, seed=1, tracked=40)
        for _ in sim.snapshots(every=5):
            sim.running_rhat()
        compare(sim.result(), chain.matrix(), ids=chain.ids)
    _PRELOADED = True


# ---------------------------------------------------------------------------
# a latest-request-wins worker
# ---------------------------------------------------------------------------
_LIVE_JOBS: "weakref.WeakSet[BackgroundJob]" = weakref.WeakSet()


def live_job_threads() -> list[QThread]:
    """Worker threads of :class:`BackgroundJob` objects not shut down (tests check it is empty)."""
    return [j._thread for j in list(_LIVE_JOBS) if j._thread is not None and j._thread.isRunning()]


class _JobWorker(QObject):
    done = Signal(int, object, object)

    def __init__(self, latest: Callable[[], int]):
        super().__init__()
        self._latest = latest

    @Slot(int, object, object)
    def run(self, ticket: int, fn, args) -> None:
        if ticket != self._latest():
            return
        try:
            out = fn(*args)
            if hasattr(out, "__next__") and hasattr(out, "send"):
                gen = out
                while True:
                    try:
                        next(gen)
                    except StopIteration as stop:
                        out = stop.value
                        break
                    if ticket != self._latest():
                        gen.close()
                        return
        except LongrunError as exc:
            self.done.emit(ticket, None, str(exc))
            return
        except Exception:  # a bug must not kill the worker; it is shown, not swallowed
            self.done.emit(ticket, None, "internal error:\n" + traceback.format_exc(limit=8))
            return
        if ticket == self._latest():
            self.done.emit(ticket, out, None)


class BackgroundJob(QObject):
    """Run a computation in a worker thread; only the latest request's result is delivered.

    Parameters
    ----------
    name : str
        Thread name (for debugging).
    delay_ms : int
        Debounce: a request starts after this quiet time (a burst of requests
        runs once, for the last one).

    Signals
    -------
    resultReady(object)
        The latest request's value.
    failed(str)
        The latest request raised (a :class:`LongrunError` message, or an
        internal error with its traceback).
    busyChanged(bool)
    """

    resultReady = Signal(object)
    failed = Signal(str)
    busyChanged = Signal(bool)
    _start = Signal(int, object, object)

    def __init__(self, name: str, *, delay_ms: int = 0, parent: QObject | None = None):
        super().__init__(parent)
        preload_core()
        self._ticket = 0
        self._lock = threading.Lock()
        self._latest = 0
        self._done = 0
        self._pending: tuple | None = None
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(max(0, int(delay_ms)))
        self._timer.timeout.connect(self._launch)
        self._thread: QThread | None = QThread()
        self._thread.setObjectName(f"longrun-{name}")
        self._worker = _JobWorker(self._read_latest)
        self._worker.moveToThread(self._thread)
        self._start.connect(self._worker.run)
        self._worker.done.connect(self._on_done)
        self._thread.start()
        _LIVE_JOBS.add(self)

    def _read_latest(self) -> int:
        with self._lock:
            return self._latest

    @property
    def busy(self) -> bool:
        return self._done != self._ticket

    def submit(self, fn: Callable, *args: Any) -> int:
        """Compute ``fn(*args)`` (after the debounce delay); returns the request's ticket."""
        if self._thread is None:
            return self._ticket
        was_busy = self.busy
        self._ticket += 1
        with self._lock:
            self._latest = self._ticket
        self._pending = (fn, args)
        self._timer.start()
        if not was_busy:
            self.busyChanged.emit(True)
        return self._ticket

    def cancel(self) -> None:
        """Drop the pending and running requests (their results are never delivered)."""
        self._timer.stop()
        self._pending = None
        was_busy = self.busy
        self._ticket += 1
        with self._lock:
            self._latest = self._ticket
        self._done = self._ticket
        if was_busy:
            self.busyChanged.emit(False)

    def flush(self) -> None:
        """Start a debounced request now."""
        if self._timer.isActive():
            self._timer.stop()
            self._launch()

    def _launch(self) -> None:
        if self._thread is None or self._pending is None:
            return
        fn, args = self._pending
        self._pending = None
        self._start.emit(self._ticket, fn, args)

    def _on_done(self, ticket: int, value, error) -> None:
        if ticket != self._ticket or self._thread is None:
            return
        self._done = ticket
        if error is not None:
            self.failed.emit(error)
        else:
            self.resultReady.emit(value)
        self.busyChanged.emit(False)

    def shutdown(self) -> None:
        """Stop the worker thread (waits for the computation in progress)."""
        self._timer.stop()
        self._pending = None
        if self._thread is None:
            return
        with self._lock:
            self._latest = -1
        self._thread.quit()
        self._thread.wait()
        self._worker.deleteLater()
        self._thread = None


class JobPanel(QWidget):
    """A panel whose work runs in its :class:`BackgroundJob` ``self.job`` (set by the subclass)."""

    job: BackgroundJob

    @property
    def busy(self) -> bool:
        """The panel's job is pending or running."""
        return self.job.busy

    def shutdown(self) -> None:
        self.job.shutdown()


# ---------------------------------------------------------------------------
# the plan values and the shared model
# ---------------------------------------------------------------------------
class RunPlan(QObject):
    """The one plan every panel reads and edits.

    Signals
    -------
    changed(PlanValues)
    runRequested(str)
        A panel asks the simulation panel to run the current plan now
        (``"plan"`` or ``"recommended"``).
    checkChanged(object)
        The latest :class:`PlanCheckOutcome` of the current plan (the form
        computes it; the simulation panel shows its prediction).
    """

    changed = Signal(object)
    runRequested = Signal(str)
    checkChanged = Signal(object)

    def __init__(self, document=None, values: PlanValues | None = None, parent: QObject | None = None):
        super().__init__(parent if parent is not None else document)
        self._values = values or PlanValues()
        self.check: PlanCheckOutcome | None = None
        self._doc = document
        if document is not None:
            document.chainChanged.connect(self._follow_chain)

    @property
    def values(self) -> PlanValues:
        return self._values

    def update(self, **changes: Any) -> bool:
        """Change some fields; emits :attr:`changed` when something changed."""
        new = replace(self._values, **changes)
        if new == self._values:
            return False
        self._values = new
        self.changed.emit(new)
        return True

    def request_run(self, kind: str = "plan") -> None:
        self.runRequested.emit(kind)

    def set_check(self, outcome: "PlanCheckOutcome | None") -> None:
        self.check = outcome
        self.checkChanged.emit(outcome)

    def _follow_chain(self, old, new) -> None:
        """Keep the start state through renames; fall back to the first state when it is gone."""
        kind = self._values.start
        if kind[0] != "state" or kind[1] is None or kind[1] in new.index:
            return
        sid = kind[1]
        follow = None
        if sid in old.index and old.n == new.n:
            cand = new.ids[old.index[sid]]
            if cand not in old.index:
                follow = cand  # renamed in place
        self.update(start=("state", follow))


def shared_plan(workspace: Workspace) -> RunPlan:
    """The workspace's :class:`RunPlan` (created on first use)."""
    rp = getattr(workspace, "run_plan", None)
    if rp is None:
        rp = RunPlan(workspace.document)
        workspace.run_plan = rp
    return rp


@dataclass(frozen=True, eq=False)
class PlanCheckOutcome:
    """What the plan check form shows: the check of one plan on one chain.

    Attributes
    ----------
    values : PlanValues
    chain : core.model.Chain
    resolved : ResolvedPlan or None
    check : core.plan.PlanCheck or None
    curve_steps, curve_tv : ndarray
        :func:`core.plan.bias_curve` (TV of the estimate against the run length ``T``).
    error : str or None
    """

    values: PlanValues
    chain: Any
    resolved: ResolvedPlan | None
    check: Any
    curve_steps: np.ndarray = field(default_factory=lambda: np.zeros(0))
    curve_tv: np.ndarray = field(default_factory=lambda: np.zeros(0))
    error: str | None = None


def curve_run_lengths(T: int, stride: int, min_steps: int | None, *, points: int = 70) -> np.ndarray:
    """Run lengths for the bias chart: log-spaced from the stride to well past ``T`` and ``min_steps``."""
    from core.plan import MAX_STEPS

    lo = max(1, int(stride))
    hi = max(10 * int(T), 100 * lo, 3 * int(min_steps or 0), lo + 1)
    hi = min(hi, MAX_STEPS)
    g = np.unique(np.round(np.geomspace(lo, hi, points)).astype(np.int64))
    g = g[g >= lo]
    return g


def plan_check_job(chain, values: PlanValues) -> PlanCheckOutcome:
    """Check ``values`` on ``chain`` exactly (worker thread): the outcome the form shows."""
    from core.plan import bias_curve, check_plan
    from core.structure import classify

    if chain.n == 0:
        return PlanCheckOutcome(values, chain, None, None, error="the chain has no states yet")
    if not chain.is_valid:
        k = len(chain.problems)
        return PlanCheckOutcome(values, chain, None, None,
                                error=f"the chain has {k} problem{'s' if k != 1 else ''} (see Checks); "
                                      "a plan is checked once the chain is valid")
    P = chain.matrix()
    st = classify(P)
    res = resolve_plan(chain, values, P, st)
    if res.error:
        return PlanCheckOutcome(values, chain, res, None, error=res.error)
    check = check_plan(chain, res.plan)
    Ts = curve_run_lengths(values.steps, values.stride if values.estimator == "average" else 1, check.min_steps)
    tv = bias_curve(chain, res.plan, Ts.tolist())
    return PlanCheckOutcome(values, chain, res, check, Ts, tv)


# ---------------------------------------------------------------------------
# field widgets
# ---------------------------------------------------------------------------
def parse_count(text: str) -> int | None:
    """A whole number typed as ``10000``, ``10,000``, ``10_000``, ``1e4`` or ``2.5e6``; None if not one."""
    t = text.strip().replace(",", "").replace("_", "").replace(" ", "").replace("\u202f", "")
    if not t:
        return None
    try:
        if t.isdigit():
            return int(t)
        x = float(t)
    except ValueError:
        return None
    if not math.isfinite(x) or x != round(x):
        return None
    return int(round(x))


class CountSpinBox(QDoubleSpinBox):
    """A whole number up to 10^12 and more, shown as ``1,000,000`` and typed as ``1e6`` too."""

    def __init__(self, lo: int, hi: int, parent: QWidget | None = None, *, grouping: bool = True):
        super().__init__(parent)
        self._grouping = grouping
        self.setDecimals(0)
        self.setRange(float(lo), float(hi))
        self.setStepType(QAbstractSpinBox.StepType.AdaptiveDecimalStepType)
        self.setAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        self.setAccelerated(True)
        self.setMinimumWidth(72)

    def textFromValue(self, v: float) -> str:  # noqa: N802 - Qt's name
        return f"{int(round(v)):,}" if self._grouping else str(int(round(v)))

    def valueFromText(self, text: str) -> float:  # noqa: N802
        x = parse_count(text)
        return float(x) if x is not None else self.value()

    def validate(self, text: str, pos: int):
        x = parse_count(text)
        if x is None:
            ok = all(ch.isdigit() or ch in ",_ .eE+-" for ch in text)
            return (QValidator.State.Intermediate if ok else QValidator.State.Invalid), text, pos
        if self.minimum() <= x <= self.maximum():
            return QValidator.State.Acceptable, text, pos
        return QValidator.State.Intermediate, text, pos

    def int_value(self) -> int:
        return int(round(self.value()))


FIELD_LABELS = {
    "start": "Start",
    "replicates": "Replicates R",
    "steps": "Steps T",
    "burn_in": "Burn-in B",
    "stride": "Stride s",
    "estimator": "Estimate",
    "tolerance": "Tolerance",
    "seed": "Seed",
    "speed": "Speed",
    "epsilon": "Mixing ε",
}
FIELD_TIPS = {
    "start": "Where every replicate starts: one state, all states equally likely, or the stationary "
             "law of a closed class",
    "replicates": "Independent copies of the chain run side by side (1 to 1,000,000)",
    "steps": "T: steps run after the burn-in (the run is B + T steps in all); type 1e6 for a million",
    "burn_in": "B: steps run first and not kept for the time average",
    "stride": "s: the time average keeps the states at steps B, B+s, B+2s, … (floor(T/s) of them)",
    "estimator": "How the plan estimates the long-run law: where the replicates are at step B+T, or "
                 "the share of time along each replicate",
    "tolerance": "Largest total variation distance between the plan's estimate and the long-run law "
                 "that counts as close enough",
    "seed": "The same seed gives the same simulation, bit for bit (also on the command line)",
    "speed": "How fast the live run advances",
    "epsilon": "Mixing time threshold: steps until the law is within ε of the long-run law (total "
               "variation, worst start)",
}


class PlanFields(QWidget):
    """Editors of some fields of a :class:`RunPlan`, kept in step with it both ways.

    Parameters
    ----------
    workspace : Workspace
        For the chain's states and closed classes (the start choices).
    run_plan : RunPlan
    fields : sequence of str
        Names among :data:`FIELD_LABELS`, in display order.
    columns : int
        Label/editor pairs per row (``start`` takes a whole row).
    """

    def __init__(self, workspace: Workspace, run_plan: RunPlan, fields: Sequence[str], *, columns: int = 2,
                 parent: QWidget | None = None):
        super().__init__(parent)
        self.workspace = workspace
        self.run_plan = run_plan
        self.fields = tuple(fields)
        self.editors: dict[str, QWidget] = {}
        self._structure = None
        self._start_key = None
        grid = QGridLayout(self)
        grid.setContentsMargins(0, 0, 0, 0)
        grid.setHorizontalSpacing(8)
        grid.setVerticalSpacing(4)
        row = col = 0
        for name in self.fields:
            editor = self._make(name)
            editor.setToolTip(FIELD_TIPS.get(name, ""))
            editor.setObjectName(f"plan_{name}")
            self.editors[name] = editor
            label = QLabel(FIELD_LABELS[name])
            label.setToolTip(FIELD_TIPS.get(name, ""))
            label.setBuddy(editor.spin if name == "seed" else editor)  # type: ignore[attr-defined]
            wide = name == "start"
            if wide and col:
                row, col = row + 1, 0
            grid.addWidget(label, row, col * 2, Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
            if wide:
                grid.addWidget(editor, row, 1, 1, columns * 2 - 1)
                row += 1
                continue
            grid.addWidget(editor, row, col * 2 + 1)
            col += 1
            if col >= columns:
                row, col = row + 1, 0
        for c in range(columns):
            grid.setColumnStretch(c * 2 + 1, 1)
        self.show_values(run_plan.values)
        run_plan.changed.connect(self.show_values)
        if "start" in self.editors:
            an = workspace.analysis
            an.structureReady.connect(self._structure_ready)
            workspace.document.changed.connect(self._fill_start)
            if an.structure_report is not None:
                self._structure_ready(an.structure_report)
            else:
                self._fill_start()

    # -- building ------------------------------------------------------------------
    def _make(self, name: str) -> QWidget:
        if name == "start":
            box = QComboBox()
            box.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
            box.setMinimumContentsLength(18)
            box.activated.connect(self._start_chosen)
            return box
        if name in ("replicates", "steps", "burn_in", "stride"):
            lo, hi = {"replicates": (1, SIM_MAX_REPLICATES), "steps": (1, SIM_MAX_STEPS),
                      "burn_in": (0, SIM_MAX_STEPS), "stride": (1, SIM_MAX_STEPS)}[name]
            spin = CountSpinBox(lo, hi)
            spin.valueChanged.connect(lambda v, n=name: self._set(n, int(round(v))))
            return spin
        if name == "seed":
            w = QWidget()
            lay = QHBoxLayout(w)
            lay.setContentsMargins(0, 0, 0, 0)
            lay.setSpacing(2)
            spin = CountSpinBox(0, 2**53 - 1, grouping=False)
            spin.setStepType(QAbstractSpinBox.StepType.DefaultStepType)
            spin.valueChanged.connect(lambda v: self._set("seed", int(round(v))))
            new = QToolButton()
            new.setText("New")
            new.setToolTip("Draw a fresh random seed")
            new.setObjectName("plan_new_seed")
            new.clicked.connect(self._new_seed)
            lay.addWidget(spin, 1)
            lay.addWidget(new)
            w.spin = spin  # type: ignore[attr-defined]
            return w
        if name == "estimator":
            box = QComboBox()
            box.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
            box.setMinimumContentsLength(14)
            for key, text in ESTIMATOR_TEXT.items():
                box.addItem(text, key)
            box.currentIndexChanged.connect(lambda _i: self._set("estimator", box.currentData()))
            return box
        if name == "speed":
            box = QComboBox()
            box.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
            box.setMinimumContentsLength(10)
            for text, v in SPEEDS:
                box.addItem(text, v)
            box.currentIndexChanged.connect(lambda _i: self._set("speed", box.currentData()))
            return box
        if name in ("tolerance", "epsilon"):
            spin = QDoubleSpinBox()
            spin.setDecimals(3)
            if name == "tolerance":
                spin.setRange(0.001, 0.5)
                spin.setSingleStep(0.01)
            else:
                spin.setRange(0.001, 0.999)
                spin.setSingleStep(0.05)
            spin.setAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
            spin.valueChanged.connect(lambda v, n=name: self._set(n, float(v)))
            return spin
        raise KeyError(name)

    def _set(self, name: str, value) -> None:
        self.run_plan.update(**{name: value})

    def _new_seed(self) -> None:
        import secrets

        self.run_plan.update(seed=secrets.randbelow(2**31))

    def spin(self, name: str) -> QAbstractSpinBox:
        w = self.editors[name]
        return w.spin if name == "seed" else w  # type: ignore[attr-defined]

    # -- showing ---------------------------------------------------------------------
    def show_values(self, values: PlanValues) -> None:
        for name, editor in self.editors.items():
            editor.blockSignals(True)
            try:
                if name in ("replicates", "steps", "burn_in", "stride"):
                    editor.setValue(float(getattr(values, name)))
                elif name == "seed":
                    editor.spin.blockSignals(True)
                    editor.spin.setValue(float(values.seed))
                    editor.spin.blockSignals(False)
                elif name == "estimator":
                    editor.setCurrentIndex(max(0, editor.findData(values.estimator)))
                elif name == "speed":
                    idx = next((k for k, (_t, v) in enumerate(SPEEDS) if v == values.speed), 0)
                    editor.setCurrentIndex(idx)
                elif name in ("tolerance", "epsilon"):
                    editor.setValue(float(getattr(values, name)))
                elif name == "start":
                    self._select_start(values.start)
            finally:
                editor.blockSignals(False)

    def _structure_ready(self, report) -> None:
        self._structure = report.structure if report.chain is self.workspace.document.chain else None
        self._fill_start()

    def _fill_start(self) -> None:
        box: QComboBox = self.editors["start"]
        chain = self.workspace.document.chain
        s = self._structure
        key = (tuple((st.id, st.display_name) for st in chain.states),
               None if s is None or s.n != chain.n else tuple((ci, s.classes[ci].size) for ci in s.closed))
        if key == self._start_key:
            return  # a move or an edit of probabilities: the choices are the same
        self._start_key = key
        box.blockSignals(True)
        box.clear()
        for sid, st in zip(chain.ids, chain.states):
            text = sid if st.display_name == sid else f"{sid} — {st.display_name}"
            box.addItem(text, ("state", sid))
        if chain.n:
            box.insertSeparator(box.count())
            box.addItem(f"Uniform over all {chain.n} states", ("uniform",))
        s = self._structure
        if s is not None and s.n == chain.n:
            for k, ci in enumerate(s.closed):
                cls = s.classes[ci]
                if cls.size == 1:
                    continue
                box.addItem(f"Stationary law of closed class C{k + 1} ({cls.size} states)", ("stationary", k))
        self._select_start(self.run_plan.values.start)
        box.blockSignals(False)

    def _select_start(self, start: tuple) -> None:
        box: QComboBox = self.editors["start"]
        want = start
        if start[0] == "state" and start[1] is None:
            idx = 0
        else:
            idx = next((k for k in range(box.count()) if box.itemData(k) == want), -1)
            if idx < 0:
                idx = 0
        if box.count():
            box.setCurrentIndex(idx)

    def _start_chosen(self, idx: int) -> None:
        data = self.editors["start"].itemData(idx)
        if data is not None:
            self.run_plan.update(start=tuple(data))


# ---------------------------------------------------------------------------
# the plan check form
# ---------------------------------------------------------------------------
def fmt_p(p: float) -> str:
    """A probability with 4 significant digits (scientific below 1e-4)."""
    p = float(p)
    if p == 0:
        return "0"
    if abs(p) < 1e-4:
        m, e = f"{p:.2e}".split("e")
        return f"{m}e{int(e)}"
    return f"{p:.4g}"


def fmt_tv(x: float) -> str:
    """An exact total variation distance; below 1e-12 it is rounding, shown as ``≈ 0``."""
    return format_tv(x, zero="≈ 0")


def fmt_signed(x: float) -> str:
    x = float(x)
    if abs(x) < 1e-13:
        return "0"
    if abs(x) < 1e-4:
        m, e = f"{x:+.2e}".split("e")
        return f"{m}e{int(e)}"
    return f"{x:+.4g}"


@contextlib.contextmanager
def table_filling(table: QTableWidget):
    """Fill ``table`` in one go: sizes to contents are computed once at the end, not per cell."""
    hh = table.horizontalHeader()
    modes = [hh.sectionResizeMode(c) for c in range(table.columnCount())]
    table.setUpdatesEnabled(False)
    for c in range(table.columnCount()):
        hh.setSectionResizeMode(c, QHeaderView.ResizeMode.Interactive)
    try:
        yield table
    finally:
        for c in range(table.columnCount()):
            hh.setSectionResizeMode(c, modes[c] if c < len(modes) else QHeaderView.ResizeMode.ResizeToContents)
        table.setUpdatesEnabled(True)


def verdict_badge(label: QLabel, kind: str, text: str) -> None:
    """Style ``label`` as a verdict badge: ``"good"``, ``"bad"``, ``"warn"`` or ``"idle"``."""
    colours = {
        "good": ("#00684E", "#E2F3EC", "✓ "),
        "bad": ("#A64200", "#FBE8DC", "✗ "),
        "warn": ("#7A5A00", "#FBF3D6", "! "),
        "idle": (pal.INK_SOFT.name(), "#EEF0F2", ""),
    }
    fg, bg, mark = colours[kind]
    label.setText(mark + text)
    label.setStyleSheet(f"QLabel {{ color: {fg}; background: {bg}; border: 1px solid {fg}; border-radius: 4px;"
                        " padding: 3px 8px; font-weight: 700; }")


class PlanForm(JobPanel):
    """The plan check form (a dock panel): the plan's fields and its exact verdict.

    Parameters
    ----------
    workspace : Workspace
    """

    def __init__(self, workspace: Workspace):
        super().__init__()
        from .plot_export import GUIDE, LONG_RUN, CURVE, ChartBox

        import pyqtgraph as pg

        self.workspace = workspace
        self.run_plan = shared_plan(workspace)
        self.outcome: PlanCheckOutcome | None = None
        self.job = BackgroundJob("plan-check", delay_ms=workspace.settings.get("analysis/delay_ms"), parent=self)
        self.job.resultReady.connect(self._show_outcome)
        self.job.failed.connect(self._show_failure)
        self.job.busyChanged.connect(self._busy)

        self.fields = PlanFields(workspace, self.run_plan,
                                 ("start", "replicates", "steps", "burn_in", "stride", "estimator", "tolerance"))
        intro = QLabel("What a simulation with this plan will report, computed exactly before it runs "
                       "(burn-in B, then T steps).")
        intro.setWordWrap(True)
        intro.setStyleSheet(f"color: {pal.INK_SOFT.name()};")

        self.badge = QLabel()
        self.badge.setObjectName("planVerdict")
        self.badge.setSizePolicy(QSizePolicy.Policy.Maximum, QSizePolicy.Policy.Fixed)
        verdict_badge(self.badge, "idle", "Not checked yet")
        self.busy_label = QLabel("")
        self.busy_label.setStyleSheet(f"color: {pal.INK_SOFT.name()};")
        self.sentence = QLabel("")
        self.sentence.setObjectName("planSentence")
        self.sentence.setWordWrap(True)
        self.sentence.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.sentence.setSizePolicy(QSizePolicy.Policy.Preferred, QSizePolicy.Policy.Minimum)

        self.run_button = QPushButton("▶  Run this plan live")
        self.run_button.setObjectName("planRun")
        self.run_button.setToolTip("Run exactly this plan in the Simulation panel and watch the prediction come true")
        self.run_button.clicked.connect(lambda: self.run_plan.request_run("plan"))
        self.recommend_button = QToolButton()
        self.recommend_button.setObjectName("planRunRecommended")
        self.recommend_button.setText("▶  Run the recommended plan")
        self.recommend_button.setPopupMode(QToolButton.ToolButtonPopupMode.MenuButtonPopup)
        self.recommend_button.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextOnly)
        self.recommend_button.clicked.connect(lambda: self.run_recommended("steps"))
        menu = QMenu(self.recommend_button)
        self.act_steps = menu.addAction("Use the smallest sound run length T", lambda: self.run_recommended("steps"))
        self.act_burn = menu.addAction("Use the smallest sound burn-in B instead",
                                       lambda: self.run_recommended("burn_in"))
        self.recommend_button.setMenu(menu)
        buttons = QHBoxLayout()
        buttons.setSpacing(6)
        buttons.addWidget(self.run_button)
        buttons.addWidget(self.recommend_button)
        buttons.addStretch(1)

        facts, self.fact_labels = fact_rows(
            (("tv", "Estimate vs long run"), ("min_steps", "Smallest sound run"),
             ("min_burn_in", "Smallest sound burn-in"), ("noise", "Noise at R replicates"),
             ("samples", "Kept per replicate")), prefix="planFact_", vertical_spacing=3)

        self.table = QTableWidget(0, 5)
        self.table.setObjectName("planTable")
        self.table.setHorizontalHeaderLabels(["State", "Plan estimates", "Long run", "Bias", "Noise (1 sd)"])
        self.table.verticalHeader().setVisible(False)
        self.table.setEditTriggers(QTableWidget.EditTrigger.NoEditTriggers)
        self.table.setSelectionMode(QTableWidget.SelectionMode.NoSelection)
        self.table.setAlternatingRowColors(True)
        self.table.verticalHeader().setDefaultSectionSize(self.table.fontMetrics().height() + 8)
        hh = self.table.horizontalHeader()
        hh.setSectionResizeMode(0, QHeaderView.ResizeMode.Stretch)
        for c in range(1, 5):
            hh.setSectionResizeMode(c, QHeaderView.ResizeMode.ResizeToContents)

        self.chart = ChartBox("How the plan's bias falls with the run length", name="planBiasChart")
        self.chart.set_labels("run length T, steps after the burn-in (log scale)", "TV to long run")
        self.chart.setMinimumHeight(210)
        self.chart.set_legend([("line", CURVE, "exact TV of the estimate"),
                               ("dash", GUIDE, "tolerance"), ("line", LONG_RUN, "this plan's T")])
        it = self.chart.item
        self.curve_item = pg.PlotDataItem(pen=pg.mkPen(CURVE, width=2.2))
        it.addItem(self.curve_item)
        self.tol_line = pg.InfiniteLine(angle=0, pen=pg.mkPen(GUIDE, width=1.4, style=Qt.PenStyle.DashLine))
        self.plan_line = pg.InfiniteLine(angle=90, pen=pg.mkPen(LONG_RUN, width=1.6))
        self.min_line = pg.InfiniteLine(angle=90, pen=pg.mkPen(pal.OKABE_ITO["bluish_green"], width=1.6,
                                                               style=Qt.PenStyle.DotLine),
                                        label="shortest sound", labelOpts={"position": 0.85,
                                                                           "color": pal.OKABE_ITO["bluish_green"],
                                                                           "anchors": [(0, 0.5), (0, 0.5)]})
        for line in (self.tol_line, self.plan_line, self.min_line):
            it.addItem(line, ignoreBounds=True)
            line.setVisible(False)

        body = QWidget()
        lay = QVBoxLayout(body)
        lay.setContentsMargins(8, 6, 8, 8)
        lay.setSpacing(8)
        lay.addWidget(intro)
        lay.addWidget(self.fields)
        head = QHBoxLayout()
        head.addWidget(self.badge)
        head.addWidget(self.busy_label, 1)
        lay.addLayout(head)
        lay.addWidget(self.sentence)
        lay.addLayout(buttons)
        lay.addWidget(separator())
        lay.addLayout(facts)
        lay.addWidget(self.table)
        lay.addWidget(self.chart)
        lay.addStretch(1)
        scroll_into(self, body)

        self.run_plan.changed.connect(self._plan_changed)
        workspace.analysis.structureReady.connect(self._chain_ready)
        self._set_buttons(None)
        if workspace.analysis.structure_report is not None:
            self.request()

    # -- requests -----------------------------------------------------------------------
    def _plan_changed(self, values: PlanValues) -> None:
        if self.outcome is not None and self.outcome.values.check_key() == values.check_key() \
                and self.outcome.chain is self.workspace.document.chain:
            return  # speed, seed or epsilon: the check is unchanged
        self.request()

    def _chain_ready(self, report) -> None:
        if report.chain is self.workspace.document.chain:
            self.request()

    def request(self) -> None:
        """Check the current plan on the current chain (debounced, in the worker)."""
        self._set_buttons(None)
        self.job.submit(plan_check_job, self.workspace.document.chain, self.run_plan.values)

    def _busy(self, busy: bool) -> None:
        self.busy_label.setText("checking…" if busy else "")

    # -- showing ------------------------------------------------------------------------
    def _show_failure(self, message: str) -> None:
        self.outcome = None
        verdict_badge(self.badge, "warn", "Could not check the plan")
        self.sentence.setText(message.split("\n")[0] if not message.startswith("internal") else message)
        self._clear_facts()
        self._set_buttons(None)
        self.run_plan.set_check(None)

    def _clear_facts(self) -> None:
        for lab in self.fact_labels.values():
            lab.setText("—")
        self.table.setRowCount(0)
        self.curve_item.setData([], [])
        for line in (self.tol_line, self.plan_line, self.min_line):
            line.setVisible(False)

    def _show_outcome(self, out: PlanCheckOutcome) -> None:
        if out.chain is not self.workspace.document.chain or out.values != self.run_plan.values:
            return  # superseded (a newer request is pending)
        self.outcome = out
        self.run_plan.set_check(out)
        if out.error or out.check is None:
            verdict_badge(self.badge, "warn", "Plan not checked")
            self.sentence.setText(out.error or "")
            self._clear_facts()
            self._set_buttons(out)
            return
        c = out.check
        from core.units import format_count, format_steps

        step = out.chain.step
        if c.sound:
            verdict_badge(self.badge, "good", f"Sound: TV {fmt_tv(c.tv)} ≤ {c.plan.tolerance:g}")
        else:
            verdict_badge(self.badge, "bad", f"Misleading: TV {fmt_tv(c.tv)} > {c.plan.tolerance:g}")
        self.sentence.setText(c.sentence)
        self.fact_labels["tv"].setText(
            f"total variation {fmt_tv(c.tv) if c.tv < 1e-12 else f'{c.tv:.4g}'} (tolerance {c.plan.tolerance:g}): "
            "the law this plan's estimate converges to, against the long-run law from the same start")
        if c.min_steps is not None:
            self.fact_labels["min_steps"].setText(f"T = {format_steps(c.min_steps, step)}, at this burn-in")
        else:
            self.fact_labels["min_steps"].setText(f"none: {c.min_steps_reason}")
        if c.min_burn_in == 0:
            self.fact_labels["min_burn_in"].setText("B = 0: no burn-in is needed at this run length")
        elif c.min_burn_in is not None:
            self.fact_labels["min_burn_in"].setText(f"B = {format_steps(c.min_burn_in, step)}, at this run length")
        elif c.min_steps is None and c.min_burn_in_reason == c.min_steps_reason:
            self.fact_labels["min_burn_in"].setText("none, for the same reason")
        else:
            self.fact_labels["min_burn_in"].setText(f"none: {c.min_burn_in_reason}")
        worst = float(np.max(c.noise_sd)) if c.noise_sd.size else 0.0
        self.fact_labels["noise"].setText(
            f"up to ±{fmt_p(worst)} per state (1 standard deviation, {format_count(c.plan.replicates)} "
            f"replicates)")
        self.fact_labels["noise"].setToolTip(c.noise_method)
        self.fact_labels["samples"].setText(
            f"{format_count(c.plan.samples)} draw{'s' if c.plan.samples != 1 else ''} "
            + ("(the state at step B + T)" if c.plan.estimator == "final" else "(steps B, B+s, …, B+(m−1)s)"))
        self._fill_table(out)
        self._fill_chart(out)
        self._set_buttons(out)

    def _fill_table(self, out: PlanCheckOutcome) -> None:
        n = len(out.chain.ids)
        with table_filling(self.table):
            self._fill_rows(out, n)
        rows = min(n, 8)
        h = self.table.horizontalHeader().height() + 4
        h += sum(self.table.rowHeight(r) for r in range(rows)) if rows else 0
        self.table.setFixedHeight(max(h, 60))

    def _fill_rows(self, out: PlanCheckOutcome, n: int) -> None:
        c = out.check
        ids = out.chain.ids
        self.table.setRowCount(n)
        big = int(np.argmax(np.abs(c.bias))) if n else -1
        for i in range(n):
            cells = [ids[i], fmt_p(c.expected_estimate[i]), fmt_p(c.long_run[i]), fmt_signed(c.bias[i]),
                     fmt_p(c.noise_sd[i])]
            for col, text in enumerate(cells):
                item = QTableWidgetItem(text)
                if col:
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                if i == big and abs(c.bias[i]) > c.plan.tolerance / 4:
                    f = item.font()
                    f.setBold(True)
                    item.setFont(f)
                self.table.setItem(i, col, item)
            label = out.chain.states[i].display_name
            if label != ids[i]:
                self.table.item(i, 0).setToolTip(label)

    def _fill_chart(self, out: PlanCheckOutcome) -> None:
        from .plot_export import finite_positive, log_ticks

        c = out.check
        x, y = finite_positive(out.curve_steps, out.curve_tv)
        lx, ly = np.log10(x), np.log10(y)
        self.curve_item.setData(lx, ly)
        tol = c.plan.tolerance
        lo_y = max(min([math.log10(tol)] + ([float(ly.min())] if ly.size else [])) - 0.3, math.log10(tol) - 3)
        hi_y = max([0.0] + ([float(ly.max())] if ly.size else []))
        self.tol_line.setPos(math.log10(tol))
        self.tol_line.setVisible(True)
        self.plan_line.setPos(math.log10(max(1, c.plan.steps)))
        self.plan_line.setVisible(True)
        if c.min_steps is not None:
            self.min_line.setPos(math.log10(max(1, c.min_steps)))
            self.min_line.setVisible(True)
        else:
            self.min_line.setVisible(False)
        if lx.size:
            x0, x1 = float(lx.min()), float(lx.max())
        else:
            x0, x1 = 0.0, math.log10(max(10, c.plan.steps * 10))
        if c.min_steps is not None:  # the label goes on the side of the line that has room
            at = (math.log10(max(1, c.min_steps)) - x0) / max(1e-9, max(x1, x0 + 1) - x0)
            side = (1, 0.5) if at > 0.6 else (0, 0.5)
            self.min_line.label.anchors = [side, side]
            self.min_line.label.updatePosition()
        it = self.chart.item
        it.setXRange(x0, max(x1, x0 + 1), padding=0.02)
        it.setYRange(max(lo_y, -8), hi_y + 0.05, padding=0)
        it.getAxis("bottom").setTicks(log_ticks(x0, max(x1, x0 + 1)))
        it.getAxis("left").setTicks(log_ticks(max(lo_y, -8), hi_y))

    def _set_buttons(self, out: PlanCheckOutcome | None) -> None:
        ok = out is not None and out.check is not None and out.error is None
        self.run_button.setEnabled(ok)
        rec_steps = rec_burn = None
        if ok:
            c = out.check
            if c.min_steps is not None and c.min_steps + c.plan.burn_in <= SIM_MAX_STEPS:
                rec_steps = c.min_steps
            if c.min_burn_in is not None and c.min_burn_in + c.plan.steps <= SIM_MAX_STEPS:
                rec_burn = c.min_burn_in
        self.act_steps.setEnabled(rec_steps is not None)
        self.act_burn.setEnabled(rec_burn is not None)
        self.recommend_button.setEnabled(rec_steps is not None or rec_burn is not None)
        if rec_steps is not None:
            self.act_steps.setText(f"Use the smallest sound run length T = {rec_steps:,}")
            self.recommend_button.setToolTip(f"Set T = {rec_steps:,} (the smallest sound run length at this "
                                             "burn-in) and run it live")
        elif rec_burn is not None:
            self.recommend_button.setToolTip(f"Set B = {rec_burn:,} (the smallest sound burn-in) and run it live")
        else:
            self.recommend_button.setToolTip("No sound plan within reach of a simulation for this start and "
                                             "estimator (see the reason above)")
        if rec_burn is not None:
            self.act_burn.setText(f"Use the smallest sound burn-in B = {rec_burn:,} instead")

    def recommended_values(self, which: str = "steps") -> PlanValues | None:
        """The plan the check recommends: T = min_steps (or B = min_burn_in), None when there is none."""
        out = self.outcome
        if out is None or out.check is None:
            return None
        c = out.check
        v = out.values
        if which == "steps" and c.min_steps is not None and c.min_steps + v.burn_in <= SIM_MAX_STEPS:
            return replace(v, steps=int(c.min_steps), stride=min(v.stride, int(c.min_steps)))
        if c.min_burn_in is not None and c.min_burn_in + v.steps <= SIM_MAX_STEPS:
            return replace(v, burn_in=int(c.min_burn_in))
        if which == "burn_in" and c.min_steps is not None and c.min_steps + v.burn_in <= SIM_MAX_STEPS:
            return replace(v, steps=int(c.min_steps), stride=min(v.stride, int(c.min_steps)))
        return None

    def run_recommended(self, which: str = "steps") -> bool:
        """Set the recommended run length (or burn-in) and run it live; False when there is none."""
        rec = self.recommended_values(which)
        if rec is None:
            return False
        self.run_plan.update(steps=rec.steps, burn_in=rec.burn_in, stride=rec.stride)
        self.run_plan.request_run("recommended")
        return True



PANELS = [
    PanelSpec("plan", "Plan check", PlanForm, area=Qt.DockWidgetArea.RightDockWidgetArea,
              tab_with="simulation", shortcut="Ctrl+Shift+P"),
]
