"""Fixtures of the desktop-app tests: a small synthetic map set on disk,
settings redirected to a temporary folder, and a shown main window."""

from __future__ import annotations

import time

import numpy as np
import pytest


@pytest.fixture(scope="session")
def small_mapset_file(tmp_path_factory):
    """A 64 x 64 synthetic barred galaxy (invented LBDP-style name) written
    as a Gyrometer map set; returns ``(path, truth)``."""
    from gyrometer.core.fitsio import write_mapset
    from gyrometer.core.synthetic import barred_model, make_maps

    model = barred_model(name="LBDP-test-bar", shape=(64, 64), pixel_scale_arcsec=1.0,
                         subsample=2, psf_fwhm_arcsec=0.0)
    maps, truth = make_maps(model, rng=np.random.default_rng(11))
    path = tmp_path_factory.mktemp("data") / "LBDP-test_maps.fits"
    write_mapset(path, maps)
    return path, truth


@pytest.fixture
def settings(tmp_path):
    from gyrometer.app.settings import AppSettings
    return AppSettings(tmp_path / "config")


@pytest.fixture
def window(qtbot, settings):
    from gyrometer.app.main import create_app
    _app, win = create_app([], settings)
    qtbot.addWidget(win)
    win.resize(1200, 800)
    win.show()
    yield win
    win.controller.tasks.cancel()
    win.controller.tasks.wait()


@pytest.fixture
def errors(window):
    """Messages the controller reported (title, message)."""
    seen: list[tuple[str, str]] = []
    window.controller.error_raised.connect(lambda t, m: seen.append((t, m)))
    return seen


@pytest.fixture
def idle(qtbot, window):
    """``idle()`` waits until the controller's background task ended."""
    def wait(timeout_ms: int = 90000) -> None:
        qtbot.waitUntil(lambda: not window.controller.tasks.busy, timeout=timeout_ms)
        qtbot.wait(5)
    return wait


@pytest.fixture(scope="session")
def prepared(small_mapset_file):
    """What opening the small map set computes in the background (session,
    maps, estimated geometry, slits), through the controller's own code,
    computed once: the geometry fit dominates the time of opening."""
    from gyrometer.app.controller import Controller
    from gyrometer.core.fitsio import open_data

    path, _ = small_mapset_file
    maps = open_data(path)
    session = Controller._session_for(path, maps)
    geometry, slits, notes = Controller._prepare(session, maps, lambda *a: None)
    return session, maps, geometry, slits, notes


@pytest.fixture
def opened(window, small_mapset_file, prepared, errors):
    """The window with the small map set installed as the background open
    would install it (``test_opening_...`` opens it for real), fast budget
    settings, and the distance of the synthetic truth."""
    from gyrometer.core.budget import BudgetSettings

    path, truth = small_mapset_file
    c = window.controller
    session, maps, geometry, slits, notes = prepared
    c.source_path = str(path)
    c._install(session, maps, maps, geometry, slits, notes)
    assert not errors, errors
    assert c.maps is not None
    # fewer draws keep the tests fast; same settings reach the batch run
    c.session = c.session.with_(budget=BudgetSettings(n_draws=40, seed=7))
    c.update_geometry("set distance", distance_mpc=truth.geometry.distance_mpc)
    return window

