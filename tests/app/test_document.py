"""The document: one source of truth, every edit an undoable command."""
from fractions import Fraction

import pytest
from PySide6.QtWidgets import QLabel

from app.document import Document, probability_text, transition_changes
from app.panels import PanelSpec, Workspace
from app.settings import KEYS, Settings
from core.model import Chain, State, Transition


def small():
    return Chain(states=(State("a", x=0.0, y=0.0), State("b", x=100.0, y=0.0)),
                 transitions=(Transition("a", "b", "0.5"), Transition("a", "a", "rest"), Transition("b", "a", "1")))


@pytest.fixture
def doc(qtbot):
    d = Document()
    d.reset(small())
    return d


def test_probability_text_accepts_the_forms_users_type():
    assert probability_text(" 0.3 ") == "0.3"
    assert probability_text("1/3") == "1/3"
    assert probability_text("2.5e-11") == "2.5e-11"
    assert probability_text("5%") == "5%"
    assert probability_text("REST") == "rest"
    assert probability_text("") is None and probability_text("0") is None
    for bad, why in (("1.5", "greater than 1"), ("-0.1", "negative"), ("x", "not a probability"),
                     ("1/0", "divides by zero"), ("nan", "not a finite number")):
        with pytest.raises(ValueError, match=why):
            probability_text(bad)


def test_each_edit_is_one_undo_step_storing_before_and_after(doc, qtbot):
    seen = []
    doc.chainChanged.connect(lambda old, new: seen.append((old, new)))
    c0 = doc.chain
    doc.set_transition("a", "b", "1/4")
    c1 = doc.chain
    assert seen == [(c0, c1)] and doc.undo_stack.count() == 1
    assert doc.undo_stack.undoText() == "Set P(a → b) = 1/4"
    doc.undo_stack.undo()
    assert doc.chain is c0 and seen[-1] == (c1, c0)
    doc.undo_stack.redo()
    assert doc.chain is c1
    assert doc.is_dirty
    doc.undo_stack.undo()
    assert not doc.is_dirty  # back at the saved state
    # an edit that changes nothing records nothing
    doc.set_transition("a", "b", "0.5")
    assert doc.undo_stack.index() == 0


def test_drag_moves_merge_into_one_step_and_a_new_drag_is_another(doc):
    for k in range(10):
        doc.move_states({"a": (float(k), 5.0)}, merge=("move", 1))
    assert doc.undo_stack.count() == 1
    assert (doc.chain.state("a").x, doc.chain.state("a").y) == (9.0, 5.0)
    doc.move_states({"a": (50.0, 5.0)}, merge=("move", 2))
    assert doc.undo_stack.count() == 2
    doc.undo_stack.undo()
    doc.undo_stack.undo()
    assert (doc.chain.state("a").x, doc.chain.state("a").y) == (0.0, 0.0)


def test_delete_is_a_macro_with_one_notification(doc):
    seen = []
    doc.chainChanged.connect(lambda old, new: seen.append(new))
    doc.add_state(0.0, 100.0, sid="c")
    doc.set_transition("c", "c", "1")
    seen.clear()
    doc.delete(["a", "c"], [("b", "a")])
    assert len(seen) == 1
    assert doc.chain.ids == ("b",) and doc.chain.transitions == ()
    assert doc.undo_stack.undoText() == "Delete 2 states"
    doc.undo_stack.undo()
    assert doc.chain.ids == ("a", "b", "c") and len(seen) == 2
    assert doc.chain.transition("c", "c").p == "1"
    doc.undo_stack.redo()
    assert doc.chain.ids == ("b",)


def test_rename_keeps_transitions_and_selection_and_refuses_clashes(doc):
    doc.set_selection(["a"])
    assert doc.rename_state("a", "alpha") == "alpha"
    assert doc.chain.transition("alpha", "b").p == "0.5"
    assert doc.chain.transition("b", "alpha").p == "1"
    assert doc.selected_states == {"alpha"}
    with pytest.raises(ValueError, match="already a state"):
        doc.rename_state("alpha", "b")
    with pytest.raises(ValueError, match="cannot be empty"):
        doc.rename_state("alpha", "  ")
    doc.set_label("b", "Bravo")
    assert doc.chain.state("b").display_name == "Bravo"


def test_rest_on_diagonal_and_its_refusal(doc):
    doc.set_transition("a", "a", "0.5")
    doc.rest_on_diagonal("a")
    assert doc.chain.transition("a", "a").p == "rest"
    doc.set_transition("b", "b", "0.2")
    doc.set_transition("b", "a", "rest")
    msg = doc.rest_on_diagonal("b")
    assert "already puts its rest on ‘a’" in msg
    assert doc.chain.transition("b", "b").p == "0.2"


def test_paste_many_cells_is_one_edit_and_keeps_file_order(doc):
    doc.set_transitions([("b", "b", "0.5"), ("b", "a", "0.5"), ("a", "a", None)], "Paste 2 × 2 cells")
    assert doc.undo_stack.count() == 1
    assert [(t.source, t.target, t.p) for t in doc.chain.transitions] == [
        ("a", "b", "0.5"), ("b", "a", "0.5"), ("b", "b", "0.5")]
    assert doc.chain.row_sum("b") == Fraction(1)


def test_transition_changes_names_only_what_changed(doc):
    old = doc.chain
    doc.set_transition("b", "b", "0.1")
    doc.set_transition("b", "a", "rest")
    assert transition_changes(old, doc.chain) == {("b", "b"): doc.chain.transition("b", "b"),
                                                   ("b", "a"): doc.chain.transition("b", "a")}
    mid = doc.chain
    doc.set_transition("b", "b", None)
    assert transition_changes(mid, doc.chain) == {("b", "b"): None}
    assert transition_changes(doc.chain, doc.chain) == {}


def test_layout_fills_missing_positions_on_open(qtbot):
    d = Document()
    d.reset(Chain(states=(State("a"), State("b"), State("c")),
                  transitions=(Transition("a", "b", 1), Transition("b", "c", 1), Transition("c", "a", 1))))
    pos = [(s.x, s.y) for s in d.chain.states]
    assert all(x is not None and y is not None for x, y in pos) and len(set(pos)) == 3
    assert not d.is_dirty


def test_settings_keys_defaults_and_round_trip(isolated):
    s = Settings()
    assert s.path.startswith(str(isolated))  # the test's own file, never the user's
    for name, key in KEYS.items():
        assert isinstance(s.get(name), key.type)
    s.set("recovery/settle_ms", 250)
    s.set("canvas/rare_below", 1e-4)
    s.add_recent(isolated / "one.json")
    s.add_recent(isolated / "two.json")
    s.add_recent(isolated / "one.json")
    s.sync()
    again = Settings()
    assert again.get("recovery/settle_ms") == 250
    assert again.get("canvas/rare_below") == pytest.approx(1e-4)
    assert again.recent_files() == [str(isolated / "one.json"), str(isolated / "two.json")]
    with pytest.raises(KeyError):
        again.get("no/such/key")


def test_a_panel_plugs_in_through_the_registry(qtbot, dialogs):
    """A later panel: a spec whose factory gets the workspace; the window docks it and lists it."""
    from app.main import create_application
    from app.panels import panel_specs
    from app.window import MainWindow

    create_application()
    made = []

    class StateCount(QLabel):
        def __init__(self, ws: Workspace):
            super().__init__()
            self.ws = ws
            ws.document.changed.connect(self.refresh)
            self.stopped = False
            made.append(self)

        def refresh(self):
            self.setText(f"{self.ws.document.chain.n} states")

        def shutdown(self):
            self.stopped = True

    class Win(MainWindow):
        def _build_docks(self, specs):
            super()._build_docks(specs + [PanelSpec("count", "Count", StateCount, tab_with="checks")])

    w = Win(Settings(), restore_layout=False, panels=("app.grid", "app.checks"))
    qtbot.addWidget(w)
    assert [s.key for s in panel_specs()][:2] == ["matrix", "checks"]
    panel = w.panels["count"]
    assert w.docks["count"].widget() is panel and panel.ws.document is w.document
    assert "Count" in [a.text() for a in w.panels_menu.actions()]
    w.document.add_state(0.0, 0.0)
    assert panel.text() == "1 states"
    w.shutdown()
    assert panel.stopped


def test_a_broken_panel_does_not_take_the_editor_down(qtbot, dialogs, capsys):
    from app.main import create_application
    from app.window import MainWindow

    create_application()

    def broken(ws):
        raise RuntimeError("this panel is broken")

    class Win(MainWindow):
        def _build_docks(self, specs):
            super()._build_docks(specs + [PanelSpec("broken", "Broken", broken)])

    w = Win(Settings(), restore_layout=False, panels=("app.grid", "no_such_module_here"))
    qtbot.addWidget(w)
    assert "matrix" in w.docks and "broken" not in w.docks
    assert "this panel is broken" in w.panel_errors["broken"]
    assert "no_such_module_here" in w.panel_errors
    assert "could not start" in capsys.readouterr().err
    w.document.add_state(0.0, 0.0)
    assert w.canvas.states
    w.shutdown()
