"""Re-validate and analyse the document off the GUI thread.

:class:`AnalysisService` watches a :class:`~app.document.Document`.  After an
edit that can change the analysis (not a move or a label), it waits
``delay_ms`` for the edit burst to end, snapshots the immutable chain and
hands it to a worker thread.  The worker validates the chain (all problems,
exact row sums), builds the matrix, classifies it with
:func:`core.structure.classify`, then runs every computation registered by a
panel.  Each request has a generation number; results of a superseded
generation are dropped, and the worker gives up on a stale request between
steps (and between the yields of a generator job).

A panel adds its own computation::

    service.register("longrun", lambda chain, P, structure: analyze(chain))
    service.resultReady.connect(panel.on_result)   # (name, AnalysisResult)

A job may be a generator function (``yield`` progress, ``return`` the
result); the worker checks for staleness at each yield.
"""
from __future__ import annotations

import threading
import traceback
import weakref
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any, Callable

from PySide6.QtCore import QObject, QThread, QTimer, Signal, Slot

from core.errors import LongrunError
from core.model import Chain, Problem

__all__ = ["AnalysisService", "ValidationReport", "StructureReport", "AnalysisResult", "analysis_key"]

_LIVE_SERVICES: "weakref.WeakSet[AnalysisService]" = weakref.WeakSet()


def live_threads() -> list[QThread]:
    """Worker threads of services that were not shut down (tests check it is empty)."""
    out = []
    for s in list(_LIVE_SERVICES):
        t = s._thread
        if t is not None and t.isRunning():
            out.append(t)
    return out


@dataclass(frozen=True)
class ValidationReport:
    """The validation of one chain, grouped for the views.

    Attributes
    ----------
    generation : int
    chain : Chain
    problems : tuple of Problem
    by_state : dict
        ``{state id: problems}``: problems of that state's row (including its
        transitions' problems).
    by_transition : dict
        ``{(from, to): problems}``.
    row_sums : dict
        ``{state id: Fraction}`` exact sums of the parsed entries (rows with a
        broken entry are absent).
    values : dict
        ``{(from, to): float}`` the resolved probabilities of valid rows
        (``rest`` resolved).
    """

    generation: int
    chain: Chain
    problems: tuple[Problem, ...]
    by_state: dict[str, tuple[Problem, ...]] = field(default_factory=dict)
    by_transition: dict[tuple[str, str], tuple[Problem, ...]] = field(default_factory=dict)
    row_sums: dict[str, Fraction] = field(default_factory=dict)
    values: dict[tuple[str, str], float] = field(default_factory=dict)

    @property
    def valid(self) -> bool:
        return not self.problems


@dataclass(frozen=True)
class StructureReport:
    """Classes of a valid chain (``structure`` is None when it is invalid or failed)."""

    generation: int
    chain: Chain
    structure: Any = None
    matrix: Any = None
    error: str | None = None


@dataclass(frozen=True)
class AnalysisResult:
    """The result of a registered job for one chain."""

    generation: int
    chain: Chain
    value: Any


def analysis_key(chain: Chain) -> tuple:
    """What the analysis depends on: ids, transitions, name and step (not positions)."""
    return (chain.ids, chain.transitions, chain.name, chain.step, chain.state_limit)


def validate(chain: Chain, generation: int = 0) -> ValidationReport:
    """Build the :class:`ValidationReport` of ``chain`` (pure; runs in the worker)."""
    problems = chain.problems
    by_state: dict[str, list[Problem]] = {}
    by_transition: dict[tuple[str, str], list[Problem]] = {}
    for p in problems:
        sid = p.state if p.state is not None else (p.transition[0] if p.transition else None)
        if sid is not None:
            by_state.setdefault(sid, []).append(p)
        if p.transition is not None:
            by_transition.setdefault(tuple(p.transition), []).append(p)
    exact = chain.exact_probabilities
    sums = chain.row_sums
    broken = {p.state for p in problems if p.code not in ("row-sum", "no-outgoing")}
    for sid in chain.ids:
        if sid not in sums and sid not in broken:
            sums[sid] = Fraction(0)
    for sid in broken:
        sums.pop(sid, None)
    return ValidationReport(
        generation=generation,
        chain=chain,
        problems=problems,
        by_state={k: tuple(v) for k, v in by_state.items()},
        by_transition={k: tuple(v) for k, v in by_transition.items()},
        row_sums=sums,
        values={k: float(v) for k, v in exact.items()},
    )


Job = Callable[[Chain, Any, Any], Any]


def _preload() -> None:
    """Import what the worker uses on the GUI thread, before the worker runs.

    A first import inside the worker thread runs PySide's import hook there,
    concurrently with the GUI thread, which can corrupt reference counts; so
    every module a job needs is imported here (and a panel registering a job
    imports its modules before calling :meth:`AnalysisService.register`).
    """
    import scipy.sparse  # noqa: F401
    import scipy.sparse.csgraph  # noqa: F401

    import core.structure  # noqa: F401


class _Worker(QObject):
    validated = Signal(int, object)
    structured = Signal(int, object)
    result = Signal(int, str, object)
    failed = Signal(int, str, str)
    done = Signal(int)

    def __init__(self, latest: Callable[[], int]):
        super().__init__()
        self._latest = latest

    def _stale(self, gen: int) -> bool:
        return gen != self._latest()

    @Slot(int, object, object)
    def run(self, gen: int, chain: Chain, jobs: tuple) -> None:
        try:
            self._run(gen, chain, jobs)
        finally:
            self.done.emit(gen)

    def _run(self, gen: int, chain: Chain, jobs: tuple) -> None:
        if self._stale(gen):
            return
        report = validate(chain, gen)
        if self._stale(gen):
            return
        self.validated.emit(gen, report)
        P = structure = None
        if report.valid:
            try:
                P = chain.matrix()
                from core.structure import classify

                structure = classify(P)
                self.structured.emit(gen, StructureReport(gen, chain, structure, P))
            except (LongrunError, ImportError, ValueError, ArithmeticError) as exc:
                self.structured.emit(gen, StructureReport(gen, chain, None, P, error=str(exc)))
        else:
            self.structured.emit(gen, StructureReport(gen, chain, None, None, error="the chain has problems"))
        for name, fn, needs_valid in jobs:
            if self._stale(gen):
                return
            if needs_valid and (P is None or structure is None):
                continue
            try:
                out = fn(chain, P, structure)
                if hasattr(out, "__next__") and hasattr(out, "send"):
                    gen_obj = out
                    while True:
                        try:
                            next(gen_obj)
                        except StopIteration as stop:
                            out = stop.value
                            break
                        if self._stale(gen):
                            gen_obj.close()
                            return
            except LongrunError as exc:
                self.failed.emit(gen, name, str(exc))
                continue
            except Exception:  # a bug in a job must not kill the worker
                self.failed.emit(gen, name, traceback.format_exc(limit=6))
                continue
            if self._stale(gen):
                return
            self.result.emit(gen, name, AnalysisResult(gen, chain, out))


class AnalysisService(QObject):
    """Debounced, threaded validation and analysis of a document.

    Parameters
    ----------
    document : Document
    delay_ms : int
        Quiet time after the last edit before the analysis starts.

    Signals
    -------
    validated(ValidationReport)
        Problems and row sums of the current chain.
    structureReady(StructureReport)
        Classes of the current chain (``structure`` None when invalid).
    resultReady(str, AnalysisResult)
        A registered job's result for the current chain.
    jobFailed(str, str)
        A registered job raised; name and message.
    finished(int)
        Every step of the latest request is done (the service is idle).
    busyChanged(bool)
    """

    validated = Signal(object)
    structureReady = Signal(object)
    resultReady = Signal(str, object)
    jobFailed = Signal(str, str)
    finished = Signal(int)
    busyChanged = Signal(bool)
    _start = Signal(int, object, object)

    def __init__(self, document, *, delay_ms: int = 150, parent: QObject | None = None):
        super().__init__(parent)
        _preload()
        self._doc = document
        self._jobs: dict[str, tuple[Job, bool]] = {}
        self._gen = 0
        self._latest_lock = threading.Lock()
        self._latest_gen = 0
        self._done_gen = 0
        self._key: tuple | None = None
        self.report: ValidationReport | None = None
        self.structure_report: StructureReport | None = None
        self.results: dict[str, AnalysisResult] = {}
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(max(0, int(delay_ms)))
        self._timer.timeout.connect(self._launch)
        self._thread: QThread | None = QThread()
        self._thread.setObjectName("longrun-analysis")
        self._worker = _Worker(self._read_latest)
        self._worker.moveToThread(self._thread)
        self._start.connect(self._worker.run)
        self._worker.validated.connect(self._on_validated)
        self._worker.structured.connect(self._on_structured)
        self._worker.result.connect(self._on_result)
        self._worker.failed.connect(self._on_failed)
        self._worker.done.connect(self._on_done)
        self._thread.start()
        _LIVE_SERVICES.add(self)
        document.chainChanged.connect(self._on_chain_changed)
        self.request()

    # -- public -------------------------------------------------------------
    @property
    def generation(self) -> int:
        return self._gen

    @property
    def is_idle(self) -> bool:
        return self._done_gen == self._gen and not self._timer.isActive()

    def register(self, name: str, fn: Job, *, needs_valid: bool = True) -> None:
        """Run ``fn(chain, P, structure)`` in the worker after every change.

        With ``needs_valid`` (the default) the job runs only for valid chains
        (``P`` the dense matrix, ``structure`` from ``classify``).  Registering
        re-runs the analysis so the new job gets a result for the current chain.
        Import every module the job uses before registering it: a first import
        inside the worker thread is unsafe with PySide.
        """
        self._jobs[name] = (fn, needs_valid)
        self.request(force=True)

    def unregister(self, name: str) -> None:
        self._jobs.pop(name, None)
        self.results.pop(name, None)

    def request(self, *, force: bool = False) -> None:
        """Schedule an analysis of the document's current chain (debounced)."""
        if self._thread is None:
            return
        key = analysis_key(self._doc.chain)
        if not force and self._key is not None and key == self._key:
            return
        self._key = key
        was_idle = self.is_idle
        self._gen += 1
        with self._latest_lock:
            self._latest_gen = self._gen
        self._timer.start()
        if was_idle:
            self.busyChanged.emit(True)

    def flush(self) -> None:
        """Start a pending analysis now instead of after the debounce delay."""
        if self._timer.isActive():
            self._timer.stop()
            self._launch()

    def shutdown(self) -> None:
        """Stop the worker thread (waits for the step in progress)."""
        self._timer.stop()
        if self._thread is None:
            return
        with self._latest_lock:
            self._latest_gen = -1
        try:
            self._doc.chainChanged.disconnect(self._on_chain_changed)
        except (RuntimeError, TypeError):
            pass
        self._thread.quit()
        self._thread.wait()
        self._worker.deleteLater()
        self._thread = None

    # -- internals ------------------------------------------------------------
    def _read_latest(self) -> int:
        with self._latest_lock:
            return self._latest_gen

    def _on_chain_changed(self, _old, new) -> None:
        self.request()

    def _launch(self) -> None:
        if self._thread is None:
            return
        jobs = tuple((name, fn, nv) for name, (fn, nv) in self._jobs.items())
        self._start.emit(self._gen, self._doc.chain, jobs)

    def _current(self, gen: int) -> bool:
        return gen == self._gen and self._thread is not None

    def _on_validated(self, gen: int, report: ValidationReport) -> None:
        if self._current(gen):
            self.report = report
            self.validated.emit(report)

    def _on_structured(self, gen: int, report: StructureReport) -> None:
        if self._current(gen):
            self.structure_report = report
            self.structureReady.emit(report)

    def _on_result(self, gen: int, name: str, result: AnalysisResult) -> None:
        if self._current(gen) and name in self._jobs:
            self.results[name] = result
            self.resultReady.emit(name, result)

    def _on_failed(self, gen: int, name: str, message: str) -> None:
        if self._current(gen):
            self.jobFailed.emit(name, message)

    def _on_done(self, gen: int) -> None:
        if gen == self._gen and self._thread is not None:
            self._done_gen = gen
            if not self._timer.isActive():
                self.busyChanged.emit(False)
                self.finished.emit(gen)
