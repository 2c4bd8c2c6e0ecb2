"""Application start-up: the QApplication, its look, and the first window."""
from __future__ import annotations

import os
import sys
from pathlib import Path

__all__ = ["main", "run_gui", "create_application", "sample_model_path"]


def sample_model_path() -> Path | None:
    """The sample model shown at first start: the repository's, else the copy shipped in app/."""
    here = Path(__file__).resolve().parent
    for candidate in (here.parent / "sample_models" / "pump_wear.json", here / "resources" / "pump_wear.json"):
        if candidate.is_file():
            return candidate
    return None


def create_application(argv: list[str] | None = None):
    """The QApplication (created once), with Longrun's names, palette and style."""
    from PySide6.QtWidgets import QApplication

    app = QApplication.instance()
    if app is None:
        app = QApplication(list(argv) if argv is not None else [sys.argv[0]])
    app.setApplicationName("Longrun")
    app.setOrganizationName("Longrun")
    app.setApplicationDisplayName("Longrun")
    from . import palette as pal

    app.setStyle("Fusion")
    app.setPalette(pal.app_palette())
    app.setStyleSheet(
        "QToolBar { border: none; spacing: 4px; padding: 3px; }"
        "QDockWidget::title { padding: 5px 8px; background: #E3E7EB; font-weight: 600; }"
        "QStatusBar { border-top: 1px solid #D5DADF; }"
        "QHeaderView::section { background: #F1F3F5; border: none; border-right: 1px solid #E1E4E8;"
        " border-bottom: 1px solid #E1E4E8; padding: 2px 6px; }"
    )
    return app


def run_gui(file: str | None = None, *, screenshot: str | None = None,
            size: tuple[int, int] | None = None, panel: str | None = None, run_plan: bool = False) -> int:
    """Open the app (optionally on ``file``); with ``screenshot`` save a picture and exit.

    Returns the process exit status.
    """
    app = create_application()
    from .settings import Settings
    from .window import MainWindow

    settings = Settings()
    if screenshot:
        from .screenshot import take_screenshot

        return take_screenshot(file or str(sample_model_path()), screenshot, size=size or (1400, 900),
                               panel=panel, run_plan=run_plan)
    win = MainWindow(settings)
    opened = False
    if file:
        opened = win.open_path(file, ask=False)
    elif not settings.get("session/first_run_done"):
        sample = sample_model_path()
        if sample is not None:
            opened = win.open_path(sample, ask=False, as_copy=True)
            if opened:
                win.show_message("Welcome! This is a sample model; File ▸ New starts an empty chain.", 15000)
    settings.set("session/first_run_done", True)
    if size:
        win.resize(*size)
    win.show()
    from PySide6.QtCore import QTimer

    if opened:
        QTimer.singleShot(0, win.canvas, win.canvas.fit_to_view)
    QTimer.singleShot(0, win, win.offer_recovery)
    app.aboutToQuit.connect(win.shutdown)
    return int(app.exec())


def main(argv: list[str] | None = None) -> int:
    """``python -m app.main [FILE]``; the usual entry point is ``longrun gui``."""
    args = sys.argv[1:] if argv is None else argv
    return run_gui(args[0] if args else None)


if __name__ == "__main__":  # pragma: no cover
    os.environ.setdefault("QT_AUTO_SCREEN_SCALE_FACTOR", "1")
    sys.exit(main())
