"""Crash safety: autosave, recovery after a killed process, no silent
overwrites of sessions and exports."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from gyrometer.app.autosave import find_recoverable, pid_alive
from gyrometer.core.session import load_session

# The driver is the app itself, run in its own process: open the map set,
# move one slit and turn the line of nodes, wait for the autosave, report
# the state on stdout, and keep running until it is killed.
_DRIVER = textwrap.dedent("""
    import json, os, sys, time
    os.environ["QT_QPA_PLATFORM"] = "offscreen"
    from gyrometer.app.main import create_app
    from gyrometer.app.settings import AppSettings

    app, window = create_app([], AppSettings(sys.argv[1]))
    window.show()
    c = window.controller

    def settle(cond, timeout=120.0):
        end = time.time() + timeout
        while not cond():
            if time.time() > end:
                raise SystemExit("timed out")
            app.processEvents()
            time.sleep(0.01)

    c.open_path(sys.argv[2])
    settle(lambda: c.maps is not None and not c.tasks.busy)
    c.nudge_slit(1.7, index=2)
    c.update_geometry("turn", pa_deg=c.geometry.pa_deg + 4.0)
    saved_before = c.autosave.writes
    settle(lambda: c.autosave.writes > saved_before and not c.autosave.pending)
    g = c.geometry
    print(json.dumps({
        "pid": os.getpid(),
        "offsets": [s.offset_arcsec for s in c.slits],
        "widths": [s.width_arcsec for s in c.slits],
        "geometry": [g.ra_deg, g.dec_deg, g.pa_deg, g.inc_deg, g.vsys_kms]}),
        flush=True)
    app.exec()
""")


def _read_line(proc, timeout_s: float) -> str:
    end = time.time() + timeout_s
    line = ""
    os.set_blocking(proc.stdout.fileno(), False)
    while time.time() < end:
        chunk = proc.stdout.readline()
        if chunk:
            line += chunk
            if line.endswith("\n"):
                return line
        elif proc.poll() is not None:
            break
        else:
            time.sleep(0.05)
    raise AssertionError(f"driver gave no state; stderr: {proc.stderr.read()}")


def test_killed_app_leaves_an_autosave_that_restores_slits_and_geometry(
        tmp_path, small_mapset_file, window, settings, monkeypatch, idle, errors):
    path, _ = small_mapset_file
    driver = tmp_path / "driver.py"
    driver.write_text(_DRIVER)
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen")
    proc = subprocess.Popen([sys.executable, str(driver), str(settings.folder), str(path)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env)
    try:
        state = json.loads(_read_line(proc, 120.0))
        # while the writer runs, its autosave is not offered
        assert find_recoverable(settings.autosave_folder()) == []
    finally:
        proc.send_signal(signal.SIGKILL)   # a crash: no clean-up code runs
        proc.wait(30)
        proc.stdout.close()
        proc.stderr.close()
    assert not pid_alive(state["pid"])
    found = find_recoverable(settings.autosave_folder())
    assert [f.pid for f in found] == [state["pid"]]
    assert Path(found[0].source).name == path.name

    asked = []
    monkeypatch.setattr(window, "ask_recovery",
                        lambda item, others: asked.append(item) or "restore")
    assert window.offer_recovery()
    idle()
    assert not errors, errors
    assert len(asked) == 1
    c = window.controller
    assert [s.offset_arcsec for s in c.slits] == pytest.approx(state["offsets"], abs=1e-12)
    assert [s.width_arcsec for s in c.slits] == pytest.approx(state["widths"], abs=1e-12)
    g = c.geometry
    assert [g.ra_deg, g.dec_deg, g.pa_deg, g.inc_deg, g.vsys_kms] == pytest.approx(
        state["geometry"], abs=1e-12)
    # the recovered job is ours now: the old autosave is gone, ours exists
    assert not found[0].session_path.exists() and not found[0].lock_path.exists()
    assert c.autosave.session_path.is_file()
    assert find_recoverable(settings.autosave_folder()) == []
    # it has no file name: Save asks for one instead of writing into the
    # autosave folder
    assert c.source_path is None


def test_autosave_follows_edits_and_a_clean_exit_removes_it(opened, qtbot):
    c = opened.controller
    saver = c.autosave
    assert not saver.session_path.exists()
    c.nudge_slit(0.5, index=1)
    assert saver.pending          # debounced: not written at once
    qtbot.waitUntil(lambda: saver.session_path.is_file(), timeout=10000)
    saved = load_session(saver.session_path)
    assert saved.slits == c.slits and saved.geometry == c.geometry
    lock = json.loads(saver.lock_path.read_text())
    assert lock["pid"] == os.getpid()
    opened.close()
    assert not saver.session_path.exists() and not saver.lock_path.exists()


def test_declined_recovery_can_discard_the_autosave(window, settings, monkeypatch,
                                                    opened, qtbot):
    c = opened.controller
    c.autosave.save_now()
    # pretend its writer died: rename the pair to a pid that cannot exist
    folder = settings.autosave_folder()
    dead = 2 ** 22 + 12345
    while pid_alive(dead):
        dead += 1
    for suffix in (".toml", ".lock"):
        src = c.autosave.session_path.with_suffix(suffix)
        text = src.read_text().replace(str(os.getpid()), str(dead))
        (folder / f"autosave-{dead}{suffix}").write_text(text)
    assert [f.pid for f in find_recoverable(folder)] == [dead]
    monkeypatch.setattr(window, "ask_recovery", lambda item, others: "keep")
    assert not window.offer_recovery()
    assert [f.pid for f in find_recoverable(folder)] == [dead]
    monkeypatch.setattr(window, "ask_recovery", lambda item, others: "discard")
    assert not window.offer_recovery()
    assert find_recoverable(folder) == []


def test_save_as_asks_before_replacing_a_file(opened, tmp_path, monkeypatch):
    from PySide6.QtWidgets import QFileDialog
    target = tmp_path / "mine.toml"
    target.write_text("# the user's own notes\n")
    monkeypatch.setattr(QFileDialog, "getSaveFileName",
                        staticmethod(lambda *a, **k: (str(target), "")))
    answers = []
    monkeypatch.setattr(opened, "confirm_replace",
                        lambda q: answers.append(q) or False)
    opened.save_session(ask=True)
    assert len(answers) == 1 and "mine.toml" in answers[0]
    assert target.read_text() == "# the user's own notes\n"
    monkeypatch.setattr(opened, "confirm_replace", lambda q: True)
    opened.save_session(ask=True)
    assert load_session(target).slits == opened.controller.slits


def test_export_asks_before_replacing_and_keeps_files_when_declined(opened, tmp_path,
                                                                   idle, errors):
    from gyrometer.core.session import OutputSettings
    c = opened.controller
    # tables, regions and the session only: figures are slow to draw
    c.session = c.session.with_(output=OutputSettings(tables=("ecsv",), figures=(),
                                                      regions="ds9", session=True))
    folder = tmp_path / "out"
    assert c.export_results(folder, confirm=lambda q: pytest.fail("nothing to replace"))
    idle()
    assert not errors, errors
    first = {p: p.stat().st_mtime_ns for p in folder.iterdir()}
    assert first
    questions = []
    assert c.export_results(folder, confirm=lambda q: questions.append(q) or False)
    idle()
    assert len(questions) == 1 and "Replace" in questions[0]
    assert {p: p.stat().st_mtime_ns for p in folder.iterdir()} == first
    assert c.export_results(folder, confirm=lambda q: True)
    idle()
    idle()   # the replacing export starts on the next turn of the event loop
    assert not errors, errors
    again = {p: p.stat().st_mtime_ns for p in folder.iterdir()}
    assert again.keys() == first.keys()
    assert all(again[p] != first[p] for p in first)     # every file replaced
    session = load_session(next(folder.glob("*.session.toml")))
    assert session.slits == c.slits
