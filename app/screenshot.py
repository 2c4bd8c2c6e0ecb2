"""``longrun gui --screenshot OUT.png``: lay out the window, wait for the analysis, save a picture.

Works with ``QT_QPA_PLATFORM=offscreen`` (no display).  On a real display
(xcb) the picture is taken from the screen, so it shows what a user sees.
"""
from __future__ import annotations

from pathlib import Path

from core.errors import LongrunError, OptionError

__all__ = ["take_screenshot", "wait_for_analysis", "grab_window"]


def wait_for_analysis(window, timeout_ms: int = 30000) -> bool:
    """Run the event loop until the window's analysis is idle (True) or the timeout."""
    from PySide6.QtCore import QEventLoop, QTimer

    service = window.analysis
    if service.is_idle:
        return True
    loop = QEventLoop()
    service.finished.connect(loop.quit)
    timer = QTimer()
    timer.setSingleShot(True)
    timer.timeout.connect(loop.quit)
    timer.start(timeout_ms)
    service.flush()
    while not service.is_idle and timer.isActive():
        loop.exec()
    timer.stop()
    service.finished.disconnect(loop.quit)
    return service.is_idle


def _settle(ms: int = 60) -> None:
    from PySide6.QtCore import QEventLoop, QTimer
    from PySide6.QtWidgets import QApplication

    loop = QEventLoop()
    QTimer.singleShot(ms, loop.quit)
    loop.exec()
    QApplication.processEvents()


def _uniform(image) -> bool:
    if image.isNull():
        return True
    w, h = image.width(), image.height()
    first = image.pixel(0, 0)
    step_x, step_y = max(1, w // 40), max(1, h // 40)
    return all(image.pixel(x, y) == first for x in range(0, w, step_x) for y in range(0, h, step_y))


def grab_window(window):
    """The window's picture: from the screen on a real display, else rendered."""
    from PySide6.QtGui import QGuiApplication

    if QGuiApplication.platformName() not in ("offscreen", "minimal"):
        screen = window.screen() or QGuiApplication.primaryScreen()
        if screen is not None:
            pix = screen.grabWindow(window.winId())
            if not pix.isNull() and not _uniform(pix.toImage()):
                return pix
    return window.grab()


def _wait_until(pred, timeout_ms: int) -> bool:
    import time

    end = time.monotonic() + timeout_ms / 1000
    while not pred():
        if time.monotonic() > end:
            return False
        _settle(30)
    return True


def _show_panel(win, panel: str | None, run_plan: bool) -> None:
    """Bring ``panel`` to the front, and run the plan in the simulation panel to its end."""
    if panel:
        dock = win.docks.get(panel)
        if dock is None:
            raise OptionError(f"--panel {panel!r}: no such panel (choose from {', '.join(win.docks)})")
        dock.show()
        dock.raise_()
    if run_plan:
        sim = win.panels.get("simulation")
        if sim is None:
            raise OptionError("--run-plan: the simulation panel is not available")
        if not panel:
            win.docks["simulation"].raise_()
        _wait_until(lambda: not any(getattr(p, "busy", False) for p in win.panels.values()), 30000)
        if not sim.run():
            raise LongrunError(f"--run-plan: the plan could not run: {sim.status.text()}")
        if not _wait_until(lambda: sim.state not in ("running", "paused"), 120000):
            sim.reset()
            raise LongrunError("--run-plan: the run did not finish within 2 minutes; no screenshot was taken")
        if sim.state != "finished":
            raise LongrunError(f"--run-plan: the run stopped: {sim.status.text()}")
    _wait_until(lambda: not any(getattr(p, "busy", False) for p in win.panels.values()), 30000)


def take_screenshot(file: str, out: str, *, size: tuple[int, int] = (1400, 900), panel: str | None = None,
                    run_plan: bool = False) -> int:
    """Open ``file`` in a fresh window of ``size``, save its picture to ``out``; exit status.

    ``panel`` brings that dock to the front; ``run_plan`` runs the plan in the
    simulation panel to its end first.
    """
    from PySide6.QtWidgets import QApplication

    from .settings import Settings
    from .window import MainWindow

    out_path = Path(out)
    if out_path.suffix.lower() not in (".png", ".jpg", ".jpeg", ".bmp"):
        raise OptionError(f"--screenshot {out!r}: the file name must end in .png, .jpg or .bmp")
    if not out_path.parent.exists():
        raise OptionError(f"--screenshot {out!r}: the folder {out_path.parent} does not exist")
    win = MainWindow(Settings(), autosave=False, restore_layout=False)
    try:
        errors: list[str] = []
        from . import dialogs

        original = dialogs.show_problems

        def record(_parent, _title, summary, problems):
            errors.append(summary + ("\n  - " + "\n  - ".join(problems) if problems else ""))

        dialogs.show_problems = record
        try:
            ok = win.open_path(file, ask=False)
        finally:
            dialogs.show_problems = original
        if not ok:
            raise LongrunError(errors[0] if errors else f"{file}: could not be opened")
        win.resize(*size)
        win.show()
        QApplication.processEvents()
        win.resize(*size)  # again: before the docks were laid out, the minimum could be taller
        QApplication.processEvents()
        if not wait_for_analysis(win):
            raise LongrunError("the analysis did not finish within 30 s; no screenshot was taken")
        win.canvas.fit_to_view()
        _settle()
        _show_panel(win, panel, run_plan)
        win.canvas.fit_to_view()
        _settle()
        pix = grab_window(win)
        if not pix.save(str(out_path)):
            raise LongrunError(f"could not write the picture {out_path}")
        print(f"wrote {out_path} ({pix.width()}x{pix.height()})")
        return 0
    finally:
        win.shutdown()
        win.close()
        win.deleteLater()
        QApplication.processEvents()
