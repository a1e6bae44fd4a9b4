"""The live result: <V> against <X>, the fit, the pattern speed, the budget.

``QtResultView`` redraws whenever the controller's measurement changes, also
while a slit is dragged. The numbers shown are the fields of core's
:class:`~gyrometer.core.results.TWMeasurement` and
:class:`~gyrometer.core.results.UncertaintyBudget`, formatted only.
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (QGraphicsItem, QHBoxLayout, QHeaderView, QLabel, QPushButton,
                               QSizePolicy, QTableWidget, QTableWidgetItem,
                               QVBoxLayout, QWidget)

from gyrometer.core.geometry import kpc_per_arcsec

__all__ = ["QtResultView", "format_pattern_speed", "format_live", "format_budget"]

_POINT = QColor(40, 110, 200)
_SELECTED = QColor(230, 150, 0)
_UNUSED = QColor(170, 170, 170)
_FIT = QColor(200, 40, 60)


def _fmt(value: float, err: float) -> str:
    """Value and error with the error's two significant figures."""
    if not (math.isfinite(err) and err > 0):
        return f"{value:.3g}"
    digits = max(0, 1 - int(math.floor(math.log10(err))))
    return f"{value:.{digits}f} \u00b1 {err:.{digits}f}"


def format_pattern_speed(m) -> str:
    """Rich text of Omega_p in km/s/arcsec and (with a distance) km/s/kpc."""
    if m is None:
        return "<b>\u03a9<sub>p</sub></b> \u2013 (no measurement)"
    text = (f"<b>\u03a9<sub>p</sub> = {_fmt(m.omega_p_kms_arcsec, m.omega_p_err_kms_arcsec)}"
            f"</b> km s<sup>\u22121</sup> arcsec<sup>\u22121</sup>")
    if m.omega_p_kms_kpc is not None:
        text += (f"<br><b>= {_fmt(m.omega_p_kms_kpc, m.omega_p_err_kms_kpc)}</b>"
                 f" km s<sup>\u22121</sup> kpc<sup>\u22121</sup>"
                 f" (D = {m.geometry.distance_mpc:g} Mpc)")
    else:
        text += "<br><i>set a distance for km s<sup>\u22121</sup> kpc<sup>\u22121</sup></i>"
    f = m.fit
    text += (f"<br><small>slope \u03a9<sub>p</sub> sin i = {_fmt(f.slope, f.slope_err)},"
             f" intercept {_fmt(f.intercept, f.intercept_err)} km/s,"
             f" \u03c7\u00b2/dof = {f.reduced_chi2:.2f}, {int(np.sum(m.used))} of "
             f"{m.integrals.n_slits} slits, i = {m.geometry.inc_deg:.1f}\u00b0</small>"
             "<br><small>fit-only error; run the uncertainty budget for the "
             "full interval</small>")
    return text


def format_live(m) -> str:
    """Short rich text of Omega_p for the corner of the live plot."""
    if m is None:
        return ""
    text = (f"\u03a9<sub>p</sub> = <b>{_fmt(m.omega_p_kms_arcsec, m.omega_p_err_kms_arcsec)}"
            "</b> km/s/arcsec")
    if m.omega_p_kms_kpc is not None:
        text += f"<br>= <b>{_fmt(m.omega_p_kms_kpc, m.omega_p_err_kms_kpc)}</b> km/s/kpc"
    return text


def _asym(median: float, plus: float, minus: float) -> str:
    """``median^{+plus}_{-minus}`` rounded at the smaller error's second digit."""
    errors = [v for v in (plus, minus) if math.isfinite(v) and v > 0]
    small = min(errors) if errors else (abs(median) or 1.0)
    digits = max(0, 1 - int(math.floor(math.log10(small))))
    return (f"{median:.{digits}f}<sup>+{plus:.{digits}f}</sup>"
            f"<sub>\u2212{minus:.{digits}f}</sub>")


def format_budget(budget) -> str:
    """Rich text of the combined asymmetric interval."""
    c = budget.combined
    plus, minus = c.p84 - c.median, c.median - c.p16
    text = (f"<b>\u03a9<sub>p</sub> = {_asym(c.median, plus, minus)}</b>"
            " km s<sup>\u22121</sup> arcsec<sup>\u22121</sup>")
    if budget.distance_mpc:
        k = 1.0 / kpc_per_arcsec(budget.distance_mpc)
        text += (f" = <b>{_asym(c.median * k, plus * k, minus * k)}</b>"
                 " km s<sup>\u22121</sup> kpc<sup>\u22121</sup>")
    text += (f"<br><small>median and 16th\u201384th percentiles of {c.n_draws} draws "
             f"with every source sampled together (seed {budget.seed})</small>")
    return text


class QtResultView(QWidget):
    """The <V>-<X> plot, the pattern speed and the uncertainty budget."""

    def __init__(self, controller, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.controller = controller
        self.plot = pg.PlotWidget(background="w")
        item = self.plot.getPlotItem()
        item.setLabel("bottom", "\u27e8X\u27e9 (arcsec)")
        item.setLabel("left", "\u27e8V\u27e9 \u2212 V<sub>sys</sub> (km/s)")
        item.setTitle("Slit integrals and straight-line fit")
        item.showGrid(x=True, y=True, alpha=0.25)
        for name in ("left", "bottom"):
            # the points' repaint regions touch the axes; a pixmap cache makes
            # redrawing them a copy instead of re-rendering the tick text
            item.getAxis(name).setCacheMode(QGraphicsItem.CacheMode.DeviceCoordinateCache)
        # the pattern speed inside the plot: it follows every live update
        # without re-laying-out the window (a QLabel would)
        self.live_text = pg.TextItem(anchor=(0, 0), color=(20, 20, 20),
                                     fill=pg.mkBrush(255, 255, 255, 215),
                                     border=pg.mkPen(180, 180, 180))
        self.live_text.setParentItem(item.getViewBox())
        self.live_text.setPos(6, 6)
        self.live_text.setZValue(50)
        self.errors = pg.ErrorBarItem(pen=pg.mkPen(_POINT, width=1))
        # one scatter per style: fixed brushes keep pyqtgraph's symbol cache warm
        self.points = pg.ScatterPlotItem(size=8, pen=pg.mkPen("k", width=0.5),
                                         brush=pg.mkBrush(_POINT))
        self.unused_points = pg.ScatterPlotItem(size=8, pen=pg.mkPen("k", width=0.5),
                                                brush=pg.mkBrush(_UNUSED))
        self.selected_point = pg.ScatterPlotItem(size=11, pen=pg.mkPen("k", width=0.8),
                                                 brush=pg.mkBrush(_SELECTED))
        # an infinite line keeps its repaint region inside the plot, so the
        # axes are not redrawn on every live update
        self.fit_line = pg.InfiniteLine(pos=(0, 0), angle=0, pen=pg.mkPen(_FIT, width=2))
        self.fit_line.setVisible(False)
        for it in (self.errors, self.fit_line, self.unused_points, self.points,
                   self.selected_point):
            item.addItem(it)
        self._follow = True
        self.omega = QLabel(format_pattern_speed(None))
        self.omega.setTextFormat(Qt.TextFormat.RichText)
        self.omega.setWordWrap(True)
        self.omega.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.omega.setToolTip("Pattern speed from the slope of the fit divided "
                              "by sin i (Tremaine & Weinberg 1984)")
        # a fixed height: new numbers while dragging must not re-lay-out (and
        # so repaint) the whole window
        self.omega.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Fixed)
        self.omega.setFixedHeight(int(self.omega.fontMetrics().lineSpacing() * 5.6))
        self.omega.setAutoFillBackground(True)
        self.warnings = QLabel("")
        self.warnings.setWordWrap(True)
        self.warnings.setStyleSheet("color: #a0522d;")
        self.warnings.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)

        self.budget_button = QPushButton("Run uncertainty budget")
        self.budget_button.setToolTip(
            "Monte Carlo over map noise, slit choice, position angle, centre "
            "and inclination (background; Ctrl+B)")
        self.budget_text = QLabel("")
        self.budget_text.setTextFormat(Qt.TextFormat.RichText)
        self.budget_text.setWordWrap(True)
        self.budget_table = QTableWidget(0, 5)
        self.budget_table.setHorizontalHeaderLabels(
            ["Error source", "Draws", "Median", "\u03c3 (16\u201384 %)", "Share"])
        header = self.budget_table.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        header.setSectionResizeMode(0, QHeaderView.ResizeMode.ResizeToContents)
        self.budget_table.verticalHeader().setVisible(False)
        self.budget_table.setToolTip("Each error source sampled alone, then all "
                                     "together; values in km/s/arcsec")
        self.budget_table.setMinimumHeight(120)
        self.budget_table.verticalHeader().setDefaultSectionSize(22)

        layout = QVBoxLayout(self)
        layout.setContentsMargins(2, 2, 2, 2)
        layout.addWidget(self.plot, 4)
        layout.addWidget(self.omega)
        layout.addWidget(self.warnings)
        row = QHBoxLayout()
        row.addWidget(self.budget_button)
        row.addStretch(1)
        layout.addLayout(row)
        layout.addWidget(self.budget_text)
        layout.addWidget(self.budget_table, 2)

        self.route_note = QLabel("")
        self.route_note.setWordWrap(True)
        layout.insertWidget(2, self.route_note)
        self.budget_button.clicked.connect(controller.run_budget)
        controller.session_changed.connect(self._session_changed)
        controller.measurement_changed.connect(self.show_measurement)
        controller.selection_changed.connect(self._selection_changed)
        controller.budget_changed.connect(self.show_budget)

    def _session_changed(self, session) -> None:
        cube = session is not None and session.input.kind == "cube"
        self.route_note.setText(
            "<small><i>Live values come from the moment maps; <b>Run full "
            "measurement</b> integrates the cube directly, as the batch "
            "command does.</i></small>" if cube else "")

    def _selection_changed(self, _index: int) -> None:
        self.show_measurement(self.controller.measurement)

    def show_measurement(self, m) -> None:
        self.live_text.setHtml(format_live(m))
        if not self.controller.dragging:   # the detailed text when the drag ends
            self.omega.setText(format_pattern_speed(m))
        if m is None:
            for item in (self.points, self.unused_points, self.selected_point):
                item.clear()
            self.errors.setData(x=np.zeros(0), y=np.zeros(0), height=np.zeros(0),
                                width=np.zeros(0))
            self.fit_line.setVisible(False)
            self.warnings.setText("")
            return
        it = m.integrals
        x, y = np.asarray(it.x_mean_arcsec), np.asarray(it.v_mean_kms)
        ok = np.isfinite(x) & np.isfinite(y)
        used = np.asarray(m.used, dtype=bool)
        selected = np.zeros(x.size, dtype=bool)
        if 0 <= self.controller.selected < x.size:
            selected[self.controller.selected] = True
        self.points.setData(x=x[ok & used], y=y[ok & used])
        self.unused_points.setData(x=x[ok & ~used], y=y[ok & ~used])
        self.selected_point.setData(x=x[ok & selected], y=y[ok & selected])
        self.errors.setData(x=x[ok], y=y[ok], height=2 * np.asarray(it.v_err_kms)[ok],
                            width=2 * np.asarray(it.x_err_arcsec)[ok])
        # keep the axes still while a slit is dragged (fewer repaints, and
        # the eye can follow the moving point); refit them when it ends
        vb = self.plot.getPlotItem().getViewBox()
        follow = not self.controller.dragging
        if follow != self._follow:
            self._follow = follow
            vb.enableAutoRange(enable=follow)
        if ok.any() and np.isfinite(m.fit.slope):
            self.fit_line.setPos((0.0, m.fit.intercept))
            self.fit_line.setAngle(math.degrees(math.atan(m.fit.slope)))
            self.fit_line.setVisible(True)
        else:
            self.fit_line.setVisible(False)
        if not self.controller.dragging:
            self.warnings.setText("\n".join(f"\u26a0 {w}" for w in m.warnings))

    def show_budget(self, budget) -> None:
        self.budget_table.setRowCount(0)
        if budget is None:
            self.budget_text.setText("")
            return
        self.budget_text.setText(format_budget(budget))
        self.budget_table.setRowCount(len(budget.terms))
        for r, t in enumerate(budget.terms):
            for c, text in enumerate((t.name, str(t.n_draws), f"{t.median:.4g}",
                                      f"{t.sigma:.3g}", f"{100 * t.share:.0f} %"
                                      if t.name != "all combined" else "")):
                item = QTableWidgetItem(text)
                item.setFlags(item.flags() & ~Qt.ItemFlag.ItemIsEditable)
                self.budget_table.setItem(r, c, item)
