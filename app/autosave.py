"""Crash safety: the current session is saved shortly after every change.

:class:`AutoSaver` writes the session the window shows (its TOML text, from
:meth:`gyrometer.core.session.Session.to_toml`) into a per-user folder a
short while after the last change (edits arrive in bursts while a slit is
dragged; one write follows the burst). The write goes through
:func:`gyrometer.core.safeio.write_text_atomic`, so a crash in the middle
of it leaves the previous autosave intact.

Each running window owns two files named after its process id::

    autosave-<pid>.toml   the session
    autosave-<pid>.lock   marker holding the pid and the data file's path

A clean exit removes both. At start-up, :func:`find_recoverable` lists the
autosaves whose owner is no longer running (it crashed or was killed);
autosaves of windows still open are left alone.
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from PySide6.QtCore import QObject, QTimer, Signal

from gyrometer.core.errors import GyrometerError
from gyrometer.core.safeio import write_text_atomic

__all__ = ["AutoSaver", "Recoverable", "find_recoverable", "pid_alive",
           "AUTOSAVE_DELAY_MS"]

#: Quiet time after the last change before the session is written, ms.
AUTOSAVE_DELAY_MS = 2000


def pid_alive(pid: int) -> bool:
    """True if a process with this id exists (signal 0 probes, sends nothing)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    except OSError:
        return False
    return True


@dataclass(frozen=True)
class Recoverable:
    """An autosave left behind by a window that did not close cleanly.

    Attributes
    ----------
    session_path : Path
        The autosaved session file (TOML).
    lock_path : Path
        Its marker file.
    pid : int
        Process id of the window that wrote it.
    saved_at : float
        Modification time of the session file, seconds since the epoch.
    source : str
        The data or session file that window had open ("" if unknown).
    """

    session_path: Path
    lock_path: Path
    pid: int
    saved_at: float
    source: str = ""

    def describe(self) -> str:
        """One line for the recovery question."""
        when = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(self.saved_at))
        what = Path(self.source).name if self.source else self.session_path.name
        return f"{what} (saved {when})"

    def discard(self) -> None:
        """Delete the autosave and its marker."""
        for path in (self.session_path, self.lock_path):
            try:
                path.unlink()
            except FileNotFoundError:
                pass


def find_recoverable(folder: str | os.PathLike) -> list[Recoverable]:
    """Autosaves in ``folder`` whose writer is no longer running, newest first."""
    folder = Path(folder)
    found: list[Recoverable] = []
    if not folder.is_dir():
        return found
    for lock in folder.glob("autosave-*.lock"):
        session = lock.with_suffix(".toml")
        try:
            info = json.loads(lock.read_text(encoding="utf-8"))
            pid = int(info["pid"])
        except (OSError, ValueError, KeyError, TypeError):
            continue  # a marker being written, or not ours: leave it
        if pid == os.getpid() or pid_alive(pid) or not session.is_file():
            continue
        found.append(Recoverable(session, lock, pid, session.stat().st_mtime,
                                 str(info.get("source", ""))))
    return sorted(found, key=lambda r: r.saved_at, reverse=True)


class AutoSaver(QObject):
    """Write the session text a short while after each change.

    Parameters
    ----------
    folder : path-like
        Where the autosave and its marker live (created when first needed).
    text_of : callable
        Returns ``(toml_text, source_path)`` of what is on screen, or None
        when there is nothing to save.
    delay_ms : int
        Debounce interval.

    Signals
    -------
    saved(str)
        Path of the autosave just written.
    failed(str)
        Why a write failed (the window shows it once in the status bar).
    """

    saved = Signal(str)
    failed = Signal(str)

    def __init__(self, folder: str | os.PathLike,
                 text_of: Callable[[], tuple[str, str] | None],
                 delay_ms: int = AUTOSAVE_DELAY_MS,
                 parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.folder = Path(folder)
        self._text_of = text_of
        pid = os.getpid()
        self.session_path = self.folder / f"autosave-{pid}.toml"
        self.lock_path = self.folder / f"autosave-{pid}.lock"
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(int(delay_ms))
        self._timer.timeout.connect(self.save_now)
        self.enabled = True
        self.writes = 0

    @property
    def pending(self) -> bool:
        """A change is waiting for its write."""
        return self._timer.isActive()

    def schedule(self, *_args) -> None:
        """Note a change; the write follows ``delay_ms`` after the last one."""
        if self.enabled:
            self._timer.start()

    def save_now(self) -> bool:
        """Write the autosave at once (atomic); True if written."""
        self._timer.stop()
        if not self.enabled:
            return False
        got = self._text_of()
        if got is None:
            return False
        text, source = got
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            if not self.lock_path.is_file():
                marker = json.dumps({"pid": os.getpid(), "source": source,
                                     "started": time.time()})
                write_text_atomic(self.lock_path, marker, overwrite=True)
            write_text_atomic(self.session_path, text, overwrite=True)
        except (GyrometerError, OSError) as exc:
            self.failed.emit(f"Autosave failed: {exc}")
            return False
        self.writes += 1
        self.saved.emit(str(self.session_path))
        return True

    def discard(self) -> None:
        """Remove this window's autosave (a clean exit)."""
        self._timer.stop()
        Recoverable(self.session_path, self.lock_path, os.getpid(), 0.0).discard()
