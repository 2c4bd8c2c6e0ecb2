"""The app's modal questions and messages, in one module.

The window calls these through the module (``dialogs.show_problems(...)``), so
tests replace them with recorders instead of blocking on a modal dialog.
"""
from __future__ import annotations

from pathlib import Path

from typing import Sequence

from PySide6.QtWidgets import QFileDialog, QMessageBox, QWidget

CHAIN_FILTER = "Longrun chain (*.json);;All files (*)"
CSV_FILTER = "Matrix CSV (*.csv *.tsv *.txt);;All files (*)"
JSON_FILTER = "Validated matrix JSON (*.json);;All files (*)"


def show_problems(parent: QWidget | None, title: str, summary: str, problems: Sequence[str]) -> None:
    """Tell the user something could not be done, listing every problem."""
    box = QMessageBox(parent)
    box.setIcon(QMessageBox.Icon.Warning)
    box.setWindowTitle(title)
    box.setText(summary)
    if problems:
        shown = list(problems[:12])
        more = len(problems) - len(shown)
        text = "\n".join(f"• {p}" for p in shown)
        if more > 0:
            text += f"\n… and {more} more (see Details)"
        box.setInformativeText(text)
        if more > 0:
            box.setDetailedText("\n".join(problems))
    box.exec()


def ask_save_changes(parent: QWidget | None, name: str) -> str:
    """Ask what to do with unsaved changes: ``"save"``, ``"discard"`` or ``"cancel"``."""
    box = QMessageBox(parent)
    box.setIcon(QMessageBox.Icon.Question)
    box.setWindowTitle("Unsaved changes")
    box.setText(f"“{name}” has changes that are not saved.")
    box.setInformativeText("Save them before going on?")
    save = box.addButton("Save", QMessageBox.ButtonRole.AcceptRole)
    discard = box.addButton("Don't save", QMessageBox.ButtonRole.DestructiveRole)
    box.addButton(QMessageBox.StandardButton.Cancel)
    box.setDefaultButton(save)
    box.exec()
    clicked = box.clickedButton()
    if clicked is save:
        return "save"
    if clicked is discard:
        return "discard"
    return "cancel"


def ask_recovery(parent: QWidget | None, entries: Sequence[str]) -> str:
    """Offer unsaved work left by a crash: ``"recover"``, ``"discard"`` or ``"later"``."""
    box = QMessageBox(parent)
    box.setIcon(QMessageBox.Icon.Question)
    box.setWindowTitle("Recover unsaved work")
    box.setText("Longrun did not close normally last time. Unsaved work was kept:")
    box.setInformativeText("\n".join(f"• {e}" for e in entries))
    rec = box.addButton("Recover", QMessageBox.ButtonRole.AcceptRole)
    dis = box.addButton("Discard it", QMessageBox.ButtonRole.DestructiveRole)
    box.addButton("Decide later", QMessageBox.ButtonRole.RejectRole)
    box.setDefaultButton(rec)
    box.exec()
    clicked = box.clickedButton()
    if clicked is rec:
        return "recover"
    if clicked is dis:
        return "discard"
    return "later"


def confirm(parent: QWidget | None, title: str, text: str) -> bool:
    answer = QMessageBox.question(parent, title, text)
    return answer == QMessageBox.StandardButton.Yes


def open_path(parent: QWidget | None, title: str, folder: str, filter: str = CHAIN_FILTER) -> str:
    path, _ = QFileDialog.getOpenFileName(parent, title, folder, filter)
    return path


def save_path(parent: QWidget | None, title: str, suggested: str, filter: str = CHAIN_FILTER) -> str:
    path, _ = QFileDialog.getSaveFileName(parent, title, suggested, filter)
    return path


def save_file(parent: QWidget | None, title: str, suggested: str, filter: str,
              suffixes: tuple[str, ...]) -> Path | None:
    """Ask where to save (:func:`save_path`); None when cancelled.

    A name without one of ``suffixes`` (lower-case, with the dot) gets the first one appended.
    """
    path = save_path(parent, title, suggested, filter)
    if not path:
        return None
    p = Path(path)
    return p if p.suffix.lower() in suffixes else p.with_name(p.name + suffixes[0])


def inform(parent: QWidget | None, title: str, text: str) -> None:
    QMessageBox.information(parent, title, text)
