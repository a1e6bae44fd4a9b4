"""Per-user settings of the desktop app, kept in an INI file.

The file lives in the per-user configuration folder that
``QStandardPaths.AppConfigLocation`` names (``~/.config/gyrometer`` on
Linux); tests and portable installs pass another folder.
"""

from __future__ import annotations

import os
from pathlib import Path

from PySide6.QtCore import QSettings, QStandardPaths

__all__ = ["AppSettings", "default_config_dir"]

_MAX_RECENT = 10


def default_config_dir() -> Path:
    """The per-user configuration folder for Gyrometer."""
    base = QStandardPaths.writableLocation(
        QStandardPaths.StandardLocation.GenericConfigLocation)
    return Path(base or Path.home() / ".config") / "gyrometer"


class AppSettings:
    """Typed access to the settings the app keeps between runs.

    Parameters
    ----------
    folder : path-like, optional
        Folder of ``desk.ini``; defaults to :func:`default_config_dir`, or
        to ``$GYROMETER_CONFIG_DIR`` when that is set.
    """

    def __init__(self, folder: str | os.PathLike | None = None) -> None:
        if folder is None:
            folder = os.environ.get("GYROMETER_CONFIG_DIR") or default_config_dir()
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.path = self.folder / "desk.ini"
        self._q = QSettings(str(self.path), QSettings.Format.IniFormat)

    # -- recent files --------------------------------------------------
    def recent_files(self) -> list[str]:
        value = self._q.value("files/recent", [])
        if isinstance(value, str):
            value = [value] if value else []
        return [str(v) for v in (value or [])]

    def add_recent(self, path: str | os.PathLike) -> list[str]:
        path = str(Path(path).resolve())
        items = [p for p in self.recent_files() if p != path]
        items.insert(0, path)
        items = items[:_MAX_RECENT]
        self._q.setValue("files/recent", items)
        self._q.sync()
        return items

    def clear_recent(self) -> None:
        self._q.setValue("files/recent", [])
        self._q.sync()

    # -- simple values -------------------------------------------------
    def value(self, key: str, default=None, type_=None):
        if type_ is None:
            return self._q.value(key, default)
        return self._q.value(key, default, type=type_)

    def set_value(self, key: str, value) -> None:
        self._q.setValue(key, value)
        self._q.sync()

    def autosave_folder(self) -> Path:
        """Where crash-recovery autosaves live (``autosave/`` beside the
        settings file, so tests and portable installs redirect both)."""
        return self.folder / "autosave"

    def last_folder(self) -> str:
        return str(self._q.value("files/last_folder", str(Path.home())))

    def set_last_folder(self, folder: str | os.PathLike) -> None:
        self.set_value("files/last_folder", str(folder))
