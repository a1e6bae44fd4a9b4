"""Start the desktop app: ``gyrometer-desk [FILE ...]``."""

from __future__ import annotations

import argparse
import os
import sys
from typing import Sequence

__all__ = ["main", "create_app"]


def create_app(argv: Sequence[str] | None = None, settings=None):
    """Create (or reuse) the QApplication, a controller and the main window.

    Returns ``(app, window)``; the window is not shown yet.
    """
    import pyqtgraph as pg
    from PySide6.QtWidgets import QApplication

    from .controller import Controller
    from .icons import icon
    from .mainwindow import MainWindow

    app = QApplication.instance()
    if app is None:
        app = QApplication(["gyrometer-desk", *(argv or [])])
    app.setApplicationName("Gyrometer")
    app.setOrganizationName("Gyrometer")
    app.setWindowIcon(icon("gyrometer"))
    # FITS arrays are (y, x): once, before any image item exists (QT.md)
    pg.setConfigOptions(imageAxisOrder="row-major", antialias=True)
    controller = Controller(settings)
    window = MainWindow(controller)
    return app, window


def main(argv: Sequence[str] | None = None) -> int:
    """Run the desktop app.

    Parameters
    ----------
    argv : sequence of str, optional
        Files to open: FITS cubes, FITS map sets or session files (the first
        one is opened). Defaults to ``sys.argv[1:]``.

    Returns
    -------
    int
        The exit status of the Qt event loop.
    """
    if argv is None:
        argv = sys.argv[1:]
    parser = argparse.ArgumentParser(prog="gyrometer-desk",
                                     description="Gyrometer desktop window")
    parser.add_argument("files", nargs="*", help="cube, map set or session to open")
    parser.add_argument("--config-dir", help="folder of the settings file "
                        "(default: the per-user configuration folder)")
    args = parser.parse_args(list(argv))
    from .settings import AppSettings
    settings = AppSettings(args.config_dir) if args.config_dir else None
    if not os.environ.get("DISPLAY") and not os.environ.get("WAYLAND_DISPLAY") \
            and sys.platform.startswith("linux") and "QT_QPA_PLATFORM" not in os.environ:
        print("gyrometer-desk: no display found (set DISPLAY, or "
              "QT_QPA_PLATFORM=offscreen for a headless run)", file=sys.stderr)
        return 2
    app, window = create_app([], settings)
    window.restore_layout()
    window.show()
    if args.files:
        window.controller.open_path(args.files[0])
    else:  # unsaved work of a window that crashed or was killed
        window.offer_recovery()
    return int(app.exec())


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
