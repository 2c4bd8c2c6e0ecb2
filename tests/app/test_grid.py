"""The matrix grid: a second view of the same document."""
from PySide6.QtCore import QItemSelection, QItemSelectionModel, Qt
from PySide6.QtGui import QGuiApplication, QKeySequence
from PySide6.QtTest import QTest
from PySide6.QtWidgets import QLineEdit

from app.grid import parse_block
from core.model import Chain, State


def grid_of(window):
    return window.panels["matrix"].view


def three_states(window):
    window.document.reset(Chain(states=tuple(State(s, x=100.0 * k, y=0.0) for k, s in enumerate("abc"))))


def select(view, r0, c0, r1=None, c1=None):
    m = view.model()
    r1 = r0 if r1 is None else r1
    c1 = c0 if c1 is None else c1
    view.setCurrentIndex(m.index(r0, c0))
    sel = QItemSelection(m.index(r0, c0), m.index(r1, c1))
    view.selectionModel().select(sel, QItemSelectionModel.SelectionFlag.ClearAndSelect)


def test_paste_a_3x3_block_is_one_undo_step(window, qtbot, settle):
    three_states(window)
    view = grid_of(window)
    doc = window.document
    select(view, 0, 0)
    QGuiApplication.clipboard().setText("0.5\t0.25\t0.25\n0\t1/3\trest\n0.1\t0.2\t0.7\n")
    view.setFocus()
    QTest.keySequence(view, QKeySequence(QKeySequence.StandardKey.Paste))
    P = {(t.source, t.target): t.p for t in doc.chain.transitions}
    assert P == {("a", "a"): "0.5", ("a", "b"): "0.25", ("a", "c"): "0.25",
                 ("b", "b"): "1/3", ("b", "c"): "rest",
                 ("c", "a"): "0.1", ("c", "b"): "0.2", ("c", "c"): "0.7"}
    settle(window)
    assert window.analysis.report.valid
    m = view.model()
    assert [m.data(m.index(r, 3)) for r in range(3)] == ["1", "1", "1"]
    assert m.data(m.index(1, 2)) == "rest"
    # the canvas shows the same document
    assert set(window.canvas.arrows) == set(P)
    window.actions_by_name["undo"].trigger()
    assert doc.chain.transitions == ()
    window.actions_by_name["redo"].trigger()
    assert len(doc.chain.transitions) == 8


def test_paste_comma_separated_with_header_and_copy_out(window, qtbot):
    three_states(window)
    view = grid_of(window)
    select(view, 0, 0)
    assert view.paste(",a,b,c\na,0.2,0.8,0\nb,0,1,0\nc,1,0,0\n")
    doc = window.document
    assert doc.chain.transition("a", "b").p == "0.8"
    assert doc.chain.transition("a", "c") is None  # zero is no transition
    select(view, 0, 0, 2, 2)
    text = view.copy_selection()
    assert text == "0.2\t0.8\t0\n0\t1\t0\n1\t0\t0\n"
    assert QGuiApplication.clipboard().text() == text
    assert parse_block(text) == [["0.2", "0.8", "0"], ["0", "1", "0"], ["1", "0", "0"]]


def test_bad_paste_changes_nothing_and_names_the_cell(window, qtbot):
    three_states(window)
    view = grid_of(window)
    messages = []
    view.message.connect(messages.append)
    select(view, 0, 0)
    assert not view.paste("0.5\t0.5\n0.2\tlots\n")
    assert window.document.chain.transitions == ()
    assert "row 2, column 2" in messages[-1] and "lots" in messages[-1]


def test_typing_into_a_cell_edits_the_document(window, qtbot, settle):
    three_states(window)
    view = grid_of(window)
    select(view, 0, 1)
    view.setFocus()
    QTest.keyClick(view, Qt.Key.Key_F2)  # the platform's edit key opens the cell editor
    editor = view.findChild(QLineEdit)
    assert editor is not None and editor.isVisible()
    editor.selectAll()
    QTest.keyClicks(editor, "0.4")
    QTest.keyClick(editor, Qt.Key.Key_Return)
    doc = window.document
    qtbot.waitUntil(lambda: doc.chain.transition("a", "b") is not None)  # the delegate commits queued
    assert doc.chain.transition("a", "b").p == "0.4"
    settle(window)
    m = view.model()
    # row a sums to 0.4: its cells are tinted and say why
    assert "sum to 0.4" in m.data(m.index(0, 3), Qt.ItemDataRole.ToolTipRole)
    assert m.data(m.index(0, 3), Qt.ItemDataRole.BackgroundRole) is not None
    assert m.data(m.index(0, 3)) == "0.4"
    # a nonsense entry is refused by the model with a message
    messages = []
    m.message.connect(messages.append)
    assert not m.setData(m.index(0, 2), "-0.1")
    assert "negative" in messages[-1]


def test_rest_on_the_diagonal_and_invalid_cell_highlight(window, qtbot, settle):
    three_states(window)
    doc = window.document
    doc.set_transitions([("a", "b", "0.3"), ("b", "b", "1"), ("c", "c", "1")], "setup")
    view = grid_of(window)
    view.rest_on_diagonal(0)
    assert doc.chain.transition("a", "a").p == "rest"
    settle(window)
    assert window.analysis.report.valid
    m = view.model()
    assert m.data(m.index(0, 3)) == "1"
    # a typed text that is not a number (as a file may hold) is highlighted, with the message
    doc.set_transitions([("c", "a", "abc")], "bad")
    settle(window)
    tip = m.data(m.index(2, 0), Qt.ItemDataRole.ToolTipRole)
    assert "not a probability" in tip
    assert m.data(m.index(2, 0), Qt.ItemDataRole.BackgroundRole) is not None
    assert m.data(m.index(2, 3)) == "—"  # a broken row has no sum


def test_clear_cells_and_grid_follows_renames(window, qtbot):
    three_states(window)
    doc = window.document
    doc.set_transitions([("a", "b", "0.3"), ("a", "c", "0.7")], "setup")
    view = grid_of(window)
    select(view, 0, 1, 0, 2)
    view.clear_selection()
    assert doc.chain.transitions == ()
    doc.rename_state("a", "alpha")
    m = view.model()
    assert m.headerData(0, Qt.Orientation.Horizontal) == "alpha"
    assert m.headerData(0, Qt.Orientation.Vertical) == "alpha"
    assert m.headerData(3, Qt.Orientation.Horizontal) == "Row sum"


def test_document_selection_shows_in_the_grid(window, qtbot):
    three_states(window)
    doc = window.document
    doc.set_transitions([("a", "b", "1"), ("b", "b", "1"), ("c", "c", "1")], "setup")
    view = grid_of(window)
    doc.set_selection(["b"], [("a", "b")])
    picked = {(i.row(), i.column()) for i in view.selectionModel().selectedIndexes()}
    assert picked == {(1, 0), (1, 1), (1, 2), (1, 3), (0, 1)}
    assert window.canvas.states["b"].isSelected() and window.canvas.arrows[("a", "b")].isSelected()
    window.canvas.reveal_selection()
