"""Long work off the GUI thread, with progress and cancellation.

A :class:`TaskRunner` runs one callable at a time in a ``QThread``. The
callable receives ``progress(done, total, stage)`` and a
:class:`threading.Event` as ``cancel``; both are handed unchanged to core
functions (see :mod:`gyrometer.core.progress`). Results and errors come back
to the GUI thread through queued signals, so slots never run in the worker.
"""

from __future__ import annotations

import threading
from typing import Any, Callable

from PySide6.QtCore import QObject, QThread, Signal, Slot

__all__ = ["TaskRunner"]

Work = Callable[[Callable[[int, int, str], None], threading.Event], Any]


class _Worker(QObject):
    progressed = Signal(int, int, str)
    done = Signal(object)
    failed = Signal(object)

    def __init__(self, work: Work, cancel: threading.Event) -> None:
        super().__init__()
        self._work = work
        self._cancel = cancel

    @Slot()
    def run(self) -> None:
        try:
            result = self._work(self._report, self._cancel)
        except BaseException as exc:  # noqa: BLE001 - reported to the GUI thread
            self.failed.emit(exc)
        else:
            self.done.emit(result)

    def _report(self, done: int, total: int, stage: str) -> None:
        self.progressed.emit(int(done), int(total), str(stage))


class TaskRunner(QObject):
    """Run one piece of long work at a time in a worker thread.

    Signals
    -------
    started(str)
        A task with this title began.
    progressed(int, int, str)
        ``done, total, stage`` from the work's progress callback.
    finished(str, object)
        Title and result of a task that completed.
    failed(str, object)
        Title and exception of a task that raised (including
        :class:`~gyrometer.core.errors.Cancelled`).
    idle()
        No task is running any more.
    """

    started = Signal(str)
    progressed = Signal(int, int, str)
    finished = Signal(str, object)
    failed = Signal(str, object)
    idle = Signal()

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._thread: QThread | None = None
        self._worker: _Worker | None = None
        self._cancel = threading.Event()
        self._title = ""
        self._on_done: Callable[[Any], None] | None = None

    @property
    def busy(self) -> bool:
        return self._thread is not None

    @property
    def title(self) -> str:
        return self._title

    def start(self, title: str, work: Work,
              on_done: Callable[[Any], None] | None = None) -> bool:
        """Start ``work``; return False (and do nothing) if a task runs."""
        if self.busy:
            return False
        self._cancel = threading.Event()
        self._title = title
        self._on_done = on_done
        thread = QThread()
        worker = _Worker(work, self._cancel)
        worker.moveToThread(thread)
        thread.started.connect(worker.run)
        worker.progressed.connect(self.progressed)
        worker.done.connect(self._finish_ok)
        worker.failed.connect(self._finish_error)
        self._thread, self._worker = thread, worker
        self.started.emit(title)
        thread.start()
        return True

    def cancel(self) -> None:
        """Ask the running task to stop at its next check."""
        self._cancel.set()

    def wait(self, timeout_ms: int = 30000) -> None:
        """Block until the worker thread ends (tests and shutdown)."""
        if self._thread is not None:
            self._thread.wait(timeout_ms)

    def _cleanup(self) -> None:
        thread, worker = self._thread, self._worker
        self._thread = self._worker = None
        if thread is not None:
            thread.quit()
            thread.wait()
            thread.deleteLater()
        if worker is not None:
            worker.deleteLater()

    @Slot(object)
    def _finish_ok(self, result: Any) -> None:
        title, on_done = self._title, self._on_done
        self._cleanup()
        try:
            if on_done is not None:
                on_done(result)
            self.finished.emit(title, result)
        except BaseException as exc:  # noqa: BLE001 - shown by the controller
            self.failed.emit(title, exc)
        finally:
            self.idle.emit()

    @Slot(object)
    def _finish_error(self, exc: BaseException) -> None:
        title = self._title
        self._cleanup()
        self.failed.emit(title, exc)
        self.idle.emit()
