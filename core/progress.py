"""Progress reporting and cancellation for long work.

Long work (cube reduction, Monte Carlo) takes ``progress`` and ``cancel``
arguments. ``progress(done, total, stage)`` is called from the worker; the
command line draws a bar, the app forwards it through a Qt signal.
``cancel`` is anything with an ``is_set()`` method (``threading.Event``
works); when set, the work raises :class:`~gyrometer.core.errors.Cancelled`
before writing anything.
"""

from __future__ import annotations

from typing import Callable, Protocol

from .errors import Cancelled

__all__ = ["ProgressCallback", "CancelFlag", "report", "check_cancel"]

ProgressCallback = Callable[[int, int, str], None]


class CancelFlag(Protocol):
    def is_set(self) -> bool: ...


def report(progress: ProgressCallback | None, done: int, total: int,
           stage: str) -> None:
    """Call ``progress`` if one was given."""
    if progress is not None:
        progress(int(done), int(total), stage)


def check_cancel(cancel: CancelFlag | None, stage: str = "") -> None:
    """Raise :class:`Cancelled` if ``cancel`` is set."""
    if cancel is not None and cancel.is_set():
        raise Cancelled(f"cancelled by the user{': ' + stage if stage else ''}")
