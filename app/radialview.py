"""Pattern speed against radius: the step curve of core's radial method.

``QtRadialView`` draws Omega_p(R) per annulus with its 1-sigma band
(:func:`gyrometer.core.radial.omega_curve` on a
:class:`~gyrometer.core.radial.RadialResult`) over the orbital frequencies
Omega and Omega -+ kappa/2 of the rotation-curve model when the full run
made one, and holds the settings of the on-request measurement (number of
annuli, regularisation strength, a fitted systemic-velocity offset).
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtWidgets import (QCheckBox, QComboBox, QFormLayout, QHBoxLayout,
                               QLabel, QPushButton, QSpinBox, QVBoxLayout,
                               QWidget)

__all__ = ["QtRadialView", "radial_settings_from", "format_radial"]

_STEP = (200, 40, 60)
_BAND = (200, 40, 60, 60)
_OMEGA = (20, 20, 20)
_LINDBLAD = (90, 160, 230)
_LAMBDAS = ("gcv", "0.001", "0.01", "0.1", "1", "10")


def radial_settings_from(base, n_annuli: int, lam_text: str, fit_vsys: bool):
    """A :class:`~gyrometer.core.radial.RadialSettings` from the panel's
    values (``n_annuli = 0``: one annulus per slit pair). Core validates
    ``lam`` and raises :class:`~gyrometer.core.errors.FitError` for text that
    is neither ``"gcv"`` nor a non-negative number."""
    from dataclasses import replace

    from gyrometer.core.errors import FitError
    from gyrometer.core.radial import RadialSettings
    text = lam_text.strip().lower()
    if text == "gcv":
        lam: float | str = "gcv"
    else:
        try:
            lam = float(text)
        except ValueError:
            raise FitError("the regularisation strength must be 'gcv' or a "
                           "non-negative number", keyword="lam",
                           value=lam_text) from None
    base = base or RadialSettings()
    return replace(base, n_annuli=int(n_annuli) or None, lam=lam,
                   fit_vsys_offset=bool(fit_vsys),
                   edges_arcsec=None if n_annuli else base.edges_arcsec)


def _fmt(value: float | None, err: float | None) -> str:
    if value is None or not math.isfinite(value):
        return "\u2013"
    if err is None or not (math.isfinite(err) and err > 0):
        return f"{value:.3g}"
    digits = max(0, 1 - int(math.floor(math.log10(err))))
    return f"{value:.{digits}f} \u00b1 {err:.{digits}f}"


def format_radial(result) -> str:
    """Rich text summary of a radial result (core's fields, formatted)."""
    if result is None:
        return ("Measure the pattern speed in annuli of disk radius with the "
                "button above; the full run (Ctrl+R) also shows it when the "
                "session asks for it.")
    kpc = result.geometry.distance_mpc is not None
    unit = "km/s/kpc" if kpc else "km/s/arcsec"
    if kpc:
        from gyrometer.core.geometry import kpc_per_arcsec
        scale = 1.0 / kpc_per_arcsec(result.geometry.distance_mpc)
    else:
        scale = 1.0
    mean = _fmt(result.mean_omega_kms_arcsec * scale,
                result.mean_omega_err_kms_arcsec * scale)
    lam = (f"\u03bb = {result.lam:.3g} ({result.lam_method})"
           if result.lam_method != "none" else "no regularisation")
    text = (f"<b>{result.n_annuli} annuli</b>, {result.regularisation}, {lam}; "
            f"\u03c7\u00b2/dof = {result.reduced_chi2:.2f}; errors: {result.error_method}"
            f"<br>Kernel-weighted mean \u03a9<sub>p</sub> = <b>{mean}</b> {unit} "
            "(comparable with the single-pattern value)")
    if result.vsys_offset_kms is not None:
        text += (f"<br>Fitted V<sub>sys</sub> offset "
                 f"{_fmt(result.vsys_offset_kms, result.vsys_offset_err_kms)} km/s")
    weak = int(np.sum(~result.constrained))
    if weak:
        text += (f"<br><small>{weak} annuli set mainly by the regulariser "
                 "(drawn dashed)</small>")
    text += "".join(f"<br><small>\u26a0 {w}</small>" for w in result.warnings
                    if "regulariser" not in w)   # said above
    return text


class QtRadialView(QWidget):
    """Omega_p(R) with errors over Omega and Omega -+ kappa/2."""

    def __init__(self, controller, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.controller = controller
        self.plot = pg.PlotWidget(background="w")
        p = self.plot.getPlotItem()
        p.setTitle("Pattern speed against radius")
        p.setLabel("bottom", "R in the disk (arcsec)")
        p.setLabel("left", "\u03a9 (km/s/arcsec)")
        p.showGrid(x=True, y=True, alpha=0.25)
        p.addLegend(offset=(-10, 10))
        self.annuli = QSpinBox()
        self.annuli.setRange(0, 60)
        self.annuli.setSpecialValueText("one per slit pair")
        self.annuli.setToolTip("Number of equal-width annuli from the centre to "
                               "the outermost slit; 'one per slit pair' starts an "
                               "annulus at the inner edge of each slit (the "
                               "triangular system)")
        self.lam = QComboBox()
        self.lam.setEditable(True)
        self.lam.addItems(list(_LAMBDAS))
        self.lam.setToolTip("Regularisation strength (dimensionless): 'gcv' "
                            "chooses it by generalised cross-validation, or type "
                            "a number (0 = none)")
        self.vsys_offset = QCheckBox("Fit a systemic-velocity offset")
        self.vsys_offset.setToolTip("Solve for a correction to the adopted V_sys "
                                    "(one more column of the linear system); needs "
                                    "slits on both sides of the centre")
        self.run_button = QPushButton("Measure against radius")
        self.run_button.setToolTip("Solve for the pattern speed in annuli on the "
                                   "current maps, geometry and slits (background)")
        self.summary = QLabel(format_radial(None))
        self.summary.setWordWrap(True)
        self.summary.setTextFormat(Qt.TextFormat.RichText)
        form = QFormLayout()
        form.addRow("Annuli", self.annuli)
        form.addRow("Smoothing \u03bb", self.lam)
        form.addRow("", self.vsys_offset)
        row = QHBoxLayout()
        row.addLayout(form, 1)
        row.addWidget(self.run_button, 0, Qt.AlignmentFlag.AlignBottom)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(2, 2, 2, 2)
        layout.addWidget(self.plot, 1)
        layout.addLayout(row)
        layout.addWidget(self.summary)
        self.step_curve: pg.PlotDataItem | None = None
        self.frequency_curves: list[pg.PlotDataItem] = []
        self.run_button.clicked.connect(self.run)
        controller.radial_changed.connect(self.show_radial)
        controller.dynamics_changed.connect(lambda _d: self.show_radial(controller.radial))
        controller.route_changed.connect(lambda _r: self.show_settings(
            controller.radial_settings))

    # -- settings ---------------------------------------------------------
    def show_settings(self, settings) -> None:
        if settings is None:
            return
        self.annuli.setValue(settings.n_annuli or 0)
        lam = settings.lam
        self.lam.setCurrentText("gcv" if lam == "gcv" else f"{float(lam):g}")
        self.vsys_offset.setChecked(bool(settings.fit_vsys_offset))

    def settings(self):
        """The panel's :class:`~gyrometer.core.radial.RadialSettings`."""
        return radial_settings_from(self.controller.radial_settings,
                                    self.annuli.value(), self.lam.currentText(),
                                    self.vsys_offset.isChecked())

    def run(self) -> bool:
        c = self.controller
        settings = c._guard("Pattern speed against radius", self.settings)
        if settings is None:
            return False
        c.set_radial_settings(settings)
        return c.run_radial()

    # -- drawing ------------------------------------------------------------
    def show_radial(self, result) -> None:
        from gyrometer.core.radial import omega_curve
        p = self.plot.getPlotItem()
        p.clear()
        if p.legend is not None:
            p.legend.clear()
        self.step_curve = None
        self.frequency_curves = []
        self.summary.setText(format_radial(result))
        dyn = self.controller.dynamics
        freqs = None if dyn is None else dyn.frequencies
        if result is None:
            if freqs is not None:
                self._draw_frequencies(freqs, freqs.unit == "km/s/kpc")
            return
        physical = result.geometry.distance_mpc is not None
        r, om, lo, hi = omega_curve(result, physical=physical)
        r_v, om_v, lo_v, hi_v = (q.value for q in (r, om, lo, hi))
        p.setLabel("bottom", f"R in the disk ({r.unit.to_string()})")
        p.setLabel("left", f"\u03a9 ({om.unit.to_string()})")
        lower = pg.PlotDataItem(r_v, lo_v, pen=pg.mkPen(_STEP, width=0.5))
        upper = pg.PlotDataItem(r_v, hi_v, pen=pg.mkPen(_STEP, width=0.5))
        p.addItem(lower)
        p.addItem(upper)
        p.addItem(pg.FillBetweenItem(lower, upper, brush=pg.mkBrush(*_BAND)))
        self.step_curve = p.plot(r_v, om_v, pen=pg.mkPen(_STEP, width=2.5),
                                 name="\u03a9<sub>p</sub>(R) \u00b1 1\u03c3")
        # annuli fixed mainly by the regulariser, dashed on top
        weak = np.repeat(~np.asarray(result.constrained, bool), 2)
        if weak.any():
            p.plot(r_v, np.where(weak, om_v, np.nan), connect="finite",
                   pen=pg.mkPen((255, 255, 255), width=2.5,
                                style=Qt.PenStyle.DashLine))
        if freqs is not None:
            same = (freqs.unit == "km/s/kpc") == physical
            if same:
                self._draw_frequencies(freqs, physical)
                finite = om_v[np.isfinite(om_v)]
                top = max(float(np.nanmax(hi_v)) * 1.3 if finite.size else 1.0, 1e-3)
                p.setYRange(min(0.0, float(np.nanmin(lo_v))), top)
                p.setXRange(0.0, float(np.nanmax(r_v)) * 1.05)

    def _draw_frequencies(self, f, physical: bool) -> None:
        p = self.plot.getPlotItem()
        x = f.r_kpc if physical and f.r_kpc is not None else f.r_arcsec
        self.frequency_curves.append(
            p.plot(x, f.omega, pen=pg.mkPen(_OMEGA, width=1.6), name="\u03a9"))
        if 2 in f.lindblad:
            minus, plus = f.lindblad[2]
            self.frequency_curves.append(p.plot(
                x, minus, pen=pg.mkPen(_LINDBLAD, width=1.4), name="\u03a9 \u2212 \u03ba/2"))
            self.frequency_curves.append(p.plot(
                x, plus, pen=pg.mkPen(_LINDBLAD, width=1.4, style=Qt.PenStyle.DashLine),
                name="\u03a9 + \u03ba/2"))
