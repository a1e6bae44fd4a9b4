"""A frame that greys out results made for an older geometry or slit set."""

from __future__ import annotations

from PySide6.QtWidgets import (QGraphicsOpacityEffect, QLabel, QVBoxLayout,
                               QWidget)

__all__ = ["StaleFrame", "STALE_OPACITY"]

#: Opacity of a result that no longer matches the geometry and slits.
STALE_OPACITY = 0.45


class StaleFrame(QWidget):
    """Hold ``content``; grey it and show a note while its results are stale.

    Parameters
    ----------
    content : QWidget
        The view of a result.
    controller : Controller
        Its ``stale_changed(frozenset)`` signal names the stale results.
    keys : tuple of str
        Which of them this view shows (``"full"``, ``"radial"``,
        ``"absorption"``).
    note : str
        What the user should do.
    """

    def __init__(self, content: QWidget, controller, keys: tuple[str, ...],
                 note: str, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.content = content
        self.keys = tuple(keys)
        self.note = QLabel(f"\u26a0 {note}")
        self.note.setWordWrap(True)
        self.note.setStyleSheet("background: #fff4d6; color: #6b4a00; "
                                "border: 1px solid #e0c070; padding: 4px;")
        self.note.setVisible(False)
        self._effect = QGraphicsOpacityEffect(self.content)
        self._effect.setOpacity(1.0)
        self._effect.setEnabled(False)
        self.content.setGraphicsEffect(self._effect)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.setSpacing(2)
        layout.addWidget(self.note)
        layout.addWidget(self.content, 1)
        self.stale = False
        controller.stale_changed.connect(self._stale_changed)

    def _stale_changed(self, names) -> None:
        self.set_stale(bool(set(names) & set(self.keys)))

    def set_stale(self, stale: bool) -> None:
        self.stale = bool(stale)
        self.note.setVisible(self.stale)
        self._effect.setOpacity(STALE_OPACITY if self.stale else 1.0)
        self._effect.setEnabled(self.stale)
