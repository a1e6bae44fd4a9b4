"""The desktop app's controller: current state, edits, signals.

The controller holds the plain frozen dataclasses of the current job (the
data, the maps, the disk geometry, the slits, the measurement, the budget,
the rotation curve and resonances) and emits a signal whenever one changes.
Widgets subscribe to the signals and send the user's edits back through the
methods below; no widget talks to another or to core directly.

All science is done by :mod:`gyrometer.core`. Long work runs in a
:class:`~gyrometer.app.tasks.TaskRunner` thread. Every
:class:`~gyrometer.core.errors.GyrometerError` is caught here, in
:meth:`Controller._report_error`, and handed to the window as
``error_raised(title, message)``; the state the user made is left as it was.
"""

from __future__ import annotations

import time
from dataclasses import replace
from pathlib import Path

import numpy as np
from PySide6.QtCore import QObject, QTimer, Signal
from PySide6.QtGui import QUndoStack

from gyrometer.core.errors import Cancelled, GyrometerError, OutputError, SlitError
from gyrometer.core.geometry import DiskGeometry
from gyrometer.core.slits import Slit, SlitSet

from .autosave import AutoSaver, Recoverable
from .settings import AppSettings
from .tasks import TaskRunner
from .undo import EditState, StateCommand

__all__ = ["Controller", "LIVE_DELAY_MS", "ROUTES"]

#: How a cube becomes a measurement: emission-line moment maps, or the
#: summed spectra of the slits of an absorption-line cube.
ROUTES = ("emission", "absorption")

#: Shortest interval between two live recomputes while dragging, ms; the
#: mouse events that arrive meanwhile are coalesced into one recompute.
LIVE_DELAY_MS = 15


class Controller(QObject):
    """Hold the current job and forward edits to core.

    Signals
    -------
    data_changed(object)
        New :class:`~gyrometer.core.dataset.MapSet` (or None).
    cube_opened(object)
        A :class:`~gyrometer.core.dataset.Cube` was read; the window asks
        for the moment settings and calls :meth:`compute_moments`.
    geometry_changed(object)
        New :class:`~gyrometer.core.geometry.DiskGeometry`.
    slits_changed(object)
        New :class:`~gyrometer.core.slits.SlitSet` (structure or any slit).
    selection_changed(int)
        Index of the selected slit, -1 for none.
    measurement_changed(object)
        New :class:`~gyrometer.core.results.TWMeasurement` or None.
    budget_changed(object)
        New :class:`~gyrometer.core.results.UncertaintyBudget` or None.
    dynamics_changed(object)
        New rotation-curve / resonance result or None.
    checks_changed(object)
        The pipeline result whose convergence and PA checks are shown, or None.
    estimate_ready(str, object)
        Name and result of a geometry estimator.
    radial_changed(object)
        New :class:`~gyrometer.core.radial.RadialResult` or None.
    absorption_changed(object)
        New :class:`~gyrometer.core.stellar.AbsorptionResult` or None.
    route_changed(str)
        ``"maps"``, ``"emission"`` (cube through moment maps) or
        ``"absorption"`` (cube through slit spectra).
    stale_changed(object)
        Frozenset of the results made for an older geometry or slit set:
        any of ``"full"`` (the last full run), ``"radial"``,
        ``"absorption"``.
    error_raised(str, str)
        Title and message of a failure; shown once by the window.
    status(str)
        Short message for the status bar.
    """

    data_changed = Signal(object)
    cube_opened = Signal(object)
    geometry_changed = Signal(object)
    slits_changed = Signal(object)
    selection_changed = Signal(int)
    measurement_changed = Signal(object)
    budget_changed = Signal(object)
    dynamics_changed = Signal(object)
    checks_changed = Signal(object)
    estimate_ready = Signal(str, object)
    session_changed = Signal(object)
    error_raised = Signal(str, str)
    status = Signal(str)
    recent_changed = Signal(list)
    radial_changed = Signal(object)
    absorption_changed = Signal(object)
    route_changed = Signal(str)
    stale_changed = Signal(object)

    def __init__(self, settings: AppSettings | None = None,
                 parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.settings = settings if settings is not None else AppSettings()
        self.tasks = TaskRunner(self)
        self.tasks.failed.connect(self._task_failed)
        self.undo_stack = QUndoStack(self)
        # -- state (plain frozen dataclasses) --
        self.source_path: str | None = None
        self.cube = None
        self.moment_settings = None
        self.maps = None
        self.geometry: DiskGeometry | None = None
        self.slits: SlitSet | None = None
        self.selected: int = -1
        self.measurement = None
        self.budget = None
        self.dynamics = None
        self.session = None
        self.pending_session = None
        self.pipeline_result = None
        self.last_export: dict = {}
        self._live = None
        # -- live dragging --
        self._pending: dict[int, Slit] = {}
        self._drag_origin: EditState | None = None
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(LIVE_DELAY_MS)
        self._timer.timeout.connect(self._flush_live)
        self.live_updates = 0
        self._last_flush = 0.0
        # -- results beyond the live one, with the state they were made for --
        self.route = "maps"
        self.radial = None
        self.radial_settings = None
        self.absorption = None
        self.stellar_settings = None
        self.stale: frozenset = frozenset()
        self._made_for: dict[str, tuple] = {}
        # -- crash safety: the session is autosaved after every change --
        self.autosave = AutoSaver(self.settings.autosave_folder(),
                                  self._autosave_text, parent=self)
        for signal in (self.geometry_changed, self.slits_changed,
                       self.session_changed):
            signal.connect(self.autosave.schedule)
        self.autosave.failed.connect(self.status)

    # ------------------------------------------------------------------
    # errors: the one place where GyrometerError is caught
    # ------------------------------------------------------------------
    def _report_error(self, title: str, exc: BaseException) -> None:
        if isinstance(exc, Cancelled):
            self.status.emit(f"{title}: cancelled")
            return
        if isinstance(exc, GyrometerError):
            message = str(exc)
        else:  # a bug, not the user's fault: still keep the app alive
            message = (f"Unexpected {type(exc).__name__}: {exc}\n\n"
                       "Your slits and geometry are unchanged. Please report "
                       "this with the file that caused it.")
        self.error_raised.emit(title, message)

    def _start(self, title: str, work, done) -> bool:
        """Start background work, or say why not (one task at a time)."""
        if self.tasks.start(title, work, done):
            return True
        self.status.emit(f"{self.tasks.title} is still running: wait for it or "
                         "cancel it (Esc)")
        return False

    def _task_failed(self, title: str, exc: object) -> None:
        self._report_error(title, exc)  # type: ignore[arg-type]

    def _guard(self, title: str, func, *args, **kwargs):
        try:
            return func(*args, **kwargs)
        except Exception as exc:  # noqa: BLE001 - see _report_error
            self._report_error(title, exc)
            return None

    # ------------------------------------------------------------------
    # opening data
    # ------------------------------------------------------------------
    def open_path(self, path: str | Path) -> bool:
        """Open a FITS cube, a FITS map set or a session file (background).

        A map set is shown with the geometry estimated by the pipeline's
        own step (:func:`gyrometer.core.pipeline.resolve_geometry`) and the
        slits its rule makes; a cube first asks for the moment settings
        (``cube_opened``). Returns False if other work is still running.
        """
        path = Path(path)
        if path.is_dir():  # a folder: its session file, else its map set or cube
            found = (sorted(path.glob("*.toml")) + sorted(path.glob("*maps*.fits"))
                     + sorted(path.glob("*.fits")))
            if found:
                path = found[0]
        if path.suffix.lower() in {".toml"}:
            return self.open_session(path)
        from gyrometer.core import fitsio
        from gyrometer.core.dataset import Cube

        def work(progress, cancel):
            progress(0, 1, f"reading {path.name}")
            data = fitsio.open_data(str(path))
            if isinstance(data, Cube):
                return data, None
            session = self._session_for(path, data)
            return data, (session, self._prepare(session, data, progress))

        def done(result):
            data, prepared = result
            self.source_path = str(path)
            self._remember(path)
            if prepared is None:
                self.cube = data
                self.pending_session = self._session_for(path, data)
                self.cube_opened.emit(data)
                return
            session, (geometry, slits, notes) = prepared
            self._install(session, data, data, geometry, slits, notes)

        return self._start(f"Open {path.name}", work, done)

    def compute_moments(self, moment_settings) -> bool:
        """Reduce the open cube to maps with ``moment_settings``
        (:class:`gyrometer.core.moments.MomentSettings`), in the background,
        with the pipeline's own step."""
        if self.cube is None:
            return False
        from gyrometer.core import pipeline
        cube = self.cube
        base = self.pending_session or self.session or self._session_for(
            Path(self.source_path or "cube.fits"), cube)
        session = base.with_(moments=moment_settings)

        def work(progress, cancel):
            maps = pipeline.maps_for(cube, session, moment_settings.vsys_kms,
                                     progress=progress, cancel=cancel)
            return maps, self._prepare(session, maps, progress)

        def done(result):
            maps, (geometry, slits, notes) = result
            self.moment_settings = moment_settings
            self.pending_session = None
            self._install(session, cube, maps, geometry, slits, notes)

        return self._start("Moment maps", work, done)

    def _remember(self, path: Path) -> None:
        self.recent_changed.emit(self.settings.add_recent(path))
        self.settings.set_last_folder(Path(path).resolve().parent)

    def set_maps(self, maps, geometry: DiskGeometry | None = None,
                 slits: SlitSet | None = None) -> None:
        """Install a new map set with a geometry and slits.

        Without ``geometry`` a starting guess is made (map centre, line of
        nodes north, 45 deg) and marked ``source="starting guess"``; the
        estimators refine it on request. Without ``slits`` a set of seven
        slits is laid out across the inner third of the field.
        """
        self.maps = maps
        self.budget = None
        self.dynamics = None
        self.pipeline_result = None
        self.radial = None
        self.absorption = None
        self._made_for = {}
        self.undo_stack.clear()
        if geometry is None:
            geometry = self._starting_geometry(maps)
        if slits is None:
            slits = self._starting_slits(maps)
        self.geometry = geometry
        self.slits = slits
        self.selected = -1
        self._live = None
        self.data_changed.emit(maps)
        self.geometry_changed.emit(geometry)
        self.slits_changed.emit(slits)
        self.selection_changed.emit(-1)
        self.budget_changed.emit(None)
        self.dynamics_changed.emit(None)
        self.checks_changed.emit(None)
        self.radial_changed.emit(None)
        self.absorption_changed.emit(None)
        self._check_stale()
        self._remeasure()
        self.status.emit(f"{maps.name or 'maps'}: {maps.shape[1]}x{maps.shape[0]} "
                         f"pixels, tracer {maps.tracer}")

    @staticmethod
    def _starting_geometry(maps) -> DiskGeometry:
        ny, nx = maps.shape
        world = maps.wcs.celestial.pixel_to_world((nx - 1) / 2.0, (ny - 1) / 2.0)
        v = np.asarray(maps.velocity_kms, dtype=float)
        vsys = float(np.nanmedian(v)) if np.isfinite(v).any() else 0.0
        return DiskGeometry(float(world.icrs.ra.deg), float(world.icrs.dec.deg),
                            0.0, 45.0, vsys_kms=vsys, source="starting guess")

    @staticmethod
    def _starting_slits(maps) -> SlitSet:
        from gyrometer.core.coords import pixel_scale_arcsec
        scale = pixel_scale_arcsec(maps.wcs)
        field = min(maps.shape) * scale
        width = max(2.0 * scale, field / 40.0)
        return SlitSet.generate(7, spacing_arcsec=field / 24.0,
                                width_arcsec=width,
                                half_length_arcsec=0.45 * field)

    # ------------------------------------------------------------------
    # edits (undoable)
    # ------------------------------------------------------------------
    def edit_state(self) -> EditState:
        return EditState(self.geometry, self.slits, self.selected)

    def _push(self, text: str, after: EditState,
              before: EditState | None = None) -> None:
        before = self.edit_state() if before is None else before
        self.undo_stack.push(StateCommand(text, before, after, self._apply_state))

    def _apply_state(self, state: EditState) -> None:
        """Install an edit state (undo, redo and every edit end here)."""
        self._timer.stop()
        self._pending.clear()
        geometry_new = state.geometry is not self.geometry
        slits_new = state.slits is not self.slits
        self.geometry, self.slits = state.geometry, state.slits
        if geometry_new:
            self.budget = None
            self.geometry_changed.emit(self.geometry)
        if slits_new:
            self.budget = None
            self.slits_changed.emit(self.slits)
        n = len(self.slits) if self.slits is not None else 0
        selected = state.selected if -1 <= state.selected < n else -1
        if selected != self.selected:
            self.selected = selected
            self.selection_changed.emit(selected)
        if geometry_new or slits_new:
            self.budget_changed.emit(None)
            self._check_stale()
            self._remeasure()

    def set_geometry(self, geometry: DiskGeometry, text: str = "change geometry") -> None:
        """Replace the disk geometry (undoable)."""
        if self.maps is None or geometry == self.geometry:
            return
        self._push(text, replace(self.edit_state(), geometry=geometry))

    def update_geometry(self, text: str = "change geometry", **changes) -> None:
        """Change some geometry fields; invalid values are reported."""
        if self.geometry is None:
            return
        geometry = self._guard("Geometry", self.geometry.with_, **changes)
        if geometry is not None:
            self.set_geometry(geometry, text)

    def set_slits(self, slits: SlitSet, text: str = "change slits",
                  selected: int | None = None) -> None:
        """Replace the whole slit set (undoable)."""
        if self.maps is None:
            return
        sel = self.selected if selected is None else selected
        self._push(text, EditState(self.geometry, slits, sel))

    def make_slits(self, count: int, spacing_arcsec: float, width_arcsec: float,
                   half_length_arcsec: float, symmetric: bool = True) -> None:
        """Lay out a new set of equally spaced slits (undoable)."""
        slits = self._guard("Make slits", SlitSet.generate, int(count),
                            float(spacing_arcsec), float(width_arcsec),
                            float(half_length_arcsec), symmetric=symmetric)
        if slits is not None:
            self.set_slits(slits, f"make {count} slits", selected=-1)

    def select_slit(self, index: int) -> None:
        n = len(self.slits) if self.slits is not None else 0
        index = index if 0 <= index < n else -1
        if index != self.selected:
            self.selected = index
            self.selection_changed.emit(index)

    def add_slit(self) -> None:
        """Add a slit beyond the outermost one, same width and length."""
        if self.slits is None:
            return
        if len(self.slits):
            last = max(self.slits, key=lambda s: s.offset_arcsec)
            step = self._spacing()
            new = last.with_(offset_arcsec=last.offset_arcsec + step)
        else:
            new = self._starting_slits(self.maps).slits[0].with_(offset_arcsec=0.0)
        slits = self.slits.added(new)
        self.set_slits(slits, "add slit", selected=len(slits) - 1)

    def duplicate_slit(self, index: int | None = None) -> None:
        """Copy a slit, shifted by half a spacing so both stay visible."""
        index = self.selected if index is None else index
        if self.slits is None or not 0 <= index < len(self.slits):
            return
        s = self.slits.slits[index]
        new = s.with_(offset_arcsec=s.offset_arcsec + 0.5 * self._spacing())
        slits = self.slits.added(new)
        self.set_slits(slits, f"duplicate slit {index + 1}", selected=len(slits) - 1)

    def remove_slit(self, index: int | None = None) -> None:
        index = self.selected if index is None else index
        if self.slits is None or not 0 <= index < len(self.slits):
            return
        self.set_slits(self.slits.removed(index), f"remove slit {index + 1}",
                       selected=-1)

    def resize_slits(self, width_arcsec: float | None = None,
                     half_length_arcsec: float | None = None,
                     only_selected: bool = False) -> None:
        """Change the width and/or half-length of the selected or all slits."""
        if self.slits is None:
            return
        changes = {}
        if width_arcsec is not None:
            changes["width_arcsec"] = float(width_arcsec)
        if half_length_arcsec is not None:
            changes["half_length_arcsec"] = float(half_length_arcsec)
        targets = ([self.selected] if only_selected and self.selected >= 0
                   else range(len(self.slits)))
        items = list(self.slits.slits)
        try:
            for i in targets:
                items[i] = items[i].with_(**changes)
        except SlitError as exc:
            self._report_error("Slit size", exc)
            return
        slits = replace(self.slits, slits=tuple(items))
        if slits != self.slits:
            self.set_slits(slits, "resize slits")

    def set_symmetric(self, symmetric: bool) -> None:
        if self.slits is not None and self.slits.symmetric != symmetric:
            self.set_slits(replace(self.slits, symmetric=bool(symmetric)),
                           "mirror masking " + ("on" if symmetric else "off"))

    def nudge_slit(self, d_offset_arcsec: float, index: int | None = None) -> None:
        """Move a slit across the line of nodes by ``d_offset_arcsec``."""
        index = self.selected if index is None else index
        if self.slits is None or not 0 <= index < len(self.slits):
            return
        s = self.slits.slits[index]
        self.set_slits(self.slits.replaced(
            index, s.with_(offset_arcsec=s.offset_arcsec + d_offset_arcsec)),
            f"nudge slit {index + 1}")

    def _spacing(self) -> float:
        offsets = np.sort(self.slits.offsets_arcsec) if self.slits else np.array([])
        if offsets.size >= 2:
            return float(np.median(np.diff(offsets))) or 1.0
        from gyrometer.core.coords import pixel_scale_arcsec
        return 3.0 * pixel_scale_arcsec(self.maps.wcs)

    # ------------------------------------------------------------------
    # live dragging
    # ------------------------------------------------------------------
    def move_slit(self, index: int, slit: Slit, final: bool = False) -> None:
        """Move one slit while it is dragged.

        Called for every mouse event. The slit set is updated and shown at
        once; the measurement is recomputed at most once per
        :data:`LIVE_DELAY_MS` (the pending moves are coalesced). ``final``
        ends the drag and records one undoable edit for the whole drag.
        """
        if self.slits is None or not 0 <= index < len(self.slits):
            return
        if self._drag_origin is None:
            self._drag_origin = self.edit_state()
        if self.selected != index:
            self.selected = index
            self.selection_changed.emit(index)
        self.slits = self.slits.replaced(index, slit)
        self._pending[index] = slit
        if not self._timer.isActive():
            # rate limit without idling: wait only for what is left of
            # LIVE_DELAY_MS since the last recompute
            since_ms = 1e3 * (time.perf_counter() - self._last_flush)
            self._timer.start(int(max(0.0, LIVE_DELAY_MS - since_ms)))
        if final:
            self._flush_live()
            origin, self._drag_origin = self._drag_origin, None
            self.measurement_changed.emit(self.measurement)
            after = self.edit_state()
            if after.slits != origin.slits:
                # the state is already installed: record the drag without
                # re-applying it, so the live measurement is kept
                command = StateCommand(f"move slit {index + 1}", origin, after,
                                       self._apply_state)
                self.undo_stack.push(command)
                self.budget = None
                self.budget_changed.emit(None)
                self._check_stale()

    @property
    def dragging(self) -> bool:
        """True while a slit drag is in progress."""
        return self._drag_origin is not None

    def _flush_live(self) -> None:
        self._timer.stop()
        if not self._pending:
            return
        pending, self._pending = self._pending, {}
        self._last_flush = time.perf_counter()
        # the outline and the result are redrawn together: one paint per update
        self.slits_changed.emit(self.slits)
        if self._live is None:
            self._remeasure()
            return
        try:
            measurement = None
            for index, slit in pending.items():
                measurement = self._live.update_slit(index, slit)
        except GyrometerError as exc:
            self._set_measurement(None, str(exc))
            return
        self.live_updates += 1
        self._set_measurement(measurement)

    # ------------------------------------------------------------------
    # results made for an older state
    # ------------------------------------------------------------------
    def _state_key(self) -> tuple:
        return (self.geometry, self.slits)

    def _mark_made(self, name: str, key: tuple) -> None:
        self._made_for[name] = key
        self._check_stale()

    def _check_stale(self) -> None:
        """Recompute which results belong to an older geometry or slit set
        (compared by value, so undoing an edit makes them current again)."""
        now = self._state_key()
        stale = frozenset(name for name, key in self._made_for.items()
                          if key[0] != now[0] or key[1] != now[1])
        if stale != self.stale:
            was_absorption = "absorption" in self.stale
            self.stale = stale
            self.stale_changed.emit(stale)
            if self.route == "absorption" and was_absorption != ("absorption" in stale):
                self._remeasure()

    # ------------------------------------------------------------------
    # crash safety
    # ------------------------------------------------------------------
    def _autosave_text(self):
        """``(session TOML, source path)`` of the screen, for the autosave."""
        if self.maps is None or self.geometry is None or self.slits is None:
            return None
        return self.current_session().to_toml(), self.source_path or ""

    def discard_autosave(self) -> None:
        """Remove this window's autosave (called on a clean exit)."""
        self.autosave.discard()

    def recover(self, item: Recoverable) -> bool:
        """Open an autosave left by a crashed window (background).

        The recovered job gets no file name (Save asks for one), and the
        old autosave is removed once it has been opened.
        """
        from gyrometer.core.session import load_session
        session = self._guard("Recover session", load_session, item.session_path)
        if session is None:
            return False

        def after():
            item.discard()
            self.source_path = None
            self.session_changed.emit(self.session)
            self.autosave.save_now()
            self.status.emit(f"Recovered {item.describe()}; save it to keep it")

        return self._open_session(session, f"Recover {item.describe()}", after)

    # ------------------------------------------------------------------
    # measurement
    # ------------------------------------------------------------------
    def _remeasure(self) -> None:
        """Recompute the measurement for the current maps, geometry, slits."""
        if self.maps is None or self.geometry is None or self.slits is None:
            self._set_measurement(None)
            return
        if self.route == "absorption":
            # no live value: the slit spectra are fitted on request
            current = self.absorption is not None and "absorption" not in self.stale
            self._set_measurement(self.absorption.measurement if current else None)
            return
        from gyrometer.core import tw
        try:
            live = self._live
            if live is None:
                live = self._live = tw.LiveMeasurer(self.maps, self.geometry, self.slits)
                measurement = live.measure()
            else:
                measurement = None
                if self.geometry is not live.geometry:
                    measurement = live.set_geometry(self.geometry)
                if self.slits is not live.slits:
                    changed = self._changed_slit(live.slits, self.slits)
                    measurement = (live.update_slit(changed, self.slits.slits[changed])
                                   if changed is not None else live.set_slits(self.slits))
                if measurement is None:
                    measurement = live.measure()
        except GyrometerError as exc:
            self._set_measurement(None, str(exc))
            return
        self._set_measurement(measurement)

    @staticmethod
    def _changed_slit(old, new) -> int | None:
        """Index of the only slit that differs, or None."""
        if old is None or len(old) != len(new) or old.symmetric != new.symmetric:
            return None
        diff = [i for i, (a, b) in enumerate(zip(old.slits, new.slits)) if a != b]
        return diff[0] if len(diff) == 1 else None

    def _set_measurement(self, measurement, problem: str = "") -> None:
        self.measurement = measurement
        self.measurement_changed.emit(measurement)
        if problem:
            self.status.emit(f"No measurement: {problem}")

    # ------------------------------------------------------------------
    # uncertainty budget (background)
    # ------------------------------------------------------------------
    def budget_settings(self):
        """Core's :class:`~gyrometer.core.budget.BudgetSettings` for this job
        (the session's, so the window and the batch run draw alike)."""
        from gyrometer.core.session import Session
        session = self.session if self.session is not None else Session()
        return session.budget

    def run_budget(self) -> bool:
        """Run core's Monte Carlo budget for the current state (background)."""
        if self.maps is None or self.measurement is None:
            self.status.emit("Nothing to run the budget on yet")
            return False
        from gyrometer.core import budget as core_budget
        maps, geometry, slits = self.maps, self.geometry, self.slits
        measurement = self.measurement
        settings = self._guard("Uncertainty budget", self.budget_settings)
        if settings is None:
            return False

        def work(progress, cancel):
            return core_budget.run_budget(maps, geometry, slits, settings,
                                          measurement=measurement,
                                          progress=progress, cancel=cancel)

        def done(result):
            if (self.maps is maps and self.geometry is geometry
                    and self.slits is slits):
                self.budget = result
                self.budget_changed.emit(result)
            else:
                self.status.emit("Budget finished for an older state; run it again")

        return self._start("Uncertainty budget", work, done)

    # ------------------------------------------------------------------
    # geometry estimators (background)
    # ------------------------------------------------------------------
    #: (key, menu text, tooltip) of core's estimators offered in the window.
    ESTIMATORS = (
        ("kinematic", "Fit disk to the velocity field",
         "Centre, PA of the receding line of nodes, inclination and systemic "
         "velocity from a thin rotating disk fitted to the whole velocity map "
         "(bars and spiral streaming bias the kinematic PA)"),
        ("photometric", "PA and inclination from the light",
         "PA and inclination from the shape of the outer isophotes (second "
         "moments of the light); keeps the centre and systemic velocity"),
        ("centroid", "Centre from the light",
         "Flux-weighted centroid of the intensity map; keeps PA, inclination "
         "and systemic velocity"),
    )

    def estimate(self, key: str) -> bool:
        """Run one of core's geometry estimators and apply it (undoable)."""
        if self.maps is None or self.geometry is None:
            return False
        from gyrometer.core import geometry_estimate as ge
        maps, geometry = self.maps, self.geometry

        def work(progress, cancel):
            progress(0, 1, f"estimating ({key})")
            if key == "kinematic":
                est = ge.kinematic_geometry(maps, initial=geometry)
                return est, est.apply_to(geometry)
            if key == "photometric":
                est = ge.photometric_geometry(maps, center=geometry)
                return est, est.apply_to(geometry, keep=("center", "vsys"))
            if key == "centroid":
                est = ge.intensity_centroid(maps, start=geometry)
                return est, est.apply_to(geometry, keep=("pa", "inc", "vsys"))
            raise ValueError(f"unknown estimator {key!r}")

        def done(result):
            est, new_geometry = result
            # keep the history of where values came from, without repeats
            parts = list(dict.fromkeys(p.strip() for p in new_geometry.source.split(";")
                                       if p.strip()))
            new_geometry = new_geometry.with_(source="; ".join(parts[-3:]))
            self.estimate_ready.emit(key, est)
            self.status.emit(describe_estimate(est))
            if self.maps is maps:
                self.set_geometry(new_geometry, f"apply {key} estimate")

        return self._start("Geometry estimate", work, done)

    # ------------------------------------------------------------------
    # sessions and the one pipeline
    # ------------------------------------------------------------------
    def galaxy_name(self) -> str:
        if self.session is not None and self.session.name:
            return self.session.name
        return "" if self.maps is None else self.maps.name

    def current_session(self):
        """The :class:`~gyrometer.core.session.Session` of what is on screen.

        It holds the input files, the moment settings, the geometry and the
        slits exactly as shown, so :func:`gyrometer.core.pipeline.run_session`
        on it reproduces the window's numbers.
        """
        from gyrometer.core.session import Session
        base = self.session if self.session is not None else Session()
        if self.geometry is None or self.slits is None:
            return base
        return self._with_routes(base.with_(
            name=self.galaxy_name(), geometry=self.geometry, geometry_guess=(),
            slits=self.slits, symmetric=self.slits.symmetric))

    @staticmethod
    def _session_for(path: Path, data):
        from gyrometer.core.dataset import Cube
        from gyrometer.core.session import InputSpec, Session
        if isinstance(data, Cube):
            spec = InputSpec(kind="cube", cube=str(path.resolve()))
        else:
            spec = InputSpec(kind="maps", maps=str(path.resolve()))
        tracer = getattr(data, "tracer", "other") or "other"
        return Session(name=data.name or path.stem, tracer=tracer, input=spec)

    @staticmethod
    def _prepare(session, maps, progress):
        """Geometry and slits for new maps, from the session or estimated."""
        from gyrometer.core import pipeline
        progress(0, 1, "disk geometry")
        notes: list[str] = []
        try:
            geometry = pipeline.resolve_geometry(session, maps, notes=notes)
        except GyrometerError as exc:
            geometry = None
            notes.append(f"no geometry estimate ({exc}); starting guess used")
        if geometry is None:
            geometry = Controller._starting_geometry(maps)
        progress(1, 2, "slits")
        slits = pipeline.resolve_slits(session, maps, geometry)
        return geometry, slits, notes

    def _install(self, session, data, maps, geometry, slits, notes,
                 route: str | None = None) -> None:
        from gyrometer.core.dataset import Cube
        self.session = session
        self.cube = data if isinstance(data, Cube) else None
        self.route = route or ("emission" if self.cube is not None else "maps")
        self.radial_settings = self._session_radial(session)
        if self.route == "absorption":
            self.stellar_settings = (self._session_stellar(session)
                                     or self.stellar_settings or self._default_stellar())
        self.set_maps(maps, geometry, slits)
        self.route_changed.emit(self.route)
        self.session_changed.emit(session)
        for note in notes:
            self.status.emit(note)

    def open_session(self, path: str | Path) -> bool:
        """Open a session file: load its data, geometry and slits (background)."""
        from gyrometer.core.session import load_session
        path = Path(path)
        session = self._guard(f"Open {path.name}", load_session, path)
        if session is None:
            return False

        def after():
            self.source_path = str(path)
            self._remember(path)

        return self._open_session(session, f"Open {path.name}", after)

    def _open_session(self, session, title: str, after) -> bool:
        from gyrometer.core import pipeline
        stellar = self._session_stellar(session)
        if stellar is not None:
            return self._open_absorption_session(session, stellar, title, after)

        def work(progress, cancel):
            data, sums = pipeline.load_inputs(session.input, tracer=session.tracer,
                                              progress=progress, cancel=cancel)
            vsys = session.geometry.vsys_kms if session.geometry is not None else \
                dict(session.geometry_guess).get("vsys_kms")
            maps = pipeline.maps_for(data, session, vsys, progress=progress,
                                     cancel=cancel)
            geometry, slits, notes = self._prepare(session, maps, progress)
            return data, maps, geometry, slits, notes

        def done(result):
            data, maps, geometry, slits, notes = result
            self._install(session, data, maps, geometry, slits, notes)
            after()

        return self._start(title, work, done)

    def save_session(self, path: str | Path, overwrite: bool = False,
                     confirm=None) -> bool:
        """Write the current session file (TOML, atomic); True on success.

        An existing file is replaced only with ``overwrite``, or when
        ``confirm(question)`` (the window asks the user) returns True.
        """
        from gyrometer.core.session import save_session
        if self.maps is None:
            return False
        session = self.current_session()
        try:
            save_session(session, path, overwrite)
        except OutputError as exc:
            if overwrite or not Path(path).exists() or confirm is None:
                self._report_error("Save session", exc)
                return False
            if not confirm(f"{path} already exists.\n\nReplace it with the "
                           "current session?"):
                self.status.emit("Session not saved; the existing file is unchanged")
                return False
            return self.save_session(path, overwrite=True)
        except Exception as exc:  # noqa: BLE001 - see _report_error
            self._report_error("Save session", exc)
            return False
        self.settings.set_last_folder(Path(path).resolve().parent)
        self.status.emit(f"Session saved to {path}")
        return True

    # ------------------------------------------------------------------
    # session sections of the other routes (read from core's Session)
    # ------------------------------------------------------------------
    @staticmethod
    def _session_radial(session):
        """The session's radial settings (defaults when it has none)."""
        from gyrometer.core.radial import RadialSettings
        return session.radial if session.radial is not None else RadialSettings()

    @staticmethod
    def _session_stellar(session):
        """The session's absorption-route settings, or None (other routes)."""
        if session.input.kind != "absorption":
            return None
        return session.absorption.stellar

    @staticmethod
    def _default_stellar():
        from gyrometer.core.stellar import StellarSettings
        return StellarSettings()

    def _with_routes(self, session):
        """``session`` carrying the radial settings and the cube's route, so
        that :func:`gyrometer.core.pipeline.run_session` measures what the
        window shows."""
        changes = {}
        if self.radial_settings is not None and (session.radial is not None
                                                 or self.radial is not None):
            changes["radial"] = self.radial_settings   # [radial] enabled
        if self.route == "absorption":
            changes["input"] = replace(session.input, kind="absorption")
            changes["absorption"] = replace(
                session.absorption,
                stellar=self.stellar_settings or self._default_stellar())
        elif self.route == "emission" and session.input.kind == "absorption":
            changes["input"] = replace(session.input, kind="cube")
        return session.with_(**changes) if changes else session

    @property
    def session_knows_absorption(self) -> bool:
        """True: core's session schema holds the absorption route, so a
        saved session re-runs through the slit spectra."""
        from gyrometer.core.session import ROUTES as SESSION_ROUTES
        return "absorption" in SESSION_ROUTES

    # ------------------------------------------------------------------
    # the absorption-line route (background)
    # ------------------------------------------------------------------
    def open_absorption(self, vsys_kms: float | None = None, settings=None) -> bool:
        """Show the open cube for the absorption-line route.

        The map view shows core's continuum image of the cube
        (:func:`gyrometer.core.pipeline.continuum_maps`) with the session's
        geometry, or a starting
        guess whose systemic velocity is ``vsys_kms`` (optical cz, km/s),
        and slits. :meth:`run_absorption` then measures.
        """
        if self.cube is None:
            return False
        cube = self.cube
        base = self.pending_session or self.session or self._session_for(
            Path(self.source_path or "cube.fits"), cube)
        stellar = settings or self.stellar_settings or self._default_stellar()

        base = base.with_(tracer="stars", input=replace(base.input, kind="absorption"),
                          absorption=replace(base.absorption, stellar=stellar))

        def work(progress, cancel):
            return self._absorption_state(base, cube, vsys_kms, progress, cancel)

        def done(result):
            maps, geometry, slits = result
            self.pending_session = None
            self.stellar_settings = stellar
            self._install(base, cube, maps, geometry, slits, (), route="absorption")

        return self._start("Absorption-line cube", work, done)

    @staticmethod
    def _absorption_state(session, cube, vsys_kms, progress, cancel):
        from gyrometer.core import pipeline
        progress(0, 1, "continuum image")
        maps = pipeline.maps_for(cube, session, progress=progress, cancel=cancel)
        geometry = session.geometry
        if geometry is None:
            geometry = Controller._starting_geometry(maps)
            if vsys_kms is not None:
                geometry = geometry.with_(vsys_kms=float(vsys_kms))
        slits = session.slits if session.slits is not None else \
            Controller._starting_slits(maps)
        return maps, geometry, slits

    def _open_absorption_session(self, session, stellar, title, after) -> bool:
        from gyrometer.core import pipeline

        def work(progress, cancel):
            data, _ = pipeline.load_inputs(session.input, tracer=session.tracer,
                                           progress=progress, cancel=cancel)
            return (data,) + self._absorption_state(session, data, None,
                                                    progress, cancel)

        def done(result):
            data, maps, geometry, slits = result
            self.stellar_settings = stellar
            self._install(session, data, maps, geometry, slits, (),
                          route="absorption")
            after()

        return self._start(title, work, done)

    def run_absorption(self) -> bool:
        """Fit the summed spectrum of every slit and measure Omega_p with
        :func:`gyrometer.core.stellar.measure_absorption` (background)."""
        if self.cube is None or self.route != "absorption" or self.slits is None:
            self.status.emit("Open an absorption-line cube first")
            return False
        from gyrometer.core import stellar
        cube, geometry, slits = self.cube, self.geometry, self.slits
        settings = self.stellar_settings or self._default_stellar()
        key = self._state_key()

        def work(progress, cancel):
            return stellar.measure_absorption(cube, geometry, slits, settings,
                                              warn=False, progress=progress,
                                              cancel=cancel)

        def done(result):
            self.absorption = result
            self._mark_made("absorption", key)
            self.absorption_changed.emit(result)
            self._remeasure()
            if "absorption" in self.stale:
                self.status.emit("The slit spectra were measured for an older "
                                 "state; measure again")

        return self._start("Measure from slit spectra", work, done)

    # ------------------------------------------------------------------
    # pattern speed against radius (background)
    # ------------------------------------------------------------------
    def set_radial_settings(self, settings) -> None:
        """Keep the :class:`~gyrometer.core.radial.RadialSettings` used by
        :meth:`run_radial` and saved with the session."""
        if settings != self.radial_settings:
            self.radial_settings = settings
            self.autosave.schedule()

    def run_radial(self) -> bool:
        """Measure Omega_p in annuli with :func:`gyrometer.core.radial.measure_radial`
        on the current maps, geometry and slits (background)."""
        if self.maps is None or self.geometry is None or self.slits is None:
            self.status.emit("Nothing to measure yet")
            return False
        from gyrometer.core import radial
        from gyrometer.core.pipeline import radial_rng
        maps, geometry, slits = self.maps, self.geometry, self.slits
        settings = self.radial_settings or radial.RadialSettings()
        seed = self.budget_settings().seed
        key = self._state_key()

        def work(progress, cancel):
            return radial.measure_radial(maps, geometry, slits, settings,
                                         rng=radial_rng(seed),
                                         progress=progress, cancel=cancel,
                                         warn=False)

        def done(result):
            self.radial = result
            self._mark_made("radial", key)
            self.radial_changed.emit(result)
            for note in result.warnings[:2]:
                self.status.emit(note)

        return self._start("Pattern speed against radius", work, done)

    def open_sample(self) -> bool:
        """Open the synthetic sample galaxy LBDP-037 (stellar maps).

        Without a ``sample_cubes`` folder (an installed package), the
        samples are first written by :func:`gyrometer.core.samples.write_samples`
        into the per-user data folder, in the background.
        """
        path = sample_path()
        if path is not None:
            return self.open_path(path)
        from PySide6.QtCore import QStandardPaths

        from gyrometer.core.samples import write_samples
        folder = Path(QStandardPaths.writableLocation(
            QStandardPaths.StandardLocation.GenericDataLocation) or Path.home()) \
            / "gyrometer" / "sample_cubes"

        def work(progress, cancel):
            target = folder / "LBDP-037_stellar_maps.fits"
            if not target.is_file():
                write_samples(folder, overwrite=True, progress=progress)
            return target

        return self._start("Write sample files", work, self._open_later)

    def _open_later(self, path) -> None:
        # the runner is still finishing the previous task: open on the next turn
        QTimer.singleShot(0, lambda: self.open_path(path))

    def run_full(self) -> bool:
        """Run :func:`gyrometer.core.pipeline.run_session` on the current
        session (background): measurement, budget, rotation curve,
        resonances and bar, exactly as the command line does."""
        if self.maps is None:
            return False
        from gyrometer.core import pipeline
        session = self.current_session()
        state = self.edit_state()
        key = self._state_key()

        def work(progress, cancel):
            return pipeline.run_session(session, progress=progress, cancel=cancel)

        def done(result):
            self.pipeline_result = result
            radial_result = getattr(result, "radial", None)
            if self.edit_state() != state:
                self.status.emit("The full run finished for an older state; "
                                 "run it again")
                return
            self.budget = result.budget
            self.dynamics = dynamics_from(result)
            if result.session.input.kind == "cube":
                self._set_measurement(result.measurement)
            self.budget_changed.emit(self.budget)
            self.dynamics_changed.emit(self.dynamics)
            self.checks_changed.emit(result)
            self._mark_made("full", key)
            absorption = getattr(result, "absorption", None)
            if absorption is not None and self.route == "absorption":
                self.absorption = absorption
                self._mark_made("absorption", key)
                self.absorption_changed.emit(absorption)
                self._remeasure()
            if radial_result is not None:
                self.radial = radial_result
                self._mark_made("radial", key)
                self.radial_changed.emit(radial_result)
            for note in result.warnings[:3]:
                self.status.emit(note)

        return self._start("Full measurement", work, done)

    def export_results(self, folder: str | Path, overwrite: bool = False,
                       confirm=None) -> bool:
        """Run the pipeline on the current session and write everything the
        command line writes (tables, figures, regions, session) to
        ``folder`` (background).

        Core's export checks every target first; if one exists and
        ``overwrite`` is false, nothing is written and ``confirm(question)``
        is asked whether to replace them (then the export runs again with
        ``overwrite=True``, reusing the computed result).
        """
        if self.maps is None:
            return False
        from gyrometer.core import pipeline
        session = self.current_session()
        reuse = self.pipeline_result
        if reuse is not None and (reuse.session.geometry != session.geometry
                                  or reuse.session.slits != session.slits
                                  or reuse.session.input.files() != session.input.files()):
            reuse = None
        folder = Path(folder)

        def work(progress, cancel):
            result = reuse or pipeline.run_session(session, progress=progress,
                                                   cancel=cancel)
            progress(0, 1, "writing outputs")
            try:
                return result, pipeline.export_result(result, folder,
                                                      overwrite=overwrite,
                                                      cancel=cancel)
            except OutputError as exc:
                if overwrite or confirm is None:
                    raise
                return result, exc

        def done(out):
            result, paths = out
            self.pipeline_result = result
            if isinstance(paths, OutputError):
                existing = [p.name for p in pipeline.output_paths(result, folder).values()
                            if p.exists()]
                shown = ", ".join(existing[:6]) + (" \u2026" if len(existing) > 6 else "")
                question = (f"{len(existing)} file(s) in {folder} would be replaced"
                            f" ({shown}).\n\nReplace them?")
                if existing and confirm(question):
                    QTimer.singleShot(0, lambda: self.export_results(
                        folder, overwrite=True))
                elif existing:
                    self.status.emit("Nothing exported; the existing files are unchanged")
                else:
                    self._report_error("Export results", paths)
                return
            self.last_export = paths
            self.settings.set_last_folder(folder)
            self.status.emit(f"Wrote {len(paths)} files to {folder}")

        return self._start("Export results", work, done)

def sample_path() -> Path | None:
    """The sample map set LBDP-037 shipped in ``sample_cubes/``, if present."""
    here = Path(__file__).resolve().parent
    for folder in (here.parent / "sample_cubes", Path.cwd() / "sample_cubes"):
        candidate = folder / "LBDP-037_stellar_maps.fits"
        if candidate.is_file():
            return candidate
    return None


def describe_estimate(est) -> str:
    """One line with an estimator's values and 1-sigma errors."""
    parts = []
    if est.ra_deg is not None:
        parts.append(f"centre \u00b1 {est.center_err_arcsec:.2g}\u2033")
    if est.pa_deg is not None:
        parts.append(f"PA {est.pa_deg:.1f} \u00b1 {est.pa_err_deg:.1f}\u00b0"
                     + (" (mod 180)" if est.pa_ambiguous else ""))
    if est.inc_deg is not None:
        parts.append(f"i {est.inc_deg:.1f} \u00b1 {est.inc_err_deg:.1f}\u00b0")
    if est.vsys_kms is not None:
        parts.append(f"V_sys {est.vsys_kms:.1f} \u00b1 {est.vsys_err_kms:.1f} km/s")
    method = est.method.split(" (")[0] if est.method else "estimate"
    return f"{method}: " + ", ".join(parts)


def dynamics_from(result):
    """Collect what the dynamics tab shows from a pipeline result."""
    from gyrometer.core.frequencies import frequency_curves
    from .dynamicsview import Dynamics
    fit = result.curve_fit
    distance = result.session.geometry.distance_mpc if result.session.geometry else None
    freqs = omega_p = None
    if fit is not None:
        lo, hi = fit.r_range_arcsec
        r = np.linspace(max(lo, 1e-3 * hi), hi, 300)  # no extrapolation
        freqs = frequency_curves(fit, r, distance_mpc=distance)
    if result.budget is not None and freqs is not None:
        c = result.budget.combined
        scale = 1.0
        if distance is not None:
            from gyrometer.core.geometry import kpc_per_arcsec
            scale = 1.0 / kpc_per_arcsec(distance)
        omega_p = (c.median * scale, c.p16 * scale, c.p84 * scale)
    bar = result.bar
    length = bar.length
    rate = bar.rate
    notes = tuple(n for n in (bar.note,) if n)
    return Dynamics(curve=result.rotation_curve, model=fit, frequencies=freqs,
                    omega_p=omega_p, resonances=result.resonances,
                    bar_length_arcsec=None if length is None else length.length_arcsec,
                    bar_length_err_arcsec=None if length is None else length.err_arcsec,
                    ratio=None if rate is None else (rate.median, rate.p16, rate.p84),
                    ratio_class="" if rate is None else rate.classification,
                    notes=notes)
