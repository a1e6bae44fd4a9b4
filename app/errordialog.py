"""The one place where the app shows an error to the user."""

from __future__ import annotations

from PySide6.QtWidgets import QMessageBox, QWidget

__all__ = ["show_error"]


def show_error(parent: QWidget | None, title: str, message: str) -> None:
    """Show ``message`` in a modal error dialog titled ``title``.

    The controller turns every :class:`~gyrometer.core.errors.GyrometerError`
    into ``(title, message)``; the message already names the file and the
    fault and says what to do.
    """
    QMessageBox.critical(parent, f"Gyrometer \u2013 {title}", message)
