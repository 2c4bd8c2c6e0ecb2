"""The long-run panel: exact answers after every edit, in steps and in the chain's time unit."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pytest  # noqa: E402

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"


@pytest.fixture
def panel(make_panels):
    """``panel(chain)``: a long-run panel over a document of ``chain`` (analysis without debounce)."""
    return lambda chain: make_panels(chain, "longrun", size=(640, 900), ready=False)[1]["longrun"]


def _ready(qtbot, p, *, intervals=False, timeout=20000):
    def done():
        an = p.workspace.analysis
        ok = an.is_idle and p.report is not None and p.chain is p.workspace.document.chain
        return ok and (not intervals or p.uncertainty is not None)

    qtbot.waitUntil(done, timeout=timeout)
    return p.report


def _col(table, col):
    return [table.item(r, col).text() for r in range(table.rowCount())]


def _find_row(table, text):
    return next(r for r in range(table.rowCount()) if table.item(r, 0).text() == text)


def test_two_state_chain_closed_forms(qtbot, panel):
    from core.evolution import mixing_time
    from core.model import Chain, Step

    from app.longrun_panel import split_time, steps_text
    from app.plan_form import fmt_p

    a, b = 0.3, 0.1
    chain = Chain.from_matrix([[1 - a, a], [b, 1 - b]], ["up", "down"])
    from dataclasses import replace

    chain = replace(chain, step=Step(1, "day"))
    p = panel(chain)
    _ready(qtbot, p)
    # two-state chain: pi = (b, a) / (a + b); mean return time 1/pi_i (Kac); second eigenvalue 1 - a - b,
    # relaxation time 1/(a + b) (Levin, Peres & Wilmer, Markov Chains and Mixing Times, 2nd ed., 2017,
    # Sections 1.1 and 12.2; formulas from memory)
    pi = np.array([b, a]) / (a + b)
    assert _col(p.laws, 0) == ["up", "down"]
    assert _col(p.laws, 2) == [fmt_p(pi[0]), fmt_p(pi[1])]
    assert _col(p.laws, 3) == [split_time(1 / pi[0], chain.step)[0], split_time(1 / pi[1], chain.step)[0]]
    assert _col(p.laws, 4) == ["~4 days", "~1.33 days"]  # 1/0.25 and 1/0.75 days
    assert steps_text(1 / (a + b), chain.step) in p.time_labels["relaxation"].text()
    t_mix = mixing_time(chain.matrix(), 0.25)
    assert p.time_labels["mixing"].text().startswith(steps_text(t_mix, chain.step))
    assert "ε = 0.25" in p.time_labels["mixing"].text()
    assert "Irreducible and aperiodic" in p.summary.text()
    assert p.time_labels["reversible"].text().startswith("holds")  # every two-state chain is reversible


def test_gamblers_ruin_absorption(qtbot, panel):
    from core.model import Chain

    from app.plan_form import fmt_p

    # fair gambler's ruin on 0..4: from i, absorbed at 4 with probability i/4 after i(4 - i) steps on average
    # (Feller, An Introduction to Probability Theory and Its Applications, vol. 1, 3rd ed., ch. XIV,
    # Sections 2-3; formulas from memory)
    P = np.zeros((5, 5))
    P[0, 0] = P[4, 4] = 1
    for i in range(1, 4):
        P[i, i - 1] = P[i, i + 1] = 0.5
    chain = Chain.from_matrix(P, [f"k{i}" for i in range(5)])
    p = panel(chain)
    r = _ready(qtbot, p)
    assert p.absorb.isVisibleTo(p) and p.absorb.rowCount() == 3
    heads = [p.absorb.horizontalHeaderItem(c).text() for c in range(p.absorb.columnCount())]
    assert heads[:3] == ["From", "ends in C1", "ends in C2"]
    top = 1 + [r.structure.classes[ci].states for ci in r.structure.closed].index((4,))
    for i in (1, 2, 3):
        row = _find_row(p.absorb, f"k{i}")
        assert p.absorb.item(row, top).text() == fmt_p(i / 4)
        assert p.absorb.item(row, 3).text() == f"{i * (4 - i)}"
    assert "2 closed classes" in p.summary.text()
    assert "not defined" in p.time_labels["mixing"].text()
    kinds = _col(p.classes, 1)
    assert kinds.count("absorbing") == 2 and kinds.count("transient") == 1
    assert not p.law_chart.isVisibleTo(p)  # two absorbing states: nothing to chart
    assert "absorbing" in p.law_note.text()


def test_periodic_sample_shows_its_cycle(qtbot, panel):
    from core.io import load_chain

    p = panel(load_chain(SAMPLES / "tanker_rotation.json"))
    _ready(qtbot, p)
    assert _col(p.classes, 2) == ["period 3"]
    states = p.classes.item(0, 3).text()
    assert "cycle: {refinery} → {port_n, port_s} → {depot_e, depot_w}" in states
    assert "period 3" in p.time_labels["mixing"].text() and "not defined" in p.time_labels["mixing"].text()
    assert "not defined" in p.time_labels["relaxation"].text()


def test_updates_after_every_edit_and_epsilon(qtbot, panel):
    from dataclasses import replace

    from core.analysis import analyze
    from core.evolution import mixing_time
    from core.io import load_chain

    from app.longrun_panel import steps_text
    from app.plan_form import fmt_p

    p = panel(load_chain(SAMPLES / "market_regimes.json"))
    _ready(qtbot, p)
    doc = p.workspace.document
    first = doc.chain
    t = first.transitions[0]
    doc.push(replace(first, transitions=(replace(t, p="0.5" if t.p != "0.5" else "0.4"),) + first.transitions[1:]),
             "edit")
    if not doc.chain.is_valid:  # keep the row summing to 1 through its 'rest' entry
        pytest.fail("the test edit broke the chain: " + "; ".join(x.message for x in doc.chain.problems))
    r = _ready(qtbot, p)
    assert p.chain is doc.chain and p.chain is not first
    want = analyze(doc.chain)
    assert len(want.stationary) == 1
    for row in range(p.laws.rowCount()):
        i = doc.chain.index[p.laws.item(row, 0).text()]
        assert p.laws.item(row, 2).text() == fmt_p(want.stationary[0][i])
    p.run_plan.update(epsilon=0.01)
    qtbot.waitUntil(lambda: p.report is not None and p.report.epsilon == 0.01 and p.workspace.analysis.is_idle,
                    timeout=20000)
    t_mix = mixing_time(doc.chain.matrix(), 0.01)
    assert p.time_labels["mixing"].text().startswith(steps_text(t_mix, doc.chain.step))
    assert "ε = 0.01" in p.time_labels["mixing"].text()
    assert r is not p.report


def test_large_times_are_readable(qtbot, panel):
    from dataclasses import replace

    from core.model import Chain, Step

    # a trap left with probability 1e-10 a day: the rare state returns every 1e10 days or so
    P = [[1 - 1e-10, 1e-10], [0.5, 0.5]]
    chain = replace(Chain.from_matrix(P, ["calm", "storm"]), step=Step(1, "day"))
    p = panel(chain)
    _ready(qtbot, p)
    row = _find_row(p.laws, "storm")
    assert p.laws.item(row, 3).text() == "5.00e9"  # 1/pi = (a + b)/a = 1 + 5e9 days (Kac)
    assert p.laws.item(row, 4).text() == "~13.7 million years"


def test_invalid_chain_is_explained(qtbot, panel):
    from dataclasses import replace

    from core.io import load_chain
    from core.model import Transition

    p = panel(load_chain(SAMPLES / "pump_wear.json"))
    _ready(qtbot, p)
    doc = p.workspace.document
    doc.push(replace(doc.chain, transitions=doc.chain.transitions + (Transition("failed", "worn", "0.9"),)), "x")
    qtbot.waitUntil(lambda: "problem" in p.summary.text(), timeout=10000)
    assert p.report is None and p.classes.rowCount() == 0


def test_fitted_chain_shows_intervals(qtbot, panel):
    from core.estimate import fit_counts, fit_from_chain, fit_to_chain, iter_derived_uncertainty

    from app.longrun_panel import INTERVAL_DRAWS, _interval_text
    from app.plan_form import fmt_p

    counts = np.array([[40, 12, 3], [10, 55, 9], [2, 11, 30]])
    chain = fit_to_chain(fit_counts(counts, states=["low", "mid", "high"]), name="fitted")
    p = panel(chain)
    _ready(qtbot, p, intervals=True, timeout=60000)
    # the intervals are core's (same draws and seed as the command line's fit)
    fit = fit_from_chain(chain)
    gen = iter_derived_uncertainty(fit, draws=INTERVAL_DRAWS, epsilon=0.25)
    while True:
        try:
            next(gen)
        except StopIteration as stop:
            u = stop.value
            break
    assert [v.low for v in p.uncertainty.values] == [v.low for v in u.values]
    for v in u.of("stationary"):
        row = _find_row(p.laws, v.state)
        assert p.laws.item(row, 2).text() == fmt_p(v.point) + "  " + _interval_text(v.low, v.high)
        assert v.low < v.point < v.high
    assert "posterior" in p.interval_note.text() and "1000 matrices" in p.interval_note.text()
    mt = u.of("mixing_time")[0]
    assert _interval_text(mt.low, mt.high, kind="n") in p.time_labels["mixing"].text()
    # once edited, the matrix no longer equals the fit: no intervals are claimed for it
    from dataclasses import replace

    doc = p.workspace.document
    low = [t for t in doc.chain.transitions if t.source == "low"]
    swap = {(low[0].source, low[0].target): low[1].p, (low[1].source, low[1].target): low[0].p}
    edited = tuple(replace(t, p=swap.get((t.source, t.target), t.p)) for t in doc.chain.transitions)
    doc.push(replace(doc.chain, transitions=edited), "swap two entries of a row")
    assert doc.chain.is_valid
    qtbot.waitUntil(lambda: p.chain is doc.chain and p.workspace.analysis.is_idle, timeout=20000)
    assert p.uncertainty is None and p.interval_note.text() == ""


def test_new_chain_from_data_opens_unsaved_with_intervals(full_window, dialogs, settle, qtbot, monkeypatch):
    from core.estimate import fit_counts, fit_to_chain

    from app import fit_dialog

    counts = np.array([[30, 10], [6, 54]])
    fitted = fit_to_chain(fit_counts(counts, states=["dry", "wet"]), name="fitted weather")
    asked = []

    def fake_get_chain(cls, parent=None, *, path=None, folder=""):
        asked.append(folder)
        return fitted

    monkeypatch.setattr(fit_dialog.FitDialog, "get_chain", classmethod(fake_get_chain))
    assert full_window.new_from_data()
    assert asked and full_window.document.chain.ids == ("dry", "wet")
    assert full_window.document.path is None and full_window.document.is_dirty  # a new chain, not saved yet
    settle(full_window)
    p = full_window.panels["longrun"]
    qtbot.waitUntil(lambda: p.uncertainty is not None and p.chain is full_window.document.chain, timeout=30000)
    assert "[" in p.laws.item(0, 2).text() and "posterior" in p.interval_note.text()
    # cancelling the dialog changes nothing
    monkeypatch.setattr(fit_dialog.FitDialog, "get_chain", classmethod(lambda cls, parent=None, **k: None))
    before = full_window.document.chain
    dialogs.save_answers.append("discard")
    assert not full_window.new_from_data()
    assert full_window.document.chain is before


def test_charts_save_as_png_and_svg(qtbot, panel, dialogs, tmp_path):
    import xml.etree.ElementTree as ET

    from core.io import load_chain

    p = panel(load_chain(SAMPLES / "credit_eras.json"))
    _ready(qtbot, p)
    chart = p.law_chart
    png = tmp_path / "law.png"
    svg = tmp_path / "law"  # the suffix is added
    dialogs.save_paths.extend([str(png), str(svg)])
    saved = []
    chart.exported.connect(saved.append)
    chart.png_action.trigger()
    chart.svg_action.trigger()
    assert saved == [str(png), str(tmp_path / "law.svg")]
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
    from PySide6.QtGui import QImage

    img = QImage(str(png))
    assert img.width() == 1600 and img.height() > 200
    root = ET.parse(tmp_path / "law.svg").getroot()
    assert root.tag.endswith("svg")
    text = (tmp_path / "law.svg").read_text(encoding="utf-8")
    assert "boom_a" in text  # the state names are kept as text
    # the chart's own right-click menu offers the same two actions
    menu_actions = chart.item.getViewBox().menu.actions()
    assert chart.png_action in menu_actions and chart.svg_action in menu_actions
    # a file that cannot be written is reported, not raised
    dialogs.save_paths.append(str(tmp_path / "missing" / "x.png"))
    chart.png_action.trigger()
    assert dialogs.problems and dialogs.problems[-1][0] == "Could not save the chart"
