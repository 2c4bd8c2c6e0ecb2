"""The plan check form: the shared plan, the exact verdict before running, and running it live."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pytest  # noqa: E402

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"


@pytest.fixture
def panels(make_panels):
    """``panels(chain)``: ``(workspace, plan form, simulation panel)`` over one document."""
    def make(chain):
        ws, p = make_panels(chain, "plan", "simulation", horizontal=True, size=(1200, 900), ready=False)
        return ws, p["plan"], p["simulation"]
    return make


def _chain(name):
    from core.io import load_chain

    return load_chain(SAMPLES / name)


def _checked(qtbot, form, timeout=15000):
    qtbot.waitUntil(lambda: form.outcome is not None and form.outcome.values == form.run_plan.values
                    and form.outcome.chain is form.workspace.document.chain and not form.job.busy, timeout=timeout)
    return form.outcome


def test_form_shows_core_check_plan(qtbot, panels):
    from core.plan import Plan, bias_curve, check_plan
    from core.units import format_steps

    from app.plan_form import fmt_p, fmt_signed

    chain = _chain("credit_eras.json")
    ws, form, _sim = panels(chain)
    ws.run_plan.update(start=("state", "boom_a"), replicates=1000, steps=360, burn_in=0, stride=1,
                       estimator="final", tolerance=0.05)
    out = _checked(qtbot, form)
    core = check_plan(chain, Plan("boom_a", 360, replicates=1000, estimator="final", tolerance=0.05))
    c = out.check
    assert c.tv == core.tv and c.verdict == core.verdict == "misleading"
    assert c.min_steps == core.min_steps and c.min_burn_in == core.min_burn_in
    np.testing.assert_array_equal(c.expected_estimate, core.expected_estimate)
    np.testing.assert_array_equal(c.noise_sd, core.noise_sd)
    assert form.sentence.text() == core.sentence
    assert "Misleading" in form.badge.text() and f"{core.tv:.3g}" in form.badge.text()
    assert format_steps(core.min_steps, chain.step) in form.fact_labels["min_steps"].text()
    assert format_steps(core.min_burn_in, chain.step) in form.fact_labels["min_burn_in"].text()
    assert fmt_p(float(np.max(core.noise_sd))) in form.fact_labels["noise"].text()
    for i, sid in enumerate(chain.ids):
        row = [form.table.item(i, k).text() for k in range(5)]
        assert row == [sid, fmt_p(core.expected_estimate[i]), fmt_p(core.long_run[i]), fmt_signed(core.bias[i]),
                       fmt_p(core.noise_sd[i])]
    # the chart is core's bias curve (log10 of T and of the TV)
    x, y = form.curve_item.getData()
    want = bias_curve(chain, core.plan, out.curve_steps.tolist())
    np.testing.assert_array_equal(x, np.log10(out.curve_steps[want > 0].astype(float)))
    np.testing.assert_array_equal(y, np.log10(want[want > 0]))
    assert form.run_button.isEnabled() and form.recommend_button.isEnabled()


def test_flip_flop_closed_form(qtbot, panels):
    from core.model import Chain

    # P = [[0, 1], [1, 0]] from state 0: P^t(0, .) alternates between (1, 0) and (0, 1), while the long-run
    # law is (1/2, 1/2), so the final-step estimate is always at TV 1/2 and no run length fixes it; the
    # time average over an even number of steps is exactly (1/2, 1/2) (common practice: periodic chains)
    flip = Chain.from_matrix([[0, 1], [1, 0]], ["on", "off"])
    ws, form, _sim = panels(flip)
    ws.run_plan.update(start=("state", "on"), steps=100, estimator="final")
    c = _checked(qtbot, form).check
    assert c.tv == 0.5 and c.verdict == "misleading" and c.min_steps is None
    assert "period 2" in form.fact_labels["min_steps"].text()
    assert form.fact_labels["min_burn_in"].text() == "none, for the same reason"  # not said twice
    assert not form.recommend_button.isEnabled()
    ws.run_plan.update(estimator="average")
    c = _checked(qtbot, form).check
    assert c.tv == 0.0 and c.verdict == "sound"
    assert form.badge.text().startswith("✓ Sound")


def test_one_plan_shared_by_the_form_and_the_simulation(qtbot, panels):
    ws, form, sim = panels(_chain("pump_wear.json"))
    _checked(qtbot, form)
    form.fields.spin("steps").setValue(2500)
    assert ws.run_plan.values.steps == 2500
    assert sim.fields.spin("steps").int_value() == 2500
    sim.fields.spin("replicates").lineEdit().setText("2e4")
    sim.fields.spin("replicates").interpretText()
    assert ws.run_plan.values.replicates == 20000
    assert form.fields.spin("replicates").int_value() == 20000
    sim.view_avg.click()
    assert ws.run_plan.values.estimator == "average"
    assert form.fields.editors["estimator"].currentData() == "average"
    out = _checked(qtbot, form)
    assert out.check.plan.steps == 2500 and out.check.plan.replicates == 20000
    assert out.check.plan.estimator == "average"


def test_run_this_plan_live_matches_the_prediction(qtbot, panels):
    from core.evolution import tv_distance

    chain = _chain("credit_eras.json")
    ws, form, sim = panels(chain)
    ws.run_plan.update(start=("state", "boom_a"), replicates=4000, steps=360, estimator="final", seed=17)
    c = _checked(qtbot, form).check
    form.run_button.click()
    qtbot.waitUntil(lambda: sim.state == "finished", timeout=20000)
    rep = sim.report
    r = rep.result
    assert (r.replicates, r.steps, r.burn_in, r.stride, r.seed) == (4000, 360, 0, 1, 17)
    # the exact law the run is compared with is the plan check's expected estimate
    np.testing.assert_allclose(rep.exact_at_step, c.expected_estimate, rtol=0, atol=1e-13)
    np.testing.assert_allclose(rep.long_run, c.long_run, rtol=0, atol=1e-13)
    # and the measured distance is the predicted one within Monte Carlo error: each share has
    # sd <= sqrt(p(1-p)/R), so TV moves by at most 0.5 * sum(6 sd) with overwhelming probability
    measured = tv_distance(rep.ensemble_share, rep.long_run)
    sd = np.sqrt(c.expected_estimate * (1 - c.expected_estimate) / 4000)
    assert abs(measured - c.tv) <= 0.5 * float(np.sum(6 * sd))
    assert "Predicted by the exact plan check" in sim.prediction.text()
    assert sim.badge.text().endswith("MISLEADING")


def test_run_the_recommended_plan(qtbot, panels):
    chain = _chain("credit_eras.json")
    ws, form, sim = panels(chain)
    ws.run_plan.update(start=("state", "boom_a"), replicates=500, steps=360, estimator="final", seed=3)
    c = _checked(qtbot, form).check
    assert c.min_steps is not None
    assert form.run_recommended("steps")
    assert ws.run_plan.values.steps == c.min_steps
    qtbot.waitUntil(lambda: sim.state == "finished", timeout=30000)
    assert sim.report.result.steps == c.min_steps
    out = _checked(qtbot, form)
    assert out.check.verdict == "sound"  # the smallest sound run length is sound
    ws.run_plan.update(steps=360)
    _checked(qtbot, form)
    assert form.run_recommended("burn_in")
    assert ws.run_plan.values.burn_in == c.min_burn_in and ws.run_plan.values.steps == 360
    assert _checked(qtbot, form).check.verdict == "sound"
    qtbot.waitUntil(lambda: sim.state == "finished" and sim.report.result.burn_in == c.min_burn_in, timeout=30000)


def test_bad_plan_and_bad_chain_are_explained(qtbot, panels):
    from dataclasses import replace

    from core.model import Transition

    ws, form, _sim = panels(_chain("pump_wear.json"))
    ws.run_plan.update(steps=10, stride=50, estimator="average")
    out = _checked(qtbot, form)
    assert out.error and "stride" in out.error
    assert "stride" in form.sentence.text() and not form.run_button.isEnabled()
    ws.run_plan.update(stride=1)
    doc = ws.document
    doc.push(replace(doc.chain, transitions=doc.chain.transitions + (Transition("failed", "worn", "0.9"),)), "x")
    out = _checked(qtbot, form)
    assert out.error and "problem" in out.error
    assert "not checked" in form.badge.text()


def test_start_choices_follow_the_chain(qtbot, panels):
    ws, form, _sim = panels(_chain("asset_fate.json"))
    qtbot.waitUntil(lambda: ws.analysis.structure_report is not None, timeout=10000)
    box = form.fields.editors["start"]
    data = [box.itemData(i) for i in range(box.count())]
    assert ("state", "commissioning") in data and ("uniform",) in data
    # closed classes of two or more states offer their stationary law as a start
    stationary = [d for d in data if d and d[0] == "stationary"]
    from core.structure import classify

    s = classify(ws.document.chain.matrix())
    assert len(stationary) == sum(1 for ci in s.closed if s.classes[ci].size > 1)
    ws.run_plan.update(start=("uniform",))
    out = _checked(qtbot, form)
    np.testing.assert_allclose(out.check.start_law, np.full(ws.document.chain.n, 1 / ws.document.chain.n))
    # a renamed start state is followed
    ws.run_plan.update(start=("state", "trial"))
    ws.document.rename_state("trial", "trial_run")
    assert ws.run_plan.values.start == ("state", "trial_run")


def test_export_report_carries_the_plan_of_the_form(full_window, dialogs, settle, qtbot, tmp_path):
    import html

    from core.plan import Plan, check_plan

    chain_path = SAMPLES / "credit_eras.json"
    assert full_window.open_path(chain_path, ask=False)
    settle(full_window)
    rp = full_window.workspace.run_plan
    rp.update(start=("state", "boom_a"), replicates=1000, steps=360, estimator="final")
    plan, eps = full_window.current_plan()
    assert (plan.steps, plan.replicates, plan.estimator, eps) == (360, 1000, "final", 0.25)
    out = tmp_path / "credit-report.html"
    dialogs.save_paths.append(str(out))
    assert full_window.export_report()
    text = out.read_text(encoding="utf-8")
    want = check_plan(full_window.document.chain, Plan("boom_a", 360, replicates=1000)).sentence
    assert html.escape(want, quote=True) in text
    file_menu = full_window.menuBar().actions()[0].menu()
    assert full_window.actions_by_name["export_report"] in file_menu.actions()
    assert full_window.actions_by_name["new_from_data"] in file_menu.actions()
    dialogs.save_paths.append("")  # the file dialog cancelled: nothing written, no error
    assert not full_window.export_report()
    assert dialogs.problems == []
