"""Autosave of unsaved work, and recovery after a crash.

While a document has unsaved changes, :class:`Autosaver` writes it to its own
recovery file in the user data folder (``platformdirs``; the environment
variable ``LONGRUN_DATA_DIR`` overrides it): when a burst of edits settles and
at least every 30 s.  Each running window holds a ``QLockFile`` beside its
recovery file.  After a crash the lock is stale (its process is gone), so the
next start finds the file with :func:`find_orphans` and offers it back.
A clean close, a save, or undoing back to the saved state removes the file.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import uuid
from dataclasses import dataclass, field
from pathlib import Path

from PySide6.QtCore import QLockFile, QObject, QTimer, Signal

from core.errors import LongrunError
from core.io import atomic_write_text, chain_from_dict, chain_to_dict
from core.model import Chain

__all__ = ["DATA_ENV", "data_dir", "recovery_dir", "Autosaver", "RecoveryEntry", "find_orphans"]

DATA_ENV = "LONGRUN_DATA_DIR"
FORMAT = "longrun-recovery"


def data_dir() -> Path:
    """Longrun's folder for user data (``$LONGRUN_DATA_DIR`` when set)."""
    env = os.environ.get(DATA_ENV)
    if env:
        return Path(env)
    import platformdirs

    return Path(platformdirs.user_data_dir("longrun", appauthor=False))


def recovery_dir() -> Path:
    return data_dir() / "recovery"


@dataclass
class RecoveryEntry:
    """Unsaved work left behind by a window that did not close normally."""

    file: Path
    chain: Chain
    original: str | None
    saved_at: str
    lock: QLockFile | None = field(default=None, repr=False)

    def describe(self) -> str:
        name = self.chain.name or "Untitled"
        where = f" (from {Path(self.original).name})" if self.original else " (never saved)"
        when = self.saved_at.replace("T", " ")[:16]
        n = self.chain.n
        return f"“{name}”{where}: {n} state{'s' if n != 1 else ''}, autosaved {when}"

    def discard(self) -> None:
        for p in (self.file,):
            try:
                p.unlink()
            except OSError:
                pass
        self.release()

    def release(self) -> None:
        if self.lock is not None:
            self.lock.unlock()
            try:
                os.unlink(str(self.file.with_suffix(".lock")))
            except OSError:
                pass
            self.lock = None


def find_orphans(folder: Path | None = None) -> list[RecoveryEntry]:
    """Recovery files whose window is gone, newest first (their locks are taken)."""
    folder = folder or recovery_dir()
    if not folder.is_dir():
        return []
    out = []
    for f in folder.glob("session-*.json"):
        lock = QLockFile(str(f.with_suffix(".lock")))
        lock.setStaleLockTime(0)
        if not lock.tryLock(0):
            continue  # a running window owns it
        try:
            doc = json.loads(f.read_text(encoding="utf-8"))
            if doc.get("format") != FORMAT:
                raise ValueError("not a recovery file")
            chain = chain_from_dict(doc["chain"], source=str(f))
        except (OSError, ValueError, KeyError, TypeError, LongrunError):
            lock.unlock()
            continue  # unreadable: left alone, never deleted
        out.append(RecoveryEntry(f, chain, doc.get("original"), str(doc.get("saved_at", "")), lock))
    out.sort(key=lambda e: e.saved_at, reverse=True)
    return out


class Autosaver(QObject):
    """Keeps a recovery copy of a document's unsaved work.

    Parameters
    ----------
    document : Document
    interval_s : int
        Longest time between two autosaves while there are unsaved changes.
    settle_ms : int
        Autosave this long after the last edit of a burst.

    Signals
    -------
    saved(str)
        The recovery file was written (its path).
    failed(str)
        It could not be written (the message); editing goes on.
    """

    saved = Signal(str)
    failed = Signal(str)

    def __init__(self, document, *, interval_s: int = 30, settle_ms: int = 2000,
                 folder: Path | None = None, parent: QObject | None = None):
        super().__init__(parent)
        self.document = document
        self.folder = folder or recovery_dir()
        stem = f"session-{os.getpid()}-{uuid.uuid4().hex[:10]}"
        self.file = self.folder / f"{stem}.json"
        self._lock: QLockFile | None = None
        self._pending = False
        self._interval = QTimer(self)
        self._interval.setInterval(max(1, int(interval_s)) * 1000)
        self._interval.timeout.connect(self._tick)
        self._settle = QTimer(self)
        self._settle.setSingleShot(True)
        self._settle.setInterval(max(0, int(settle_ms)))
        self._settle.timeout.connect(self.save_now)
        document.changed.connect(self._on_changed)
        document.fileChanged.connect(self._on_file_changed)
        self._interval.start()

    def _ensure_lock(self) -> bool:
        if self._lock is not None:
            return True
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            self.failed.emit(f"cannot create the recovery folder {self.folder}: {exc.strerror}")
            return False
        lock = QLockFile(str(self.file.with_suffix(".lock")))
        lock.setStaleLockTime(0)
        if not lock.tryLock(0):
            self.failed.emit(f"cannot lock the recovery file in {self.folder}")
            return False
        self._lock = lock
        return True

    def _on_changed(self) -> None:
        self._pending = True
        self._settle.start()

    def _on_file_changed(self) -> None:
        if not self.document.is_dirty:
            self._pending = False
            self._settle.stop()
            self.discard()

    def _tick(self) -> None:
        if self._pending:
            self.save_now()

    def save_now(self) -> bool:
        """Write the recovery file now if there are unsaved changes."""
        doc = self.document
        if not doc.is_dirty:
            self._pending = False
            self.discard()
            return False
        if not self._ensure_lock():
            return False
        body = {
            "format": FORMAT,
            "version": 1,
            "saved_at": _dt.datetime.now().isoformat(timespec="seconds"),
            "original": str(doc.path) if doc.path else None,
            "pid": os.getpid(),
            "chain": chain_to_dict(doc.chain),
        }
        try:
            atomic_write_text(self.file, json.dumps(body, ensure_ascii=False, allow_nan=False))
        except LongrunError as exc:
            self.failed.emit(str(exc))
            return False
        self._pending = False
        self.saved.emit(str(self.file))
        return True

    def discard(self) -> None:
        """Remove the recovery file (the work is saved, or was thrown away)."""
        try:
            self.file.unlink()
        except OSError:
            pass

    def close(self) -> None:
        """Stop, remove the recovery file and release the lock (a clean exit)."""
        self._interval.stop()
        self._settle.stop()
        try:
            self.document.changed.disconnect(self._on_changed)
            self.document.fileChanged.disconnect(self._on_file_changed)
        except (RuntimeError, TypeError):
            pass
        self.discard()
        if self._lock is not None:
            self._lock.unlock()
            self._lock = None
