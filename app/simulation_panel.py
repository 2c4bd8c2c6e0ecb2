"""The replicate simulation panel: a live run of the plan, next to the exact answer.

The panel runs the shared plan (:mod:`app.plan_form`) with the core engine
(:class:`core.simulate.ReplicateSimulation`) in a worker thread
(:class:`SimulationThread`) and shows, live:

* grouped bars per state: the simulated share (of the replicates at step
  ``t``, or of the time along each replicate), the exact value (``pi0 P^t``,
  or the exact mean of the kept draws so far) with its ±2 standard deviation
  noise band, and the long-run law from the start;
* the total variation distance to the long-run law against the steps
  (log-log): the simulated points over the exact curve ``d_start(t) =
  TV(pi0 P^t, long run)`` (and the exact curve of the time average), with
  the tolerance and the noise floor of ``R`` replicates;
* a strip of a few sample paths (their last steps).

The run convention is DEVELOPERS.md "Simulation": burn-in ``B`` then ``T``
steps; the final-step view shows the ensemble, the time-average view the
states kept at steps ``B, B + s, ...``.  Run, Pause, Single step and Reset
drive the worker; its speed (steps per second or as fast as possible) can be
changed while it runs.

Threading: the run executes in a worker process (:mod:`app.simulation_worker`,
so the engine never holds the GUI's interpreter lock), which constructs the
simulation, computes the exact curves, then advances in chunks sized to about
15 ms of work (measured as it goes).  A relay thread (:class:`SimulationThread`)
passes the controls to it and its snapshots back as queued signals tagged with
the run's id; the GUI keeps only the newest frame and draws it from a 25 Hz
timer with ``setData`` on plot items made once (live charts have no grid, so
their axes are not repainted with every frame).  A frame whose run id is not
the current one is dropped, so an edit of the chain (which stops the run, or
restarts it, as set in the panel's menu) never mixes old and new results.  At
the end the worker calls :func:`core.simulate.compare` and the panel shows its
verdict.  ``tests/benchmarks/gui_latency.py`` measures the event-loop latency
and the refresh rate during a run of 100,000 replicates.
"""
from __future__ import annotations

import math
import queue
import threading
import time
import traceback
import weakref

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QThread, Qt, QTimer, Signal
from PySide6.QtGui import QAction, QActionGroup
from PySide6.QtWidgets import (
    QButtonGroup,
    QHBoxLayout,
    QLabel,
    QMenu,
    QProgressBar,
    QSizePolicy,
    QSplitter,
    QStyle,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from core.errors import LongrunError

from . import palette as pal
from .analysis_service import analysis_key
from .panels import PanelSpec, Workspace, separator
from .plan_form import PlanFields, fmt_tv, preload_core, shared_plan, verdict_badge
from .simulation_worker import (PATH_LENGTH, PATHS, POOL, LiveFrame, PlanValues, RunRequest, RunSetup,
                                ThreadControl, WorkerProcess, default_mode, run_loop)
from .plot_export import (AVG_CURVE, CURVE, EXACT, GUIDE, LONG_RUN, SIM, ChartBox, finite_positive, log_ticks,
                          nice_upper, state_ticks)

__all__ = ["SimulationPanel", "SimulationThread", "RunRequest", "RunSetup", "LiveFrame", "live_simulation_threads",
           "PANELS", "PATHS", "PATH_LENGTH"]

#: Above this many states the bar chart shows one bar per state, with the exact laws as lines.
DENSE_STATES = 40
#: Screen refresh of the plots (ms).
REFRESH_MS = 40
#: Most simulated points kept on the TV chart (one per 1/200 of a decade of steps).
TV_POINTS_PER_DECADE = 200

_THREADS: "weakref.WeakSet[SimulationThread]" = weakref.WeakSet()


def live_simulation_threads() -> list["SimulationThread"]:
    """Simulation worker threads still running (tests check it is empty at teardown)."""
    return [t for t in list(_THREADS) if t.isRunning()]


# ---------------------------------------------------------------------------
# the worker thread: runs the loop in a worker process (or here) and relays its messages
# ---------------------------------------------------------------------------
class SimulationThread(QThread):
    """Runs one :class:`RunRequest`; its controls are thread-safe.

    In ``"process"`` mode (the default) the run executes in a worker process
    (:data:`app.simulation_worker.POOL`) and this thread relays its messages;
    in ``"thread"`` mode the loop runs in this thread.  Either way the signals
    are emitted from this thread and delivered queued to the GUI thread.

    Signals
    -------
    setup(int, RunSetup), frame(int, LiveFrame), finished_run(int, object), failed(int, str)
        ``finished_run`` carries the :class:`core.simulate.SimulationReport`
        (None when the run was cancelled).
    """

    setup = Signal(int, object)
    frame = Signal(int, object)
    finished_run = Signal(int, object)
    failed = Signal(int, str)

    #: Seconds a cancelled run may take to stop before its worker process is killed.
    KILL_AFTER = 3.0

    def __init__(self, request: RunRequest, *, mode: str | None = None):
        super().__init__()
        self.request = request
        self.run_id = request.run_id
        self.mode = mode or default_mode()
        self._mode_lock = threading.Lock()
        self._paused = bool(request.paused)
        self._cancel_at: float | None = None
        self.worker: WorkerProcess | None = None
        self._outbox: "queue.SimpleQueue[tuple]" = queue.SimpleQueue()
        self._control = ThreadControl(paused=request.paused, wanted=request.first_steps,
                                      speed=request.values.speed)
        self.setObjectName(f"longrun-simulation-{request.run_id}")
        _THREADS.add(self)

    # -- controls (any thread) -----------------------------------------------------
    def _post(self, msg: tuple) -> None:
        with self._mode_lock:
            if self.mode == "thread":
                self._control.send(msg)
            else:
                self._outbox.put(msg)

    def pause(self) -> None:
        self._paused = True
        self._post(("pause",))

    def resume(self) -> None:
        self._paused = False
        self._post(("resume",))

    def step(self, k: int = 1) -> None:
        """Pause (if running) and advance ``k`` more steps."""
        self._paused = True
        self._post(("step", max(1, int(k))))

    def set_speed(self, speed: float | None) -> None:
        self._post(("speed", speed))

    def cancel(self) -> None:
        if self._cancel_at is None:
            self._cancel_at = time.monotonic()
        self._post(("cancel",))

    @property
    def paused(self) -> bool:
        return self._paused

    # -- the run ------------------------------------------------------------------------
    def run(self) -> None:  # noqa: D401 - QThread's entry point
        if self.mode == "process":
            try:
                worker = POOL.acquire()
            except (OSError, RuntimeError, ValueError):
                # no worker process on this system: run here (the GUI is then less smooth, the numbers the same)
                with self._mode_lock:
                    self.mode = "thread"
                    while True:
                        try:
                            self._control.send(self._outbox.get_nowait())
                        except queue.Empty:
                            break
            else:
                self.worker = worker
                self._relay(worker)
                return
        rid = self.run_id
        try:
            run_loop(self.request, self._emit, self._control)
        except LongrunError as exc:
            self.failed.emit(rid, str(exc))
        except MemoryError:
            self.failed.emit(rid, "not enough memory for this run; use fewer replicates")
        except Exception:  # a bug must not take the app down; it is shown in the panel
            self.failed.emit(rid, "internal error:\n" + traceback.format_exc(limit=8))

    def _relay(self, worker: WorkerProcess) -> None:
        rid = self.run_id
        conn = worker.conn
        healthy = True
        try:
            conn.send(("run", self.request))
            while True:
                while True:
                    try:
                        msg = self._outbox.get_nowait()
                    except queue.Empty:
                        break
                    conn.send(msg)
                if conn.poll(0.02):
                    kind, mid, payload = conn.recv()
                    if mid != rid:
                        continue
                    if kind == "done":
                        break
                    self._emit(kind, payload)
                elif not worker.alive():
                    healthy = False
                    self._lost(worker)
                    break
                elif self._cancel_at is not None and time.monotonic() - self._cancel_at > self.KILL_AFTER:
                    healthy = False  # stuck in a long step (a huge table): stop it the hard way
                    break
        except (EOFError, OSError, BrokenPipeError):
            healthy = False
            self._lost(worker)
        if healthy:
            POOL.release(worker)
        else:
            POOL.discard(worker)

    def _lost(self, worker: WorkerProcess) -> None:
        """The worker process went away in the middle of a run (killed, out of memory...)."""
        if self._cancel_at is not None:
            return  # it was being stopped anyway
        worker.wait(1.0)
        code = worker.exitcode()
        self.failed.emit(self.run_id, f"the simulation engine stopped unexpectedly (exit code {code}); "
                                      "press Run to start it again")

    def _emit(self, kind: str, payload) -> None:
        rid = self.run_id
        if kind == "setup":
            self.setup.emit(rid, payload)
        elif kind == "frame":
            self.frame.emit(rid, payload)
        elif kind == "finished":
            self.finished_run.emit(rid, payload)
        elif kind == "failed":
            self.failed.emit(rid, payload)


# ---------------------------------------------------------------------------
# the panel
# ---------------------------------------------------------------------------
def _tool(text: str, icon: QStyle.StandardPixmap | None, tip: str, name: str) -> QToolButton:
    b = QToolButton()
    b.setText(text)
    b.setObjectName(name)
    b.setToolTip(tip)
    b.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextBesideIcon)
    if icon is not None:
        from PySide6.QtWidgets import QApplication

        b.setIcon(QApplication.style().standardIcon(icon))
    return b


def _fmt_rate(x: float) -> str:
    if x <= 0 or not math.isfinite(x):
        return "—"
    m, e = f"{x:.2e}".split("e")
    return f"{m}e{int(e)}" if x >= 1e5 else f"{x:,.0f}"


def _fmt_eta(seconds: float) -> str:
    if not math.isfinite(seconds):
        return ""
    if seconds < 1:
        return "under a second left"
    if seconds < 120:
        return f"{seconds:.0f} s left"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min left"
    if seconds < 3 * 86400:
        return f"{seconds / 3600:.1f} h left"
    return f"{seconds / 86400:.0f} days left"


class SimulationPanel(QWidget):
    """The live replicate simulation of the shared plan (a dock panel).

    Attributes
    ----------
    state : str
        ``"idle"``, ``"running"``, ``"paused"``, ``"finished"``, ``"stopped"``
        or ``"failed"``.
    run_id : int
        Id of the current run (frames of other runs are dropped).
    setup_info : RunSetup or None
    frame : LiveFrame or None
        The frame on screen.
    report : core.simulate.SimulationReport or None
        The finished run's comparison with the exact values.
    render_count : int
        Frames drawn so far (the benchmark measures the refresh rate with it).
    """

    stateChanged = Signal(str)
    runFinished = Signal(object)

    def __init__(self, workspace: Workspace):
        super().__init__()
        preload_core()
        self.workspace = workspace
        self.run_plan = shared_plan(workspace)
        self.state = "idle"
        self.run_id = 0
        self.thread: SimulationThread | None = None
        self._threads: list[SimulationThread] = []
        self.setup_info: RunSetup | None = None
        self.frame: LiveFrame | None = None
        self._pending: LiveFrame | None = None
        self.report = None
        self.render_count = 0
        self.dropped_frames = 0
        self._restart_pending = False
        self._n_bars = -1
        self._bar_top = 0.0
        self._tv_pts = {"final": ([], []), "average": ([], [])}
        self._tv_drawn = None
        self._closed = False
        self._prewarmed = False

        # -- controls
        self.fields = PlanFields(workspace, self.run_plan,
                                 ("start", "replicates", "steps", "burn_in", "stride", "seed", "speed"), columns=3)
        SP = QStyle.StandardPixmap
        self.run_button = _tool("Run", SP.SP_MediaPlay, "Run the plan (or resume a paused run)", "simRun")
        self.pause_button = _tool("Pause", SP.SP_MediaPause, "Pause the run", "simPause")
        self.step_button = _tool("Step", SP.SP_MediaSkipForward, "Advance one step (pauses a running run)",
                                 "simStep")
        self.reset_button = _tool("Reset", SP.SP_MediaStop, "Stop the run and clear the charts", "simReset")
        self.run_button.clicked.connect(self.run)
        self.pause_button.clicked.connect(self.pause)
        self.step_button.clicked.connect(lambda: self.single_step())
        self.reset_button.clicked.connect(self.reset)
        self.view_final = QToolButton()
        self.view_final.setText("Final step across replicates")
        self.view_final.setObjectName("simViewFinal")
        self.view_avg = QToolButton()
        self.view_avg.setText("Time average along chains")
        self.view_avg.setObjectName("simViewAverage")
        self.view_group = QButtonGroup(self)
        for b, key in ((self.view_final, "final"), (self.view_avg, "average")):
            b.setCheckable(True)
            b.setToolTip("Estimator shown (and checked by the plan): " +
                         ("where the replicates are at step t" if key == "final"
                          else "the share of the kept steps spent in each state"))
            self.view_group.addButton(b)
        self.view_final.toggled.connect(lambda on: on and self.run_plan.update(estimator="final"))
        self.view_avg.toggled.connect(lambda on: on and self.run_plan.update(estimator="average"))
        self.options_button = QToolButton()
        self.options_button.setText("On edit: stop")
        self.options_button.setObjectName("simOptions")
        self.options_button.setToolTip("What a running simulation does when the chain is edited")
        self.options_button.setPopupMode(QToolButton.ToolButtonPopupMode.InstantPopup)
        menu = QMenu(self.options_button)
        group = QActionGroup(self)
        self.on_edit_actions: dict[str, QAction] = {}
        for key, text in (("stop", "When the chain is edited, stop the run"),
                          ("restart", "When the chain is edited, restart the run on the new chain")):
            act = QAction(text, self, checkable=True)
            act.setData(key)
            group.addAction(act)
            menu.addAction(act)
            act.toggled.connect(lambda on, k=key: on and self.set_on_edit(k))
            self.on_edit_actions[key] = act
        self.on_edit_actions[self.on_edit()].setChecked(True)
        self.options_button.setText(f"On edit: {self.on_edit()}")
        self.options_button.setMenu(menu)

        buttons = QHBoxLayout()
        buttons.setSpacing(3)
        for b in (self.run_button, self.pause_button, self.step_button, self.reset_button):
            buttons.addWidget(b)
        buttons.addStretch(1)
        buttons.addWidget(self.options_button)
        views = QHBoxLayout()
        views.setSpacing(0)
        shown = QLabel("Estimate shown ")
        shown.setStyleSheet(f"color: {pal.INK_SOFT.name()};")
        views.addWidget(shown)
        views.addWidget(self.view_final)
        views.addWidget(self.view_avg)
        views.addStretch(1)

        self.progress = QProgressBar()
        self.progress.setObjectName("simProgress")
        self.progress.setRange(0, 1000)
        self.progress.setTextVisible(False)
        self.progress.setFixedHeight(8)
        self.status = QLabel("Ready: press Run to simulate the plan.")
        self.status.setObjectName("simStatus")
        self.status.setWordWrap(True)
        # two lines always: a changing text never moves the charts (no relayout per frame)
        self.status.setFixedHeight(2 * self.status.fontMetrics().lineSpacing() + 4)
        self.status.setAlignment(Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignTop)
        self.status.setStyleSheet(f"color: {pal.INK.name()};")
        self.prediction = QLabel("")
        self.prediction.setObjectName("simPrediction")
        self.prediction.setWordWrap(True)
        self.prediction.setStyleSheet(f"color: {pal.INK_SOFT.name()};")
        self.badge = QLabel("")
        self.badge.setObjectName("simVerdict")
        self.badge.setSizePolicy(QSizePolicy.Policy.Maximum, QSizePolicy.Policy.Fixed)
        self.badge.setVisible(False)
        self.verdict = QLabel("")
        self.verdict.setObjectName("simVerdictText")
        self.verdict.setWordWrap(True)
        self.verdict.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.verdict.setVisible(False)

        # -- charts (items are made once; frames only call setData / setOpts)
        self.bars = ChartBox("Share of replicates in each state", name="simBars", grid=False)
        self.bars.set_labels("", "share")
        bi = self.bars.item
        w = 0.26
        self.bar_sim = pg.BarGraphItem(x=[], height=[], width=w, brush=SIM, pen=pg.mkPen(SIM.darker(125)))
        self.bar_exact = pg.BarGraphItem(x=[], height=[], width=w, brush=EXACT, pen=pg.mkPen(EXACT.darker(125)))
        self.bar_long = pg.BarGraphItem(x=[], height=[], width=w, brush=pal.tint(LONG_RUN, 0.92),
                                        pen=pg.mkPen(LONG_RUN, width=1.6))
        self.noise_band = pg.ErrorBarItem(x=np.zeros(0), y=np.zeros(0), height=np.zeros(0), beam=0.12,
                                          pen=pg.mkPen(pal.INK, width=1.3))
        # many states: one bar per state and the exact and long-run laws as lines over them
        self.line_exact = pg.PlotDataItem(stepMode="center", pen=pg.mkPen(EXACT.darker(110), width=1.8))
        self.line_long = pg.PlotDataItem(stepMode="center",
                                         pen=pg.mkPen(LONG_RUN, width=1.3, style=Qt.PenStyle.DashLine))
        for item in (self.bar_sim, self.bar_exact, self.bar_long, self.noise_band, self.line_exact, self.line_long):
            bi.addItem(item)
        self._bar_w = w
        self._dense = False
        self.tv = ChartBox("Distance to the long-run law", name="simTV", grid=False)
        self.tv.set_labels("step t (log scale)", "TV distance")
        ti = self.tv.item
        self.tv_curve = pg.PlotDataItem(pen=pg.mkPen(CURVE, width=2.2))
        self.tv_avg_curve = pg.PlotDataItem(pen=pg.mkPen(AVG_CURVE, width=2.2, style=Qt.PenStyle.DashLine))
        self.tv_points = pg.ScatterPlotItem(size=4.5, brush=pg.mkBrush(SIM.red(), SIM.green(), SIM.blue(), 170),
                                             pen=pg.mkPen(SIM.darker(130), width=0.5))
        self.tol_line = pg.InfiniteLine(angle=0, pen=pg.mkPen(GUIDE, width=1.3, style=Qt.PenStyle.DashLine))
        self.floor_line = pg.InfiniteLine(angle=0, pen=pg.mkPen(GUIDE, width=1.3, style=Qt.PenStyle.DotLine))
        self.now_line = pg.InfiniteLine(angle=90, pen=pg.mkPen(pal.tint(pal.INK, 0.55), width=1))
        for item in (self.tv_curve, self.tv_avg_curve, self.tv_points):
            ti.addItem(item)
        for item in (self.tol_line, self.floor_line, self.now_line):
            ti.addItem(item, ignoreBounds=True)
            item.setVisible(False)
        self.paths = ChartBox("A few sample paths (their last steps)", name="simPaths", grid=False)
        self.paths.set_labels("steps before t", "")
        self.paths.setMinimumHeight(95)
        self.paths.item.getViewBox().sigResized.connect(self._label_paths)
        pcol = [pal.OKABE_ITO[k] for k in ("blue", "orange", "bluish_green", "reddish_purple")]
        self.path_items = []
        for k in range(PATHS):
            item = pg.PlotDataItem(pen=pg.mkPen(pcol[k % len(pcol)], width=1.6), stepMode="right")
            self.paths.item.addItem(item)
            self.path_items.append(item)
        self._set_legends()

        split = QSplitter(Qt.Orientation.Vertical)
        split.setObjectName("simSplit")
        split.setChildrenCollapsible(False)
        split.addWidget(self.bars)
        split.addWidget(self.tv)
        split.addWidget(self.paths)
        split.setStretchFactor(0, 5)
        split.setStretchFactor(1, 4)
        split.setStretchFactor(2, 3)
        self.splitter = split

        verdict_row = QHBoxLayout()
        verdict_row.addWidget(self.badge, 0, Qt.AlignmentFlag.AlignTop)
        verdict_row.addWidget(self.verdict, 1)
        body = QWidget()
        lay = QVBoxLayout(body)
        lay.setContentsMargins(8, 6, 8, 6)
        lay.setSpacing(5)
        lay.addWidget(self.fields)
        lay.addLayout(buttons)
        lay.addLayout(views)
        lay.addWidget(self.progress)
        lay.addWidget(self.status)
        lay.addWidget(self.prediction)
        lay.addWidget(separator())
        lay.addWidget(split, 1)
        lay.addLayout(verdict_row)
        outer = QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        outer.addWidget(body)

        self.timer = QTimer(self)
        self.timer.setInterval(REFRESH_MS)
        self.timer.timeout.connect(self._render)
        self.run_plan.changed.connect(self._plan_changed)
        self.run_plan.runRequested.connect(self._run_requested)
        self.run_plan.checkChanged.connect(lambda _o: self._show_prediction())
        workspace.document.chainChanged.connect(self._chain_edited)
        workspace.analysis.structureReady.connect(self._structure_ready)
        self._show_view(self.run_plan.values.estimator)
        self._reset_charts()
        self._update_buttons()

    def showEvent(self, event) -> None:  # noqa: N802 - Qt's name
        """Start a worker process in the background the first time the panel is seen."""
        super().showEvent(event)
        if not self._prewarmed and default_mode() == "process":
            self._prewarmed = True
            threading.Thread(target=POOL.prewarm, name="longrun-prewarm", daemon=True).start()

    # -- settings -------------------------------------------------------------------
    def on_edit(self) -> str:
        v = self.workspace.settings.get("simulation/on_edit")
        return v if v in ("stop", "restart") else "stop"

    def set_on_edit(self, how: str) -> None:
        if how not in ("stop", "restart"):
            raise ValueError(how)
        self.workspace.settings.set("simulation/on_edit", how)
        self.options_button.setText(f"On edit: {how}")
        act = self.on_edit_actions[how]
        if not act.isChecked():
            act.setChecked(True)

    # -- commands ------------------------------------------------------------------------
    def run(self) -> bool:
        """Run the plan (resume when paused); False when it cannot start."""
        if self.state == "paused" and self.thread is not None and self._same_plan():
            self.thread.resume()
            self.timer.start()
            self._set_state("running")
            return True
        return self._start(paused=False)

    def pause(self) -> None:
        if self.state == "running" and self.thread is not None:
            self.thread.pause()
            self._set_state("paused")

    def single_step(self, k: int = 1) -> bool:
        """Advance ``k`` steps (starting a paused run when there is none)."""
        if self.state in ("running", "paused") and self.thread is not None and self._same_plan():
            self.thread.step(k)
            self.timer.start()
            self._set_state("paused")
            return True
        return self._start(paused=True, first_steps=k)

    def reset(self) -> None:
        """Stop the run and clear the charts."""
        self._restart_pending = False
        self._stop_thread()
        self.report = None
        self._reset_charts()
        self._set_state("idle")
        self.status.setText("Ready: press Run to simulate the plan.")

    def _same_plan(self) -> bool:
        t = self.thread
        return t is not None and t.request.values.run_key() == self.run_plan.values.run_key() \
            and t.request.chain is self.workspace.document.chain

    def _start(self, *, paused: bool, first_steps: int = 0) -> bool:
        self._restart_pending = False
        chain = self.workspace.document.chain
        self._stop_thread()
        self.report = None
        if chain.n == 0:
            self.status.setText("Add states to the chain to simulate it.")
            return False
        if not chain.is_valid:
            k = len(chain.problems)
            self.status.setText(f"The chain has {k} problem{'s' if k != 1 else ''} (see Checks): fix "
                                f"{'them' if k != 1 else 'it'} to simulate.")
            self._set_state("failed")
            return False
        self.run_id += 1
        req = RunRequest(self.run_id, chain, self.run_plan.values, paused=paused, first_steps=first_steps)
        th = SimulationThread(req)
        th.setup.connect(self._on_setup)
        th.frame.connect(self._on_frame)
        th.finished_run.connect(self._on_finished)
        th.failed.connect(self._on_failed)
        th.finished.connect(lambda t=th: self._thread_done(t))
        self.thread = th
        self._threads.append(th)
        self._reset_charts()
        self._set_state("paused" if paused else "running")
        self.status.setText("Preparing the run…")
        th.start()
        self.timer.start()
        return True

    def _stop_thread(self) -> None:
        th = self.thread
        self.thread = None
        self.run_id += 1  # everything the old run still sends is dropped
        self._pending = None
        if th is not None:
            th.cancel()

    def _thread_done(self, th: SimulationThread) -> None:
        th.wait()
        if th in self._threads:
            self._threads.remove(th)

    def _run_requested(self, _kind: str) -> None:
        dock = self.parentWidget()
        from PySide6.QtWidgets import QDockWidget

        while dock is not None and not isinstance(dock, QDockWidget):
            dock = dock.parentWidget()
        if dock is not None:
            dock.show()
            dock.raise_()
        self._start(paused=False)

    # -- the chain changes under a run ---------------------------------------------------------
    def _chain_edited(self, old, new) -> None:
        if analysis_key(old) == analysis_key(new):
            return  # moved or relabelled: the run is unaffected
        was_active = self.state in ("running", "paused")
        had_results = self.frame is not None or self.report is not None
        self._stop_thread()
        self.report = None
        self._reset_charts()
        if was_active and self.on_edit() == "restart":
            self._restart_pending = True
            self._set_state("paused" if self.state == "paused" else "running")
            self.status.setText("The chain was edited: the run restarts on the new chain once it is checked…")
            return
        if was_active:
            self._set_state("stopped")
            self.status.setText("Stopped: the chain was edited. Press Run to simulate the new chain.")
        elif had_results:
            self._set_state("idle")
            self.status.setText("The chain was edited: the previous run's results were cleared.")

    def _structure_ready(self, report) -> None:
        if not self._restart_pending or report.chain is not self.workspace.document.chain:
            return
        self._restart_pending = False
        if report.structure is None:
            self._set_state("stopped")
            self.status.setText("Stopped: the edited chain has problems (see Checks); fix them and press Run.")
            return
        self._start(paused=False)

    def _plan_changed(self, values: PlanValues) -> None:
        self._show_view(values.estimator)
        if self.thread is not None:
            self.thread.set_speed(values.speed)
        if self.frame is not None:
            if self._pending is None:
                self._pending = self.frame
            self._render()
        if self.report is not None and self.state == "finished":
            self._show_report(self.report)
        self._update_buttons()
        self._show_prediction()

    def _show_view(self, estimator: str) -> None:
        for b, key in ((self.view_final, "final"), (self.view_avg, "average")):
            b.blockSignals(True)
            b.setChecked(estimator == key)
            b.blockSignals(False)
        self._set_legends()

    # -- worker signals -------------------------------------------------------------------------
    def _on_setup(self, rid: int, setup: RunSetup) -> None:
        if rid != self.run_id:
            self.dropped_frames += 1
            return
        self.setup_info = setup
        self._tv_pts = {"final": ([], []), "average": ([], [])}
        self._prepare_charts(setup)
        self._show_prediction()

    def _on_frame(self, rid: int, frame: LiveFrame) -> None:
        if rid != self.run_id or self.setup_info is None:
            self.dropped_frames += 1
            return
        for step, tv_e, x_avg, tv_a in frame.trace:
            self._add_tv_point("final", step, tv_e)
            if tv_a is not None and x_avg:
                self._add_tv_point("average", x_avg, tv_a)
        self._pending = frame

    def _on_finished(self, rid: int, report) -> None:
        if rid != self.run_id:
            self.dropped_frames += 1
            return
        if report is None:
            return
        self.report = report
        if self._pending is None:
            self._pending = self.frame
        self._render()
        self._show_report(report)
        self._set_state("finished")
        self.runFinished.emit(report)

    def _on_failed(self, rid: int, message: str) -> None:
        if rid != self.run_id:
            return
        self._set_state("failed")
        first = message.split("\n")[0]
        self.status.setText(f"Could not run: {first}" if not message.startswith("internal") else message)
        self.status.setToolTip(message)

    # -- drawing ------------------------------------------------------------------------------------
    def _set_state(self, state: str) -> None:
        self.state = state
        if state not in ("running", "paused"):
            self.timer.stop()
        self._update_buttons()
        self.stateChanged.emit(state)

    def _update_buttons(self) -> None:
        s = self.state
        changed = s in ("running", "paused") and self.thread is not None and not self._same_plan()
        self.run_button.setEnabled(s != "running" or changed)
        if changed:
            self.run_button.setText("Restart")
            self.run_button.setToolTip("The plan was changed: start a new run with it")
        else:
            self.run_button.setText("Resume" if s == "paused" else ("Run again" if s == "finished" else "Run"))
            self.run_button.setToolTip("Run the plan (or resume a paused run)")
        self.pause_button.setEnabled(s == "running")
        self.step_button.setEnabled(True)
        self.reset_button.setEnabled(s in ("running", "paused", "finished", "stopped", "failed"))

    def _set_legends(self) -> None:
        avg = self.run_plan.values.estimator == "average"
        exact = "exact mean of the kept steps" if avg else "exact law at step t"
        if getattr(self, "_dense", False):
            bars = [("fill", SIM, "simulated"), ("line", EXACT.darker(110), exact), ("dash", LONG_RUN, "long-run law")]
        else:
            bars = [("fill", SIM, "simulated"), ("fill", EXACT, exact)]
            if not avg:
                bars.append(("band", pal.INK, "±2 sd noise"))
            bars.append(("outline", LONG_RUN, "long-run law"))
        self.bars.set_legend(bars)
        tv = [("dots", SIM, "simulated"), ("line", CURVE, "exact d_start(t)")]
        if avg:
            tv.append(("dash", AVG_CURVE, "exact, time average"))
        else:
            tv.append(("dotline", GUIDE, "noise floor"))
        tv.append(("dash", GUIDE, "tolerance"))
        self.tv.set_legend(tv)

    def _reset_charts(self) -> None:
        """Empty charts for the current chain (no frame from any run)."""
        self.frame = None
        self._pending = None
        self.setup_info = None
        self._tv_pts = {"final": ([], []), "average": ([], [])}
        self._tv_drawn = None
        chain = self.workspace.document.chain
        self._layout_bars(chain.ids)
        z = np.zeros(chain.n)
        self.bar_sim.setOpts(height=z)
        self.bar_exact.setOpts(height=z)
        self.bar_long.setOpts(height=z)
        self.noise_band.setData(x=np.zeros(0), y=np.zeros(0), height=np.zeros(0))
        self._bar_top = 0.0
        self.bars.item.setYRange(0, 1, padding=0)
        self.bars.set_title("Share of replicates in each state")
        self.tv_curve.setData([], [])
        self.tv_avg_curve.setData([], [])
        self.tv_points.setData([], [])
        for line in (self.tol_line, self.floor_line, self.now_line):
            line.setVisible(False)
        self.tv.item.setXRange(0, 3, padding=0)
        self.tv.item.setYRange(-3, 0, padding=0.02)
        self.tv.item.getAxis("bottom").setTicks(log_ticks(0, 3))
        self.tv.item.getAxis("left").setTicks(log_ticks(-3, 0))
        for item in self.path_items:
            item.setData([], [])
        self._layout_paths(chain.ids)
        self.progress.setValue(0)
        self.badge.setVisible(False)
        self.verdict.setVisible(False)
        self.prediction.setText("")

    def _layout_bars(self, ids) -> None:
        n = len(ids)
        x = np.arange(n, dtype=float)
        w = self._bar_w
        self._dense = n > DENSE_STATES
        if self._dense:
            self.bar_sim.setOpts(x=x, height=np.zeros(n), width=0.9, pen=pg.mkPen(None))
        else:
            self.bar_sim.setOpts(x=x - w, height=np.zeros(n), width=w, pen=pg.mkPen(SIM.darker(125)))
        self.bar_exact.setOpts(x=x, height=np.zeros(n))
        self.bar_long.setOpts(x=x + w, height=np.zeros(n))
        edges = np.arange(n + 1, dtype=float) - 0.5
        self.line_exact.setData(edges, np.zeros(n))
        self.line_long.setData(edges, np.zeros(n))
        for item in (self.bar_exact, self.bar_long):
            item.setVisible(not self._dense)
        for item in (self.line_exact, self.line_long):
            item.setVisible(self._dense)
        self._set_legends()
        ax = self.bars.item.getAxis("bottom")
        ax.setTicks([state_ticks(ids), []])
        self.bars.item.setXRange(-0.6, max(n - 0.4, 0.6), padding=0)
        self._n_bars = n

    def _layout_paths(self, ids) -> None:
        n = len(ids)
        self._path_ids = tuple(ids)
        self._label_paths()
        self.paths.item.setYRange(-0.6, max(n - 0.4, 0.6), padding=0)
        self.paths.item.setXRange(-(PATH_LENGTH - 1), 0, padding=0.01)

    def _label_paths(self, *_args) -> None:
        """State labels on the paths' axis: as many as its height holds (one per 14 px), at least two."""
        ids = getattr(self, "_path_ids", ())
        if not ids:
            return
        height = self.paths.item.getViewBox().height()
        fit = max(2, int(height // 14)) if height > 0 else 6
        self.paths.item.getAxis("left").setTicks([state_ticks(ids, max_labels=fit, width=8), []])

    def _prepare_charts(self, setup: RunSetup) -> None:
        ids = setup.ids
        if len(ids) != self._n_bars:
            self._layout_bars(ids)
        self._layout_paths(ids)
        self.bar_long.setOpts(height=setup.long_run)
        self.line_long.setData(np.arange(len(ids) + 1, dtype=float) - 0.5, np.asarray(setup.long_run, float))
        x, y = finite_positive(setup.curve_steps, setup.curve_tv)
        self.tv_curve.setData(np.log10(x), np.log10(y))
        ax_, ay = finite_positive(setup.avg_steps, setup.avg_tv)
        self.tv_avg_curve.setData(np.log10(ax_), np.log10(ay))
        tol = setup.values.tolerance
        self.tol_line.setPos(math.log10(tol))
        self.tol_line.setVisible(True)
        if setup.noise_floor > 0:
            self.floor_line.setPos(math.log10(setup.noise_floor))
        x1 = math.log10(max(10, setup.total_steps))
        guides = [math.log10(tol)] + ([math.log10(setup.noise_floor)] if setup.noise_floor > 0 else [])
        lows = list(guides)
        if y.size:
            lows.append(float(np.log10(y).min()))
        if ay.size:
            lows.append(float(np.log10(ay).min()))
        # the exact curve may fall far lower; the view stops a little below the noise floor and tolerance
        y0 = max(-6.0, min(lows) - 0.4, min(guides) - 1.2)
        ti = self.tv.item
        ti.setXRange(0, x1, padding=0.02)
        ti.setYRange(y0, 0.05, padding=0)
        ti.getAxis("bottom").setTicks(log_ticks(0, x1))
        ti.getAxis("left").setTicks(log_ticks(y0, 0))
        self._apply_view_items()

    def _apply_view_items(self) -> bool:
        """Show the items of the estimate in view; True when the simulated TV points were redrawn."""
        avg = self.run_plan.values.estimator == "average"
        self.tv_avg_curve.setVisible(avg)
        self.floor_line.setVisible(not avg and self.setup_info is not None and self.setup_info.noise_floor > 0)
        self.noise_band.setVisible(not avg and not self._dense)
        view = "average" if avg else "final"
        xs, ys = self._tv_pts[view]
        key = (view, len(xs), xs[-1] if xs else None, self.run_id)
        if key == self._tv_drawn:
            return False
        self._tv_drawn = key
        if xs:
            self.tv_points.setData(np.log10(np.asarray(xs, float)), np.log10(np.asarray(ys, float)))
        else:
            self.tv_points.setData([], [])
        return True

    def _add_tv_point(self, view: str, x: float, tv: float) -> None:
        if x <= 0 or not (tv > 0) or not math.isfinite(tv):
            return
        xs, ys = self._tv_pts[view]
        lx = math.log10(x)
        if xs and lx - math.log10(xs[-1]) < 1.0 / TV_POINTS_PER_DECADE:
            xs[-1], ys[-1] = x, tv  # same place on the chart: keep the newest
            return
        xs.append(x)
        ys.append(tv)

    def _render(self) -> None:
        frame = self._pending
        if frame is None:
            return
        self._pending = None
        setup = self.setup_info
        if setup is None or frame.run_id != self.run_id:
            return
        self.frame = frame
        self.render_count += 1
        snap = frame.snap
        v = self.run_plan.values
        avg = v.estimator == "average"
        R = snap.replicates
        rep = self.report if self.report is not None and self.report.step == snap.step else None
        if avg:
            sim = snap.time_average if snap.time_average is not None else np.zeros(len(setup.ids))
            exact = frame.exact_kept
            if rep is not None and rep.window_mean is not None:
                exact = rep.window_mean
            if exact is None:
                exact = np.zeros(len(setup.ids))
        else:
            sim = snap.ensemble / R
            exact = rep.exact_at_step if rep is not None else frame.exact_now
        self.bar_sim.setOpts(height=np.asarray(sim, float))
        if self._dense:
            self.line_exact.setData(np.arange(len(exact) + 1, dtype=float) - 0.5, np.asarray(exact, float))
        else:
            self.bar_exact.setOpts(height=np.asarray(exact, float))
        top = float(max(np.max(sim) if len(sim) else 0, np.max(exact) if len(exact) else 0,
                        np.max(setup.long_run) if len(setup.long_run) else 0))
        if not avg and not self._dense:
            sd = np.sqrt(np.clip(exact * (1 - exact), 0, None) / R)
            self.noise_band.setData(x=np.arange(len(exact), dtype=float), y=np.asarray(exact, float),
                                    height=4 * sd)
            top = max(top, float(np.max(exact + 2 * sd)) if len(exact) else 0)
        want = nice_upper(top * 1.04)
        if want != self._bar_top:
            self._bar_top = want
            self.bars.item.setYRange(0, want * 1.03, padding=0)  # room for the top tick label
        if avg:
            kept = snap.kept
            if kept:
                last = v.burn_in + (kept - 1) * v.stride
                self.bars.set_title(f"Share of time in each state: {kept:,} kept steps "
                                    f"({v.burn_in:,} … {last:,}) of {R:,} replicates")
            else:
                self.bars.set_title(f"Share of time in each state: burn-in, nothing kept yet (step {snap.step:,} "
                                    f"of {v.burn_in:,})")
        else:
            self.bars.set_title(f"Share of {R:,} replicates in each state at step t = {snap.step:,}")
        if self._apply_view_items() and snap.step >= 1:  # the TV chart is redrawn only when it has news
            self.now_line.setPos(math.log10(snap.step))
            self.now_line.setVisible(True)
        # sample paths
        paths = snap.paths
        if paths.size:
            m = paths.shape[1]
            # x is "steps before t", so the axis stays put while the paths scroll
            xs = np.arange(snap.path_start - snap.step, snap.path_start - snap.step + m, dtype=float)
            p = paths.shape[0]
            for k, item in enumerate(self.path_items):
                if k < p:
                    item.setData(xs, paths[k].astype(float) + (k - (p - 1) / 2) * 0.1)
                else:
                    item.setData([], [])
        # progress
        total = snap.total_steps
        self.progress.setValue(int(1000 * snap.step / total) if total else 1000)
        parts = [f"step {snap.step:,} of {total:,}"
                 + (f" (burn-in {v.burn_in:,} + {snap.steps:,})" if snap.burn_in else "")]
        if frame.rate > 0:
            parts.append(f"{_fmt_rate(frame.rate)} replicate-steps/s")
            if self.state == "running" and snap.step < total:
                if v.speed is None:
                    eta = (total - snap.step) * R / frame.rate
                else:
                    eta = (total - snap.step) / v.speed
                parts.append(_fmt_eta(eta))
        if frame.rhat_max is not None and not setup.several_classes:  # (replicates legitimately disagree)
            parts.append(f"R-hat up to {frame.rhat_max:.3f}")
        shown_tv = frame.tv_average if avg else frame.tv_ensemble
        if shown_tv is not None:
            parts.append(f"TV to long run {shown_tv:.3g}")
        if self.state == "paused":
            parts.append("paused")
        if self.thread is not None and not self._same_plan():
            parts.append("plan changed: Restart applies it")
        self.status.setText(" · ".join(parts))

    def _show_prediction(self) -> None:
        setup = self.setup_info
        out = self.run_plan.check
        if setup is None:
            self.prediction.setText("")
            return
        if out is None or out.check is None or out.chain is not self.workspace.document.chain \
                or out.values.check_key() != replace_estimator(setup.values, self.run_plan.values.estimator):
            notes = "; ".join(setup.notes)
            self.prediction.setText(f"From {setup.start_text}, seed {setup.seed}." + (f" Note: {notes}." if notes
                                                                                   else ""))
            return
        c = out.check
        word = "sound" if c.sound else "misleading"
        self.prediction.setText(
            f"Predicted by the exact plan check: this estimate converges to a law at TV {fmt_tv(c.tv)} from the "
            f"long-run law — {word} (tolerance {c.plan.tolerance:g}). From {setup.start_text}, seed {setup.seed}.")

    def verdict_parts(self, report) -> tuple[str, str, str]:
        """``(kind, title, text)`` of the finished run's verdict for the estimate shown."""
        from core.evolution import tv_distance

        setup = self.setup_info
        tol = setup.values.tolerance if setup is not None else report.tolerance
        avg = self.run_plan.values.estimator == "average"
        R = report.result.replicates
        if report.status == "mismatch":
            head, _, rest = report.verdict.partition(": ")
            return "bad", "MISMATCH", rest or report.verdict
        if avg:
            kind = {"consistent": "good", "biased": "warn", "uncertain": "warn", "incomplete": "warn",
                    "misleading": "bad"}.get(report.status, "warn")
            head, _, rest = report.verdict.partition(": ")
            text = rest or report.verdict
            if report.tv_time_average is not None:
                text += (f" Measured: the time average is at TV {fmt_tv(report.tv_time_average)} from the long-run "
                         "law" + (f" (exactly expected for these kept steps: {fmt_tv(report.tv_window)})"
                                  if report.tv_window is not None else "") + ".")
            return kind, report.status.upper(), text
        exact_tv = tv_distance(report.exact_at_step, report.long_run)
        meas = tv_distance(report.ensemble_share, report.long_run)
        noise = report.tv_ensemble_noise
        at = f"step {report.step:,}"
        if exact_tv > tol:
            kind, title = "bad", "MISLEADING"
            text = (f"the {R:,} replicates at {at} are at TV {meas:.3g} from the long-run law (tolerance {tol:g}); "
                    f"exactly, the law at that step is at {fmt_tv(exact_tv)}, so the run is too short for its start and "
                    "more replicates would not help.")
        elif meas > tol:
            kind, title = "warn", "NOISY"
            text = (f"exactly, the law at {at} is within the tolerance (TV {fmt_tv(exact_tv)} ≤ {tol:g}), but the "
                    f"{R:,} replicates are at TV {meas:.3g} from the long-run law (noise ~{noise:.2g}): use more "
                    "replicates.")
        else:
            kind, title = "good", "CONSISTENT"
            text = (f"the {R:,} replicates at {at} are at TV {meas:.3g} from the long-run law, within the tolerance "
                    f"{tol:g} (exact law at that step: {fmt_tv(exact_tv)}; noise ~{noise:.2g}).")
        p = report.gof.pvalue
        if math.isfinite(p):
            text += f" The ensemble is a fair sample of the exact law at that step (chi-square p = {p:.2g})."
        return kind, title, text

    def _show_report(self, report) -> None:
        kind, title, text = self.verdict_parts(report)
        verdict_badge(self.badge, kind, title)
        self.badge.setVisible(True)
        self.verdict.setText(text[0].upper() + text[1:] if text else "")
        self.verdict.setToolTip("\n".join(report.findings))
        self.verdict.setVisible(True)
        st = self.status.text().replace(" · paused", "")
        if not st.endswith(" · done"):
            st += " · done"
        self.status.setText(st)

    # -- teardown ------------------------------------------------------------------------------------
    def shutdown(self) -> None:
        """Cancel every run and join the worker threads."""
        if self._closed:
            return
        self._closed = True
        self.timer.stop()
        self._stop_thread()
        for th in list(self._threads):
            th.cancel()
        for th in list(self._threads):
            th.wait()
        self._threads.clear()

    def wait_idle(self, timeout_s: float = 30.0) -> bool:
        """Join threads that were already cancelled (tests; returns False on timeout)."""
        ok = True
        for th in list(self._threads):
            if th is not self.thread:
                ok = th.wait(int(timeout_s * 1000)) and ok
        return ok


def replace_estimator(values: PlanValues, estimator: str) -> tuple:
    """The check key of ``values`` seen with another estimator (the view can change under a run)."""
    from dataclasses import replace

    return replace(values, estimator=estimator).check_key()


PANELS = [
    PanelSpec("simulation", "Simulation", SimulationPanel, area=Qt.DockWidgetArea.RightDockWidgetArea,
              tab_with="longrun", shortcut="Ctrl+Shift+R"),
]
