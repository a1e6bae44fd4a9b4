"""Slit spectra of the absorption-line route.

``QtSlitSpectrumView`` shows, for the selected slit, the summed spectrum,
the best-fit model and the residuals (the arrays of core's
:class:`~gyrometer.core.stellar.SlitSpectrumFit`), with the slit's mean
velocity, and beside it the <V> against <X> fit of all slits and the pattern
speed of the :class:`~gyrometer.core.stellar.AbsorptionResult`.
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtWidgets import (QHBoxLayout, QLabel, QPushButton, QVBoxLayout,
                               QWidget)

from .resultview import _fmt, format_live

__all__ = ["QtSlitSpectrumView", "format_slit_fit"]

_DATA = (40, 40, 40)
_MODEL = (200, 40, 60)
_MASKED = (170, 170, 170, 60)


def format_slit_fit(index: int, fit) -> str:
    """Rich text of one slit's fit (slits are numbered from 1)."""
    if fit is None:
        return ""
    head = f"<b>Slit {index + 1}</b>: "
    if fit.message:
        return head + f"not fitted \u2013 {fit.message}"
    h = ", ".join(f"h<sub>{k + 3}</sub> = {v:.3f}" for k, v in enumerate(fit.h))
    snr = f", S/N {fit.snr:.0f} per pixel" if math.isfinite(fit.snr) else ""
    return (head + f"\u27e8V\u27e9 \u2212 V<sub>sys</sub> = "
            f"<b>{_fmt(fit.mean_velocity_kms, fit.mean_velocity_err_kms)}</b> km/s; "
            f"\u03c3 = {fit.sigma_kms:.0f} km/s, {h}; "
            f"\u03c7\u00b2/dof = {fit.reduced_chi2:.2f}{snr}")


class QtSlitSpectrumView(QWidget):
    """Summed spectrum, model and residuals of the selected slit."""

    def __init__(self, controller, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.controller = controller
        self.result = None
        self.index = -1
        self.spectrum_plot = pg.PlotWidget(background="w")
        sp = self.spectrum_plot.getPlotItem()
        sp.setTitle("Slit spectrum and fit")
        sp.setLabel("left", "flux")
        sp.showGrid(x=True, y=True, alpha=0.2)
        sp.addLegend(offset=(-10, 10))
        self.residual_plot = pg.PlotWidget(background="w")
        rp = self.residual_plot.getPlotItem()
        rp.setLabel("bottom", "observed wavelength (\u00c5)")
        rp.setLabel("left", "data \u2212 model")
        rp.showGrid(x=True, y=True, alpha=0.2)
        rp.setXLink(sp)
        self.fit_plot = pg.PlotWidget(background="w")
        fp = self.fit_plot.getPlotItem()
        fp.setTitle("\u27e8V\u27e9 against \u27e8X\u27e9")
        fp.setLabel("bottom", "\u27e8X\u27e9 (arcsec)")
        fp.setLabel("left", "\u27e8V\u27e9 \u2212 V<sub>sys</sub> (km/s)")
        fp.showGrid(x=True, y=True, alpha=0.2)
        self.fit_plot.setMinimumWidth(160)
        self.data_curve = sp.plot([], [], pen=pg.mkPen(_DATA, width=1), name="slit sum")
        self.model_curve = sp.plot([], [], pen=pg.mkPen(_MODEL, width=1.6),
                                   name="best fit")
        self.residual_curve = rp.plot([], [], pen=pg.mkPen(_DATA, width=1))
        self.error_band: list = []
        self.run_button = QPushButton("Measure from slit spectra")
        self.run_button.setToolTip("Sum the spectra in each slit, fit their "
                                   "line-of-sight velocity distributions and fit "
                                   "\u27e8V\u27e9 against \u27e8X\u27e9 (background; "
                                   "Esc cancels)")
        self.run_button.clicked.connect(controller.run_absorption)
        self.slit_text = QLabel("")
        self.slit_text.setWordWrap(True)
        self.slit_text.setTextFormat(Qt.TextFormat.RichText)
        self.omega_text = QLabel("")
        self.omega_text.setWordWrap(True)
        self.omega_text.setTextFormat(Qt.TextFormat.RichText)
        left = QVBoxLayout()
        left.addWidget(self.spectrum_plot, 3)
        left.addWidget(self.residual_plot, 1)
        plots = QHBoxLayout()
        plots.addLayout(left, 5)
        plots.addWidget(self.fit_plot, 2)
        row = QHBoxLayout()
        row.addWidget(self.run_button)
        row.addWidget(self.omega_text, 1)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(2, 2, 2, 2)
        layout.addLayout(plots, 1)
        layout.addWidget(self.slit_text)
        layout.addLayout(row)
        controller.absorption_changed.connect(self.show_result)
        controller.selection_changed.connect(self.show_slit)
        controller.route_changed.connect(self._route_changed)
        self._route_changed(controller.route)

    def _route_changed(self, route: str) -> None:
        on = route == "absorption"
        self.run_button.setEnabled(on)
        if not on:
            self.slit_text.setText("Open an absorption-line cube and choose "
                                   "<i>absorption lines (slit spectra)</i> to "
                                   "measure from the summed spectra of the slits.")
        elif self.result is None:
            self.slit_text.setText("Set the systemic velocity and the geometry, "
                                   "place the slits, then <b>Measure from slit "
                                   "spectra</b>.")

    def show_result(self, result) -> None:
        self.result = result
        fp = self.fit_plot.getPlotItem()
        fp.clear()
        if result is None:
            self.omega_text.setText("")
            self.show_slit(-1)
            self._route_changed(self.controller.route)
            return
        m = result.measurement
        self.omega_text.setText(format_live(m))
        it = m.integrals
        x, y = np.asarray(it.x_mean_arcsec), np.asarray(it.v_mean_kms)
        ok = np.isfinite(x) & np.isfinite(y)
        used = np.asarray(m.used, bool)
        fp.addItem(pg.ErrorBarItem(x=x[ok], y=y[ok], height=2 * np.asarray(it.v_err_kms)[ok],
                                   width=2 * np.asarray(it.x_err_arcsec)[ok],
                                   pen=pg.mkPen((40, 110, 200))))
        fp.plot(x[ok & used], y[ok & used], pen=None, symbol="o", symbolSize=7,
                symbolBrush=(40, 110, 200))
        if np.any(ok & ~used):
            fp.plot(x[ok & ~used], y[ok & ~used], pen=None, symbol="o", symbolSize=7,
                    symbolBrush=(170, 170, 170))
        if ok.any() and math.isfinite(m.fit.slope):
            xs = np.array([np.min(x[ok]), np.max(x[ok])])
            fp.plot(xs, m.fit.intercept + m.fit.slope * xs, pen=pg.mkPen(_MODEL, width=2))
        self.show_slit(self.controller.selected)

    def show_slit(self, index: int) -> None:
        """Draw slit ``index`` (the first slit when none is selected)."""
        sp, rp = self.spectrum_plot.getPlotItem(), self.residual_plot.getPlotItem()
        for item in self.error_band:
            rp.removeItem(item)
        self.error_band = []
        r = self.result
        if r is None or not r.slit_fits:
            self.index = -1
            for curve in (self.data_curve, self.model_curve, self.residual_curve):
                curve.setData([], [])
            self._shade_masked(sp, np.zeros(0), np.zeros(0, bool))
            return
        index = index if 0 <= index < len(r.slit_fits) else 0
        self.index = index
        fit = r.slit_fits[index]
        wave = np.asarray(fit.wave_A)
        flux = np.asarray(fit.flux, float)
        model = np.asarray(fit.model, float)
        good = np.asarray(fit.good, bool)
        self.data_curve.setData(wave, flux, connect="finite")
        self.model_curve.setData(wave, np.where(good, model, np.nan), connect="finite")
        resid = np.where(good, flux - model, np.nan)
        self.residual_curve.setData(wave, resid, connect="finite")
        err = np.asarray(fit.error, float)
        if np.isfinite(err[good]).any():
            lo = pg.PlotDataItem(wave, np.where(good, -err, np.nan), connect="finite",
                                 pen=pg.mkPen((120, 120, 120), width=0.5))
            hi = pg.PlotDataItem(wave, np.where(good, err, np.nan), connect="finite",
                                 pen=pg.mkPen((120, 120, 120), width=0.5))
            rp.addItem(lo)
            rp.addItem(hi)
            self.error_band = [lo, hi]
        # masked stretches (emission, sky, edges) shaded in the spectrum
        self._shade_masked(sp, wave, good)
        picked = "" if self.controller.selected >= 0 else \
            " <small>(click a slit on the map to show another)</small>"
        self.slit_text.setText(format_slit_fit(index, fit) + picked)

    def _shade_masked(self, plot, wave: np.ndarray, good: np.ndarray) -> None:
        for item in getattr(self, "_masked_items", []):
            plot.removeItem(item)
        self._masked_items = []
        if wave.size < 2:
            return
        bad = ~good
        edges = np.flatnonzero(np.diff(np.concatenate([[0], bad.astype(int), [0]])))
        for start, stop in zip(edges[::2], edges[1::2]):
            region = pg.LinearRegionItem((wave[start], wave[min(stop, wave.size) - 1]),
                                         movable=False, brush=pg.mkBrush(*_MASKED),
                                         pen=pg.mkPen(None))
            region.setZValue(-5)
            plot.addItem(region)
            self._masked_items.append(region)
