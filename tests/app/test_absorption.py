"""The absorption-line route: a cube measured through its slit spectra."""

from __future__ import annotations

import numpy as np
import pytest


@pytest.fixture(scope="module")
def absorption_file(tmp_path_factory):
    """A noiseless 24 x 24 absorption-line cube (399 channels around the
    calcium triplet) of a barred disk, written as FITS."""
    from gyrometer.core.fitsio import write_cube
    from gyrometer.core.synthetic import barred_model
    from gyrometer.core.synthetic_stellar import make_absorption_cube

    model = barred_model(name="LBDP-test-stars", shape=(24, 24), pixel_scale_arcsec=4.0,
                         dispersion_kms=80.0, noise_frac=0.02)
    cube, truth, scene = make_absorption_cube(model, noise=False)
    path = tmp_path_factory.mktemp("stars") / "LBDP-test_stars_cube.fits"
    write_cube(path, cube)
    return path, truth, scene


def test_absorption_route_shows_slit_spectra_and_core_pattern_speed(
        window, absorption_file, monkeypatch, qtbot, idle, errors):
    from gyrometer.app import mainwindow
    from gyrometer.core.fitsio import open_data
    from gyrometer.core.slits import SlitSet
    from gyrometer.core.stellar import StellarSettings, measure_absorption

    path, truth, scene = absorption_file
    asked = []

    def choose_absorption(dialog):
        asked.append(dialog)
        dialog.route_box.setCurrentIndex(dialog.route_box.findData("absorption"))
        assert not dialog.line.isEnabled() and dialog.vsys.isEnabled()
        dialog.vsys.setValue(truth.geometry.vsys_kms)
        return 1
    monkeypatch.setattr(mainwindow.MomentDialog, "exec", choose_absorption)
    c = window.controller
    c.open_path(path)
    qtbot.waitUntil(lambda: c.maps is not None and not c.tasks.busy, timeout=60000)
    idle()
    assert not errors, errors
    assert asked and c.route == "absorption"
    assert c.geometry.vsys_kms == truth.geometry.vsys_kms
    assert c.measurement is None              # no live value on this route
    assert window.act_absorption.isEnabled() and not window.act_budget.isEnabled()
    assert window.map_view.image.image.shape == (24, 24)
    # the geometry of the model, slits reaching where the bar fades
    c.set_geometry(truth.geometry, "geometry of the model")
    c.set_slits(SlitSet.generate(4, 10.0, 10.0, 46.0), "four slits")
    c.stellar_settings = StellarSettings(n_mc=0, continuum_band_A=scene.continuum_band_A)
    window.act_absorption.trigger()
    assert window.progress.isVisible() and window.cancel_button.isVisible()
    idle()
    assert not errors, errors
    direct = measure_absorption(open_data(path), c.geometry, c.slits, c.stellar_settings,
                                warn=False)
    m = c.measurement
    assert m is c.absorption.measurement and m.route == "absorption"
    assert m.omega_p_kms_arcsec == pytest.approx(direct.measurement.omega_p_kms_arcsec,
                                                 rel=1e-12)
    # the result view and the spectra panel both show core's value
    from gyrometer.app.resultview import format_live, format_pattern_speed
    assert window.result_view.omega.text() == format_pattern_speed(direct.measurement)
    view = window.spectrum_view
    assert view.omega_text.text() == format_live(direct.measurement)
    # the selected slit's summed spectrum, model and residuals (slits count from 1)
    c.select_slit(2)
    fit = direct.slit_fits[2]
    assert view.index == 2 and view.slit_text.text().startswith("<b>Slit 3</b>")
    np.testing.assert_array_equal(view.data_curve.xData, fit.wave_A)
    np.testing.assert_allclose(view.data_curve.yData, fit.flux, rtol=1e-12)
    good = fit.good
    np.testing.assert_allclose(view.model_curve.yData[good], fit.model[good], rtol=1e-12)
    np.testing.assert_allclose(view.residual_curve.yData[good],
                               (fit.flux - fit.model)[good], rtol=1e-9, atol=1e-12)
    # the map shows the continuum core read for the slits
    assert window.map_view.kind == "continuum"
    np.testing.assert_array_equal(np.isfinite(window.map_view.image.image),
                                  np.isfinite(direct.continuum_map))
    # an edit greys the spectra and removes the value until measured again
    c.nudge_slit(2.0, index=0)
    assert "absorption" in c.stale and window.spectrum_frame.stale
    assert c.measurement is None
    c.undo_stack.undo()
    assert c.measurement is m


def test_absorption_session_reruns_to_the_same_pattern_speed(window, absorption_file,
                                                             tmp_path, idle, errors):
    """The saved session names the route, so the batch pipeline measures the
    slit spectra exactly as the window did."""
    from dataclasses import replace

    from gyrometer.app.controller import Controller
    from gyrometer.core import pipeline
    from gyrometer.core.budget import BudgetSettings
    from gyrometer.core.fitsio import open_data
    from gyrometer.core.session import load_session
    from gyrometer.core.slits import SlitSet
    from gyrometer.core.stellar import StellarSettings

    path, truth, scene = absorption_file
    cube = open_data(path)
    c = window.controller
    stellar = StellarSettings(n_mc=0, continuum_band_A=scene.continuum_band_A)
    base = Controller._session_for(path, cube)
    session = base.with_(budget=BudgetSettings(n_draws=20, seed=3),
                         absorption=replace(base.absorption, stellar=stellar,
                                            geometry_draws=0))
    c.cube, c.pending_session, c.stellar_settings = cube, session, stellar
    assert c.open_absorption(truth.geometry.vsys_kms)
    idle()
    assert not errors, errors
    assert c.route == "absorption"
    # the map is core's continuum image of the cube
    shown = pipeline.continuum_maps(cube, stellar)
    np.testing.assert_array_equal(c.maps.intensity, shown.intensity)
    c.set_geometry(truth.geometry)
    c.set_slits(SlitSet.generate(4, 10.0, 10.0, 46.0))
    assert c.run_absorption()
    idle()
    assert not errors, errors
    target = tmp_path / "stars.toml"
    assert c.save_session(target)
    saved = load_session(target)
    assert saved.input.kind == "absorption"
    assert saved.absorption.stellar == stellar
    batch = pipeline.run_session(saved)
    assert batch.measurement.omega_p_kms_arcsec == pytest.approx(
        c.measurement.omega_p_kms_arcsec, rel=1e-12)
    # and the window's own full run takes the same route
    c.run_full()
    idle()
    assert not errors, errors
    assert c.pipeline_result.session.input.kind == "absorption"
    assert c.absorption is c.pipeline_result.absorption
    assert c.measurement.omega_p_kms_arcsec == pytest.approx(
        batch.measurement.omega_p_kms_arcsec, rel=1e-12)
