"""The findings pane: the core engine's findings, selection on the canvas and grid, live updates."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import pytest  # noqa: E402

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"


@pytest.fixture
def pane(qtbot):
    """The findings pane with a canvas and a matrix grid over one document."""
    from PySide6.QtWidgets import QHBoxLayout, QWidget

    from app.analysis_service import AnalysisService
    from app.canvas import ChainCanvas
    from app.document import Document
    from app.findings_pane import FindingsPane
    from app.grid import MatrixView
    from app.main import create_application
    from app.panels import Workspace
    from app.settings import Settings
    from core.io import load_chain

    create_application()
    doc = Document()
    doc.reset(load_chain(SAMPLES / "tanker_rotation.json"))
    an = AnalysisService(doc, delay_ms=0)
    host = QWidget()
    canvas = ChainCanvas(doc, an, host)
    grid = MatrixView(doc, an)
    ws = Workspace(doc, an, Settings(), canvas=canvas)
    p = FindingsPane(ws)
    lay = QHBoxLayout(host)
    lay.addWidget(canvas)
    lay.addWidget(grid)
    lay.addWidget(p)
    qtbot.addWidget(host)
    host.resize(1200, 700)
    host.show()
    p.host, p.canvas, p.grid = host, canvas, grid  # keep them alive with the pane
    yield p
    from app.plan_form import live_job_threads

    p.shutdown()
    an.shutdown()
    assert live_job_threads() == []


def _codes(p):
    return [it.data(0, 0x0100).code for it in p.finding_items()]


def _wait_for(qtbot, p, pred, timeout=15000):
    qtbot.waitUntil(lambda: p.outcome is not None and p.outcome.chain is p.workspace.document.chain
                    and p.outcome.values == p.run_plan.values and not p.job.busy and pred(), timeout=timeout)


def test_periodic_sample_lists_the_periodicity_and_selection_highlights_it(qtbot, pane):
    from core.findings import find_all

    _wait_for(qtbot, pane, lambda: "periodic" in _codes(pane))
    doc = pane.workspace.document
    # the same list the core engine gives for the same chain and plan
    res = pane.outcome
    assert [f.code for f in res.findings] == [it.data(0, 0x0100).code for it in pane.finding_items()]
    from app.plan_form import resolve_plan

    plan = resolve_plan(doc.chain, pane.run_plan.values).plan
    assert [f.code for f in find_all(doc.chain, plan=plan)] == _codes(pane)
    periodic = next(f for f in res.findings if f.code == "periodic")
    assert periodic.severity == "warning"
    assert "period 3" in periodic.title + periodic.explanation  # the tanker rotation's cycle has length 3
    item = next(it for it in pane.finding_items() if it.data(0, 0x0100).code == "periodic")
    assert item.text(1) == periodic.title and item.text(0) == "Warning"
    assert pane.select_finding("periodic")
    assert doc.selected_states == frozenset(periodic.state_ids)
    assert set(periodic.state_ids) == set(doc.chain.ids)  # the whole chain is one periodic class
    canvas = pane.canvas
    assert all(canvas.states[s].isSelected() for s in periodic.state_ids)
    rows = {i.row() for i in pane.grid.selectionModel().selectedIndexes()}
    assert rows == {doc.chain.index[s] for s in periodic.state_ids}
    assert periodic.explanation[:40] in pane.detail.toPlainText()


def test_a_bottleneck_selects_its_transitions(qtbot, pane):
    from core.io import load_chain

    doc = pane.workspace.document
    doc.reset(load_chain(SAMPLES / "credit_eras.json"))  # two eras joined by two rare transitions
    _wait_for(qtbot, pane, lambda: "bottleneck" in _codes(pane))
    assert pane.select_finding("bottleneck")
    f = pane.tree.selectedItems()[0].data(0, 0x0100)
    assert f.transition_ids
    assert doc.selected_transitions == frozenset(tuple(t) for t in f.transition_ids)
    assert all(pane.canvas.arrows[tuple(t)].isSelected() for t in f.transition_ids)
    # the rare links between the eras are among them
    assert {("boom_a", "slump_a"), ("slump_c", "boom_c")} <= set(map(tuple, f.transition_ids))


def test_the_list_follows_the_plan(qtbot, pane):
    rp = pane.run_plan
    rp.update(estimator="final", steps=100)
    # from a fixed start the final-step estimate of a period-3 chain never settles
    _wait_for(qtbot, pane, lambda: "plan-misleading" in _codes(pane))
    assert "100 steps" in pane.summary.text()
    rp.update(estimator="average", steps=3000)
    _wait_for(qtbot, pane, lambda: "plan-misleading" not in _codes(pane))
    assert "time average" in pane.summary.text()


def test_the_list_follows_the_model(qtbot, pane):
    from dataclasses import replace

    from core.model import Transition

    _wait_for(qtbot, pane, lambda: "periodic" in _codes(pane))
    doc = pane.workspace.document
    chain = doc.chain
    # depot_e waits at the quay with probability 1/2: a self-loop breaks the cycle (aperiodic)
    ts = tuple(replace(t, p="rest") if (t.source, t.target) == ("depot_e", "refinery") else t
               for t in chain.transitions) + (Transition("depot_e", "depot_e", "0.5"),)
    doc.push(replace(chain, transitions=ts), "self-loop")
    assert doc.chain.is_valid, [p.message for p in doc.chain.problems]
    _wait_for(qtbot, pane, lambda: "periodic" not in _codes(pane))
    # an invalid chain lists its problems as errors
    bad = replace(doc.chain, transitions=doc.chain.transitions + (Transition("port_n", "refinery", "0.9"),))
    doc.push(bad, "break")
    _wait_for(qtbot, pane, lambda: "invalid-model" in _codes(pane))
    assert pane.finding_items()[0].text(0) == "Error"
