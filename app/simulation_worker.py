"""The simulation worker, free of Qt: the run request, the loop, and the process that runs it.

The simulation panel's runs execute here, in a separate process
(:class:`WorkerPool`), so that the engine never competes with the GUI for
Python's global interpreter lock: the GUI thread stays responsive however
hard the engine works, on any number of cores.  The loop itself
(:func:`run_loop`) drives :class:`core.simulate.ReplicateSimulation` in
chunks of about 15 ms of work, keeps the exact law at the current step
(:class:`ExactTracker`), measures the TV distance at log-spaced steps, sends a
frame at most 40 times a second, and finishes with
:func:`core.simulate.compare`.  It can also run in a thread of the GUI process
(``mode="thread"``) where processes are not available.

The plan values (:class:`PlanValues`) and :func:`resolve_plan` live here too,
so the worker process can read a request without importing Qt; the app's plan
model (:mod:`app.plan_form`) uses them.

Nothing here changes a result: for one seed the run is bit-identical to
``longrun simulate --seed`` (DEVELOPERS.md "Simulation").
"""
from __future__ import annotations

import atexit
import math
import os
import threading
import time
import traceback
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from core.errors import LongrunError, OptionError

__all__ = [
    "SIM_MAX_STEPS", "SIM_MAX_REPLICATES", "PlanValues", "ResolvedPlan", "resolve_plan",
    "RunRequest", "RunSetup", "LiveFrame", "ExactTracker", "Control", "ThreadControl", "PipeControl",
    "run_loop", "child_main", "serve_fd", "WorkerProcess", "WorkerPool", "POOL", "PATHS", "PATH_LENGTH", "CHUNK_SECONDS",
]

#: Largest run length and burn-in the live simulation accepts (core.simulate.MAX_STEPS).
SIM_MAX_STEPS = 10**12
#: Largest number of replicates (core.simulate.MAX_REPLICATES).
SIM_MAX_REPLICATES = 10**6
#: Sample paths recorded and shown, and how many of their last steps.
PATHS = 4
PATH_LENGTH = 160
#: Work per chunk the worker aims for, seconds (control messages and frames come between chunks).
CHUNK_SECONDS = 0.015
#: Frames sent at most this often (seconds), and R-hat computed at most this often.
FRAME_INTERVAL = 1 / 40
RHAT_INTERVAL = 0.5
#: Steps per decade at which the worker measures the TV distance for the chart.
TRACE_PER_DECADE = 100
#: Scheduling niceness of the worker process (POSIX): the engine yields the CPU to the GUI.
WORKER_NICENESS = 5


# ---------------------------------------------------------------------------
# the plan
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class PlanValues:
    """Every field of a simulation plan (immutable; :class:`RunPlan` holds the current one).

    Attributes
    ----------
    start : tuple
        ``("state", id)`` (``id`` None: the first state), ``("uniform",)`` or
        ``("stationary", k)`` (the stationary law of the k-th closed class).
    replicates, steps, burn_in, stride : int
        ``R``, ``T``, ``B``, ``s`` of the run convention.
    estimator : {"final", "average"}
    tolerance : float
        Largest acceptable total variation distance (plan check and the
        simulation's verdict).
    seed : int
    speed : float or None
        Steps per second of the live run; None: as fast as possible.
    epsilon : float
        Threshold of the mixing time (long-run panel, findings).
    """

    start: tuple = ("state", None)
    replicates: int = 1000
    steps: int = 1000
    burn_in: int = 0
    stride: int = 1
    estimator: str = "final"
    tolerance: float = 0.05
    seed: int = 1
    speed: float | None = None
    epsilon: float = 0.25

    #: The fields that change what a run computes (not speed).
    RUN_FIELDS = ("start", "replicates", "steps", "burn_in", "stride", "seed")

    def run_key(self) -> tuple:
        return tuple(getattr(self, f) for f in self.RUN_FIELDS)

    def check_key(self) -> tuple:
        return (self.start, self.replicates, self.steps, self.burn_in, self.stride, self.estimator,
                self.tolerance)


@dataclass(frozen=True, eq=False)
class ResolvedPlan:
    """A :class:`PlanValues` made concrete for one chain.

    Attributes
    ----------
    plan : core.plan.Plan or None
        None when the values do not make a valid run (``error`` says why).
    sim_start : int, str or ndarray
        The ``start`` argument of :class:`core.simulate.ReplicateSimulation`.
    start_law : (n,) ndarray
    start_index : int or None
    start_text : str
    error : str or None
    """

    values: PlanValues
    plan: Any
    sim_start: Any
    start_law: np.ndarray | None
    start_index: int | None
    start_text: str
    error: str | None = None


def _closed_laws(P, structure):
    from core.stationary import stationary_laws

    return stationary_laws(P, structure)


def resolve_plan(chain, values: PlanValues, P=None, structure=None) -> ResolvedPlan:
    """Turn ``values`` into a core plan and a simulation start for ``chain`` (valid)."""
    from core.errors import OptionError
    from core.plan import Plan

    n = chain.n
    if n == 0:
        return ResolvedPlan(values, None, None, None, None, "", "the chain has no states")
    kind = values.start
    start_index = None
    if kind[0] == "uniform":
        law = np.full(n, 1.0 / n)
        sim_start: Any = "uniform"
        plan_start: Any = law
        text = f"uniform over the {n} states"
    elif kind[0] == "stationary":
        if P is None:
            P = chain.matrix()
        if structure is None:
            from core.structure import classify

            structure = classify(P)
        k = int(kind[1] or 0)
        laws = _closed_laws(P, structure)
        if not 0 <= k < len(laws):
            k = 0
        law = np.asarray(laws[k], dtype=float)
        sim_start = law
        plan_start = law
        cls = structure.classes[structure.closed[k]]
        text = f"the stationary law of closed class C{k + 1} ({len(cls.states)} state{'s' if len(cls.states) != 1 else ''})"
        nz = np.flatnonzero(law)
        if nz.size == 1:
            start_index = int(nz[0])
    else:
        sid = kind[1]
        i = chain.index.get(sid, 0) if sid is not None else 0
        start_index = i
        law = np.zeros(n)
        law[i] = 1.0
        sim_start = i
        plan_start = i
        text = f"state '{chain.ids[i]}'"
    if values.stride > values.steps:
        return ResolvedPlan(values, None, sim_start, law, start_index, text,
                            f"stride ({values.stride:,}) must be at most the steps T ({values.steps:,}): the time "
                            "average keeps floor(T / stride) draws after the burn-in, and none would be kept")
    if values.burn_in + values.steps > SIM_MAX_STEPS:
        return ResolvedPlan(values, None, sim_start, law, start_index, text,
                            f"burn-in + steps ({values.burn_in:,} + {values.steps:,}) must be at most "
                            f"{SIM_MAX_STEPS:.0e} for a simulation")
    try:
        plan = Plan(plan_start, values.steps, burn_in=values.burn_in, stride=values.stride,
                    replicates=values.replicates, estimator=values.estimator, tolerance=values.tolerance)
    except OptionError as exc:
        return ResolvedPlan(values, None, sim_start, law, start_index, text, str(exc))
    return ResolvedPlan(values, plan, sim_start, law, start_index, text)


# ---------------------------------------------------------------------------
# messages
# ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class RunRequest:
    """What to run: a snapshot of the chain and of the plan, taken on the GUI thread."""

    run_id: int
    chain: Any
    values: PlanValues
    paused: bool = False
    first_steps: int = 0


@dataclass(frozen=True, eq=False)
class RunSetup:
    """Sent once by the worker, before the first frame: the run's exact reference values.

    Attributes
    ----------
    ids : tuple of str
    start_law, long_run : (n,) ndarray
    curve_steps, curve_tv : ndarray
        ``d_start(t) = TV(pi0 P^t, long run)`` on a log grid of ``t`` in ``0..B+T``.
    avg_steps, avg_tv : ndarray
        The exact TV of the time average of a run of length ``T'`` (plotted at
        step ``B + T'``).
    noise_floor : float
        The TV distance a perfect sample of ``R`` replicates shows on average
        around the long-run law.
    """

    run_id: int
    ids: tuple
    labels: tuple
    values: PlanValues
    start_text: str
    start_law: np.ndarray
    long_run: np.ndarray
    total_steps: int
    kept_planned: int
    curve_steps: np.ndarray
    curve_tv: np.ndarray
    avg_steps: np.ndarray
    avg_tv: np.ndarray
    noise_floor: float
    seed: int
    notes: tuple = ()
    several_classes: bool = False


@dataclass(frozen=True, eq=False)
class LiveFrame:
    """One snapshot of the run with the exact values at its step."""

    run_id: int
    snap: Any
    exact_now: np.ndarray
    exact_kept: np.ndarray | None
    tv_ensemble: float
    tv_average: float | None
    rhat_max: float | None
    rate: float
    trace: tuple = ()


class ExactTracker:
    """``pi0 P^t`` and the sum of the laws at the kept steps, advanced one step at a time.

    Mat-vec products (dense, or CSR for large sparse chains) in the same order
    as the simulation's steps, so the exact values are known at every frame.
    """

    def __init__(self, P: np.ndarray, pi0: np.ndarray, burn_in: int, stride: int, kept_planned: int):
        n = P.shape[0]
        nnz = int(np.count_nonzero(P))
        if n > 200 and nnz < 0.2 * n * n:
            from scipy.sparse import csr_matrix

            self._PT = csr_matrix(P.T)
            self._mul = lambda v: self._PT @ v
        else:
            self._P = np.ascontiguousarray(P)
            self._mul = lambda v: v @ self._P
        self.v = np.array(pi0, dtype=float)
        self.t = 0
        self.B, self.s, self.m = burn_in, stride, kept_planned
        self.acc = np.zeros(n)
        self.kept = 0
        if burn_in == 0 and kept_planned >= 1:
            self.acc += self.v
            self.kept = 1

    def advance(self, k: int) -> None:
        mul = self._mul
        B, s, m = self.B, self.s, self.m
        v, t = self.v, self.t
        for _ in range(k):
            v = mul(v)
            t += 1
            if t >= B and self.kept < m and (t - B) % s == 0:
                self.acc += v
                self.kept += 1
            if t & 1023 == 0:
                v = np.clip(v, 0.0, None)
                v /= v.sum()
        self.v, self.t = v, t

    def kept_mean(self) -> np.ndarray | None:
        return self.acc / self.kept if self.kept else None


# ---------------------------------------------------------------------------
# controls: pause, step, speed, cancel
# ---------------------------------------------------------------------------
class Control:
    """What the loop reads between chunks (the base holds the state)."""

    def __init__(self, *, paused: bool = False, wanted: int = 0, speed: float | None = None):
        self.paused = bool(paused)
        self.wanted = int(wanted)
        self.speed = speed
        self.cancel = False
        self.pace_reset = True
        self.sim = None

    def attach(self, sim) -> None:
        self.sim = sim

    def apply(self, msg: tuple) -> None:
        kind = msg[0]
        if kind == "pause":
            self.paused = True
        elif kind == "resume":
            self.paused = False
            self.wanted = 0
            self.pace_reset = True
        elif kind == "step":
            self.paused = True
            self.wanted += max(1, int(msg[1]))
        elif kind == "speed":
            self.speed = msg[1]
            self.pace_reset = True
        elif kind in ("cancel", "quit"):
            self.cancel = True
            if self.sim is not None:
                self.sim.cancel()

    def take(self, most: int) -> int:
        """Steps of a single-step request to do now (at most ``most``)."""
        k = max(0, min(self.wanted, most))
        self.wanted -= k
        return k

    def check(self) -> None:  # pragma: no cover - overridden
        """Read the requests that arrived (never blocks)."""

    def wait(self, timeout: float) -> None:  # pragma: no cover - overridden
        """Block up to ``timeout`` seconds or until a request arrives."""
        time.sleep(timeout)


class ThreadControl(Control):
    """Requests from another thread of the same process (thread-safe ``send``)."""

    def __init__(self, **kw):
        super().__init__(**kw)
        self._cond = threading.Condition()
        self._inbox: list[tuple] = []

    def send(self, msg: tuple) -> None:
        with self._cond:
            self._inbox.append(msg)
            self._cond.notify_all()
        if msg[0] in ("cancel", "quit") and self.sim is not None:
            self.sim.cancel()

    def check(self) -> None:
        with self._cond:
            box, self._inbox = self._inbox, []
        for m in box:
            self.apply(m)

    def wait(self, timeout: float) -> None:
        with self._cond:
            if not self._inbox:
                self._cond.wait(timeout)
        self.check()


class PipeControl(Control):
    """Requests arriving on the worker process's end of the pipe."""

    def __init__(self, conn, **kw):
        super().__init__(**kw)
        self._conn = conn
        self.quit = False

    def _read(self, timeout: float) -> None:
        conn = self._conn
        try:
            while conn.poll(timeout):
                msg = conn.recv()
                if msg[0] == "quit":
                    self.quit = True
                self.apply(msg)
                timeout = 0
        except (EOFError, OSError):  # the app went away: stop
            self.quit = True
            self.apply(("cancel",))

    def check(self) -> None:
        self._read(0)

    def wait(self, timeout: float) -> None:
        self._read(timeout)


# ---------------------------------------------------------------------------
# the loop
# ---------------------------------------------------------------------------
def run_loop(req: RunRequest, emit: Callable[[str, Any], None], control: "Control") -> None:
    """Run ``req`` with the core engine, sending ``emit("setup" | "frame" | "finished", payload)``.

    Qt-free: it runs in the worker process (or a thread).  ``control`` says
    when to pause, step, change speed or stop; it is consulted between chunks
    of about :data:`CHUNK_SECONDS` of work.

    Raises
    ------
    core.errors.LongrunError
        For a run that cannot start (the message names the problem).
    """
    from core.evolution import PowerLadder, tv_curve, tv_distance
    from core.passage import limit_law
    from core.plan import Plan, bias_curve
    from core.simulate import ReplicateSimulation, compare, curve_grid
    from core.structure import classify

    rid = req.run_id
    chain = req.chain
    v = req.values
    if not chain.is_valid:
        raise OptionError("the chain has problems (see Checks); fix them to simulate")
    P = chain.matrix()
    st = classify(P)
    res = resolve_plan(chain, v, P, st)
    if res.error:
        raise OptionError(res.error)
    sim = ReplicateSimulation(P, replicates=v.replicates, steps=v.steps, start=res.sim_start,
                              burn_in=v.burn_in, stride=v.stride, seed=v.seed, paths=PATHS,
                              path_length=PATH_LENGTH)
    control.attach(sim)
    control.check()
    if control.cancel:
        return
    pi0 = np.asarray(sim.start, dtype=float)
    long_run = limit_law(P, pi0, st)
    total = sim.total_steps
    ladder = PowerLadder(P)
    grid = curve_grid(total, 90)
    d_start = tv_curve(ladder, pi0, grid.tolist(), target=long_run)
    s = sim.stride
    Ts = np.unique(np.round(np.geomspace(s, max(s, sim.steps), 70)).astype(np.int64))
    Ts = Ts[(Ts >= s) & (Ts <= sim.steps)]
    avg_plan = Plan(pi0, max(s, 1), burn_in=sim.burn_in, stride=s, replicates=sim.replicates,
                    estimator="average")
    avg_tv = bias_curve(P, avg_plan, Ts.tolist()) if Ts.size else np.zeros(0)
    R = sim.replicates
    floor = float(np.sqrt(np.clip(long_run * (1 - long_run), 0, None) / (2 * np.pi * R)).sum())
    notes = []
    reached = [k for k in st.closed if long_run[list(st.classes[k].states)].sum() > 0]
    if len(reached) > 1:
        notes.append(f"{len(reached)} closed classes can be reached: each replicate settles in one of them")
    per = [st.classes[k].period for k in reached if (st.classes[k].period or 1) > 1]
    if per:
        notes.append(f"period {max(per)}: the law at step t keeps cycling; only the time average settles")
    emit("setup", RunSetup(
        run_id=rid, ids=chain.ids, labels=tuple(x.display_name for x in chain.states), values=v,
        start_text=res.start_text, start_law=pi0, long_run=long_run, total_steps=total,
        kept_planned=sim.kept_planned, curve_steps=grid, curve_tv=d_start, avg_steps=sim.burn_in + Ts,
        avg_tv=avg_tv, noise_floor=floor, seed=sim.seed, notes=tuple(notes),
            several_classes=len(reached) > 1))
    tracker = ExactTracker(P, pi0, sim.burn_in, s, sim.kept_planned)

    trace: list[tuple] = []

    def observe(snap) -> tuple[float, float | None]:
        avg = snap.time_average
        tv_e = tv_distance(snap.ensemble_share, long_run)
        tv_a = None if avg is None else tv_distance(avg, long_run)
        trace.append((snap.step, tv_e, sim.burn_in + snap.kept * s if snap.kept else 0, tv_a))
        return tv_e, tv_a

    def send(snap, rate, rhat):
        if not trace or trace[-1][0] != snap.step:
            tv_e, tv_a = observe(snap)
        else:
            tv_e, tv_a = trace[-1][1], trace[-1][3]
        emit("frame", LiveFrame(
            run_id=rid, snap=snap, exact_now=tracker.v.copy(), exact_kept=tracker.kept_mean(),
            tv_ensemble=tv_e, tv_average=tv_a, rhat_max=rhat, rate=rate, trace=tuple(trace)))
        trace.clear()

    send(sim.snapshot(), 0.0, None)
    next_trace = 1
    per_step = None
    last_emit = last_rhat = 0.0
    rhat = None
    ref_time, ref_step = time.monotonic(), 0
    while not sim.done:
        control.check()
        while not control.cancel and control.paused and control.wanted == 0:
            control.wait(0.5)
        if control.cancel:
            break
        stepping = control.paused and control.wanted > 0
        speed = control.speed
        if control.pace_reset:
            ref_time, ref_step = time.monotonic(), sim.t
            control.pace_reset = False
        remaining = total - sim.t
        budget = 1 if per_step is None else max(1, int(CHUNK_SECONDS / per_step))
        if next_trace > sim.t:  # stop at the log-spaced steps of the TV chart
            budget = min(budget, next_trace - sim.t)
        if stepping:
            k = control.take(min(remaining, budget))
        elif speed is None:
            k = min(budget, remaining)
        else:
            now = time.monotonic()
            due = ref_step + int((now - ref_time) * speed) - sim.t
            if due <= 0:
                wait = (sim.t + 1 - ref_step) / speed - (now - ref_time)
                control.wait(min(0.05, max(0.001, wait)))
                continue
            k = min(due, budget, remaining)
        t0 = time.perf_counter()
        sim.advance(k)
        tracker.advance(k)
        dt = time.perf_counter() - t0
        ps = dt / k
        per_step = ps if per_step is None else 0.7 * per_step + 0.3 * ps
        if sim.t >= next_trace:
            next_trace = _next_trace_step(sim.t)
            if not sim.done:
                observe(sim.snapshot())
        now = time.monotonic()
        slow = speed is not None and speed <= 1 / FRAME_INTERVAL
        if stepping or slow or sim.done or now - last_emit >= FRAME_INTERVAL:
            if now - last_rhat >= RHAT_INTERVAL or sim.done:
                r = sim.running_rhat()
                rhat = None if r is None or not np.any(np.isfinite(r)) else float(np.nanmax(r))
                last_rhat = now
            rate = R / per_step if per_step else 0.0
            send(sim.snapshot(), rate, rhat)
            last_emit = now
    if control.cancel or not sim.done:
        emit("finished", None)
        return
    report = compare(sim.result(), P, ids=chain.ids, structure=st, tolerance=v.tolerance)
    emit("finished", report)


def _next_trace_step(t: int) -> int:
    """The next step at which the TV chart gets a point: every step up to 100, then 1/100 of a decade apart."""
    return max(t + 1, int(math.ceil(t * 10 ** (1 / TRACE_PER_DECADE))))


# ---------------------------------------------------------------------------
# the worker process
# ---------------------------------------------------------------------------
def _preload() -> None:
    import scipy.sparse  # noqa: F401
    import scipy.special  # noqa: F401

    import core.diagnostics  # noqa: F401
    import core.evolution  # noqa: F401
    import core.passage  # noqa: F401
    import core.plan  # noqa: F401
    import core.simulate  # noqa: F401
    import core.structure  # noqa: F401


def child_main(conn) -> None:
    """The worker process: run the requests that arrive on ``conn`` one after the other.

    Messages in: ``("run", RunRequest)``, then ``("pause",)``, ``("resume",)``,
    ``("step", k)``, ``("speed", v)``, ``("cancel",)`` during a run, and
    ``("quit",)``.  Messages out: ``(kind, run_id, payload)`` with kind
    ``"setup"``, ``"frame"``, ``"finished"``, ``"failed"`` and, when a run is
    over, ``"done"``.
    """
    try:
        import signal

        signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl+C is the app's to handle
    except (ImportError, ValueError, OSError):
        pass
    if hasattr(os, "nice"):
        try:
            os.nice(WORKER_NICENESS)  # the screen comes first when the cores are busy
        except OSError:
            pass
    _preload()
    while True:
        try:
            msg = conn.recv()
        except (EOFError, OSError):
            return
        if msg[0] == "quit":
            return
        if msg[0] != "run":
            continue  # a late control message of a finished run
        req = msg[1]
        rid = req.run_id
        control = PipeControl(conn, paused=req.paused, wanted=req.first_steps, speed=req.values.speed)

        def emit(kind, payload, rid=rid):
            conn.send((kind, rid, payload))

        try:
            run_loop(req, emit, control)
        except LongrunError as exc:
            _send(conn, ("failed", rid, str(exc)))
        except MemoryError:
            _send(conn, ("failed", rid, "not enough memory for this run; use fewer replicates"))
        except (EOFError, OSError, BrokenPipeError):
            return
        except Exception:  # a bug: reported in the panel, the process lives on
            _send(conn, ("failed", rid, "internal error:\n" + traceback.format_exc(limit=8)))
        if not _send(conn, ("done", rid, None)) or control.quit:
            return


def _send(conn, msg) -> bool:
    try:
        conn.send(msg)
        return True
    except (EOFError, OSError, BrokenPipeError):
        return False


class WorkerProcess:
    """One worker process and the app's end of its connection.

    On POSIX the process is ``python -c "...serve_fd(fd)"`` with one end of a
    socket pair (so nothing of the app's main script is re-run in it, and no
    Qt is imported there); elsewhere it is a ``multiprocessing`` "spawn"
    process.  Either way messages are pickled over a
    :class:`multiprocessing.connection.Connection`.
    """

    def __init__(self, ctx=None):
        self._mp = None
        self._popen = None
        if os.name == "posix" and ctx is None:
            import socket
            import subprocess
            import sys
            from multiprocessing.connection import Connection

            ours, theirs = socket.socketpair()
            root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
            env = dict(os.environ)
            env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
            code = "import sys; from app.simulation_worker import serve_fd; serve_fd(int(sys.argv[1]))"
            try:
                self._popen = subprocess.Popen([sys.executable, "-c", code, str(theirs.fileno())],
                                               pass_fds=(theirs.fileno(),), env=env, stdin=subprocess.DEVNULL,
                                               close_fds=True)
            finally:
                theirs.close()
            self.conn = Connection(ours.detach())
        else:
            import multiprocessing

            ctx = ctx or multiprocessing.get_context("spawn")
            parent, child = ctx.Pipe(duplex=True)
            self.conn = parent
            self._mp = ctx.Process(target=child_main, args=(child,), name="longrun-simulation", daemon=True)
            self._mp.start()
            child.close()

    @property
    def pid(self) -> int | None:
        return self._popen.pid if self._popen is not None else self._mp.pid

    def alive(self) -> bool:
        if self._popen is not None:
            return self._popen.poll() is None
        return self._mp.is_alive()

    def exitcode(self) -> int | None:
        return self._popen.poll() if self._popen is not None else self._mp.exitcode

    def wait(self, timeout: float) -> None:
        if self._popen is not None:
            import subprocess

            try:
                self._popen.wait(timeout)
            except subprocess.TimeoutExpired:
                pass
        else:
            self._mp.join(timeout)

    def kill(self) -> None:
        """Stop the process at once (its run is lost) and release the connection."""
        if self.alive():
            if self._popen is not None:
                self._popen.kill()
            else:
                self._mp.kill()
        self.wait(2.0)
        self._close()

    def stop(self, timeout: float = 2.0) -> None:
        """Ask the process to quit, then make sure it is gone."""
        try:
            self.conn.send(("quit",))
        except (EOFError, OSError, BrokenPipeError):
            pass
        self.wait(timeout)
        if self.alive():
            self.kill()
        self._close()

    def _close(self) -> None:
        try:
            self.conn.close()
        except OSError:
            pass
        if self._mp is not None and not self._mp.is_alive():
            try:
                self._mp.close()
            except ValueError:
                pass


def serve_fd(fd: int) -> None:
    """Entry point of a POSIX worker process: serve requests on the connected socket ``fd``."""
    from multiprocessing.connection import Connection

    child_main(Connection(fd))


class WorkerPool:
    """Worker processes kept ready between runs (each a clean interpreter: no Qt, no app state).

    ``acquire`` hands out an idle process or starts one (about a second: the
    interpreter and numpy start); ``release`` keeps it for the next run.
    Processes are daemonic and are stopped at exit.
    """

    def __init__(self, keep: int = 2):
        self.keep = keep
        self._idle: list[WorkerProcess] = []
        self._lock = threading.Lock()
        self._closed = False

    def acquire(self) -> WorkerProcess:
        with self._lock:
            while self._idle:
                w = self._idle.pop()
                if w.alive():
                    return w
                w.kill()
        return WorkerProcess()

    def release(self, w: WorkerProcess) -> None:
        with self._lock:
            if not self._closed and len(self._idle) < self.keep and w.alive():
                self._idle.append(w)
                return
        w.stop()

    def discard(self, w: WorkerProcess) -> None:
        w.kill()

    def prewarm(self) -> None:
        """Start one idle process ahead of the first run (call from a background thread)."""
        with self._lock:
            if self._idle or self._closed:
                return
        w = WorkerProcess()
        self.release(w)

    def idle_count(self) -> int:
        with self._lock:
            return len(self._idle)

    def shutdown(self) -> None:
        with self._lock:
            idle, self._idle = self._idle, []
            self._closed = True
        for w in idle:
            w.stop()


#: The app's pool of worker processes.
POOL = WorkerPool()
atexit.register(POOL.shutdown)

#: ``LONGRUN_SIMULATION_MODE=thread`` runs the simulation in a thread of the app instead of a process.
MODE_ENV = "LONGRUN_SIMULATION_MODE"


def default_mode() -> str:
    v = os.environ.get(MODE_ENV, "process").strip().lower()
    return v if v in ("process", "thread") else "process"
