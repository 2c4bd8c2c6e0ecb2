"""The canvas driven by real mouse and keyboard events on its viewport."""
import math

import pytest
from PySide6.QtCore import QPoint, QPointF, Qt
from PySide6.QtGui import QKeySequence, QPainter
from PySide6.QtTest import QTest

from app.canvas import NODE_RADIUS, ArrowItem
from core.model import Chain, State, Transition



def vp_point(canvas, scene_pt) -> QPoint:
    return canvas.mapFromScene(QPointF(scene_pt))


def rim_point(canvas, sid) -> QPoint:
    c = canvas.states[sid].pos()
    return vp_point(canvas, QPointF(c.x() + NODE_RADIUS * 0.85, c.y()))


def centre_point(canvas, sid) -> QPoint:
    return vp_point(canvas, canvas.states[sid].pos())


def drag(viewport, a: QPoint, b: QPoint, steps: int = 6, modifier=Qt.KeyboardModifier.NoModifier):
    QTest.mousePress(viewport, Qt.MouseButton.LeftButton, modifier, a)
    for k in range(1, steps + 1):
        p = QPoint(a.x() + (b.x() - a.x()) * k // steps, a.y() + (b.y() - a.y()) * k // steps)
        QTest.mouseMove(viewport, p)
    QTest.mouseRelease(viewport, Qt.MouseButton.LeftButton, modifier, b)


def type_into_editor(canvas, text):
    ed = canvas.editor
    assert ed.isVisible()
    QTest.keyClicks(ed, text)
    QTest.keyClick(ed, Qt.Key.Key_Return)


def test_add_connect_type_undo_redo_delete(window, qtbot):
    canvas, doc = window.canvas, window.document
    vp = canvas.viewport()
    # two states by double-clicking empty space, named in place
    QTest.mouseDClick(vp, Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier, QPoint(300, 300))
    type_into_editor(canvas, "pump")
    QTest.mouseDClick(vp, Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier, QPoint(600, 300))
    type_into_editor(canvas, "spare")
    assert doc.chain.ids == ("pump", "spare")
    assert not canvas.editor.isVisible()
    # the state sits where it was double-clicked
    assert canvas.mapFromScene(canvas.states["pump"].pos()) == QPoint(300, 300)

    # connect: drag from the rim of pump to spare; a new transition starts as 'rest'
    drag(vp, rim_point(canvas, "pump"), centre_point(canvas, "spare"))
    assert doc.chain.transition("pump", "spare").p == "rest"
    assert ("pump", "spare") in canvas.arrows
    type_into_editor(canvas, "0.3")
    assert doc.chain.transition("pump", "spare").p == "0.3"
    assert doc.is_dirty and window.isWindowModified()

    undo = window.actions_by_name["undo"]
    redo = window.actions_by_name["redo"]
    assert undo.shortcut() == QKeySequence(QKeySequence.StandardKey.Undo)
    assert redo.shortcut() == QKeySequence(QKeySequence.StandardKey.Redo)
    undo.trigger()
    assert doc.chain.transition("pump", "spare").p == "rest"
    redo.trigger()
    assert doc.chain.transition("pump", "spare").p == "0.3"
    assert canvas.arrows[("pump", "spare")].transition.p == "0.3"

    # select pump with a click on its centre and delete it with the Delete key
    QTest.mouseClick(vp, Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier, centre_point(canvas, "pump"))
    assert doc.selected_states == {"pump"}
    QTest.keyClick(canvas, Qt.Key.Key_Delete)
    assert doc.chain.ids == ("spare",)
    assert doc.chain.transitions == ()
    assert set(canvas.states) == {"spare"} and canvas.arrows == {}
    undo.trigger()  # one step brings the state and its transition back
    assert doc.chain.ids == ("pump", "spare")
    assert doc.chain.transition("pump", "spare").p == "0.3"
    assert set(canvas.arrows) == {("pump", "spare")}


def test_undo_shortcut_from_the_keyboard(window, qtbot):
    canvas, doc = window.canvas, window.document
    window.activateWindow()
    qtbot.waitUntil(lambda: window.isActiveWindow())
    canvas.setFocus()
    QTest.mouseDClick(canvas.viewport(), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier, QPoint(200, 200))
    QTest.keyClick(canvas.editor, Qt.Key.Key_Escape)  # keep the proposed name
    assert doc.chain.ids == ("s1",)
    QTest.keySequence(canvas, QKeySequence(QKeySequence.StandardKey.Undo))
    assert doc.chain.ids == ()
    QTest.keySequence(canvas, QKeySequence(QKeySequence.StandardKey.Redo))
    assert doc.chain.ids == ("s1",)


def two_state_doc(window):
    chain = Chain(
        states=(State("a", x=-150.0, y=0.0), State("b", x=150.0, y=0.0)),
        transitions=(Transition("a", "b", "0.4"), Transition("a", "a", "rest"), Transition("b", "b", "1")),
    )
    window.document.reset(chain)
    window.canvas.resetTransform()
    window.canvas.centerOn(0, 0)


def test_self_loop_by_dragging_back_to_the_same_state(window, qtbot):
    two_state_doc(window)
    canvas, doc = window.canvas, window.document
    doc.set_transition("b", "b", None)
    assert ("b", "b") not in canvas.arrows
    c = centre_point(canvas, "b")
    drag(canvas.viewport(), rim_point(canvas, "b"), QPoint(c.x() - 4, c.y() + 3))
    assert ("b", "b") in canvas.arrows and canvas.arrows[("b", "b")].is_loop
    type_into_editor(canvas, "1")
    assert doc.chain.transition("b", "b").p == "1"
    # the loop leaves the node and comes back: its path reaches well outside the circle
    item = canvas.arrows[("b", "b")]
    rect = item.mapRectToScene(item._path.boundingRect())
    centre = canvas.states["b"].pos()
    far = max(math.hypot(x - centre.x(), y - centre.y()) for x, y in
              ((rect.left(), rect.top()), (rect.right(), rect.top()), (rect.left(), rect.bottom()),
               (rect.right(), rect.bottom())))
    assert far > NODE_RADIUS + 30


def test_shift_drag_from_the_middle_connects_plain_drag_moves_in_one_undo_step(window, qtbot):
    two_state_doc(window)
    canvas, doc = window.canvas, window.document
    vp = canvas.viewport()
    before = (doc.chain.state("a").x, doc.chain.state("a").y)
    depth = doc.undo_stack.count()
    drag(vp, centre_point(canvas, "a"), centre_point(canvas, "a") + QPoint(0, 120), steps=10)
    moved = doc.chain.state("a")
    assert moved.y == pytest.approx(before[1] + 120 / canvas.zoom, abs=1.5)
    assert doc.undo_stack.count() == depth + 1  # ten mouse moves, one undo step
    window.actions_by_name["undo"].trigger()
    assert (doc.chain.state("a").x, doc.chain.state("a").y) == before
    # Shift + drag from the centre draws a transition instead of moving
    drag(vp, centre_point(canvas, "b"), centre_point(canvas, "a"), modifier=Qt.KeyboardModifier.ShiftModifier)
    assert doc.chain.transition("b", "a") is not None
    QTest.keyClick(canvas.editor, Qt.Key.Key_Escape)
    assert (doc.chain.state("b").x, doc.chain.state("b").y) == (150.0, 0.0)


def test_opposite_transitions_are_two_distinct_curves(window, qtbot):
    two_state_doc(window)
    canvas, doc = window.canvas, window.document
    ab = canvas.arrows[("a", "b")]
    straight_mid = ab._path.pointAtPercent(0.5)
    assert abs(straight_mid.y()) < 1e-6  # alone: a straight arrow on the line y = 0
    doc.set_transition("b", "a", "0.5")
    ba = canvas.arrows[("b", "a")]
    m1, m2 = ab._path.pointAtPercent(0.5), ba._path.pointAtPercent(0.5)
    # bent to opposite sides of the line joining the states, so neither hides the other
    assert m1.y() * m2.y() < 0 and abs(m1.y()) > 10 and abs(m2.y()) > 10
    assert not ab.label_scene_rect().intersects(ba.label_scene_rect())
    doc.set_transition("b", "a", None)
    assert abs(canvas.arrows[("a", "b")]._path.pointAtPercent(0.5).y()) < 1e-6


def test_double_click_on_arrow_edits_probability_and_rejects_nonsense(window, qtbot):
    two_state_doc(window)
    canvas, doc = window.canvas, window.document
    label = canvas.arrows[("a", "b")].label_scene_rect().center()
    QTest.mouseDClick(canvas.viewport(), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier,
                      vp_point(canvas, label))
    assert canvas.editor.isVisible() and canvas.editor.text() == "0.4"
    for text in ("1/3", "2.5e-11", "rest"):
        canvas.editor.selectAll()
        type_into_editor(canvas, text)
        assert doc.chain.transition("a", "b").p == text
        canvas.edit_probability(("a", "b"))
    messages = []
    canvas.message.connect(messages.append)
    canvas.editor.selectAll()
    QTest.keyClicks(canvas.editor, "1.5")
    QTest.keyClick(canvas.editor, Qt.Key.Key_Return)
    assert canvas.editor.isVisible()  # refused: stays open, says why
    assert doc.chain.transition("a", "b").p == "rest"
    assert any("greater than 1" in m for m in messages)
    canvas.editor.selectAll()
    QTest.keyClicks(canvas.editor, "three")
    QTest.keyClick(canvas.editor, Qt.Key.Key_Return)
    assert any("not a probability" in m for m in messages)
    QTest.keyClick(canvas.editor, Qt.Key.Key_Escape)
    assert not canvas.editor.isVisible()
    assert doc.chain.transition("a", "b").p == "rest"


def test_rename_in_place_carries_transitions_and_refuses_duplicates(window, qtbot):
    two_state_doc(window)
    canvas, doc = window.canvas, window.document
    QTest.mouseDClick(canvas.viewport(), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier,
                      centre_point(canvas, "a"))
    type_into_editor(canvas, "b")
    assert canvas.editor.isVisible()  # 'b' is taken
    canvas.editor.selectAll()
    type_into_editor(canvas, "alpha")
    assert doc.chain.ids == ("alpha", "b")
    assert doc.chain.transition("alpha", "b").p == "0.4"
    assert set(canvas.arrows) == {("alpha", "b"), ("alpha", "alpha"), ("b", "b")}


def test_tiny_probability_is_visible_and_marked_rare(window, qtbot, settle):
    two_state_doc(window)
    canvas, doc = window.canvas, window.document
    doc.set_transition("a", "b", "1e-10")
    settle(window, qtbot)
    item = canvas.arrows[("a", "b")]
    assert item._rare and item._width >= 0.8
    assert canvas.arrows[("b", "b")]._width > item._width + 3  # p = 1 is much wider
    assert "rare" in item.toolTip()


def test_row_sum_problem_marked_on_the_state_with_its_message(window, qtbot, settle):
    two_state_doc(window)
    canvas, doc = window.canvas, window.document
    doc.set_transition("a", "a", "0.5")  # row a: 0.4 + 0.5 = 0.9
    settle(window, qtbot)
    item = canvas.states["a"]
    assert item.problems and "sum to 0.9" in item.problems[0]
    assert "sum to 0.9" in item.toolTip()
    assert not canvas.states["b"].problems
    assert item.style.kind == "unknown"  # classes are not shown for an invalid chain
    doc.set_transition("a", "a", "rest")
    settle(window, qtbot)
    assert not canvas.states["a"].problems


def test_transient_and_closed_states_differ_beyond_colour(window, qtbot, settle):
    # a -> b absorbing, c <-> d closed pair, a also reaches c: a is transient.
    # (Classification by definition: a state is transient when it can leave its class
    # for good; common practice.)
    chain = Chain(
        states=tuple(State(s, x=float(100 * k), y=0.0) for k, s in enumerate("abcd")),
        transitions=(Transition("a", "b", "0.5"), Transition("a", "c", "0.5"), Transition("b", "b", "1"),
                     Transition("c", "d", "1"), Transition("d", "c", "1")),
    )
    window.document.reset(chain)
    settle(window, qtbot)
    qtbot.waitUntil(lambda: window.canvas.states["a"].style.kind != "unknown")
    st = {s: window.canvas.style_of(s) for s in "abcd"}
    assert st["a"].kind == "transient" and st["a"].dashed and st["a"].tag == "T"
    assert st["b"].kind == "closed" and st["b"].double and not st["b"].dashed
    assert st["c"].kind == st["d"].kind == "closed" and not st["c"].double
    assert st["c"].tag == st["d"].tag != st["b"].tag
    assert st["c"].outline == st["d"].outline != st["b"].outline
    assert "period 2" in st["c"].description


def test_zoom_pan_and_fit(window, qtbot):
    two_state_doc(window)
    canvas = window.canvas
    z0 = canvas.zoom
    from PySide6.QtGui import QWheelEvent
    from PySide6.QtCore import QPointF as P

    ev = QWheelEvent(P(300, 300), P(canvas.viewport().mapToGlobal(QPoint(300, 300))), QPoint(0, 0),
                     QPoint(0, 240), Qt.MouseButton.NoButton, Qt.KeyboardModifier.NoModifier,
                     Qt.ScrollPhase.NoScrollPhase, False)
    canvas.wheelEvent(ev)
    assert canvas.zoom > z0 * 1.3
    canvas.fit_to_view()
    view_rect = canvas.mapToScene(canvas.viewport().rect()).boundingRect()
    assert view_rect.contains(canvas.items_rect())
    # middle-button drag pans
    h = canvas.horizontalScrollBar().value()
    vp = canvas.viewport()
    QTest.mousePress(vp, Qt.MouseButton.MiddleButton, Qt.KeyboardModifier.NoModifier, QPoint(400, 300))
    QTest.mouseMove(vp, QPoint(300, 300))
    QTest.mouseRelease(vp, Qt.MouseButton.MiddleButton, Qt.KeyboardModifier.NoModifier, QPoint(300, 300))
    assert canvas.horizontalScrollBar().value() != h


def test_layouts_are_undoable_and_keep_the_model(window, qtbot, settle):
    from app.main import sample_model_path

    assert window.open_path(sample_model_path(), ask=False)
    settle(window, qtbot)
    doc = window.document
    before = doc.chain
    for kind in ("spring", "circular", "shell"):
        window.arrange(kind)
        assert doc.chain.transitions == before.transitions
        pos = [(s.x, s.y) for s in doc.chain.states]
        assert len(set(pos)) == doc.chain.n  # no two states on the same spot
        for sid, item in window.canvas.states.items():
            s = doc.chain.state(sid)
            assert (item.pos().x(), item.pos().y()) == (s.x, s.y)
    for _ in range(3):
        window.actions_by_name["undo"].trigger()
    assert doc.chain == before
    assert not doc.is_dirty


def test_incremental_update_keeps_untouched_items(window, qtbot):
    from app.main import sample_model_path

    window.open_path(sample_model_path(), ask=False)
    canvas, doc = window.canvas, window.document
    items = {k: id(v) for k, v in canvas.arrows.items()}
    nodes = {k: id(v) for k, v in canvas.states.items()}
    doc.set_transition("worn", "new", "0.001")
    assert {k: id(v) for k, v in canvas.states.items()} == nodes
    for k, v in items.items():
        assert id(canvas.arrows[k]) == v
    assert isinstance(canvas.arrows[("worn", "new")], ArrowItem)


def test_quick_drawing_while_dragging_defers_the_neighbours_tidying(window, qtbot):
    # (the canvas switches to this mode by itself for chains of more than 300 arrows)
    two_state_doc(window)
    canvas, doc = window.canvas, window.document
    before = canvas.states["a"].loop_angle  # a's loop points away from b (to the left)
    canvas._begin_interaction()
    assert not canvas.renderHints() & QPainter.RenderHint.Antialiasing
    doc.move_states({"b": (-150.0, -300.0)}, merge=("move", "t"))  # b goes above a
    assert canvas.states["a"].loop_angle == before
    canvas._end_interaction()
    after = canvas.states["a"].loop_angle
    assert after != before
    # the loop now avoids the arrow to b, which leaves a straight upwards (angle -pi/2)
    assert abs(math.remainder(after + math.pi / 2, 2 * math.pi)) > math.radians(60)
    assert canvas.renderHints() & QPainter.RenderHint.Antialiasing


def test_pinch_zooms(window, qtbot):
    from PySide6.QtGui import QNativeGestureEvent, QPointingDevice

    two_state_doc(window)
    canvas = window.canvas
    z0 = canvas.zoom
    p = QPointF(300, 300)
    ev = QNativeGestureEvent(Qt.NativeGestureType.ZoomNativeGesture, QPointingDevice.primaryPointingDevice(), 2,
                             p, p, p, 0.5, QPointF(0, 0))
    assert canvas.viewportEvent(ev)
    assert canvas.zoom == pytest.approx(z0 * 1.5)


def test_a_chain_of_many_transitions_is_drawn_as_plain_lines(window, qtbot, monkeypatch):
    # Beyond MAX_DRAWN_ARROWS transitions the canvas makes no arrow items (each costs about a
    # millisecond and tens of kilobytes: a dense 500-state matrix exhausted 24 GB), draws every
    # transition as one batch of lines and says so; edits keep it so, and a chain back under the
    # limit gets its arrows again.  (The limit is lowered here to keep the test small.)
    import app.canvas as cv

    monkeypatch.setattr(cv, "MAX_DRAWN_ARROWS", 10)
    n = 5
    ids = [f"s{i}" for i in range(n)]
    dense = Chain.from_matrix([[1 / n] * n for _ in range(n)], ids)  # 25 transitions, 20 between states
    canvas = window.canvas
    window.document.reset(dense)
    assert canvas.lines_only and canvas.arrows == {} and len(canvas.states) == n
    assert len(canvas._overview._lines) == n * (n - 1)
    assert canvas.notice.isVisible() and "25 transitions, more than the 10 drawn as arrows" in canvas.notice.text()
    window.document.set_transition("s0", "s1", "0.1")
    window.document.set_transition("s0", "s0", "rest")
    assert canvas.lines_only and canvas.arrows == {}
    ring = Chain.from_matrix([[1.0 if j == (i + 1) % n else 0.0 for j in range(n)] for i in range(n)], ids)
    window.document.reset(ring)
    assert not canvas.lines_only and not canvas.notice.isVisible()
    assert sorted(canvas.arrows) == sorted((f"s{i}", f"s{(i + 1) % n}") for i in range(n))
    assert canvas._overview._lines.keys() <= set(canvas.arrows)  # no stale lines from the plain-line mode


def test_plain_lines_are_the_most_probable_transitions_when_there_are_too_many(window, monkeypatch):
    import app.canvas as cv

    monkeypatch.setattr(cv, "MAX_DRAWN_ARROWS", 10)
    monkeypatch.setattr(cv, "MAX_DRAWN_LINES", 4)
    # row i puts 0.5 on i -> i+1 and spreads the rest thinly: those 5 are the most probable
    n = 5
    P = [[0.5 if j == (i + 1) % n else 0.5 / (n - 1) for j in range(n)] for i in range(n)]
    window.document.reset(Chain.from_matrix(P, [f"s{i}" for i in range(n)]))
    canvas = window.canvas
    lines = set(canvas._overview._lines)
    assert len(lines) == 4 and lines <= {(f"s{i}", f"s{(i + 1) % n}") for i in range(n)}
    assert "the 4 most probable are shown as plain lines" in canvas.notice.text()
