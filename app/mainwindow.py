"""The main window: it assembles the views, menus and shortcuts.

Nothing here computes or stores science; the window wires widgets to the
:class:`~gyrometer.app.controller.Controller` and shows its errors and
progress.
"""

from __future__ import annotations

from pathlib import Path

import shiboken6

from PySide6.QtCore import QSize, Qt
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import (QDockWidget, QFileDialog, QLabel, QMainWindow,
                               QMessageBox,
                               QProgressBar, QPushButton, QScrollArea,
                               QSplitter, QTabWidget, QToolBar, QVBoxLayout,
                               QWidget)

from .controller import Controller
from .dialogs import HelpWindow, MomentDialog, show_about
from .errordialog import show_error
from .icons import icon
from .mapview import MAP_KINDS, QtMapView
from .panels import QtGeometryPanel, QtSlitPanel
from .resultview import QtResultView

__all__ = ["MainWindow", "OPEN_FILTER"]

OPEN_FILTER = ("Data and sessions (*.fits *.fit *.fits.gz *.fts *.toml);;"
               "FITS cubes or map sets (*.fits *.fit *.fits.gz *.fts);;"
               "Sessions (*.toml);;All files (*)")


class MainWindow(QMainWindow):
    """Gyrometer's desktop window.

    Parameters
    ----------
    controller : Controller
    """

    def __init__(self, controller: Controller, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.controller = controller
        self.setWindowTitle("Gyrometer")
        self.setWindowIcon(icon("gyrometer"))
        self.setAcceptDrops(True)
        self.resize(1360, 860)
        self._help: HelpWindow | None = None
        self._session_path: str | None = None

        # -- views ---------------------------------------------------------
        self.map_view = QtMapView(controller)
        self.result_view = QtResultView(controller)
        from .dynamicsview import QtDynamicsView
        self.dynamics_view = QtDynamicsView(controller)
        self.tabs = QTabWidget()
        self.tabs.addTab(self.result_view, icon("fit"), "Pattern speed")
        self.tabs.addTab(self.dynamics_view, icon("resonance"), "Rotation && resonances")
        from .checksview import QtChecksView
        from .radialview import QtRadialView
        from .spectrumview import QtSlitSpectrumView
        from .staleview import StaleFrame
        self.checks_view = QtChecksView(controller)
        self.radial_view = QtRadialView(controller)
        self.spectrum_view = QtSlitSpectrumView(controller)
        rerun = ("From the full run before your last edit of the geometry or the "
                 "slits; run it again (Ctrl+R) to update.")
        self.dynamics_frame = StaleFrame(self.dynamics_view, controller, ("full",), rerun)
        self.checks_frame = StaleFrame(self.checks_view, controller, ("full",), rerun)
        self.radial_frame = StaleFrame(
            self.radial_view, controller, ("radial",),
            "Measured before your last edit of the geometry or the slits; "
            "measure again to update.")
        self.spectrum_frame = StaleFrame(
            self.spectrum_view, controller, ("absorption",),
            "Fitted before your last edit of the geometry or the slits; "
            "measure from the slit spectra again to update.")
        self.tabs.removeTab(1)
        self.tabs.addTab(self.dynamics_frame, icon("resonance"), "Rotation && resonances")
        self.tabs.addTab(self.checks_frame, icon("budget"), "Checks")
        self.tabs.addTab(self.radial_frame, icon("fit"), "Speed against radius")
        self.tabs.addTab(self.spectrum_frame, icon("fit"), "Slit spectra")
        splitter = QSplitter(Qt.Orientation.Horizontal)
        splitter.addWidget(self.map_view)
        splitter.addWidget(self.tabs)
        splitter.setStretchFactor(0, 3)
        splitter.setStretchFactor(1, 2)
        splitter.setSizes([560, 470])
        self.setCentralWidget(splitter)

        self.geometry_panel = QtGeometryPanel(controller)
        self.slit_panel = QtSlitPanel(controller)
        side = QWidget()
        side_layout = QVBoxLayout(side)
        side_layout.setContentsMargins(2, 2, 2, 2)
        side_layout.addWidget(self.geometry_panel)
        side_layout.addWidget(self.slit_panel, 1)
        scroll = QScrollArea()
        scroll.setWidget(side)
        scroll.setWidgetResizable(True)
        scroll.setMinimumWidth(390)
        self.side_dock = QDockWidget("Disk and slits", self)
        self.side_dock.setObjectName("disk-and-slits")
        self.side_dock.setWidget(scroll)
        self.side_dock.setFeatures(QDockWidget.DockWidgetFeature.DockWidgetMovable
                                   | QDockWidget.DockWidgetFeature.DockWidgetFloatable)
        self.addDockWidget(Qt.DockWidgetArea.LeftDockWidgetArea, self.side_dock)

        # -- status bar with progress and cancel -----------------------------
        self.progress = QProgressBar()
        self.progress.setMaximumWidth(260)
        self.progress.setVisible(False)
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setToolTip("Stop the running work (Esc); nothing is written")
        self.cancel_button.setVisible(False)
        self.cancel_button.clicked.connect(controller.tasks.cancel)
        self.task_label = QLabel("")
        self.statusBar().addPermanentWidget(self.task_label)
        self.statusBar().addPermanentWidget(self.progress)
        self.statusBar().addPermanentWidget(self.cancel_button)

        self._make_actions()
        self._make_menus()
        self._connect()
        self._update_enabled()
        self.statusBar().showMessage("Open a cube, a map set or a session to begin (Ctrl+O)")

    # ------------------------------------------------------------------
    def _action(self, text: str, slot, shortcut=None, tip: str = "",
                icon_name: str | None = None, context=None) -> QAction:
        action = QAction(text, self)
        if shortcut is not None:
            action.setShortcut(QKeySequence(shortcut))
        if tip:
            action.setToolTip(tip)
            action.setStatusTip(tip)
        if icon_name:
            action.setIcon(icon(icon_name))
        if context is not None:
            action.setShortcutContext(context)
        action.triggered.connect(slot)
        return action

    def _make_actions(self) -> None:
        c = self.controller
        Seq = QKeySequence.StandardKey
        self.act_open = self._action("&Open\u2026", self.open_dialog, Seq.Open,
                                     "Open a FITS cube, a FITS map set or a session file",
                                     "open")
        self.act_sample = self._action("Open &sample galaxy", self.open_sample, None,
                                       "Open the synthetic sample galaxy LBDP-011")
        self.act_save = self._action("&Save session", self.save_session, Seq.Save,
                                     "Save geometry, slits and settings to a session file",
                                     "save")
        self.act_save_as = self._action("Save session &as\u2026",
                                        lambda: self.save_session(ask=True), Seq.SaveAs)
        self.act_export = self._action("&Export results\u2026", self.export_dialog,
                                       "Ctrl+E", "Write tables, region files and "
                                       "figures with the batch pipeline", "export")
        self.act_quit = self._action("&Quit", self.close, Seq.Quit)
        self.act_undo = self._action("&Undo", c.undo_stack.undo, Seq.Undo,
                                     "Undo the last edit of the geometry or the slits",
                                     "undo")
        self.act_redo = self._action("&Redo", c.undo_stack.redo, None,
                                     "Redo the edit just undone", "redo")
        self.act_redo.setShortcuts([QKeySequence(Seq.Redo), QKeySequence("Ctrl+Y")])
        self.act_undo.setEnabled(False)
        self.act_redo.setEnabled(False)
        c.undo_stack.canUndoChanged.connect(self.act_undo.setEnabled)
        c.undo_stack.canRedoChanged.connect(self.act_redo.setEnabled)
        c.undo_stack.undoTextChanged.connect(self._undo_text)
        c.undo_stack.redoTextChanged.connect(self._redo_text)
        self.act_add = self._action("&Add slit", c.add_slit, "Ctrl+Shift+A",
                                    "Add a slit beyond the outermost one", "slit-add")
        self.act_dup = self._action("&Duplicate slit", lambda: c.duplicate_slit(),
                                    "Ctrl+D", "Copy the selected slit", "slit-duplicate")
        self.act_remove = self._action("&Remove slit", lambda: c.remove_slit(),
                                       QKeySequence.StandardKey.Delete,
                                       "Remove the selected slit", "slit-remove")
        ctx = Qt.ShortcutContext.WidgetWithChildrenShortcut
        self.nudge_actions = []
        for key, factor, text in (("Up", 1.0, "outward (+Y)"), ("Down", -1.0, "inward (\u2212Y)"),
                                  ("Shift+Up", 5.0, "5 steps +Y"),
                                  ("Shift+Down", -5.0, "5 steps \u2212Y")):
            act = self._action(f"Nudge slit {text}", lambda _=False, f=factor: self.nudge(f),
                               key, "Move the selected slit across the line of nodes "
                               "by half a pixel", context=ctx)
            self.map_view.addAction(act)
            self.nudge_actions.append(act)
        self.act_budget = self._action("Run uncertainty &budget", c.run_budget, "Ctrl+B",
                                       "Monte Carlo uncertainty budget in the background",
                                       "budget")
        self.act_full = self._action("Run &full measurement", c.run_full, "Ctrl+R",
                                     "Run the batch pipeline on this session: "
                                     "pattern speed, budget, rotation curve, "
                                     "resonances and bar", "run")
        self.act_radial = self._action("Pattern speed against &radius",
                                       self.run_radial, "Ctrl+Shift+R",
                                       "Solve for the pattern speed in annuli of disk "
                                       "radius (background)")
        self.act_absorption = self._action("Measure from slit &spectra",
                                           self.run_absorption, "Ctrl+Shift+M",
                                           "Fit the summed spectrum of each slit of an "
                                           "absorption-line cube (background)")
        self.act_cancel = self._action("&Cancel running work", c.tasks.cancel, "Esc")
        self.act_reset_zoom = self._action("&Whole map", self.reset_zoom, "Ctrl+0",
                                           "Zoom out to the whole map")
        self.map_actions = []
        for n, (key, (_, label, _, _)) in enumerate(MAP_KINDS.items(), start=1):
            act = self._action(f"Show {label.lower()}",
                               lambda _=False, k=key: self.map_view.set_kind(k),
                               f"Ctrl+{n}")
            self.map_actions.append(act)
        self.act_help = self._action("Method &notes", self.show_help, Seq.HelpContents,
                                     "Assumptions and caveats of the method", "help")
        self.act_about = self._action("&About Gyrometer", lambda: show_about(self))

    def _undo_text(self, text: str) -> None:
        self.act_undo.setToolTip(f"Undo {text}" if text else "Nothing to undo")

    def _redo_text(self, text: str) -> None:
        self.act_redo.setToolTip(f"Redo {text}" if text else "Nothing to redo")

    def _make_menus(self) -> None:
        bar = self.menuBar()
        m = bar.addMenu("&File")
        m.addActions([self.act_open, self.act_sample])
        self.recent_menu = m.addMenu("Open &recent")
        m.addSeparator()
        m.addActions([self.act_save, self.act_save_as, self.act_export])
        m.addSeparator()
        m.addAction(self.act_quit)
        m = bar.addMenu("&Edit")
        m.addActions([self.act_undo, self.act_redo])
        m.addSeparator()
        m.addActions([self.act_add, self.act_dup, self.act_remove])
        m.addSeparator()
        m.addActions(self.nudge_actions)
        m = bar.addMenu("&View")
        m.addActions(self.map_actions)
        m.addSeparator()
        m.addAction(self.act_reset_zoom)
        self.estimate_menu = bar.addMenu("&Geometry")
        m = bar.addMenu("&Measure")
        m.addActions([self.act_budget, self.act_full, self.act_radial,
                      self.act_absorption, self.act_cancel])
        m = bar.addMenu("&Help")
        m.addActions([self.act_help, self.act_about])

        tools = QToolBar("Main tools")
        tools.setObjectName("main-tools")
        tools.setIconSize(QSize(22, 22))
        tools.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextBesideIcon)
        tools.addActions([self.act_open, self.act_save, self.act_export])
        tools.addSeparator()
        tools.addActions([self.act_undo, self.act_redo])
        tools.addSeparator()
        tools.addActions([self.act_add, self.act_dup, self.act_remove])
        tools.addSeparator()
        tools.addActions([self.act_budget, self.act_full])
        self.addToolBar(tools)
        self._fill_recent(self.controller.settings.recent_files())

    def _connect(self) -> None:
        c = self.controller
        c.error_raised.connect(self._show_error)
        c.status.connect(self._status)
        c.cube_opened.connect(self._ask_moments)
        c.recent_changed.connect(self._fill_recent)
        c.data_changed.connect(self._update_enabled)
        c.route_changed.connect(self._update_enabled)
        c.selection_changed.connect(self._update_enabled)
        c.undo_stack.cleanChanged.connect(self._update_title)
        c.session_changed.connect(self._session_changed)
        c.tasks.started.connect(self._task_started)
        c.tasks.progressed.connect(self._task_progress)
        c.tasks.idle.connect(self._task_idle)
        for key, text, tip in c.ESTIMATORS:
            act = self._action(text, lambda _=False, k=key: c.estimate(k), None, tip)
            self.estimate_menu.addAction(act)
            self.geometry_panel.add_estimator(key, text, tip,
                                              lambda _=False, k=key: c.estimate(k))

    def _session_changed(self, session) -> None:
        path = self.controller.source_path or ""
        self._session_path = path if path.lower().endswith(".toml") else None
        self._update_title()

    def _update_title(self, *_args) -> None:
        name = self.controller.galaxy_name()
        title = f"Gyrometer \u2013 {name}[*]" if name else "Gyrometer[*]"
        stack = self.controller.undo_stack
        if not (shiboken6.isValid(self) and shiboken6.isValid(stack)):
            return  # shutting down
        self.setWindowTitle(title)
        self.setWindowModified(not stack.isClean())

    def _status(self, text: str) -> None:
        self.statusBar().showMessage(text, 8000)

    def _update_enabled(self, *_args) -> None:
        has_data = self.controller.maps is not None
        selected = self.controller.selected >= 0
        absorption = self.controller.route == "absorption"
        for act in (self.act_save, self.act_save_as, self.act_export, self.act_add,
                    self.act_budget, self.act_full, self.act_radial):
            act.setEnabled(has_data)
        self.act_absorption.setEnabled(has_data and absorption)
        for act in (self.act_budget, self.act_radial):
            act.setEnabled(has_data and not absorption)
        for act in [self.act_dup, self.act_remove] + self.nudge_actions:
            act.setEnabled(has_data and selected)

    # ------------------------------------------------------------------
    def _show_error(self, title: str, message: str) -> None:
        show_error(self, title, message)

    def _task_started(self, title: str) -> None:
        self.task_label.setText(title)
        self.progress.setRange(0, 0)
        self.progress.setVisible(True)
        self.cancel_button.setVisible(True)

    def _task_progress(self, done: int, total: int, stage: str) -> None:
        if total > 0:
            self.progress.setRange(0, total)
            self.progress.setValue(done)
        self.task_label.setText(stage)

    def _task_idle(self) -> None:
        self.progress.setVisible(False)
        self.cancel_button.setVisible(False)
        self.task_label.setText("")

    def _fill_recent(self, paths: list) -> None:
        self.recent_menu.clear()
        for path in paths:
            self.recent_menu.addAction(Path(path).name,
                                       lambda p=path: self.controller.open_path(p)
                                       ).setToolTip(path)
        self.recent_menu.setEnabled(bool(paths))

    def _ask_moments(self, cube) -> None:
        dialog = MomentDialog(cube, self.controller.moment_settings, self)
        if dialog.exec():
            if dialog.route() == "absorption":
                self.controller.open_absorption(dialog.vsys_kms())
                self.tabs.setCurrentWidget(self.spectrum_frame)
            else:
                self.controller.compute_moments(dialog.settings())
        else:
            self.statusBar().showMessage("Cube opened; no maps made", 8000)

    # -- file actions -----------------------------------------------------
    def open_dialog(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open data or session",
                                              self.controller.settings.last_folder(),
                                              OPEN_FILTER)
        if path:
            self.controller.open_path(path)

    def open_sample(self) -> None:
        self.controller.open_sample()

    def save_session(self, ask: bool = False) -> None:
        path = self._session_path
        # Save writes over the session file this window has open (that is
        # what Save means); Save as never replaces a file without asking.
        overwrite = not (ask or path is None)
        if ask or path is None:
            start = str(Path(self.controller.settings.last_folder()) /
                        f"{self.controller.galaxy_name() or 'session'}.toml")
            path, _ = QFileDialog.getSaveFileName(
                self, "Save session", start, "Sessions (*.toml)",
                options=QFileDialog.Option.DontConfirmOverwrite)
            if not path:
                return
        if self.controller.save_session(path, overwrite=overwrite,
                                        confirm=self.confirm_replace):
            self._session_path = path
            self.controller.undo_stack.setClean()

    def confirm_replace(self, question: str) -> bool:
        """Ask before a file the user owns is replaced (Yes replaces)."""
        answer = QMessageBox.question(
            self, "Replace files?", question,
            QMessageBox.StandardButton.Yes | QMessageBox.StandardButton.No,
            QMessageBox.StandardButton.No)
        return answer == QMessageBox.StandardButton.Yes

    def export_dialog(self) -> None:
        folder = QFileDialog.getExistingDirectory(
            self, "Export results to folder", self.controller.settings.last_folder())
        if not folder:
            return
        # core refuses to replace files; the controller then asks us
        self.controller.export_results(folder, confirm=lambda q: self.confirm_replace(q))

    # -- measure actions ----------------------------------------------------
    def run_radial(self) -> None:
        self.tabs.setCurrentWidget(self.radial_frame)
        self.radial_view.run()

    def run_absorption(self) -> None:
        self.tabs.setCurrentWidget(self.spectrum_frame)
        self.controller.run_absorption()

    # -- crash recovery -----------------------------------------------------
    def ask_recovery(self, item, others: int) -> str:
        """Ask what to do with an autosave left by a window that did not
        close cleanly: ``"restore"``, ``"discard"`` or ``"keep"``."""
        more = (f"\n\n({others} older unsaved job(s) are also kept; they are "
                "offered again next time.)" if others else "")
        box = QMessageBox(QMessageBox.Icon.Question, "Unsaved work found",
                          "Gyrometer did not close normally last time. Its "
                          f"last state was kept:\n\n{item.describe()}\n\n"
                          "Restore it now? (Restoring gives you the geometry and "
                          f"the slits as they were; save it to keep it.){more}",
                          parent=self)
        restore = box.addButton("Restore", QMessageBox.ButtonRole.AcceptRole)
        discard = box.addButton("Discard", QMessageBox.ButtonRole.DestructiveRole)
        box.addButton("Not now", QMessageBox.ButtonRole.RejectRole)
        box.setDefaultButton(restore)
        box.exec()
        clicked = box.clickedButton()
        return "restore" if clicked is restore else "discard" if clicked is discard \
            else "keep"

    def offer_recovery(self) -> bool:
        """Offer the newest autosave of a crashed window; True if restoring."""
        from .autosave import find_recoverable
        items = find_recoverable(self.controller.settings.autosave_folder())
        if not items:
            return False
        item = items[0]
        answer = self.ask_recovery(item, len(items) - 1)
        if answer == "restore":
            return self.controller.recover(item)
        if answer == "discard":
            item.discard()
        return False

    # -- view actions -----------------------------------------------------
    def reset_zoom(self) -> None:
        maps = self.controller.maps
        if maps is not None:
            ny, nx = maps.shape
            self.map_view.plot.setRange(xRange=(-0.5, nx - 0.5), yRange=(-0.5, ny - 0.5))

    def nudge(self, factor: float) -> None:
        c = self.controller
        if c.maps is None:
            return
        from gyrometer.core.coords import pixel_scale_arcsec
        c.nudge_slit(factor * 0.5 * pixel_scale_arcsec(c.maps.wcs))

    def show_help(self) -> None:
        if self._help is None:
            self._help = HelpWindow(self)
        self._help.show()
        self._help.raise_()

    # -- drag and drop ------------------------------------------------------
    def dragEnterEvent(self, event) -> None:
        if event.mimeData().hasUrls():
            event.acceptProposedAction()

    def dropEvent(self, event) -> None:
        urls = [u for u in event.mimeData().urls() if u.isLocalFile()]
        if urls:
            self.controller.open_path(urls[0].toLocalFile())
            event.acceptProposedAction()

    def closeEvent(self, event) -> None:
        c = self.controller
        c.settings.set_value("window/geometry", self.saveGeometry())
        c.settings.set_value("window/state", self.saveState())
        if c.tasks.busy:
            c.tasks.cancel()
            c.tasks.wait(10000)
        c.discard_autosave()  # a clean exit leaves nothing to recover
        super().closeEvent(event)

    def restore_layout(self) -> None:
        geometry = self.controller.settings.value("window/geometry")
        state = self.controller.settings.value("window/state")
        if geometry is not None:
            self.restoreGeometry(geometry)
        if state is not None:
            self.restoreState(state)
