"""Rotation curve, orbital frequencies and resonances.

``QtDynamicsView`` shows the rotation curve with its smooth model, the
frequency curves Omega, Omega -+ kappa/2 and Omega -+ kappa/4, the band of
the measured pattern speed, the resonance radii and the bar length with the
ratio R = R_CR / R_bar and its class. Everything drawn is a field of core's
results, collected by the controller in a :class:`Dynamics` value.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtWidgets import (QHeaderView, QLabel, QTableWidget,
                               QTableWidgetItem, QVBoxLayout, QWidget)

__all__ = ["Dynamics", "QtDynamicsView"]


@dataclass(frozen=True, eq=False)
class Dynamics:
    """What the dynamics tab shows (all values from core).

    Attributes
    ----------
    curve : RotationCurve or None
        Measured points.
    model : object or None
        Smooth model with ``v(r_arcsec)`` (km/s) and a ``name``.
    frequencies : FrequencyCurves or None
    omega_p : tuple of float or None
        ``(median, p16, p84)`` in ``frequencies.unit``.
    resonances : ResonanceTable or None
    bar_length_arcsec, bar_length_err_arcsec : float or None
        Deprojected bar half-length.
    ratio : tuple of float or None
        ``R = R_CR / R_bar`` as ``(median, p16, p84)``.
    ratio_class : str
        ``"ultrafast"``, ``"fast"``, ``"slow"`` or ``""``.
    notes : tuple of str
    """

    curve: Any = None
    model: Any = None
    frequencies: Any = None
    omega_p: tuple[float, float, float] | None = None
    resonances: Any = None
    bar_length_arcsec: float | None = None
    bar_length_err_arcsec: float | None = None
    ratio: tuple[float, float, float] | None = None
    ratio_class: str = ""
    notes: tuple[str, ...] = ()

    def radii_arcsec(self) -> list[tuple[str, float]]:
        """``(short name, radius)`` of every resonance found, for the map."""
        out = []
        if self.resonances is not None:
            for row in self.resonances.rows:
                r = row.radius_arcsec
                if r is not None and np.isfinite(r) and r > 0:
                    out.append((_short(row.name), float(r)))
        return out


def _short(name: str) -> str:
    text = (name.replace("UHR inner (4:1)", "iUHR").replace("UHR outer (4:1)", "oUHR")
            .replace("ILR (inner)", "iILR").replace("ILR (outer)", "oILR"))
    return text


_CURVES = (  # key in the lindblad dict, sign index, label, colour, style
    (2, 0, "\u03a9 \u2212 \u03ba/2", (90, 160, 230), Qt.PenStyle.SolidLine),
    (2, 1, "\u03a9 + \u03ba/2", (90, 160, 230), Qt.PenStyle.DashLine),
    (4, 0, "\u03a9 \u2212 \u03ba/4", (150, 110, 220), Qt.PenStyle.SolidLine),
    (4, 1, "\u03a9 + \u03ba/4", (150, 110, 220), Qt.PenStyle.DashLine),
)


class QtDynamicsView(QWidget):
    """Rotation curve, frequency curves and the resonance table."""

    def __init__(self, controller, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.controller = controller
        self.curve_plot = pg.PlotWidget(background="w")
        cp = self.curve_plot.getPlotItem()
        cp.setTitle("Rotation curve")
        cp.setLabel("bottom", "R in the disk (arcsec)")
        cp.setLabel("left", "V (km/s)")
        cp.showGrid(x=True, y=True, alpha=0.25)
        cp.addLegend(offset=(-10, -10))
        self.freq_plot = pg.PlotWidget(background="w")
        fp = self.freq_plot.getPlotItem()
        fp.setTitle("Orbital frequencies and the pattern speed")
        fp.setLabel("bottom", "R in the disk (arcsec)")
        fp.setLabel("left", "frequency")
        fp.showGrid(x=True, y=True, alpha=0.25)
        fp.addLegend(offset=(-10, 10))
        fp.setXLink(cp)
        self.summary = QLabel("Run the full measurement (Ctrl+R) for the rotation "
                              "curve, resonances and the bar.")
        self.summary.setTextFormat(Qt.TextFormat.RichText)
        self.summary.setWordWrap(True)
        self.table = QTableWidget(0, 4)
        self.table.setHorizontalHeaderLabels(["Resonance", "Radius (\u2033)",
                                              "16\u201384 % (\u2033)", "Radius (kpc)"])
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        self.table.verticalHeader().setVisible(False)
        self.table.setMaximumHeight(160)
        self.table.setToolTip("Radii in the disk plane where the pattern speed "
                              "meets Omega or Omega -+ kappa/m")
        layout = QVBoxLayout(self)
        layout.setContentsMargins(2, 2, 2, 2)
        layout.addWidget(self.curve_plot, 2)
        layout.addWidget(self.freq_plot, 3)
        layout.addWidget(self.summary)
        layout.addWidget(self.table, 1)
        controller.dynamics_changed.connect(self.show_dynamics)

    def show_dynamics(self, d: Dynamics | None) -> None:
        cp, fp = self.curve_plot.getPlotItem(), self.freq_plot.getPlotItem()
        for plot in (cp, fp):
            plot.clear()
            if plot.legend is not None:
                plot.legend.clear()
        self.table.setRowCount(0)
        if d is None:
            self.summary.setText("Run the full measurement (Ctrl+R) for the rotation "
                                 "curve, resonances and the bar.")
            return
        if d.curve is not None:
            r, v, e = d.curve.r_arcsec, d.curve.v_kms, d.curve.v_err_kms
            cp.addItem(pg.ErrorBarItem(x=r, y=v, height=2 * e, pen=pg.mkPen((80, 80, 80))))
            cp.plot(r, v, pen=None, symbol="o", symbolSize=6,
                    symbolBrush=(60, 60, 60), name="measured")
        f = d.frequencies
        if f is not None:
            if d.model is not None:
                cp.plot(f.r_arcsec, d.model.v(f.r_arcsec), pen=pg.mkPen((200, 40, 60), width=2),
                        name=f"model ({getattr(d.model, 'name', 'smooth')})")
            fp.setLabel("left", f"frequency ({f.unit})")
            fp.plot(f.r_arcsec, f.omega, pen=pg.mkPen((20, 20, 20), width=2), name="\u03a9")
            for m, k, label, colour, style in _CURVES:
                if m in f.lindblad:
                    fp.plot(f.r_arcsec, f.lindblad[m][k], name=label,
                            pen=pg.mkPen(colour, width=1.6, style=style))
            if d.omega_p is not None:
                med, lo, hi = d.omega_p
                band = pg.LinearRegionItem((lo, hi), orientation="horizontal",
                                           movable=False, brush=pg.mkBrush(255, 140, 0, 60),
                                           pen=pg.mkPen(255, 140, 0, 0))
                fp.addItem(band)
                fp.addItem(pg.InfiniteLine(med, angle=0, pen=pg.mkPen((230, 120, 0), width=2),
                                           label="\u03a9p", labelOpts={"position": 0.95,
                                                                       "color": (200, 100, 0)}))
                finite = np.concatenate([f.omega[np.isfinite(f.omega)], [hi]])
                top = float(np.nanpercentile(finite, 97)) * 1.1 if finite.size else hi * 3
                fp.setYRange(0, max(top, 1.5 * hi))
        # labels at staggered heights so close radii stay readable
        for k, (name, radius) in enumerate(sorted(d.radii_arcsec(), key=lambda t: t[1])):
            for plot in (cp, fp):
                plot.addItem(pg.InfiniteLine(radius, angle=90, pen=pg.mkPen(
                    (255, 120, 60), width=1, style=Qt.PenStyle.DotLine), label=name,
                    labelOpts={"position": 0.92 - 0.09 * (k % 3),
                               "color": (180, 80, 30), "fill": (255, 255, 255, 200)}))
        if d.bar_length_arcsec:
            fp.addItem(pg.InfiniteLine(d.bar_length_arcsec, angle=90,
                                       pen=pg.mkPen((220, 40, 140), width=2),
                                       label="bar end", labelOpts={
                                           "position": 0.6, "color": (200, 30, 120),
                                           "fill": (255, 255, 255, 200)}))
        self._fill_table(d)
        self.summary.setText(self._summary_text(d))

    def _fill_table(self, d: Dynamics) -> None:
        rows = [] if d.resonances is None else list(d.resonances.rows)
        self.table.setRowCount(len(rows))
        for i, row in enumerate(rows):
            found = row.status == "found" and math.isfinite(row.radius_arcsec)
            cells = (row.name,
                     f"{row.radius_arcsec:.1f}" if found else row.status,
                     f"{row.p16_arcsec:.1f}\u2013{row.p84_arcsec:.1f}"
                     if found and math.isfinite(row.p16_arcsec) else "",
                     f"{row.radius_kpc:.2f}" if found and row.radius_kpc is not None else "")
            for j, text in enumerate(cells):
                item = QTableWidgetItem(text)
                item.setFlags(item.flags() & ~Qt.ItemFlag.ItemIsEditable)
                if row.note:
                    item.setToolTip(row.note)
                self.table.setItem(i, j, item)

    @staticmethod
    def _summary_text(d: Dynamics) -> str:
        parts = []
        if d.bar_length_arcsec:
            err = (f" \u00b1 {d.bar_length_err_arcsec:.1f}"
                   if d.bar_length_err_arcsec else "")
            parts.append(f"Bar half-length (deprojected) <b>{d.bar_length_arcsec:.1f}"
                         f"{err}\u2033</b>")
        if d.ratio is not None and all(np.isfinite(d.ratio)):
            med, lo, hi = d.ratio
            parts.append(f"<b>R = R<sub>CR</sub>/R<sub>bar</sub> = {med:.2f}"
                         f"<sup>+{hi - med:.2f}</sup><sub>\u2212{med - lo:.2f}</sub></b>"
                         + (f" \u2013 <b>{d.ratio_class}</b> bar" if d.ratio_class else ""))
        parts.extend(f"<small>{n}</small>" for n in d.notes)
        return "<br>".join(parts) or "No bar length or corotation radius available."
