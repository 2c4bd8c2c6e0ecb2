"""GUI responsiveness during a live simulation: event-loop latency and plot refresh rate.

Opens the main window (offscreen unless QT_QPA_PLATFORM says otherwise) on a
random sparse chain of n = 50 states, runs R = 100,000 replicates as fast as
possible in the simulation panel, and meanwhile

* pings the event loop with a 5 ms QTimer and records how late each ping
  comes (the 99th percentile must stay at or below 50 ms: the GUI never
  blocks), and
* counts the frames the panel draws per second (at least 20 Hz).

The last two lines printed are the two figures.  Usage::

    .venv/bin/python tests/benchmarks/gui_latency.py [--seconds 8] [--replicates 100000] [--states 50]
        [--mode process|thread]
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402

PING_MS = 5


def random_chain(n: int, seed: int = 20240611):
    """A random sparse irreducible chain: a cycle through all states plus ~6 random successors per row."""
    from core.model import Chain

    rng = np.random.default_rng(seed)
    P = np.zeros((n, n))
    for i in range(n):
        succ = rng.choice(n, size=6, replace=False)
        P[i, succ] = rng.random(6)
        P[i, (i + 1) % n] += 0.5
        P[i, i] += 0.2
    P /= P.sum(axis=1, keepdims=True)
    return Chain.from_matrix(P, [f"s{i:02d}" for i in range(n)])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seconds", type=float, default=8.0, help="how long to measure during the run")
    ap.add_argument("--replicates", type=int, default=100_000)
    ap.add_argument("--states", type=int, default=50)
    ap.add_argument("--mode", choices=("process", "thread"), default="process",
                    help="where the engine runs: a worker process (the app's default) or a thread of the GUI "
                    "process (for comparison)")
    args = ap.parse_args(argv)
    os.environ["LONGRUN_SIMULATION_MODE"] = args.mode

    tmp = tempfile.TemporaryDirectory()
    os.environ["LONGRUN_SETTINGS_FILE"] = str(Path(tmp.name) / "settings.ini")
    from PySide6.QtCore import QElapsedTimer, QEventLoop, Qt, QTimer

    from app.main import create_application
    from app.settings import Settings
    from app.window import MainWindow

    create_application()
    win = MainWindow(Settings(), autosave=False, restore_layout=False)
    win.resize(1600, 1000)
    win.document.reset(random_chain(args.states))
    win.show()
    sim = win.panels["simulation"]
    win.docks["simulation"].raise_()

    def spin(ms: int) -> None:
        loop = QEventLoop()
        QTimer.singleShot(ms, loop.quit)
        loop.exec()

    # let the first analysis, plan check and findings finish
    end = time.monotonic() + 30
    while time.monotonic() < end and (not win.analysis.is_idle or any(getattr(p, "busy", False)
                                                                      for p in win.panels.values())):
        spin(50)
    # a run long enough to outlast the measurement
    sim.run_plan.update(replicates=args.replicates, steps=10**9, burn_in=0, stride=1, seed=7, speed=None,
                        estimator="final")
    if not sim.run():
        print("the run did not start:", sim.status.text())
        return 1
    while sim.frame is None or sim.frame.snap.step < 3:  # construction and the exact curves first
        spin(20)

    lateness: list[float] = []
    clock = QElapsedTimer()
    clock.start()
    last = [clock.nsecsElapsed()]

    def ping() -> None:
        now = clock.nsecsElapsed()
        lateness.append(max(0.0, (now - last[0]) / 1e6 - PING_MS))
        last[0] = now

    timer = QTimer()
    timer.setTimerType(Qt.TimerType.PreciseTimer)
    timer.setInterval(PING_MS)
    timer.timeout.connect(ping)
    frames0 = sim.render_count
    step0 = sim.frame.snap.step
    t0 = time.perf_counter()
    timer.start()
    spin(int(args.seconds * 1000))
    timer.stop()
    elapsed = time.perf_counter() - t0
    frames = sim.render_count - frames0
    steps = sim.frame.snap.step - step0
    state = sim.state
    sim.reset()
    win.shutdown()
    win.close()

    lat = np.asarray(lateness)
    p50, p99, worst = (float(np.percentile(lat, q)) for q in (50, 99, 100)) if lat.size else (float("nan"),) * 3
    rate = frames / elapsed
    print(f"chain: {args.states} states; run: {args.replicates:,} replicates in a worker {args.mode}, "
          f"state during the measurement: {state}")
    print(f"measured {elapsed:.1f} s: {steps:,} steps = {steps * args.replicates / elapsed:.3g} replicate-steps/s")
    print(f"pings: {lat.size} every {PING_MS} ms; lateness median {p50:.1f} ms, worst {worst:.1f} ms")
    print(f"frames drawn: {frames}")
    print(f"event-loop latency p99: {p99:.1f} ms (target <= 50 ms; ratio to target {p99 / 50:.2f})")
    print(f"plot refresh rate: {rate:.1f} Hz (target >= 20 Hz; ratio to target {rate / 20:.2f})")
    tmp.cleanup()
    return 0


if __name__ == "__main__":
    sys.exit(main())
