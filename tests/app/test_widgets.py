"""Widget behaviour: mouse drags on the map, cursor read-out, geometry
handles, colour scale, dialogs, settings and help."""

from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import QEvent, QPointF, Qt
from PySide6.QtGui import QMouseEvent
from PySide6.QtWidgets import QMessageBox

from gyrometer.app.mapview import map_levels
from gyrometer.core import tw


def _mouse(view, kind, pos, buttons):
    button = Qt.MouseButton.LeftButton
    if kind == QEvent.Type.MouseMove:
        button = Qt.MouseButton.NoButton
    event = QMouseEvent(kind, QPointF(pos), QPointF(view.viewport().mapToGlobal(pos)),
                        button, buttons, Qt.KeyboardModifier.NoModifier)
    from PySide6.QtWidgets import QApplication
    QApplication.sendEvent(view.viewport(), event)


def test_mouse_drag_moves_a_slit_across_the_line_of_nodes(opened, qtbot):
    """Real mouse events on the viewport (QT.md: moves >= 10 ms apart and
    beyond 5 px from the press)."""
    c = opened.controller
    opened.slit_panel.count.setValue(3)
    opened.slit_panel.spacing.setValue(8.0)
    opened.slit_panel.width.setValue(3.0)
    opened.slit_panel.layout_button.click()
    qtbot.wait(50)
    view = opened.map_view.graphics
    vb = opened.map_view.plot.getViewBox()
    qtbot.waitUntil(lambda: vb.viewRect().width() > 0)
    frame = opened.map_view._frame
    slit = c.slits.slits[2]
    # a point on the slit's centre line, a third of the way along it
    px, py = frame.lon_to_pixel(0.3 * slit.half_length_arcsec, slit.offset_arcsec)
    start = view.mapFromScene(vb.mapViewToScene(QPointF(float(px), float(py))))
    # drag across the line of nodes by 4 arcsec
    qx, qy = frame.lon_to_pixel(0.3 * slit.half_length_arcsec, slit.offset_arcsec + 4.0)
    end = view.mapFromScene(vb.mapViewToScene(QPointF(float(qx), float(qy))))
    _mouse(view, QEvent.Type.MouseButtonPress, start, Qt.MouseButton.LeftButton)
    for t in np.linspace(0.0, 1.0, 8)[1:]:
        qtbot.wait(15)
        p = start + (end - start) * float(t)
        _mouse(view, QEvent.Type.MouseMove, p, Qt.MouseButton.LeftButton)
    qtbot.wait(15)
    _mouse(view, QEvent.Type.MouseButtonRelease, end, Qt.MouseButton.NoButton)
    qtbot.waitUntil(lambda: not c.dragging, timeout=2000)
    moved = c.slits.slits[2]
    assert moved.offset_arcsec == pytest.approx(slit.offset_arcsec + 4.0, abs=0.6)
    assert c.selected == 2
    direct = tw.measure(c.maps, c.geometry, c.slits, warn=False)
    assert c.measurement.omega_p_kms_arcsec == pytest.approx(direct.omega_p_kms_arcsec,
                                                             rel=1e-12)
    assert c.undo_stack.count() >= 1


def test_cursor_readout_names_sky_position_pixel_and_value(opened):
    view = opened.map_view
    view.set_kind("velocity")
    text = view.describe(10.0, 20.0)
    maps = opened.controller.maps
    assert "pixel (10, 20)" in text
    world = maps.wcs.celestial.pixel_to_world(10.0, 20.0).icrs
    assert world.to_string("hmsdms", precision=2, sep=":").split()[0] in text
    assert f"{maps.velocity_kms[20, 10]:.4g}" in text and "km/s" in text


def test_velocity_colour_scale_is_centred_on_the_systemic_velocity():
    v = np.array([[1900.0, 2000.0], [2150.0, np.nan]])
    lo, hi = map_levels("velocity", v, 2000.0, 0.0)
    assert (lo + hi) / 2 == pytest.approx(2000.0)
    assert hi - 2000.0 == pytest.approx(150.0)


def test_map_kinds_offered_follow_the_maps(opened):
    box = opened.map_view.kind_box
    kinds = {box.itemData(i) for i in range(box.count())}
    assert {"intensity", "velocity"} <= kinds
    opened.map_actions[0].trigger()
    assert opened.map_view.kind == "intensity"


def test_dragging_the_nodes_handle_turns_the_position_angle(opened, qtbot):
    c = opened.controller
    overlay = opened.map_view.geometry_overlay
    frame = opened.map_view._frame
    a = overlay.radius_arcsec
    pa0 = c.geometry.pa_deg
    # put the handle 10 degrees further from north through east, then release
    from gyrometer.core.coords import lon_to_sky
    east, north = lon_to_sky(a, 0.0, pa0 + 10.0)
    px, py = frame.to_pixel(east, north)
    overlay.pa_handle.setPos(float(px), float(py))
    overlay.pa_handle.sigPositionChangeFinished.emit(overlay.pa_handle)
    assert c.geometry.pa_deg == pytest.approx((pa0 + 10.0) % 360.0, abs=0.05)
    c.undo_stack.undo()
    assert c.geometry.pa_deg == pytest.approx(pa0)


def test_dragging_the_minor_axis_handle_sets_the_inclination(opened):
    c = opened.controller
    overlay = opened.map_view.geometry_overlay
    frame = opened.map_view._frame
    a = overlay.radius_arcsec
    px, py = frame.lon_to_pixel(0.0, a * np.cos(np.radians(60.0)))
    overlay.inc_handle.setPos(float(px), float(py))
    overlay.inc_handle.sigPositionChangeFinished.emit(overlay.inc_handle)
    assert c.geometry.inc_deg == pytest.approx(60.0, abs=0.05)


def test_estimator_button_applies_core_estimate_with_errors(opened, idle):
    c = opened.controller
    c.update_geometry("offset PA", pa_deg=c.geometry.pa_deg + 8.0, pa_err_deg=0.0)
    seen = []
    c.estimate_ready.connect(lambda key, est: seen.append((key, est)))
    opened.geometry_panel.estimate_buttons["kinematic"].click()
    idle()
    key, est = seen[0]
    assert key == "kinematic"
    assert c.geometry.pa_deg == pytest.approx(est.pa_deg)
    assert c.geometry.pa_err_deg == pytest.approx(est.pa_err_deg) and est.pa_err_deg > 0
    assert opened.geometry_panel.errors["pa_err_deg"].value() == pytest.approx(
        est.pa_err_deg, abs=0.01)


def test_recent_files_and_settings_live_in_the_given_config_folder(window, settings,
                                                                   tmp_path):
    assert settings.folder == tmp_path / "config"
    window.controller._remember(tmp_path / "a.fits")
    window.controller._remember(tmp_path / "b.fits")
    assert settings.path.parent == settings.folder and settings.path.is_file()
    assert settings.recent_files()[:2] == [str(tmp_path / "b.fits"), str(tmp_path / "a.fits")]
    assert [a.text() for a in window.recent_menu.actions()[:2]] == ["b.fits", "a.fits"]
    from gyrometer.app.settings import AppSettings
    assert AppSettings(settings.folder).recent_files() == settings.recent_files()


def test_about_box_shows_the_version(window, monkeypatch):
    from gyrometer.core import __version__
    shown = []
    monkeypatch.setattr(QMessageBox, "about",
                        staticmethod(lambda parent, title, text: shown.append(text)))
    window.act_about.trigger()
    assert __version__ in shown[0]


def test_help_page_states_the_assumptions_and_caveats(window):
    from gyrometer.app.dialogs import help_html
    text = help_html().lower()
    for phrase in ("continuity", "position angle", "inclination", "mirror masking"):
        assert phrase in text
    window.act_help.trigger()
    assert window._help.isVisible()


def test_every_action_has_a_tooltip_and_frequent_ones_a_shortcut(window):
    for act in (window.act_open, window.act_save, window.act_export, window.act_undo,
                window.act_add, window.act_dup, window.act_remove, window.act_budget,
                window.act_full):
        assert act.toolTip()
    for act in (window.act_open, window.act_save, window.act_undo, window.act_redo,
                window.act_dup, window.act_budget, window.act_full, window.act_help):
        assert not act.shortcut().isEmpty()


def test_icons_are_our_svg_files_and_load():
    from gyrometer.app.icons import ICON_NAMES, icon, icon_path
    for name in ICON_NAMES:
        with open(icon_path(name), encoding="utf-8") as fh:
            assert fh.read().lstrip().startswith("<svg")
        assert not icon(name).isNull()


def test_moment_dialog_returns_core_settings():
    from gyrometer.app.dialogs import MomentDialog
    from gyrometer.core.moments import MomentSettings
    from gyrometer.core.synthetic import barred_model, make_cube

    cube, _ = make_cube(barred_model(shape=(12, 12), pixel_scale_arcsec=2.0, subsample=1))
    dialog = MomentDialog(cube, MomentSettings(vsys_kms=2000.0))
    dialog.window.setValue(321.0)
    dialog.snr.setValue(5.0)
    dialog.line.setCurrentIndex(max(dialog.line.findData("Halpha"), 0))
    chosen = dialog.settings()
    assert isinstance(chosen, MomentSettings)
    assert chosen.window_halfwidth_kms == 321.0 and chosen.snr_threshold == 5.0
    assert chosen.vsys_kms == 2000.0


def test_dropping_a_file_on_the_window_opens_it(window, small_mapset_file, qtbot, idle):
    from PySide6.QtCore import QMimeData, QPoint, QUrl
    from PySide6.QtGui import QDropEvent

    path, _ = small_mapset_file
    mime = QMimeData()
    mime.setUrls([QUrl.fromLocalFile(str(path))])
    event = QDropEvent(QPointF(QPoint(300, 300)), Qt.DropAction.CopyAction, mime,
                       Qt.MouseButton.NoButton, Qt.KeyboardModifier.NoModifier)
    window.dropEvent(event)
    idle()
    assert window.controller.maps is not None
    assert "LBDP-test" in window.windowTitle()


def test_unsaved_edits_mark_the_window_title(opened, tmp_path):
    c = opened.controller
    c.select_slit(0)
    c.nudge_slit(0.5)
    assert opened.isWindowModified()
    opened._session_path = str(tmp_path / "s.toml")
    opened.save_session()
    assert not opened.isWindowModified()
    assert (tmp_path / "s.toml").is_file()


def test_arrow_keys_on_the_map_nudge_the_selected_slit(opened, qtbot):
    from PySide6.QtTest import QTest

    c = opened.controller
    c.select_slit(1)
    y = c.slits.slits[1].offset_arcsec
    graphics = opened.map_view.graphics
    graphics.setFocus()
    qtbot.waitUntil(graphics.hasFocus, timeout=2000)
    QTest.keyClick(graphics, Qt.Key.Key_Up)
    assert c.slits.slits[1].offset_arcsec > y
    QTest.keyClick(graphics, Qt.Key.Key_Down, Qt.KeyboardModifier.ShiftModifier)
    assert c.slits.slits[1].offset_arcsec < y
    c.undo_stack.undo()
    c.undo_stack.undo()
    assert c.slits.slits[1].offset_arcsec == y
