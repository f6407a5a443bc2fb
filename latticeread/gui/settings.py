"""Remembered program settings (QSettings): window layout, recent files, view options.

The analysis settings of one session (optics, images per shot...) live in the session file;
this module only keeps what belongs to the user's desktop between runs. Tests pass an INI
path so they never touch the user's real settings.
"""

from __future__ import annotations

import os
from pathlib import Path

from PySide6 import QtCore

__all__ = ["AppSettings", "MAX_RECENT"]

MAX_RECENT = 10
ORGANIZATION = "latticeread"
APPLICATION = "latticeread"


class AppSettings:
    """Thin typed wrapper around QSettings.

    Parameters
    ----------
    path : str or Path, optional
        INI file to use instead of the platform's default settings store (tests).
    """

    def __init__(self, path=None):
        if path is not None:
            self._q = QtCore.QSettings(str(path), QtCore.QSettings.IniFormat)
            self._data_dir = Path(path).resolve().parent
        else:
            self._q = QtCore.QSettings(QtCore.QSettings.IniFormat, QtCore.QSettings.UserScope,
                                       ORGANIZATION, APPLICATION)
            self._data_dir = Path(self._q.fileName()).resolve().parent / APPLICATION

    @property
    def file_name(self) -> str:
        return self._q.fileName()

    # --- plain values ------------------------------------------------------------------
    def value(self, key: str, default=None, type_=None):
        if type_ is bool:
            v = self._q.value(key, default)
            if isinstance(v, str):
                return v.lower() in ("true", "1", "yes")
            return bool(v) if v is not None else default
        if type_ is not None:
            v = self._q.value(key, default)
            try:
                return type_(v) if v is not None else default
            except (TypeError, ValueError):
                return default
        return self._q.value(key, default)

    def set_value(self, key: str, value) -> None:
        self._q.setValue(key, value)

    def sync(self) -> None:
        self._q.sync()

    # --- recent files ---------------------------------------------------------------------
    def recent_files(self) -> list[str]:
        v = self._q.value("recent_files", [])
        if isinstance(v, str):
            v = [v] if v else []
        return [str(p) for p in (v or [])]

    def add_recent(self, path) -> list[str]:
        path = os.fspath(Path(path).resolve())
        files = [p for p in self.recent_files() if p != path]
        files.insert(0, path)
        files = files[:MAX_RECENT]
        self._q.setValue("recent_files", files)
        return files

    def clear_recent(self) -> None:
        self._q.setValue("recent_files", [])

    # --- window -----------------------------------------------------------------------------
    @staticmethod
    def screen_key(window) -> str:
        """``"WxH"`` of the screen area available to ``window`` (layouts are kept per screen size)."""
        screen = window.screen() if hasattr(window, "screen") else None
        if screen is None:
            return "unknown"
        size = screen.availableGeometry().size()
        return f"{size.width()}x{size.height()}"

    def save_window(self, window) -> None:
        """Remember the window's geometry and dock layout for the screen size it is on."""
        key = self.screen_key(window)
        self._q.setValue(f"window/{key}/geometry", window.saveGeometry())
        self._q.setValue(f"window/{key}/state", window.saveState())

    def restore_window(self, window) -> bool:
        """Restore the layout saved on a screen of the same size; False when there is none
        (a layout made on a large screen is not forced onto a laptop)."""
        key = self.screen_key(window)
        geometry = self._q.value(f"window/{key}/geometry")
        state = self._q.value(f"window/{key}/state")
        ok = False
        if geometry is not None:
            ok = bool(window.restoreGeometry(geometry))
        if state is not None:
            ok = bool(window.restoreState(state)) and ok
        return ok

    # --- autosave ---------------------------------------------------------------------------
    def autosave_path(self) -> Path:
        """Where the crash-recovery copy of the session is written (JSON; results next to it)."""
        return self._data_dir / "autosave" / "autosave-session.json"
