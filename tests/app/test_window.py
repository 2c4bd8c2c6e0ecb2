"""Files and safety: open, save, reopen, broken files, unsaved changes, export, drop."""
import errno
import json
import os
import shutil
from pathlib import Path

import pytest
from PySide6.QtCore import QMimeData, QPointF, Qt, QUrl
from PySide6.QtGui import QDropEvent

from core.io import load_chain, verify_validated_matrix

SAMPLES = Path(__file__).resolve().parents[2] / "sample_models"


@pytest.fixture
def pump(tmp_path):
    p = tmp_path / "pump.json"
    shutil.copy(SAMPLES / "pump_wear.json", p)
    return p


def test_save_reopen_compare(window, dialogs, pump, tmp_path):
    assert window.open_path(pump, ask=False)
    doc = window.document
    assert not doc.is_dirty and not window.isWindowModified()
    assert "pump.json[*]" in window.windowTitle()
    doc.set_transition("new", "worn", "1/50")
    doc.add_state(10.0, 250.0, sid="scrapped", label="Scrapped")
    doc.set_transition("failed", "scrapped", "0.01")
    doc.set_transition("scrapped", "scrapped", "1")
    assert doc.is_dirty and window.isWindowModified()
    out = tmp_path / "saved" / "copy.json"
    out.parent.mkdir()
    dialogs.save_paths.append(str(out))
    assert window.file_save_as()
    assert not doc.is_dirty and doc.path == out.resolve()
    edited = doc.chain
    # reopen in a fresh document: the same chain, states, positions and typed probabilities
    assert window.open_path(out, ask=False)
    assert window.document.chain == edited
    assert load_chain(out) == edited
    assert str(out.resolve()) in window.settings.recent_files()


def test_open_broken_file_lists_every_problem_and_keeps_the_document(window, dialogs, pump, tmp_path):
    assert window.open_path(pump, ask=False)
    doc = window.document
    doc.set_transition("new", "worn", "0.02")  # an unsaved edit that must survive
    before = doc.chain
    bad = tmp_path / "broken.json"
    bad.write_text(json.dumps({
        "format": "longrun-chain", "version": 1,
        "states": [{"id": "a"}, {"label": "no id"}],
        "transitions": [{"from": "a", "p": "0.5"}, {"from": "a", "to": "a", "p": [1]}],
    }), encoding="utf-8")
    assert not window.open_path(bad)
    assert len(dialogs.problems) == 1
    title, summary, problems = dialogs.problems[0]
    assert "broken.json" in summary and "left as it was" in summary
    joined = "\n".join(problems)
    assert "states[1]" in joined and "'id' is missing" in joined
    assert "transitions[0]" in joined and "'to' is missing" in joined
    assert "transitions[1].p" in joined
    assert len(problems) >= 3
    assert doc.chain is before and doc.is_dirty and doc.path == pump.resolve()
    assert dialogs.save_questions == []  # nothing was asked: nothing was going to be replaced
    # not JSON at all: the place is named
    bad.write_text('{"format": "longrun-chain",\n "states": [}', encoding="utf-8")
    assert not window.open_path(bad)
    assert "line 2" in dialogs.problems[-1][1]
    assert doc.chain is before


def test_file_with_validation_problems_opens_with_them_marked(window, dialogs, tmp_path, settle):
    p = tmp_path / "half.json"
    p.write_text(json.dumps({
        "format": "longrun-chain", "version": 1, "name": "half done",
        "states": [{"id": "a"}, {"id": "b"}],
        "transitions": [{"from": "a", "to": "b", "p": "0.7"}, {"from": "b", "to": "b", "p": 1}],
    }), encoding="utf-8")
    assert window.open_path(p, ask=False)
    assert dialogs.problems == []
    settle(window)
    item = window.canvas.states["a"]
    assert "sum to 0.7" in item.toolTip()
    # states without positions were laid out
    assert all(s.x is not None and s.y is not None for s in window.document.chain.states)
    assert "1 problem" in window.validity_label.text()
    checks = window.panels["checks"]
    assert checks.list.count() == 1 and "sum to 0.7" in checks.list.item(0).text()
    checks.list.setCurrentRow(0)
    assert window.document.selected_states == {"a"}
    assert window.canvas.states["a"].isSelected()


def test_unsaved_changes_prompt_on_close(window, dialogs, pump, qtbot):
    window.open_path(pump, ask=False)
    window.document.set_transition("new", "worn", "0.02")
    dialogs.save_answers.append("cancel")
    window.close()
    assert dialogs.save_questions == ["pump.json"]
    assert window.isVisible()  # cancelled: still open, still unsaved
    assert window.document.is_dirty
    dialogs.save_answers.append("save")
    window.close()
    assert not window.isVisible()
    assert load_chain(pump).transition("new", "worn").p == "0.02"


def test_unsaved_changes_prompt_before_opening_another_file(window, dialogs, pump, tmp_path):
    window.open_path(pump, ask=False)
    window.document.set_transition("new", "worn", "0.02")
    other = tmp_path / "other.json"
    shutil.copy(SAMPLES / "pump_wear.json", other)
    dialogs.save_answers.append("cancel")
    assert not window.open_path(other)
    assert window.document.path == pump.resolve() and window.document.is_dirty
    dialogs.save_answers.append("discard")
    assert window.open_path(other)
    assert window.document.path == other.resolve() and not window.document.is_dirty
    assert dialogs.save_questions == ["pump.json", "pump.json"]


def test_save_failure_keeps_the_document_unsaved(window, dialogs, pump):
    window.open_path(pump, ask=False)
    doc = window.document
    doc.set_transition("new", "worn", "0.02")
    original = pump.read_bytes()

    def full_disk(src, dst):
        raise OSError(errno.ENOSPC, "No space left on device")

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(os, "replace", full_disk)
        assert not window.file_save()
    title, summary, problems = dialogs.problems[-1]
    assert "disk is full" in summary and "not saved" in summary
    assert doc.is_dirty and window.isWindowModified()
    assert pump.read_bytes() == original
    assert not list(pump.parent.glob(".pump.json.*.tmp"))  # the temporary file was cleaned up
    # a folder that does not exist
    dialogs.save_paths.append(str(pump.parent / "missing" / "x.json"))
    assert not window.file_save_as()
    assert "folder does not exist" in dialogs.problems[-1][1]
    assert doc.is_dirty


def test_revert_is_undoable(window, dialogs, pump):
    window.open_path(pump, ask=False)
    doc = window.document
    saved = doc.chain
    doc.set_transition("new", "worn", "0.02")
    edited = doc.chain
    window.file_revert()
    assert doc.chain == saved and not doc.is_dirty
    window.actions_by_name["undo"].trigger()
    assert doc.chain == edited and doc.is_dirty


def test_new_and_title(window, dialogs, pump):
    window.open_path(pump, ask=False)
    window.file_new()
    assert window.document.chain.n == 0 and window.document.path is None
    assert window.windowTitle().startswith("Untitled[*]")


def test_new_chain_follows_the_state_limit_variable(window, dialogs, monkeypatch):
    # File > New starts under the same LONGRUN_MAX_STATES limit as chains read from files
    monkeypatch.setenv("LONGRUN_MAX_STATES", "3")
    window.file_new()
    assert window.document.chain.state_limit == 3 and not dialogs.infos
    # a malformed value is said, by name, and the default limit is used
    monkeypatch.setenv("LONGRUN_MAX_STATES", "10k")
    window.file_new()
    assert window.document.chain.state_limit == 5000
    [(title, text)] = dialogs.infos
    assert "LONGRUN_MAX_STATES='10k' is not a whole number" in text and "default limit of 5,000 states" in text


def test_export_validated_matrix_json_and_csv(window, dialogs, pump, tmp_path):
    window.open_path(pump, ask=False)
    out = tmp_path / "handover.json"
    dialogs.save_paths.append(str(out))
    window.export_json()
    doc = json.loads(out.read_text(encoding="utf-8"))
    assert verify_validated_matrix(doc)
    assert doc["states"] == ["new", "worn", "degraded", "failed"]
    # 1/60 exactly as typed, rounded once to float64
    assert doc["matrix"][0][1] == 1 / 60
    csv_out = tmp_path / "handover.csv"
    dialogs.save_paths.append(str(csv_out))
    window.export_csv()
    assert csv_out.read_text(encoding="utf-8").splitlines()[0] == "from\\to,new,worn,degraded,failed"


def test_export_refused_for_an_invalid_chain(window, dialogs, pump, tmp_path):
    window.open_path(pump, ask=False)
    window.document.set_transition("new", "new", "0.5")
    window.export_json()
    title, summary, problems = dialogs.problems[-1]
    assert "Only a valid matrix" in summary
    assert any("'new'" in p and "sum" in p for p in problems)
    assert not list(tmp_path.glob("*-validated.json"))


def test_import_csv_and_drop_a_file(window, dialogs, tmp_path, pump, qtbot):
    csv = tmp_path / "m.csv"
    csv.write_text("from,x,y\nx,0.5,0.5\ny,1/3,rest\n", encoding="utf-8")
    assert window.open_path(csv, ask=False)
    assert window.document.path is None and window.document.chain.ids == ("x", "y")
    assert window.document.chain.transition("y", "y").p == "rest"
    mime = QMimeData()
    mime.setUrls([QUrl.fromLocalFile(str(pump))])
    ev = QDropEvent(QPointF(200, 200), Qt.DropAction.CopyAction, mime, Qt.MouseButton.LeftButton,
                    Qt.KeyboardModifier.NoModifier)
    window.dropEvent(ev)
    qtbot.waitUntil(lambda: window.document.path == pump.resolve())
    assert window.document.chain.n == 4


def test_recent_files_menu(window, dialogs, pump, tmp_path):
    window.open_path(pump, ask=False)
    window._fill_recent()
    labels = [a.text() for a in window.recent_menu.actions()]
    assert any("pump.json" in t for t in labels)
    window.file_new()
    first = next(a for a in window.recent_menu.actions() if "pump.json" in a.text())
    first.trigger()
    assert window.document.path == pump.resolve()
    # a file that disappeared is reported and leaves the list
    gone = tmp_path / "gone.json"
    shutil.copy(pump, gone)
    window.open_path(gone, ask=False)
    gone.unlink()
    assert not window.open_path(gone)
    assert "no such file" in dialogs.problems[-1][1]
    assert str(gone.resolve()) not in window.settings.recent_files()


def test_add_state_action_and_about_caution(window, dialogs):
    sid = window.add_state()
    window.canvas.editor.cancel()
    assert window.document.chain.ids == (sid,)
    window.show_about()
    assert "not the world" in dialogs.infos[-1][1]
