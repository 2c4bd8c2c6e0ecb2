"""Autosave and recovery: a crashed session's unsaved edit comes back at the next start."""
import json
import os
import shutil
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from app.recovery import Autosaver, find_orphans, recovery_dir
from app.settings import Settings

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"

CRASHING_SESSION = textwrap.dedent("""
    import os, sys
    os.environ["QT_QPA_PLATFORM"] = "offscreen"
    from app.main import create_application
    app = create_application()
    from app.settings import Settings
    from app.window import MainWindow
    w = MainWindow(Settings(), restore_layout=False)
    assert w.open_path(sys.argv[1], ask=False)
    w.autosaver.saved.connect(lambda path: print("AUTOSAVED", path, flush=True))
    w.show()
    w.document.set_transition("new", "worn", "1/45")
    app.exec()
""")


@pytest.fixture
def pump(tmp_path):
    p = tmp_path / "pump.json"
    shutil.copy(SAMPLES / "pump_wear.json", p)
    return p


def fast_autosave_settings():
    s = Settings()
    s.set("recovery/settle_ms", 100)
    s.sync()
    return s


@pytest.mark.timeout(120)
def test_recovery_after_sigkill(window, dialogs, pump):
    fast_autosave_settings()
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", PYTHONPATH=str(REPO))
    proc = subprocess.Popen([sys.executable, "-c", CRASHING_SESSION, str(pump)], cwd=str(REPO), env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        line = ""
        for line in proc.stdout:  # blocks until the session reports its autosave
            if line.startswith("AUTOSAVED"):
                break
        assert line.startswith("AUTOSAVED"), proc.stderr.read()
        autosaved = Path(line.split(" ", 1)[1].strip())
        assert autosaved.is_file()
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    assert pump.read_text(encoding="utf-8") == (SAMPLES / "pump_wear.json").read_text(encoding="utf-8")

    # the next start finds the orphaned recovery file and restores the edit
    dialogs.recovery_answers.append("recover")
    assert window.offer_recovery()
    offered = dialogs.recovery_offers[-1]
    assert len(offered) == 1 and "pump.json" in offered[0] and "Pump wear with repair" in offered[0]
    doc = window.document
    assert doc.chain.transition("new", "worn").p == "1/45"
    assert doc.path == pump.resolve()
    assert doc.is_dirty  # recovered work is unsaved until the user saves it
    assert not autosaved.exists()
    # undo goes back to the file as it is on disk
    window.actions_by_name["undo"].trigger()
    assert doc.chain.transition("new", "worn").p == "1/60"
    assert not doc.is_dirty


def _orphan(tmp_path, name="Lost work"):
    """A recovery file as a crashed session leaves it (no live lock)."""
    folder = recovery_dir()
    folder.mkdir(parents=True, exist_ok=True)
    from core.io import chain_to_dict
    from core.model import Chain, State, Transition

    chain = Chain(states=(State("a", x=0.0, y=0.0),), transitions=(Transition("a", "a", "1"),), name=name)
    f = folder / "session-999999-deadbeef00.json"
    f.write_text(json.dumps({"format": "longrun-recovery", "version": 1, "saved_at": "2026-01-02T03:04:05",
                             "original": None, "pid": 999999, "chain": chain_to_dict(chain)}), encoding="utf-8")
    return f


def test_decide_later_keeps_and_discard_removes(window, dialogs, tmp_path):
    f = _orphan(tmp_path)
    dialogs.recovery_answers.append("later")
    assert not window.offer_recovery()
    assert f.exists()
    assert "“Lost work” (never saved)" in dialogs.recovery_offers[-1][0]
    dialogs.recovery_answers.append("discard")
    assert not window.offer_recovery()
    assert not f.exists()
    assert find_orphans() == []


def test_recover_never_saved_work(window, dialogs, tmp_path):
    _orphan(tmp_path)
    dialogs.recovery_answers.append("recover")
    assert window.offer_recovery()
    assert window.document.path is None and window.document.chain.name == "Lost work"
    assert window.document.is_dirty


def test_a_running_session_is_not_an_orphan(window, dialogs, pump, qtbot):
    window.open_path(pump, ask=False)
    saver = window.autosaver
    with qtbot.waitSignal(saver.saved, timeout=5000):
        window.document.set_transition("new", "worn", "0.02")
        saver.save_now()
    assert saver.file.exists()
    assert find_orphans() == []  # its lock is alive


def test_autosave_after_a_burst_and_cleanup_on_save_and_close(window, dialogs, pump, qtbot, isolated):
    window.open_path(pump, ask=False)
    doc = window.document
    saver = Autosaver(doc, interval_s=30, settle_ms=50, folder=isolated / "data" / "other")
    try:
        with qtbot.waitSignal(saver.saved, timeout=5000):
            for k in range(5):
                doc.set_transition("new", "worn", f"0.0{k + 1}")
        body = json.loads(saver.file.read_text(encoding="utf-8"))
        assert body["chain"]["transitions"][0]["p"] == "0.05"
        assert body["original"] == str(pump.resolve())
        window.file_save()
        assert not saver.file.exists()  # saved: no recovery copy
        doc.set_transition("new", "worn", "0.06")
        saver.save_now()
        assert saver.file.exists()
        window.actions_by_name["undo"].trigger()  # back to the saved state
        assert not saver.file.exists()
        doc.set_transition("new", "worn", "0.07")
        saver._tick()  # the 30 s timer's tick saves pending work
        assert saver.file.exists()
    finally:
        saver.close()
    assert not saver.file.exists()
    assert not saver.file.with_suffix(".lock").exists()
