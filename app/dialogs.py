"""Dialogs: moment-map settings for a cube, the method notes, About."""

from __future__ import annotations

from importlib import resources

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (QCheckBox, QComboBox, QDialog, QDialogButtonBox,
                               QDoubleSpinBox, QFormLayout, QLabel,
                               QMessageBox, QTextBrowser, QVBoxLayout, QWidget)

from gyrometer.core import __version__

__all__ = ["MomentDialog", "HelpWindow", "show_about", "help_html"]


class MomentDialog(QDialog):
    """Choose how a cube is measured: through moment maps of an emission
    line (line, velocity window and mask), or through the summed spectra of
    the slits for absorption lines (the systemic velocity to start from).

    Parameters
    ----------
    cube : Cube
        The cube just opened (its spectral axis is summarised).
    previous : gyrometer.core.moments.MomentSettings, optional
        Values to start from.
    """

    def __init__(self, cube, previous=None, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        from gyrometer.core.lines import list_lines
        from gyrometer.core.moments import MomentSettings
        self.setWindowTitle("Moment maps from the cube")
        previous = previous or MomentSettings()
        spec = cube.spectral
        values = spec.values
        info = QLabel(
            f"<b>{cube.name or 'cube'}</b>: {cube.shape[2]} \u00d7 {cube.shape[1]} "
            f"spaxels, {spec.n_channels} channels of {spec.ctype} "
            f"{values.min():.6g}\u2013{values.max():.6g} {spec.unit}"
            + (f"; rest value in header {spec.rest_value:.8g} {spec.rest_unit}"
               if spec.rest_value else "; no rest value in the header"))
        info.setWordWrap(True)
        self.route_box = QComboBox()
        self.route_box.addItem("Emission line (moment maps)", "emission")
        self.route_box.addItem("Absorption lines (slit spectra)", "absorption")
        self.route_box.setToolTip(
            "Emission line: reduce the cube to intensity and velocity maps and "
            "measure live while slits move. Absorption lines (stars): sum the "
            "spectra in each slit and fit their velocity distributions")
        if spec.ctype.upper()[:4] not in ("WAVE", "AWAV"):
            self.route_box.model().item(1).setEnabled(False)
        self.line = QComboBox()
        self.line.addItem("Rest value from the header", "")
        for line in list_lines():
            self.line.addItem(line.label or line.name, line.name)
        self.line.setCurrentIndex(max(self.line.findData(previous.line or ""), 0))
        self.line.setToolTip("Emission line whose velocity field traces the "
                             "disk; its rest value converts the spectral axis "
                             "to velocity")
        self.whole_axis = QCheckBox("Whole spectral axis")
        self.whole_axis.setToolTip("Use every channel instead of a window about "
                                   "the systemic velocity")
        self.vsys = QDoubleSpinBox()
        self.vsys.setRange(-1e5, 1e5)
        self.vsys.setSuffix(" km/s")
        self.vsys.setToolTip("Centre of the velocity window (the galaxy's "
                             "systemic velocity, in the axis's convention)")
        self.vsys.setValue(previous.vsys_kms or 0.0)
        self.whole_axis.setChecked(previous.vsys_kms is None)
        self.vsys.setEnabled(previous.vsys_kms is not None)
        self.whole_axis.toggled.connect(lambda on: self.vsys.setEnabled(not on))
        self.window = QDoubleSpinBox()
        self.window.setRange(10.0, 5000.0)
        self.window.setSuffix(" km/s")
        self.window.setValue(previous.window_halfwidth_kms)
        self.window.setToolTip("Half-width of the velocity window; generous "
                               "windows avoid clipping the line wings (which "
                               "biases the first moment)")
        self.mask = QComboBox()
        self.mask.addItem("Smooth, clip and grow", "smooth")
        self.mask.addItem("No mask (every valid channel)", "none")
        self.mask.setCurrentIndex(max(self.mask.findData(previous.mask), 0))
        self.mask.setToolTip("How emission is told from noise before the moments "
                             "are summed")
        self.snr = QDoubleSpinBox()
        self.snr.setRange(0.5, 100.0)
        self.snr.setDecimals(1)
        self.snr.setValue(previous.snr_threshold)
        self.snr.setToolTip("Clip level of the mask in units of the smoothed "
                            "cube's noise")
        self.mask.currentIndexChanged.connect(
            lambda _: self.snr.setEnabled(self.mask.currentData() == "smooth"))
        form = QFormLayout()
        form.addRow("Measure from", self.route_box)
        form.addRow("Line", self.line)
        form.addRow("", self.whole_axis)
        form.addRow("Window centre", self.vsys)
        form.addRow("Window half-width", self.window)
        form.addRow("Mask", self.mask)
        form.addRow("Clip at S/N", self.snr)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok
                                   | QDialogButtonBox.StandardButton.Cancel)
        buttons.button(QDialogButtonBox.StandardButton.Ok).setText("Make maps")
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        layout = QVBoxLayout(self)
        layout.addWidget(info)
        layout.addLayout(form)
        layout.addWidget(buttons)
        self._previous = previous
        self._ok = buttons.button(QDialogButtonBox.StandardButton.Ok)
        self._emission_only = (self.line, self.whole_axis, self.window, self.mask,
                               self.snr)
        self.route_box.currentIndexChanged.connect(self._route_chosen)

    def _route_chosen(self, _index: int) -> None:
        absorption = self.route() == "absorption"
        for widget in self._emission_only:
            widget.setEnabled(not absorption)
        if absorption:
            self.vsys.setEnabled(True)
            self.vsys.setToolTip("Systemic velocity of the galaxy (optical cz), "
                                 "the starting value of the disk geometry")
            self._ok.setText("Show cube")
        else:
            self.vsys.setEnabled(not self.whole_axis.isChecked())
            self.snr.setEnabled(self.mask.currentData() == "smooth")
            self._ok.setText("Make maps")

    def route(self) -> str:
        """``"emission"`` or ``"absorption"``."""
        return self.route_box.currentData()

    def vsys_kms(self) -> float:
        """The systemic velocity typed, km/s."""
        return float(self.vsys.value())

    def settings(self):
        """The chosen :class:`gyrometer.core.moments.MomentSettings`."""
        return self._previous.replace(
            line=self.line.currentData() or None,
            vsys_kms=None if self.whole_axis.isChecked() else float(self.vsys.value()),
            window_halfwidth_kms=float(self.window.value()),
            mask=self.mask.currentData(),
            snr_threshold=float(self.snr.value()))


def help_html() -> str:
    """The method notes shipped with the app (app/help.html)."""
    return resources.files("gyrometer.app").joinpath("help.html").read_text("utf-8")


class HelpWindow(QDialog):
    """The method notes: assumptions, caveats and how to use the window."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Gyrometer \u2013 method notes")
        self.resize(720, 640)
        self.browser = QTextBrowser()
        self.browser.setOpenExternalLinks(True)
        self.browser.setHtml(help_html())
        layout = QVBoxLayout(self)
        layout.addWidget(self.browser)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Close)
        buttons.rejected.connect(self.close)
        layout.addWidget(buttons)
        self.setWindowModality(Qt.WindowModality.NonModal)


def show_about(parent: QWidget | None) -> None:
    """The About box, with the version of the core package."""
    from PySide6 import __version__ as qt_version
    QMessageBox.about(
        parent, "About Gyrometer",
        f"<h3>Gyrometer {__version__}</h3>"
        "<p>Pattern speeds of bars and spiral patterns with the "
        "Tremaine\u2013Weinberg method, resonance radii and paper-ready "
        "tables from IFU and radio data.</p>"
        "<p>The desktop window and the <tt>gyrometer</tt> command run the same "
        "pipeline and give the same numbers for the same session file.</p>"
        f"<p><small>Qt for Python {qt_version}. BSD 3-clause licence.</small></p>")
