"""The replicate simulation panel: live run, bars and exact values, controls, edits during a run.

The panel runs the core engine in a worker thread; these tests check that what
it draws is the engine's own numbers (a direct core run with the same seed),
that the exact bars are the core engine's laws (and a closed form), that the
controls (run, pause, single step, reset, speed) behave, that editing the chain
during a run stops or restarts it without ever drawing a stale snapshot, and
that the app and ``longrun simulate --json`` give the same run for one seed.
"""
import json
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pytest  # noqa: E402

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"


def _chain(name):
    from core.io import load_chain

    return load_chain(SAMPLES / name)


def _two_state(a=0.3, b=0.1):
    from core.model import Chain

    return Chain.from_matrix([[1 - a, a], [b, 1 - b]], ["up", "down"])


def _finish(qtbot, panel, timeout=20000):
    qtbot.waitUntil(lambda: panel.state in ("finished", "failed"), timeout=timeout)
    assert panel.state == "finished", panel.status.text()


def _heights(item):
    return np.asarray(item.opts["height"], dtype=float)


def test_finished_run_bars_hold_the_engine_counts(qtbot, make_panels):
    from core.simulate import ReplicateSimulation

    chain = _chain("pump_wear.json")
    ws, p = make_panels(chain)
    sim_panel = p["simulation"]
    ws.run_plan.update(start=("state", "worn"), replicates=500, steps=200, burn_in=10, stride=2, seed=11,
                       estimator="final")
    assert sim_panel.run()
    _finish(qtbot, sim_panel)
    # the same run straight from the core engine (same seed, same convention)
    direct = ReplicateSimulation(chain.matrix(), replicates=500, steps=200, start=chain.index["worn"], burn_in=10,
                                 stride=2, seed=11).run()
    snap = sim_panel.frame.snap
    assert snap.step == 210 and snap.total_steps == 210
    np.testing.assert_array_equal(snap.ensemble, direct.ensemble)
    np.testing.assert_array_equal(_heights(sim_panel.bar_sim), direct.ensemble / 500)
    np.testing.assert_array_equal(sim_panel.report.result.occupancy, direct.occupancy)
    # the time-average view shows the pooled kept draws of the same run
    ws.run_plan.update(estimator="average")
    assert direct.kept == 100  # floor(T / s) draws at steps B, B + s, ...
    np.testing.assert_array_equal(_heights(sim_panel.bar_sim), direct.occupancy / (100 * 500))
    assert "100 kept steps" in sim_panel.bars.title()


def test_exact_bars_are_the_core_laws(qtbot, make_panels):
    from core.evolution import distribution_at
    from core.passage import limit_law
    from core.plan import Plan, estimate_law

    chain = _chain("credit_eras.json")
    ws, p = make_panels(chain)
    sp = p["simulation"]
    ws.run_plan.update(start=("state", "boom_a"), replicates=300, steps=120, burn_in=30, stride=3, seed=5,
                       estimator="final")
    sp.run()
    _finish(qtbot, sp)
    P = chain.matrix()
    pi0 = np.zeros(chain.n)
    pi0[0] = 1.0
    np.testing.assert_array_equal(_heights(sp.bar_exact), distribution_at(P, pi0, 150))
    np.testing.assert_array_equal(_heights(sp.bar_long), limit_law(P, pi0))
    ws.run_plan.update(estimator="average")
    # the exact mean of the kept draws is the plan check's law for the same B, T, s; two exact
    # algorithms (average of powers, doubling) agree to rounding
    want = estimate_law(P, Plan(0, 120, burn_in=30, stride=3, estimator="average"))
    np.testing.assert_allclose(_heights(sp.bar_exact), want, rtol=0, atol=1e-13)


def test_single_step_matches_the_two_state_closed_form(qtbot, make_panels):
    a, b = 0.3, 0.1
    ws, p = make_panels(_two_state(a, b))
    sp = p["simulation"]
    ws.run_plan.update(start=("state", "up"), replicates=200, steps=50, seed=3)
    assert sp.single_step(4)
    qtbot.waitUntil(lambda: sp.frame is not None and sp.frame.snap.step == 4, timeout=10000)
    assert sp.state == "paused"
    # two-state chain from state 0: P^t(0, .) = pi + (1 - a - b)^t (a, -a) / (a + b)
    # (Norris, Markov Chains, 1997, Example 1.1.4; formula from memory)
    pi = np.array([b, a]) / (a + b)
    for t in (4, 5, 6):
        if t > 4:
            sp.single_step()
            qtbot.waitUntil(lambda t=t: sp.frame is not None and sp.frame.snap.step == t, timeout=10000)
        closed = pi + (1 - a - b) ** t * np.array([a, -a]) / (a + b)
        # the tracker multiplies by P once per step: rounding only
        np.testing.assert_allclose(sp.frame.exact_now, closed, rtol=0, atol=1e-14)
        np.testing.assert_allclose(_heights(sp.bar_exact), closed, rtol=0, atol=1e-14)
        assert int(sp.frame.snap.ensemble.sum()) == 200
    np.testing.assert_allclose(_heights(sp.bar_long), pi, rtol=0, atol=1e-15)
    assert sp.run()  # resume to the end
    _finish(qtbot, sp)
    assert sp.frame.snap.step == 50


def test_pause_resume_reset(qtbot, make_panels):
    ws, p = make_panels(_chain("helpdesk_queue.json"))
    sp = p["simulation"]
    ws.run_plan.update(replicates=2000, steps=10**7, seed=9, speed=None)
    sp.run()
    qtbot.waitUntil(lambda: sp.frame is not None and sp.frame.snap.step > 0, timeout=10000)
    sp.pause()
    assert sp.state == "paused" and not sp.pause_button.isEnabled()
    qtbot.waitUntil(lambda: sp.thread is not None and sp.thread.paused, timeout=5000)
    assert sp.run_button.text() == "Resume"
    sp.run()
    assert sp.state == "running"
    sp.reset()
    assert sp.state == "idle" and sp.frame is None and sp.setup_info is None
    assert not np.any(_heights(sp.bar_sim))
    from app.simulation_panel import live_simulation_threads

    qtbot.waitUntil(lambda: live_simulation_threads() == [], timeout=10000)


def test_slow_speed_paces_the_run(qtbot, make_panels):
    ws, p = make_panels(_two_state())
    sp = p["simulation"]
    ws.run_plan.update(replicates=50, steps=1000, speed=25.0, seed=2)
    sp.run()
    qtbot.waitUntil(lambda: sp.frame is not None and sp.frame.snap.step >= 3, timeout=10000)
    import time

    t0 = time.monotonic()
    s0 = sp.frame.snap.step
    qtbot.waitUntil(lambda: sp.frame.snap.step >= s0 + 5, timeout=10000)
    # 5 steps at 25 steps per second take at least ~0.2 s (paced by the worker, not the test)
    assert time.monotonic() - t0 >= 0.12
    assert sp.state == "running" and sp.frame.snap.step < 1000
    ws.run_plan.update(speed=None)  # as fast as possible, applied to the running run
    _finish(qtbot, sp)


def _edit_probability(doc, a, b, text):
    from dataclasses import replace

    chain = doc.chain
    ts = tuple(replace(t, p=text) if (t.source, t.target) == (a, b) else t for t in chain.transitions)
    doc.push(replace(chain, transitions=ts), "test edit")


def test_edit_during_run_stops_cleanly(qtbot, make_panels):
    from app.simulation_panel import LiveFrame, live_simulation_threads

    ws, p = make_panels(_chain("pump_wear.json"))
    sp = p["simulation"]
    ws.run_plan.update(replicates=5000, steps=10**8, seed=1)
    sp.run()
    qtbot.waitUntil(lambda: sp.frame is not None and sp.frame.snap.step > 2, timeout=10000)
    old_id = sp.run_id
    old_frame = sp.frame
    doc = ws.document
    doc.add_state(10.0, 10.0, sid="spare")  # a new state: the old frames no longer even fit
    assert sp.state == "stopped"
    assert "edited" in sp.status.text()
    qtbot.waitUntil(lambda: live_simulation_threads() == [], timeout=10000)
    from PySide6.QtWidgets import QApplication

    QApplication.processEvents()
    assert sp.frame is None and sp.setup_info is None
    assert len(_heights(sp.bar_sim)) == doc.chain.n and not np.any(_heights(sp.bar_sim))
    # a late snapshot of the old run is dropped, not drawn
    dropped = sp.dropped_frames
    stale = LiveFrame(old_id, old_frame.snap, old_frame.exact_now, None, 0.1, None, None, 1.0)
    sp._on_frame(old_id, stale)
    sp._render()
    assert sp.frame is None and sp.dropped_frames == dropped + 1


def test_edit_during_run_restarts_when_asked(qtbot, make_panels):
    from app.simulation_panel import live_simulation_threads

    ws, p = make_panels(_chain("pump_wear.json"))
    sp = p["simulation"]
    sp.set_on_edit("restart")
    assert ws.settings.get("simulation/on_edit") == "restart"
    ws.run_plan.update(replicates=5000, steps=10**8, seed=1)
    sp.run()
    qtbot.waitUntil(lambda: sp.frame is not None and sp.frame.snap.step > 2, timeout=10000)
    old_id = sp.run_id
    doc = ws.document
    _edit_probability(doc, "new", "worn", "0.2")
    new_chain = doc.chain
    qtbot.waitUntil(lambda: sp.run_id > old_id and sp.frame is not None and sp.thread is not None
                    and sp.thread.request.chain is new_chain, timeout=10000)
    assert sp.state == "running"
    assert sp.frame.run_id == sp.run_id and sp.setup_info.run_id == sp.run_id
    # every thread left running is the new run's
    assert [t.request.chain for t in live_simulation_threads()] in ([new_chain], [])
    # an edit that breaks the chain stops the run instead of restarting it
    _edit_probability(doc, "failed", "new", "1.3")
    qtbot.waitUntil(lambda: sp.state == "stopped", timeout=10000)
    assert "problems" in sp.status.text()
    qtbot.waitUntil(lambda: live_simulation_threads() == [], timeout=10000)


def test_moving_a_state_does_not_stop_the_run(qtbot, make_panels):
    ws, p = make_panels(_chain("pump_wear.json"))
    sp = p["simulation"]
    ws.run_plan.update(replicates=2000, steps=10**8, seed=1)
    sp.run()
    qtbot.waitUntil(lambda: sp.frame is not None, timeout=10000)
    rid = sp.run_id
    ws.document.move_states({"new": (5.0, 5.0)})
    assert sp.state == "running" and sp.run_id == rid
    sp.reset()


def test_invalid_chain_and_bad_plan_are_refused_with_a_message(qtbot, make_panels):
    ws, p = make_panels(_chain("pump_wear.json"))
    sp = p["simulation"]
    ws.run_plan.update(steps=10, stride=20)
    assert sp.run()
    qtbot.waitUntil(lambda: sp.state == "failed", timeout=10000)
    assert "stride" in sp.status.text()
    ws.run_plan.update(stride=1)
    _edit_probability(ws.document, "failed", "new", "1.3")
    assert not sp.run()
    assert sp.state == "failed" and "problem" in sp.status.text()


def test_same_seed_same_run_as_the_command_line(qtbot, make_panels, capsys):
    from core.cli import main

    path = SAMPLES / "pump_wear.json"
    code = main(["simulate", str(path), "--replicates", "300", "--steps", "150", "--burn-in", "5", "--stride", "3",
                 "--start", "worn", "--seed", "4242", "--json"])
    assert code == 0
    cli = json.loads(capsys.readouterr().out)
    ws, p = make_panels(_chain("pump_wear.json"))
    sp = p["simulation"]
    ws.run_plan.update(start=("state", "worn"), replicates=300, steps=150, burn_in=5, stride=3, seed=4242)
    sp.run()
    _finish(qtbot, sp)
    app_doc = json.loads(__import__("core.jsonout", fromlist=["dumps"]).dumps(sp.report.to_json()))
    for key in ("engine", "memory_bytes"):  # timings and the display buffers differ, nothing else
        app_doc.pop(key)
        cli.pop(key)
    cli.pop("file")
    cli.pop("name")
    assert app_doc == cli
    np.testing.assert_array_equal(_heights(sp.bar_sim) * 300, [cli["ensemble"][i] for i in ws.document.chain.ids])


def test_tv_chart_items_are_made_once(qtbot, make_panels):
    ws, p = make_panels(_chain("market_regimes.json"))
    sp = p["simulation"]
    before = list(sp.tv.item.listDataItems()) + list(sp.bars.item.items)
    ws.run_plan.update(replicates=1000, steps=3000, seed=8)
    sp.run()
    _finish(qtbot, sp)
    sp.run()
    _finish(qtbot, sp)
    after = list(sp.tv.item.listDataItems()) + list(sp.bars.item.items)
    assert after == before
    xs, ys = sp.tv_points.getData()
    assert len(xs) >= 2 and np.all(np.isfinite(xs)) and np.all(ys <= 0)  # log10 of TV <= 1
    assert sp.render_count >= 2


def test_thread_mode_gives_the_same_run(qtbot, make_panels, monkeypatch):
    from core.simulate import ReplicateSimulation

    monkeypatch.setenv("LONGRUN_SIMULATION_MODE", "thread")
    chain = _chain("market_regimes.json")
    ws, p = make_panels(chain)
    sp = p["simulation"]
    ws.run_plan.update(replicates=400, steps=300, burn_in=7, stride=2, seed=99)
    sp.run()
    assert sp.thread.mode == "thread"
    _finish(qtbot, sp)
    direct = ReplicateSimulation(chain.matrix(), replicates=400, steps=300, start=0, burn_in=7, stride=2,
                                 seed=99).run()
    np.testing.assert_array_equal(sp.report.result.ensemble, direct.ensemble)
    np.testing.assert_array_equal(sp.report.result.occupancy, direct.occupancy)


def test_a_worker_process_that_dies_is_reported(qtbot, make_panels):
    from app.simulation_panel import live_simulation_threads

    ws, p = make_panels(_chain("pump_wear.json"))
    sp = p["simulation"]
    ws.run_plan.update(replicates=5000, steps=10**8, seed=1)
    sp.run()
    qtbot.waitUntil(lambda: sp.frame is not None and sp.thread.worker is not None, timeout=15000)
    assert sp.thread.mode == "process"
    import signal

    os.kill(sp.thread.worker.pid, signal.SIGKILL)  # as if the system killed it
    qtbot.waitUntil(lambda: sp.state == "failed", timeout=10000)
    assert "stopped unexpectedly" in sp.status.text()
    qtbot.waitUntil(lambda: live_simulation_threads() == [], timeout=10000)
    assert sp.run()  # a new engine starts for the next run
    qtbot.waitUntil(lambda: sp.frame is not None and sp.frame.snap.step > 0, timeout=15000)
    sp.reset()


def test_gui_screenshot_after_running_the_plan(tmp_path):
    """``longrun gui --screenshot --run-plan`` (a subprocess, offscreen): the picture of a finished run."""
    import subprocess
    import sys

    out = tmp_path / "run.png"
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", LONGRUN_SETTINGS_FILE=str(tmp_path / "s.ini"))
    proc = subprocess.run([sys.executable, "-m", "core", "gui", str(SAMPLES / "pump_wear.json"), "--screenshot",
                           str(out), "--size", "1400x900", "--run-plan", "--panel", "simulation"],
                          capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    from PySide6.QtGui import QImage

    assert QImage(str(out)).size().width() == 1400


def test_screenshot_panel_option_names_the_panels():
    from core.errors import OptionError

    from app.screenshot import _show_panel

    class Win:  # what _show_panel needs of a window
        docks = {"simulation": None, "plan": None}
        panels = {}

    with pytest.raises(OptionError, match="--panel 'nowhere': no such panel \\(choose from simulation, plan\\)"):
        _show_panel(Win(), "nowhere", False)


def test_many_states_show_bars_and_exact_lines(qtbot, make_panels):
    from core.model import Chain

    rng = np.random.default_rng(1234)
    n = 45
    P = rng.random((n, n)) * (rng.random((n, n)) < 0.15) + np.eye(n)
    P /= P.sum(axis=1, keepdims=True)
    ws, p = make_panels(Chain.from_matrix(P, [f"q{i}" for i in range(n)]))
    sp = p["simulation"]
    ws.run_plan.update(replicates=300, steps=40, seed=21)
    sp.run()
    _finish(qtbot, sp)
    assert sp.line_exact.isVisible() and not sp.bar_exact.isVisible()
    _x, y = sp.line_exact.getData()
    np.testing.assert_array_equal(y, sp.report.exact_at_step)
    np.testing.assert_array_equal(_heights(sp.bar_sim), sp.report.result.ensemble / 300)
    assert "long-run law" in sp.bars.legend_texts()


def test_changing_the_plan_during_a_run_offers_a_restart(qtbot, make_panels):
    ws, p = make_panels(_chain("pump_wear.json"))
    sp = p["simulation"]
    ws.run_plan.update(replicates=3000, steps=10**8, seed=4)
    sp.run()
    qtbot.waitUntil(lambda: sp.frame is not None and sp.frame.snap.step > 0, timeout=15000)
    assert not sp.run_button.isEnabled()
    ws.run_plan.update(seed=5)  # a different run
    assert sp.run_button.isEnabled() and sp.run_button.text() == "Restart"
    old = sp.run_id
    sp.run_button.click()
    qtbot.waitUntil(lambda: sp.setup_info is not None and sp.setup_info.seed == 5, timeout=15000)
    assert sp.run_id > old and sp.run_button.text() == "Run" and not sp.run_button.isEnabled()
    ws.run_plan.update(speed=10.0)  # speed applies to the running run: no restart needed
    assert not sp.run_button.isEnabled()
    sp.reset()


def test_without_a_worker_process_the_run_goes_on_in_a_thread(qtbot, make_panels, monkeypatch):
    from app import simulation_worker

    def no_process(self):
        raise OSError("no processes here")

    monkeypatch.setattr(simulation_worker.WorkerPool, "acquire", no_process)
    ws, p = make_panels(_chain("pump_wear.json"))
    sp = p["simulation"]
    ws.run_plan.update(replicates=200, steps=100, seed=3)
    sp.run()
    _finish(qtbot, sp)
    assert sp.report.result.step == 100
