"""App tests: offscreen Qt, temporary settings and data folders, no modal dialogs.

``QT_QPA_PLATFORM`` is set before anything imports Qt, so the tests need no
display.  Every test gets its own settings file and recovery folder (never the
developer's), and the modal dialogs of :mod:`app.dialogs` are replaced by
recorders; a test states the answers it wants.  After each test no analysis
thread may still be running.
"""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from dataclasses import dataclass, field  # noqa: E402
from pathlib import Path  # noqa: E402

import pytest  # noqa: E402

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_models"


@dataclass
class DialogLog:
    """What the app asked or told the user, and the answers it gets."""

    problems: list = field(default_factory=list)      # (title, summary, [problems])
    save_answers: list = field(default_factory=list)  # answers to "save changes?" (default discard)
    save_questions: list = field(default_factory=list)
    recovery_answers: list = field(default_factory=list)
    recovery_offers: list = field(default_factory=list)
    open_paths: list = field(default_factory=list)
    save_paths: list = field(default_factory=list)
    infos: list = field(default_factory=list)


def _no_modal(name):
    def refuse(*args, **kwargs):
        raise AssertionError(f"a modal dialog ({name}) was opened in a test without the dialogs fixture")
    return refuse


@pytest.fixture(autouse=True)
def isolated(tmp_path, monkeypatch):
    monkeypatch.setenv("LONGRUN_SETTINGS_FILE", str(tmp_path / "settings" / "longrun.ini"))
    monkeypatch.setenv("LONGRUN_DATA_DIR", str(tmp_path / "data"))
    from app import dialogs as d

    with pytest.MonkeyPatch.context() as strict:  # its own patcher: a test's undo() cannot lift it
        for name in ("show_problems", "ask_save_changes", "ask_recovery", "confirm", "open_path",
                     "save_path", "inform"):
            strict.setattr(d, name, _no_modal(name))
        yield tmp_path
    from app.analysis_service import live_threads

    assert live_threads() == [], "an analysis thread was left running"


@pytest.fixture
def make_panels(qtbot):
    """``make(chain, "simulation", "plan", ...)`` builds panels over one document and analysis service.

    Kinds: ``"simulation"`` (the default), ``"plan"``, ``"findings"``, ``"longrun"``; they are laid
    out in one host (``horizontal``, ``size``) and returned as ``(workspace, {kind: panel})``, after
    the first structure report when ``ready`` (a chain with problems never has one).  At the end
    every panel and the service are shut down, and no background thread may be left.
    """
    from PySide6.QtWidgets import QHBoxLayout, QVBoxLayout, QWidget

    from app.main import create_application

    create_application()
    made = []

    def make(chain, *kinds, horizontal=False, size=(700, 900), ready=True):
        from app.analysis_service import AnalysisService
        from app.document import Document
        from app.findings_pane import FindingsPane
        from app.longrun_panel import LongRunPanel
        from app.panels import Workspace
        from app.plan_form import PlanForm
        from app.settings import Settings
        from app.simulation_panel import SimulationPanel

        classes = {"simulation": SimulationPanel, "plan": PlanForm, "findings": FindingsPane, "longrun": LongRunPanel}
        doc = Document()
        doc.reset(chain)
        an = AnalysisService(doc, delay_ms=0)
        ws = Workspace(doc, an, Settings())
        host = QWidget()
        lay = (QHBoxLayout if horizontal else QVBoxLayout)(host)
        panels = {}
        for kind in kinds or ("simulation",):
            panels[kind] = classes[kind](ws)
            lay.addWidget(panels[kind])
        qtbot.addWidget(host)
        host.resize(*size)
        host.show()
        made.append((ws, panels, host))  # the host owns the panels: keep it alive
        if ready:
            qtbot.waitUntil(lambda: an.is_idle and an.structure_report is not None, timeout=10000)
        return ws, panels

    yield make
    from app.plan_form import live_job_threads
    from app.simulation_panel import live_simulation_threads

    for ws, panels, _host in made:
        for p in panels.values():
            p.shutdown()
        ws.analysis.shutdown()
    assert live_simulation_threads() == [], "a simulation thread was left running"
    assert live_job_threads() == [], "a background job thread was left running"


@pytest.fixture
def full_window(qtbot, dialogs):
    """The main window with every panel (the shared ``window`` fixture has the editor's panels only)."""
    from app.main import create_application
    from app.panels import PANEL_MODULES
    from app.settings import Settings
    from app.window import MainWindow

    create_application()
    w = MainWindow(Settings(), restore_layout=False, panels=PANEL_MODULES)
    qtbot.addWidget(w)
    w.resize(1400, 900)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.shutdown()
    from app.plan_form import live_job_threads
    from app.simulation_panel import live_simulation_threads

    assert live_job_threads() == [] and live_simulation_threads() == []


@pytest.fixture
def dialogs():
    with pytest.MonkeyPatch.context() as monkeypatch:
        yield _recording_dialogs(monkeypatch)


def _recording_dialogs(monkeypatch):
    from app import dialogs as d

    log = DialogLog()
    monkeypatch.setattr(d, "show_problems", lambda parent, title, summary, problems:
                        log.problems.append((title, summary, list(problems))))

    def ask_save(parent, name):
        log.save_questions.append(name)
        return log.save_answers.pop(0) if log.save_answers else "discard"

    def ask_recovery(parent, entries):
        log.recovery_offers.append(list(entries))
        return log.recovery_answers.pop(0) if log.recovery_answers else "later"

    monkeypatch.setattr(d, "ask_save_changes", ask_save)
    monkeypatch.setattr(d, "ask_recovery", ask_recovery)
    monkeypatch.setattr(d, "open_path", lambda *a, **k: log.open_paths.pop(0) if log.open_paths else "")
    monkeypatch.setattr(d, "save_path", lambda *a, **k: log.save_paths.pop(0) if log.save_paths else "")
    monkeypatch.setattr(d, "inform", lambda parent, title, text: log.infos.append((title, text)))
    monkeypatch.setattr(d, "confirm", lambda *a, **k: True)
    return log


def _settle(window, qtbot, timeout=10000):
    """Wait until the window's analysis has caught up with its document."""
    svc = window.analysis

    def done():
        r = svc.report
        s = svc.structure_report
        return (svc.is_idle and r is not None and r.chain is window.document.chain
                and s is not None and s.chain is window.document.chain)

    qtbot.waitUntil(done, timeout=timeout)


@pytest.fixture
def settle(qtbot):
    """``settle(window)`` waits until the analysis has caught up with the document."""
    return lambda window, _qtbot=None, timeout=10000: _settle(window, qtbot, timeout)


@pytest.fixture
def window(qtbot, dialogs):
    from app.main import create_application
    from app.settings import Settings
    from app.window import MainWindow

    create_application()
    # the editor's own panels only: the analysis panels are tested in their own files, and the
    # screenshot tests run the whole window in a subprocess
    w = MainWindow(Settings(), restore_layout=False, panels=("app.grid", "app.checks"))
    qtbot.addWidget(w)
    w.resize(1100, 760)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.shutdown()
