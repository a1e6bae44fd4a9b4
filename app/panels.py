"""Side panels: disk geometry and slits.

Each panel shows what the controller holds and sends typed values back to
it; nothing here computes anything.
"""

from __future__ import annotations

import math

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (QAbstractItemView, QCheckBox, QDoubleSpinBox,
                               QGridLayout, QGroupBox, QHBoxLayout,
                               QHeaderView, QLabel, QPushButton, QSpinBox,
                               QTableWidget, QTableWidgetItem, QVBoxLayout,
                               QWidget)

__all__ = ["QtGeometryPanel", "QtSlitPanel"]


def _spin(lo: float, hi: float, decimals: int, suffix: str, tip: str,
          step: float = 1.0) -> QDoubleSpinBox:
    box = QDoubleSpinBox()
    box.setRange(lo, hi)
    box.setDecimals(decimals)
    box.setSingleStep(step)
    box.setSuffix(suffix)
    box.setToolTip(tip)
    box.setKeyboardTracking(False)
    box.setAccelerated(True)
    return box


#: Geometry fields: name -> (label, lo, hi, decimals, suffix, step, tooltip).
_GEOMETRY_FIELDS = {
    "ra_deg": ("Centre RA", 0.0, 360.0, 6, "\u00b0", 1e-4,
               "Right ascension (ICRS) of the disk centre, degrees; drag the "
               "cross on the map or type a value"),
    "dec_deg": ("Centre Dec", -90.0, 90.0, 6, "\u00b0", 1e-4,
                "Declination (ICRS) of the disk centre, degrees"),
    "pa_deg": ("Line of nodes PA", 0.0, 360.0, 2, "\u00b0", 0.5,
               "Position angle of the receding half of the line of nodes, "
               "north through east. Errors of a few degrees change the "
               "pattern speed by tens of percent: the slits turn with it"),
    "inc_deg": ("Inclination", 0.5, 89.5, 2, "\u00b0", 0.5,
                "Disk inclination (0 = face-on). The pattern speed scales as "
                "1/sin i; below about 15\u00b0 or above about 70\u00b0 the "
                "method is unreliable"),
    "vsys_kms": ("Systemic velocity", -1e5, 1e5, 2, " km/s", 1.0,
                 "Systemic velocity in the data's velocity convention; an "
                 "error here shifts only the intercept of the fit"),
    "distance_mpc": ("Distance", 0.0, 1e4, 2, " Mpc", 0.5,
                     "Distance used to convert arcsec to kpc (0 = none: "
                     "results in km/s/arcsec only)"),
}

_ERROR_FIELDS = {
    "ra_deg": ("center_err_arcsec", 4, "\u2033",
               "1-sigma uncertainty of the centre, arcsec (used by the budget)"),
    "pa_deg": ("pa_err_deg", 2, "\u00b0",
               "1-sigma uncertainty of the position angle (used by the budget)"),
    "inc_deg": ("inc_err_deg", 2, "\u00b0",
                "1-sigma uncertainty of the inclination (used by the budget)"),
    "vsys_kms": ("vsys_err_kms", 2, " km/s",
                 "1-sigma uncertainty of the systemic velocity"),
    "distance_mpc": ("distance_err_mpc", 2, " Mpc",
                     "1-sigma uncertainty of the distance"),
}


class QtGeometryPanel(QGroupBox):
    """Typed values of the disk geometry, with their 1-sigma errors."""

    def __init__(self, controller, parent: QWidget | None = None) -> None:
        super().__init__("Disk geometry", parent)
        self.controller = controller
        self.values: dict[str, QDoubleSpinBox] = {}
        self.errors: dict[str, QDoubleSpinBox] = {}
        self.estimate_buttons: dict[str, QPushButton] = {}
        grid = QGridLayout(self)
        grid.setVerticalSpacing(3)
        for row, (name, (label, lo, hi, dec, suffix, step, tip)) in enumerate(
                _GEOMETRY_FIELDS.items()):
            text = QLabel(label)
            text.setToolTip(tip)
            box = _spin(lo, hi, dec, suffix, tip, step)
            if name in ("pa_deg",):
                box.setWrapping(True)
            if name == "distance_mpc":
                box.setSpecialValueText("not set")
            box.editingFinished.connect(lambda n=name: self._value_edited(n))
            grid.addWidget(text, row, 0)
            grid.addWidget(box, row, 1)
            self.values[name] = box
            if name in _ERROR_FIELDS:
                err_name, edec, esuffix, etip = _ERROR_FIELDS[name]
                err = _spin(0.0, 1e4, edec, esuffix, etip, 0.1)
                err.editingFinished.connect(lambda n=err_name: self._error_edited(n))
                grid.addWidget(QLabel("\u00b1"), row, 2)
                grid.addWidget(err, row, 3)
                self.errors[err_name] = err
        self.source = QLabel("")
        self.source.setWordWrap(True)
        self.source.setToolTip("Where the current values came from")
        grid.addWidget(self.source, len(_GEOMETRY_FIELDS), 0, 1, 4)
        self.estimate_text = QLabel("")
        self.estimate_text.setWordWrap(True)
        self.estimate_text.setToolTip("Values and 1-sigma errors returned by the "
                                      "last estimator run")
        grid.addWidget(self.estimate_text, len(_GEOMETRY_FIELDS) + 1, 0, 1, 4)
        controller.geometry_changed.connect(self.show_geometry)
        controller.estimate_ready.connect(self.show_estimate)
        self.setEnabled(False)

    def add_estimator(self, key: str, text: str, tip: str, slot) -> QPushButton:
        """Add a button that runs one of core's estimators."""
        button = QPushButton(text)
        button.setToolTip(tip)
        button.clicked.connect(slot)
        layout: QGridLayout = self.layout()
        row = layout.rowCount()
        layout.addWidget(button, row, 0, 1, 4)
        self.estimate_buttons[key] = button
        return button

    def show_estimate(self, key: str, estimate) -> None:
        from .controller import describe_estimate
        self.estimate_text.setText(f"<small>Last estimate: {describe_estimate(estimate)}</small>")

    def show_geometry(self, geometry) -> None:
        self.setEnabled(geometry is not None)
        if geometry is None:
            return
        for name, box in self.values.items():
            value = getattr(geometry, name)
            box.blockSignals(True)
            box.setValue(0.0 if value is None else float(value))
            box.blockSignals(False)
        for name, box in self.errors.items():
            box.blockSignals(True)
            box.setValue(float(getattr(geometry, name)))
            box.blockSignals(False)
        centre = geometry.center.to_string("hmsdms", precision=2, sep=":")
        self.source.setText(f"<small>Centre {centre.replace(' ', ', ')}<br>"
                            f"<i>Source: {geometry.source}</i></small>")

    def _value_edited(self, name: str) -> None:
        geometry = self.controller.geometry
        if geometry is None:
            return
        value = self.values[name].value()
        if name == "distance_mpc":
            value = None if value <= 0 else value
            if value == geometry.distance_mpc:
                return
        elif math.isclose(value, getattr(geometry, name), rel_tol=0, abs_tol=1e-9):
            return
        label = _GEOMETRY_FIELDS[name][0].lower()
        self.controller.update_geometry(f"set {label}", **{name: value,
                                                           "source": "typed by the user"})

    def _error_edited(self, name: str) -> None:
        geometry = self.controller.geometry
        if geometry is None:
            return
        value = self.errors[name].value()
        if not math.isclose(value, getattr(geometry, name), abs_tol=1e-12):
            self.controller.update_geometry("set uncertainty", **{name: value})


class QtSlitPanel(QGroupBox):
    """Lay out a slit set from parameters and edit single slits."""

    COLUMNS = ("Y \u2033", "Width \u2033", "\u00bdL \u2033", "\u27e8X\u27e9 \u2033",
               "\u27e8V\u27e9 km/s", "Cover")

    def __init__(self, controller, parent: QWidget | None = None) -> None:
        super().__init__("Slits", parent)
        self.controller = controller
        self.count = QSpinBox()
        self.count.setRange(1, 200)
        self.count.setValue(9)
        self.count.setToolTip("Number of slits in the set, spread evenly about the centre")
        self.spacing = _spin(0.01, 1e4, 2, "\u2033", "Distance between slit centre "
                             "lines; at least the PSF FWHM keeps slits independent")
        self.width = _spin(0.01, 1e4, 2, "\u2033", "Full width of each slit "
                           "(in principle any width gives the same pattern speed)")
        self.half_length = _spin(0.01, 1e5, 2, "\u2033", "Half-length along the "
                                 "line of nodes; the integrals must have converged "
                                 "(reach where the pattern fades)")
        self.symmetric = QCheckBox("Mirror masking (X \u2192 \u2212X)")
        self.symmetric.setChecked(True)
        self.symmetric.setToolTip(
            "Truncate each slit to the same extent on both sides of the minor "
            "axis and mirror masked pixels, so the axisymmetric disk cancels")
        self.layout_button = QPushButton("Lay out slit set")
        self.layout_button.setToolTip("Replace the slits with an evenly spaced set "
                                      "built from the values above (undoable)")
        self.resize_button = QPushButton("Apply width and length to all")
        self.resize_button.setToolTip("Give every slit the width and half-length above")
        form = QGridLayout()
        for row, (label, box) in enumerate((("Slits", self.count),
                                            ("Spacing", self.spacing),
                                            ("Width", self.width),
                                            ("Half-length", self.half_length))):
            form.addWidget(QLabel(label), row // 2, 2 * (row % 2))
            form.addWidget(box, row // 2, 2 * (row % 2) + 1)

        self.table = QTableWidget(0, len(self.COLUMNS))
        self.table.setHorizontalHeaderLabels(self.COLUMNS)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        self.table.verticalHeader().setDefaultSectionSize(20)
        self.table.setToolTip("One row per slit: offset Y across the line of nodes, "
                              "width, half-length, the integrals <X> and <V> - V_sys, "
                              "and the fraction of the slit with valid data; slits "
                              "left out of the fit are greyed")

        self.add_button = QPushButton("Add")
        self.add_button.setToolTip("Add a slit one spacing beyond the outermost (Ctrl+Shift+A)")
        self.duplicate_button = QPushButton("Duplicate")
        self.duplicate_button.setToolTip("Copy the selected slit, shifted by half a spacing (Ctrl+D)")
        self.remove_button = QPushButton("Remove")
        self.remove_button.setToolTip("Remove the selected slit (Delete)")
        buttons = QHBoxLayout()
        for b in (self.add_button, self.duplicate_button, self.remove_button):
            buttons.addWidget(b)

        layout = QVBoxLayout(self)
        layout.addLayout(form)
        row = QHBoxLayout()
        row.addWidget(self.layout_button)
        row.addWidget(self.resize_button)
        layout.addLayout(row)
        layout.addWidget(self.symmetric)
        layout.addWidget(self.table, 1)
        layout.addLayout(buttons)

        self.layout_button.clicked.connect(self._lay_out)
        self.resize_button.clicked.connect(self._resize)
        self.symmetric.toggled.connect(controller.set_symmetric)
        self.add_button.clicked.connect(controller.add_slit)
        self.duplicate_button.clicked.connect(lambda: controller.duplicate_slit())
        self.remove_button.clicked.connect(lambda: controller.remove_slit())
        self.table.itemSelectionChanged.connect(self._row_selected)
        controller.slits_changed.connect(self.show_slits)
        controller.selection_changed.connect(self.show_selection)
        controller.measurement_changed.connect(self.show_measurement)
        controller.data_changed.connect(self._data_changed)
        self._shown: dict = {}
        self.setEnabled(False)

    def _data_changed(self, maps) -> None:
        self.setEnabled(maps is not None)

    def parameters(self) -> dict:
        return dict(count=self.count.value(), spacing_arcsec=self.spacing.value(),
                    width_arcsec=self.width.value(),
                    half_length_arcsec=self.half_length.value(),
                    symmetric=self.symmetric.isChecked())

    def _lay_out(self) -> None:
        self.controller.make_slits(**self.parameters())

    def _resize(self) -> None:
        self.controller.resize_slits(self.width.value(), self.half_length.value())

    def _row_selected(self) -> None:
        rows = {i.row() for i in self.table.selectedIndexes()}
        self.controller.select_slit(min(rows) if rows else -1)

    def show_slits(self, slits) -> None:
        if slits is None:
            self.table.setRowCount(0)
            self._shown = {}
            return
        self.symmetric.blockSignals(True)
        self.symmetric.setChecked(slits.symmetric)
        self.symmetric.blockSignals(False)
        if self.table.rowCount() != len(slits):
            self.table.setRowCount(len(slits))
            self._shown = {}
            if len(slits):
                s0 = slits.slits[0]
                offsets = sorted(s.offset_arcsec for s in slits)
                for box, value in ((self.width, s0.width_arcsec),
                                   (self.half_length, s0.half_length_arcsec),
                                   (self.spacing, (offsets[-1] - offsets[0]) /
                                    max(len(offsets) - 1, 1) or s0.width_arcsec)):
                    box.blockSignals(True)
                    box.setValue(value)
                    box.blockSignals(False)
                self.count.setValue(len(slits))
        for i, s in enumerate(slits):
            if self._shown.get(i) == s:
                continue
            self._shown[i] = s
            for j, value in enumerate((s.offset_arcsec, s.width_arcsec,
                                       s.half_length_arcsec)):
                self._set(i, j, f"{value:.2f}")

    def _set(self, row: int, col: int, text: str, enabled: bool = True) -> None:
        item = self.table.item(row, col)
        if item is None:
            item = QTableWidgetItem()
            item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
            self.table.setItem(row, col, item)
        item.setText(text)
        flags = item.flags()
        item.setFlags(flags | Qt.ItemFlag.ItemIsEnabled if enabled
                      else flags & ~Qt.ItemFlag.ItemIsEnabled)

    def show_measurement(self, m) -> None:
        n = self.table.rowCount()
        rows = range(n)
        if self.controller.dragging and 0 <= self.controller.selected < n:
            rows = (self.controller.selected,)   # the rest follow when the drag ends
        for i in rows:
            if m is None or i >= m.integrals.n_slits:
                for j in (3, 4, 5):
                    self._set(i, j, "\u2013")
                continue
            it = m.integrals
            used = bool(m.used[i])
            self._set(i, 3, f"{it.x_mean_arcsec[i]:.3f}", used)
            self._set(i, 4, f"{it.v_mean_kms[i]:.2f}", used)
            self._set(i, 5, f"{100 * it.coverage[i]:.0f} %", used)

    def show_selection(self, index: int) -> None:
        self.table.blockSignals(True)
        self.table.clearSelection()
        if 0 <= index < self.table.rowCount():
            self.table.selectRow(index)
        self.table.blockSignals(False)
