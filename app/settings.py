"""One wrapper over ``QSettings``; every key is declared once with its default.

The settings file is the platform's usual place, unless the environment
variable ``LONGRUN_SETTINGS_FILE`` names an INI file (the tests point it at a
temporary folder, so they never touch the developer's own settings).
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

from PySide6.QtCore import QByteArray, QSettings

__all__ = ["Key", "KEYS", "Settings", "SETTINGS_ENV"]

SETTINGS_ENV = "LONGRUN_SETTINGS_FILE"


@dataclass(frozen=True)
class Key:
    """A settings key: its name, default value and type."""

    name: str
    default: Any
    type: type
    doc: str = ""


KEYS: dict[str, Key] = {
    k.name: k
    for k in (
        Key("session/first_run_done", False, bool, "a sample model was shown once at first start"),
        Key("files/recent", [], list, "recently opened chain files, newest first"),
        Key("files/recent_max", 10, int, "how many recent files are remembered"),
        Key("files/last_folder", "", str, "folder of the last open or save dialog"),
        Key("window/geometry", QByteArray(), QByteArray, "main window geometry"),
        Key("window/state", QByteArray(), QByteArray, "dock and toolbar layout"),
        Key("recovery/interval_s", 30, int, "autosave of unsaved work at most this many seconds apart"),
        Key("recovery/settle_ms", 2000, int, "autosave this long after a burst of edits ends"),
        Key("analysis/delay_ms", 150, int, "debounce before re-analysing after an edit"),
        Key("canvas/rare_below", 1e-3, float, "transitions below this probability are drawn as rare"),
        Key("simulation/on_edit", "stop", str, "a running simulation stops ('stop') or restarts ('restart') "
            "when the chain is edited"),
    )
}


class Settings:
    """Typed access to Longrun's settings.

    Parameters
    ----------
    path : str, optional
        An INI file to use instead of the platform's default location
        (default: ``$LONGRUN_SETTINGS_FILE`` when set).
    """

    def __init__(self, path: str | os.PathLike | None = None):
        path = path if path is not None else os.environ.get(SETTINGS_ENV) or None
        if path:
            self._qs = QSettings(str(path), QSettings.Format.IniFormat)
        else:
            self._qs = QSettings(QSettings.Format.IniFormat, QSettings.Scope.UserScope, "Longrun", "longrun")

    @property
    def path(self) -> str:
        return self._qs.fileName()

    def get(self, name: str) -> Any:
        key = KEYS[name]
        if not self._qs.contains(name):
            return _copy(key.default)
        raw = self._qs.value(name)
        return _coerce(raw, key)

    def set(self, name: str, value: Any) -> None:
        key = KEYS[name]
        self._qs.setValue(name, _coerce(value, key))

    def reset(self, name: str) -> None:
        KEYS[name]  # unknown keys raise KeyError
        self._qs.remove(name)

    def sync(self) -> None:
        self._qs.sync()

    # -- recent files -------------------------------------------------------
    def recent_files(self) -> list[str]:
        return [str(p) for p in self.get("files/recent") if p]

    def add_recent(self, path: str | os.PathLike) -> None:
        p = os.path.abspath(str(path))
        items = [x for x in self.recent_files() if x != p]
        self.set("files/recent", [p, *items][: max(1, self.get("files/recent_max"))])

    def remove_recent(self, path: str | os.PathLike) -> None:
        p = os.path.abspath(str(path))
        self.set("files/recent", [x for x in self.recent_files() if x != p])


def _copy(v: Any) -> Any:
    if isinstance(v, list):
        return list(v)
    if isinstance(v, QByteArray):
        return QByteArray(v)
    return v


def _coerce(raw: Any, key: Key) -> Any:
    """Read back INI values (strings) as the key's type; fall back to the default."""
    t = key.type
    try:
        if t is bool:
            if isinstance(raw, str):
                return raw.strip().lower() in ("1", "true", "yes", "on")
            return bool(raw)
        if t is int:
            return int(float(raw))
        if t is float:
            return float(raw)
        if t is str:
            return "" if raw is None else str(raw)
        if t is list:
            if raw is None or raw == "":
                return []
            if isinstance(raw, (list, tuple)):
                return [str(x) for x in raw]
            return [str(raw)]
        if t is QByteArray:
            return raw if isinstance(raw, QByteArray) else QByteArray(raw or b"")
    except (TypeError, ValueError):
        return _copy(key.default)
    return raw
