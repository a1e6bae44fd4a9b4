"""The map view: one of the maps with overlays, colour scale and read-out.

``QtMapView`` follows the controller: it shows the chosen map of the current
:class:`~gyrometer.core.dataset.MapSet`, draws the disk geometry, the slits
and the resonance circles, and reports the sky position, pixel and value
under the cursor. Edits made with the mouse go back to the controller.
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QPointF, Qt, Signal
from PySide6.QtWidgets import (QComboBox, QHBoxLayout, QLabel, QSizePolicy,
                               QVBoxLayout, QWidget)

from .overlays import Compass, GeometryOverlay, ResonanceLayer, SlitLayer
from .skyframe import SkyFrame

__all__ = ["QtMapView", "MAP_KINDS", "map_levels"]

#: Map kinds: (attribute of MapSet, menu label, colour map, unit label).
MAP_KINDS = {
    "intensity": ("intensity", "Tracer intensity", "inferno", None),
    "velocity": ("velocity_kms", "Line-of-sight velocity", "CET-D1", "km/s"),
    "dispersion": ("dispersion_kms", "Velocity dispersion", "viridis", "km/s"),
    "velocity_err": ("velocity_err_kms", "Velocity uncertainty", "cividis", "km/s"),
    "intensity_err": ("intensity_err", "Intensity uncertainty", "cividis", None),
    # absorption route: the band-integrated continuum of the pixels the slits
    # read (AbsorptionResult.continuum_map), available after a measurement
    "continuum": ("continuum_map", "Continuum in the slits", "inferno", None),
}

#: Colour-scale stretches: label -> lower/upper percentile.
STRETCHES = {"99.5 %": 0.5, "98 %": 2.0, "95 %": 5.0, "min - max": 0.0}


def map_levels(kind: str, data: np.ndarray, vsys_kms: float | None,
               clip_percent: float) -> tuple[float, float]:
    """Colour-scale limits; velocity maps are symmetric about ``vsys_kms``."""
    finite = data[np.isfinite(data)]
    if finite.size == 0:
        return 0.0, 1.0
    if kind == "velocity" and vsys_kms is not None:
        half = float(np.percentile(np.abs(finite - vsys_kms), 100.0 - clip_percent))
        half = half if half > 0 else 1.0
        return vsys_kms - half, vsys_kms + half
    lo = float(np.percentile(finite, clip_percent))
    hi = float(np.percentile(finite, 100.0 - clip_percent))
    if not hi > lo:
        hi = lo + 1.0
    return lo, hi


class QtMapView(QWidget):
    """Map display with the geometry and slit overlays.

    Parameters
    ----------
    controller : Controller
    """

    cursor_text = Signal(str)

    def __init__(self, controller, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.controller = controller
        self.kind = "velocity"
        self._frame: SkyFrame | None = None
        self._maps = None
        self._continuum = None

        self.kind_box = QComboBox()
        self.kind_box.setToolTip("Which map to show under the slits")
        self.stretch_box = QComboBox()
        self.stretch_box.addItems(list(STRETCHES))
        self.stretch_box.setToolTip(
            "Colour-scale range: central percentile of the pixel values (the "
            "velocity scale stays centred on the systemic velocity); drag the "
            "bar's handles for a custom range")
        top = QHBoxLayout()
        top.addWidget(QLabel("Map:"))
        top.addWidget(self.kind_box, 1)
        top.addWidget(QLabel("Colour range:"))
        top.addWidget(self.stretch_box)

        self.graphics = pg.GraphicsLayoutWidget()
        self.graphics.setBackground("#1b1d22")
        self.plot: pg.PlotItem = self.graphics.addPlot()
        self.plot.setAspectLocked(True)
        self.plot.setLabel("bottom", "x (pixel)")
        self.plot.setLabel("left", "y (pixel)")
        self.plot.getViewBox().setMenuEnabled(False)
        self.image = pg.ImageItem()
        self.image.setZValue(-10)
        self.plot.addItem(self.image)
        self.colorbar = pg.ColorBarItem(colorMap="CET-D1", interactive=True, width=14)
        self.colorbar.setImageItem(self.image)
        self.graphics.addItem(self.colorbar)

        self.compass = Compass(self.plot)
        self.geometry_overlay = GeometryOverlay(self.plot, self._geometry_edit)
        self.slit_layer = SlitLayer(self.plot, controller.move_slit,
                                    controller.select_slit)
        self.resonance_layer = ResonanceLayer(self.plot)

        self.readout = QLabel("Open a cube or a set of maps (File > Open, or drop a file here)")
        self.readout.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.readout.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)

        layout = QVBoxLayout(self)
        layout.setContentsMargins(2, 2, 2, 2)
        layout.addLayout(top)
        layout.addWidget(self.graphics, 1)
        layout.addWidget(self.readout)

        self.kind_box.currentIndexChanged.connect(self._kind_chosen)
        self.stretch_box.currentIndexChanged.connect(lambda _: self._show_image())
        self.graphics.scene().sigMouseMoved.connect(self._mouse_moved)
        self.graphics.setFocusPolicy(Qt.FocusPolicy.StrongFocus)

        controller.data_changed.connect(self._data_changed)
        controller.geometry_changed.connect(self._geometry_changed)
        controller.slits_changed.connect(self._slits_changed)
        controller.selection_changed.connect(self.slit_layer.set_selected)
        controller.measurement_changed.connect(self._measurement_changed)
        controller.dynamics_changed.connect(self._dynamics_changed)
        controller.absorption_changed.connect(self._absorption_changed)

    def _layer(self, attr: str):
        """The array shown for a map kind (None if this data has none)."""
        if attr == "continuum_map":
            return self._continuum
        value = getattr(self._maps, attr, None)
        if value is None or not np.isfinite(value).any():
            return None
        return value

    def _absorption_changed(self, result) -> None:
        self._continuum = None if result is None else np.asarray(result.continuum_map)
        if self._maps is not None:
            self._data_changed(self._maps, keep_range=True)
            if result is not None:
                self.set_kind("continuum")

    # -- controller -> view ------------------------------------------------
    def _data_changed(self, maps, keep_range: bool = False) -> None:
        if maps is not self._maps and not keep_range:
            self._continuum = None
        self._maps = maps
        self.kind_box.blockSignals(True)
        self.kind_box.clear()
        if maps is not None:
            for key, (attr, label, _, _) in MAP_KINDS.items():
                if self._layer(attr) is not None:
                    self.kind_box.addItem(label, key)
            index = max(self.kind_box.findData(self.kind), 0)
            self.kind_box.setCurrentIndex(index)
            self.kind = self.kind_box.currentData()
        self.kind_box.blockSignals(False)
        self._show_image()
        if maps is not None and not keep_range:
            self.readout.setText("Move the cursor over the map for the sky position, "
                                 "pixel and value; drag slits and the geometry handles")
            ny, nx = maps.shape
            self.plot.setRange(xRange=(-0.5, nx - 0.5), yRange=(-0.5, ny - 0.5),
                               padding=0.02)

    def _kind_chosen(self, _index: int) -> None:
        self.kind = self.kind_box.currentData() or "intensity"
        self._show_image()

    def set_kind(self, kind: str) -> None:
        index = self.kind_box.findData(kind)
        if index >= 0:
            self.kind_box.setCurrentIndex(index)

    def _show_image(self) -> None:
        maps = self._maps
        if maps is None:
            self.image.clear()
            return
        attr, label, cmap, unit = MAP_KINDS[self.kind]
        data = np.asarray(self._layer(attr), dtype=np.float32)
        unit = unit or maps.intensity_unit or "arbitrary units"
        geometry = self.controller.geometry
        vsys = geometry.vsys_kms if geometry is not None else None
        clip = STRETCHES[self.stretch_box.currentText()]
        levels = map_levels(self.kind, data, vsys, clip)
        self.image.setImage(data, autoLevels=False, levels=levels)
        ny, nx = data.shape
        self.image.setRect(-0.5, -0.5, nx, ny)
        self.colorbar.setColorMap(pg.colormap.get(cmap))
        self.colorbar.setLevels(levels)
        name = maps.name or ""
        self.plot.setTitle(f"{name}: {label.lower()}" if name else label, size="10pt")
        self.kind_box.setItemText(self.kind_box.currentIndex(), f"{label} ({unit})")
        self.colorbar.setToolTip(f"{label} ({unit}): drag the handles to set the "
                                 "colour range")

    def _geometry_changed(self, geometry) -> None:
        maps = self._maps
        if maps is None or geometry is None:
            self._frame = None
        else:
            self._frame = SkyFrame.from_wcs(maps.wcs, geometry, maps.shape)
        shape = maps.shape if maps is not None else (1, 1)
        self.compass.update(self._frame, shape)
        self.geometry_overlay.update(self._frame, geometry,
                                     None if maps is None else maps.wcs, shape)
        self.slit_layer.update(self._frame, self.controller.slits,
                               self.controller.selected)
        if self.kind == "velocity":
            self._show_image()
        self._dynamics_changed(self.controller.dynamics)

    def _slits_changed(self, slits) -> None:
        if self._frame is None:
            return
        if slits is not None and len(slits) == len(self.slit_layer.items):
            for i, item in enumerate(self.slit_layer.items):
                if item.slit != slits.slits[i]:
                    self.slit_layer.update_one(i, slits)
        else:
            self.slit_layer.update(self._frame, slits, self.controller.selected)

    def _measurement_changed(self, measurement) -> None:
        used = None if measurement is None else measurement.used
        if self._frame is not None:
            self.slit_layer.set_used(used)

    def _dynamics_changed(self, dynamics) -> None:
        radii = [] if dynamics is None else list(dynamics.radii_arcsec())
        self.resonance_layer.update(self._frame, radii)

    # -- view -> controller -------------------------------------------------
    def _geometry_edit(self, text: str, changes: dict) -> None:
        self.controller.update_geometry(text, **changes)

    # -- cursor read-out ----------------------------------------------------
    def _mouse_moved(self, scene_pos: QPointF) -> None:
        maps = self._maps
        if maps is None or not self.plot.sceneBoundingRect().contains(scene_pos):
            return
        p = self.plot.getViewBox().mapSceneToView(scene_pos)
        self.readout.setText(self.describe(p.x(), p.y()))

    def describe(self, x: float, y: float) -> str:
        """Read-out text for the 0-based pixel position ``(x, y)``."""
        maps = self._maps
        ny, nx = maps.shape
        i, j = int(round(y)), int(round(x))
        world = maps.wcs.celestial.pixel_to_world(x, y).icrs
        sky = world.to_string("hmsdms", precision=2, sep=":")
        text = f"pixel ({j}, {i})   RA, Dec {sky.replace(' ', ', ')}"
        if self._frame is not None:
            east, north = self._frame.to_offsets(x, y)
            text += f"   offset E {float(east):+.2f}\u2033 N {float(north):+.2f}\u2033"
        if 0 <= i < ny and 0 <= j < nx:
            attr, label, _, unit = MAP_KINDS[self.kind]
            value = self._layer(attr)[i, j]
            unit = unit or maps.intensity_unit or ""
            text += f"   {label.lower()}: {value:.4g} {unit}"
        return text
