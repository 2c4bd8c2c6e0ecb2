"""The "New chain from data" dialog: columns, states, preview, estimate table, result.

The dialog displays what :mod:`core.estimate` computes (its numbers are checked against
references in tests/core/test_estimate.py); here the expected values are the core
results for the same choices, or hand counts of the small files written below.
"""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pytest  # noqa: E402
from PySide6.QtCore import Qt  # noqa: E402
from PySide6.QtWidgets import QDialog  # noqa: E402

from app.fit_dialog import FitDialog  # noqa: E402
from core.datafile import read_observations  # noqa: E402
from core.estimate import fit_observations  # noqa: E402

DEMO = Path(__file__).resolve().parents[2] / "sample_models" / "data" / "daily_moves.csv"


@pytest.fixture
def dlg(qtbot):
    d = FitDialog()
    qtbot.addWidget(d)
    yield d
    assert not d.pending, "a refit timer was left running"


def test_opens_the_demo_file_with_guessed_columns(dlg):
    assert dlg.set_path(DEMO)
    o = dlg.options()
    assert o["time_column"] == "date" and o["id_column"] == "fund" and o["column"] == "daily_return"
    # a numeric state column starts cut at quantiles (a visible default)
    assert o["mode"] == "quantiles" and o["quantiles"] == 3
    assert dlg.fit() is not None and dlg.fit().n == 3
    assert dlg.ok_button.isEnabled()


def test_cut_points_preview_and_estimates_match_core(dlg):
    dlg.set_path(DEMO)
    dlg.set_options(mode="cuts", cuts="-1%, 1%")
    fit = dlg.fit()
    ref = fit_observations(read_observations(DEMO, column="daily_return", id_column="fund",
                                             time_column="date", cuts="-1%,1%"))
    np.testing.assert_array_equal(fit.counts, ref.counts)
    assert fit.labels == ("below -1%", "-1% to 1%", "1% and above")
    summary = dlg.summary_label.text()
    assert "-1%, 1%" in summary and "[a, b)" in summary and "2 sequences" in summary
    # the preview shows each row's state; a value exactly on a cut point goes to the band above
    p = dlg.preview
    headers = [p.horizontalHeaderItem(c).text() for c in range(p.columnCount())]
    assert headers == ["date", "fund", "daily_return", "→ state"]
    seen_boundary = False
    for r in range(p.rowCount()):
        v = float(p.item(r, 2).text())
        state = p.item(r, 3).text()
        expected = "below -1%" if v < -0.01 else ("-1% to 1%" if v < 0.01 else "1% and above")
        assert state == expected
        seen_boundary |= v == 0.01
    assert seen_boundary, "the demo preview should show a value on the +1% cut point"
    assert p.verticalHeaderItem(0).text() == "6"  # first data row is on line 6 of the file
    # the estimate table: all 9 entries, values as computed by core
    m = dlg.estimate_model
    assert m.rowCount() == 9
    for r in range(9):
        i, j = divmod(r, 3)
        assert m.value(r, 2) == ref.counts[i, j]
        assert m.value(r, 4) == pytest.approx(ref.estimate[i, j], abs=0)
        assert m.value(r, 5) == pytest.approx(ref.low[i, j], abs=0)
        assert m.value(r, 6) == pytest.approx(ref.high[i, j], abs=0)


def test_typing_refits_after_a_pause(dlg, qtbot):
    dlg.set_path(DEMO)
    dlg.set_options(mode="cuts", cuts="0")
    assert dlg.fit().n == 2
    dlg.cuts_edit.setText("-2%, 0%, 2%")
    assert dlg.pending
    qtbot.waitUntil(lambda: not dlg.pending and dlg.fit() is not None and dlg.fit().n == 4, timeout=5000)
    assert dlg.fit().labels[0] == "below -2%"


def test_bad_choices_show_the_message_and_block_creation(dlg):
    dlg.set_path(DEMO)
    dlg.set_options(mode="cuts", cuts="1%, -1%")
    assert dlg.fit() is None and not dlg.ok_button.isEnabled()
    assert "increase strictly" in dlg.error()
    assert not dlg.error_label.isHidden()
    dlg.set_options(mode="labels", column="fund", id_column=None, time_column=None, states=["Harbour"])
    assert "line 7" in dlg.error() and "'Ridge'" in dlg.error()
    dlg.set_options(states=None)
    assert dlg.error() is None and dlg.error_label.isHidden()
    assert dlg.fit().states == ("Harbour", "Ridge")


def test_unreadable_file_is_reported(dlg, tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("a,b\n1,2\n1,2,3\n")
    assert not dlg.set_path(bad)
    assert "line 3" in dlg.error() and dlg.chain() is None
    assert not dlg.set_path(tmp_path / "missing.csv")
    assert "no such file" in dlg.error()


def test_sequences_prior_and_findings(dlg, tmp_path):
    data = tmp_path / "units.csv"
    data.write_text("unit,state\nu1,ok\nu2,broken\nu1,ok\nu2,broken\nu1,worn\nu2,ok\n")
    dlg.set_path(data)
    o = dlg.options()
    assert o["id_column"] == "unit" and o["column"] == "state" and o["mode"] == "labels"
    # u1: ok ok worn ; u2: broken broken ok (hand count, no transition across units)
    assert dlg.fit().counts.tolist() == [[1, 1, 0], [0, 1, 1], [0, 0, 0]]
    assert "never seen leaving" in dlg.findings_text.toPlainText()
    assert "never left" in dlg.summary_label.text()
    assert not dlg.chain().is_valid  # the editor will show the empty row
    dlg.set_options(prior=0.5, simultaneous=True)
    fit = dlg.fit()
    assert fit.prior == 0.5 and fit.simultaneous is not None and fit.complete
    assert dlg.chain().is_valid
    cols = [dlg.estimate_model.headerData(c, Qt.Orientation.Horizontal)
            for c in range(dlg.estimate_model.columnCount())]
    assert "Simult. low" in cols and "Posterior high" in cols
    assert "pseudo-count" in dlg.findings_text.toPlainText()


def test_accept_emits_the_chain(dlg, qtbot, dialogs):
    dialogs.open_paths.append(str(DEMO))
    dlg.choose_file()
    dlg.set_options(mode="cuts", cuts="-1%, 1%")
    with qtbot.waitSignal(dlg.chainFitted, timeout=2000) as sig:
        dlg.ok_button.click()
    chain = sig.args[0]
    assert chain is dlg.chain()
    assert chain.is_valid and chain.n == 3
    assert chain.name == "Fitted from daily_moves.csv"
    assert chain.extra["fitted_from"]["file"] == "daily_moves.csv"
    assert chain.extra["transition_counts"]["matrix"] == dlg.fit().counts.tolist()
    assert dlg.result() == QDialog.DialogCode.Accepted


def test_cancel_returns_nothing(dlg, qtbot):
    dlg.set_path(DEMO)
    got = []
    dlg.chainFitted.connect(got.append)
    dlg.reject()
    assert got == [] and dlg.result() == QDialog.DialogCode.Rejected


def test_file_without_header(dlg, tmp_path):
    data = tmp_path / "plain.csv"
    data.write_text("A\nB\nB\nA\n")
    dlg.header_check.setChecked(False)
    dlg.set_path(data)
    assert dlg.options()["column"] == "1"
    assert dlg.fit().counts.tolist() == [[0, 1], [1, 1]]
