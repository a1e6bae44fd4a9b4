"""Checks of a measurement: convergence with slit length, PA sensitivity.

The position angle is the dominant systematic of the method and the slit
integrals must reach where the pattern fades; this tab plots core's
:class:`~gyrometer.core.results.ConvergenceCurves` and
:class:`~gyrometer.core.results.PASensitivity` from the full run.
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QLabel, QVBoxLayout, QWidget

__all__ = ["QtChecksView"]


class QtChecksView(QWidget):
    """Omega_p against slit half-length and against the position angle."""

    def __init__(self, controller, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.controller = controller
        self.length_plot = pg.PlotWidget(background="w")
        lp = self.length_plot.getPlotItem()
        lp.setTitle("Convergence with slit length")
        lp.setLabel("bottom", "slit half-length (arcsec)")
        lp.setLabel("left", "\u03a9<sub>p</sub> (km/s/arcsec)")
        lp.showGrid(x=True, y=True, alpha=0.25)
        self.pa_plot = pg.PlotWidget(background="w")
        pp = self.pa_plot.getPlotItem()
        pp.setTitle("Sensitivity to the position angle")
        pp.setLabel("bottom", "assumed PA \u2212 adopted PA (deg)")
        pp.setLabel("left", "\u03a9<sub>p</sub> (km/s/arcsec)")
        pp.showGrid(x=True, y=True, alpha=0.25)
        self.summary = QLabel("Run the full measurement (Ctrl+R) for these checks.")
        self.summary.setWordWrap(True)
        self.summary.setTextFormat(Qt.TextFormat.RichText)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(2, 2, 2, 2)
        layout.addWidget(self.length_plot, 1)
        layout.addWidget(self.pa_plot, 1)
        layout.addWidget(self.summary)
        controller.checks_changed.connect(self.show_checks)

    def show_checks(self, result) -> None:
        lp, pp = self.length_plot.getPlotItem(), self.pa_plot.getPlotItem()
        lp.clear()
        pp.clear()
        if result is None:
            self.summary.setText("Run the full measurement (Ctrl+R) for these checks.")
            return
        parts = []
        conv = result.convergence
        if conv is not None:
            lp.plot(conv.half_length_arcsec, conv.omega_p_kms_arcsec,
                    pen=pg.mkPen((40, 110, 200), width=2), symbol="o", symbolSize=5,
                    symbolBrush=(40, 110, 200))
            bad = [i + 1 for i, ok in enumerate(np.asarray(conv.converged)) if not ok]
            parts.append("All slits have converged with length." if not bad else
                         f"Slits {', '.join(map(str, bad))} have <b>not converged</b> "
                         f"(tolerance {100 * conv.tolerance:.0f} %): lengthen them or "
                         "check that the data reach where the pattern fades.")
        sens = result.pa_sensitivity
        if sens is not None:
            x = np.asarray(sens.pa_offset_deg)
            y = np.asarray(sens.omega_p_kms_arcsec)
            e = np.asarray(sens.omega_p_err_kms_arcsec)
            pp.addItem(pg.ErrorBarItem(x=x, y=y, height=2 * e, pen=pg.mkPen((90, 90, 90))))
            pp.plot(x, y, pen=pg.mkPen((200, 40, 60), width=2), symbol="s", symbolSize=5,
                    symbolBrush=(200, 40, 60))
            err = result.session.geometry.pa_err_deg if result.session.geometry else 0.0
            if err > 0:
                pp.addItem(pg.LinearRegionItem((-err, err), movable=False,
                                               brush=pg.mkBrush(255, 140, 0, 50)))
            ok = np.isfinite(y)
            if ok.sum() >= 2:
                span = float(np.nanmax(y[ok]) - np.nanmin(y[ok]))
                mid = float(np.interp(0.0, x[ok], y[ok]))
                parts.append(f"Over PA \u00b1{np.nanmax(np.abs(x)):.0f}\u00b0 \u03a9<sub>p</sub> "
                             f"spans {span:.3g} km/s/arcsec ({100 * span / abs(mid):.0f} % "
                             "of the adopted value)" if mid else "")
        self.summary.setText("<br>".join(p for p in parts if p) or
                             "No convergence or PA checks in this run.")
