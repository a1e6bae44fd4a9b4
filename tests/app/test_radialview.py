"""The pattern speed against radius tab, and results greyed after edits."""

from __future__ import annotations

import numpy as np
import pytest


@pytest.fixture(scope="module")
def two_pattern_file(tmp_path_factory):
    """A 96 x 96 noiseless disk with a bar (50 km/s/kpc inside 3.5 kpc) and a
    slower spiral (22 km/s/kpc in 4.5-11 kpc), the defaults of
    :func:`gyrometer.core.synthetic.two_pattern_model`; returns the map
    file, the model and its truth."""
    from gyrometer.core.fitsio import write_mapset
    from gyrometer.core.synthetic import make_maps, two_pattern_model

    model = two_pattern_model(name="LBDP-test-two", shape=(96, 96),
                              pixel_scale_arcsec=1.9)
    maps, truth = make_maps(model, noise=False)
    path = tmp_path_factory.mktemp("two") / "LBDP-test-two_maps.fits"
    write_mapset(path, maps)
    return path, model, truth


def _slits(model, n: int = 17):
    """Adjacent slits over 90 % of the projected minor axis (as in
    tests/core/test_radial.py)."""
    from gyrometer.core.slits import SlitSet
    half = 0.5 * model.shape[0] * model.pixel_scale_arcsec * 0.98
    spacing = 2.0 * half * model.geometry.cos_i * 0.9 / n
    return SlitSet.generate(n, spacing, spacing, 0.95 * half)


@pytest.fixture
def two_open(window, two_pattern_file, errors):
    from gyrometer.app.controller import Controller
    from gyrometer.core.budget import BudgetSettings
    from gyrometer.core.fitsio import open_data

    path, model, truth = two_pattern_file
    maps = open_data(path)
    c = window.controller
    session = Controller._session_for(path, maps).with_(
        budget=BudgetSettings(n_draws=20, seed=7))
    c.source_path = str(path)
    c._install(session, maps, maps, truth.geometry, _slits(model), ())
    assert not errors, errors
    return window


def test_radial_tab_shows_two_pattern_speeds_from_core(two_open, two_pattern_file,
                                                       idle, errors):
    from gyrometer.core.radial import RadialSettings, measure_radial, omega_curve

    window = two_open
    c = window.controller
    view = window.radial_view
    assert view.annuli.value() == 0 and view.lam.currentText() == "gcv"
    view.run_button.click()
    assert c.tasks.busy                      # off the GUI thread
    idle()
    assert not errors, errors
    assert c.radial is not None
    # the curve drawn is core's step curve for the same maps, geometry, slits
    direct = measure_radial(c.maps, c.geometry, c.slits, RadialSettings(),
                            rng=np.random.default_rng(7), warn=False)
    r, om, lo, hi = omega_curve(direct)
    np.testing.assert_allclose(view.step_curve.xData, r.value, rtol=1e-12)
    np.testing.assert_allclose(view.step_curve.yData, om.value, rtol=1e-9)
    assert str(om.unit) == "km / (kpc s)"       # D = 20 Mpc in the model
    # two distinct levels: the bar's 50 and the spiral's 22 km/s/kpc (the
    # defaults of two_pattern_model; Merrifield, Rand & Meidt 2006 recover
    # each in its own zone), 10 % tolerance as in tests/core/test_radial.py
    ys = view.step_curve.yData
    assert np.any(np.abs(ys / 50.0 - 1) < 0.10)
    assert np.any(np.abs(ys / 22.0 - 1) < 0.10)
    assert "annuli" in view.summary.text()


def test_radial_settings_reach_core_and_bad_strength_is_reported(two_open, idle,
                                                                 errors, monkeypatch):
    from PySide6.QtWidgets import QMessageBox
    shown = []
    monkeypatch.setattr(QMessageBox, "critical",
                        staticmethod(lambda parent, title, text: shown.append(text)))
    window = two_open
    c = window.controller
    view = window.radial_view
    view.annuli.setValue(6)
    view.lam.setCurrentText("0.1")
    view.vsys_offset.setChecked(True)
    assert view.run()
    idle()
    assert not errors, errors
    assert c.radial.n_annuli == 6
    assert c.radial.lam == pytest.approx(0.1) and c.radial.lam_method == "user"
    assert c.radial.vsys_offset_kms is not None
    # the settings are kept with the session the window saves
    assert c.radial_settings.n_annuli == 6
    assert c.current_session().radial == c.radial_settings
    # the full run measures it too ([radial] in the session) and is shown
    c.run_full()
    idle()
    assert not errors, errors
    assert c.pipeline_result.radial is not None
    assert c.radial is c.pipeline_result.radial and c.radial.n_annuli == 6
    view.lam.setCurrentText("strong")
    assert not view.run()
    assert errors and "lam" in errors[-1][1]
    assert len(shown) == 1 and "Traceback" not in shown[0]
    assert c.radial.n_annuli == 6                 # the shown result is kept


def test_full_run_results_are_greyed_after_an_edit_and_current_after_undo(
        two_open, idle, errors):
    window = two_open
    c = window.controller
    c.run_full()
    idle()
    assert not errors, errors
    assert c.pipeline_result is not None and c.dynamics is not None
    assert c.stale == frozenset()
    assert not window.dynamics_frame.stale and not window.checks_frame.stale
    # the rotation-curve model gives Omega and Omega -+ kappa/2 under the
    # radial curve once that is measured
    window.radial_view.run()
    idle()
    assert len(window.radial_view.frequency_curves) == 3
    c.nudge_slit(1.0, index=3)
    assert c.stale == frozenset({"full", "radial"})
    for frame in (window.dynamics_frame, window.checks_frame, window.radial_frame):
        assert frame.stale
        assert not frame.note.isHidden()
        assert frame.content.graphicsEffect().isEnabled()
    # the live result is never stale
    assert c.measurement is not None
    c.undo_stack.undo()
    assert c.stale == frozenset()
    assert not window.dynamics_frame.stale
    assert window.dynamics_frame.note.isHidden()
    c.update_geometry("turn", pa_deg=c.geometry.pa_deg + 2.0)
    assert window.checks_frame.stale and window.radial_frame.stale
