"""Settings that persist between launches (QSettings): recent files, last folders,
window geometry, display choices.

Set ``BOSCAGE_SETTINGS`` to an ``.ini`` path to keep settings in that file
instead of the platform's usual store (tests do this).
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import os

from PySide6.QtCore import QSettings

from core import SOFTWARE_NAME

MAX_RECENT = 10


class Settings:
    """Thin typed wrapper over QSettings."""

    def __init__(self) -> None:
        path = os.environ.get("BOSCAGE_SETTINGS")
        if path:
            self._q = QSettings(path, QSettings.IniFormat)
        else:
            self._q = QSettings(SOFTWARE_NAME, SOFTWARE_NAME)

    # -- recent files -------------------------------------------------
    def recent_paths(self) -> list[str]:
        value = self._q.value("recent/paths", [])
        if isinstance(value, str):
            value = [value]
        return [str(p) for p in (value or []) if p]

    def add_recent(self, path: str) -> list[str]:
        path = os.path.abspath(path)
        paths = [p for p in self.recent_paths() if p != path]
        paths.insert(0, path)
        paths = paths[:MAX_RECENT]
        self._q.setValue("recent/paths", paths)
        self._q.sync()
        return paths

    def clear_recent(self) -> None:
        self._q.setValue("recent/paths", [])
        self._q.sync()

    # -- generic values -----------------------------------------------
    def value(self, key: str, default=None, kind=None):
        v = self._q.value(key, default)
        if kind is not None and v is not None:
            try:
                if kind is bool and isinstance(v, str):
                    return v.lower() in ("1", "true", "yes")
                return kind(v)
            except (TypeError, ValueError):
                return default
        return v

    def set_value(self, key: str, value) -> None:
        self._q.setValue(key, value)

    def sync(self) -> None:
        self._q.sync()
