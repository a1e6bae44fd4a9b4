"""The app's own icons, drawn as SVG files shipped next to this module."""

from __future__ import annotations

from importlib import resources

from PySide6.QtGui import QIcon

__all__ = ["icon", "icon_path", "ICON_NAMES"]

#: Names of the icons (file ``icon-<name>.svg`` in this package).
ICON_NAMES = ("gyrometer", "open", "save", "export", "undo", "redo",
              "slit-add", "slit-duplicate", "slit-remove", "budget", "run",
              "help", "fit", "resonance")


def icon_path(name: str) -> str:
    """File path of the icon ``name``."""
    return str(resources.files("gyrometer.app").joinpath(f"icon-{name}.svg"))


def icon(name: str) -> QIcon:
    """The icon ``name`` as a :class:`QIcon` (Qt renders the SVG)."""
    return QIcon(icon_path(name))
