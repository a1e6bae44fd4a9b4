"""Every bad input of the robustness corpus, met in the desktop app.

The corpus (``tests/robustness/make_corpus.py``, shared with the command-line
tests) is fed through the path a user takes in the window: File > Open for
data files and sessions (:meth:`Controller.open_path`; a recipe's job
reaches the app as the session ``gyrometer session`` makes of it), the
moment dialog for cubes, the geometry panel's edits
(:meth:`Controller.update_geometry`), Save onto an existing file, and the
full run for a job whose rotation-curve table is bad. For each case the app
must show exactly one error dialog (the window's one error display,
:func:`gyrometer.app.errordialog.show_error`, is replaced by a recorder)
holding the case's message and the file's name, never an "Unexpected ..."
bug report; afterwards the user's slits and geometry are those from before,
and an edit still works.
"""

from __future__ import annotations

import importlib.util
import sys
import tempfile
import warnings
from pathlib import Path

import pytest

from gyrometer.core.slits import SlitSet

_MODULE = "gyrometer_tests_make_corpus"  # the key of tests/robustness/conftest.py


def _load_make_corpus():
    # the suite runs with --import-mode=importlib: load the builder by path
    if _MODULE not in sys.modules:
        spec = importlib.util.spec_from_file_location(
            _MODULE, Path(__file__).parents[1] / "robustness" / "make_corpus.py")
        module = importlib.util.module_from_spec(spec)
        sys.modules[_MODULE] = module  # dataclasses look the module up
        spec.loader.exec_module(module)
    return sys.modules[_MODULE]


_MC = _load_make_corpus()
with tempfile.TemporaryDirectory() as _scratch:
    _ALL = {c.name: c.kind for c in _MC.build_corpus(_scratch)}

#: Corpus kinds the app has no way to feed, left to the command line:
#: * "regions": the app cannot import a region file (slit regions are only
#:   exported; ``gyrometer regions import`` is the command line's);
#: * "recipe": the app opens sessions, not recipes (a recipe is the command
#:   line's input); any recipe is refused with one message, checked by
#:   ``test_opening_a_recipe_says_it_is_not_a_session``. The recipe faults
#:   that are edits in the app (inclination 0 or 90 deg, distance <= 0) are
#:   the "geometry" cases, fed through the geometry edits;
#: * "slits": slits off the data are not refused in the app: a slit dragged
#:   off the map is allowed mid-drag and the live result says why there is
#:   no measurement (``test_slits_moved_off_the_data_...`` below).
_NO_APP_PATH = {"regions", "recipe", "slits"}
CASE_NAMES = sorted(n for n, kind in _ALL.items() if kind not in _NO_APP_PATH)

#: Where the app's message differs from the Python API's, by design: File >
#: Open takes a cube or a map set (:func:`gyrometer.core.fitsio.open_data`),
#: so a file with no 3D image is judged as a map set.
_APP_MESSAGE = {"2d_not_cube": "no map extension recognised",
                "empty_data": "no map extension recognised",
                "one_pixel_cube": "no map extension recognised"}


def _session_of(recipe: Path, folder: Path) -> Path:
    """The session file ``gyrometer session`` makes of ``recipe``: the way
    a recipe's job reaches the app."""
    from gyrometer.core.recipe import load_recipe
    from gyrometer.core.session import save_session
    out = folder / f"{recipe.stem}.session.toml"
    save_session(load_recipe(recipe), out)
    return out


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    """The corpus, written once for this module."""
    folder = tmp_path_factory.mktemp("corpus_app")
    return {c.name: c for c in _MC.build_corpus(folder)}


@pytest.fixture
def shown(opened, monkeypatch):
    """Messages shown by the window's error dialog (title, message)."""
    seen: list[tuple[str, str]] = []
    monkeypatch.setattr("gyrometer.app.mainwindow.show_error",
                        lambda parent, title, message: seen.append((title, message)))
    return seen


class _OkMomentDialog:
    """The moment dialog as a user accepting it: emission line, systemic
    velocity 1500 km/s and a +-25 km/s window (the corpus cubes' line)."""

    def __init__(self, cube, settings, parent=None) -> None:
        pass

    def exec(self) -> bool:
        return True

    def route(self) -> str:
        return "emission"

    def settings(self):
        from gyrometer.core.moments import MomentSettings
        return MomentSettings(vsys_kms=1500.0, window_halfwidth_kms=25.0)


def _lay_out_slits(c) -> None:
    c.make_slits(5, 6.0, 3.0, 20.0)
    c.select_slit(1)
    c.nudge_slit(0.7)  # something the user made, beyond the regular layout
    assert c.measurement is not None


def _feed(case, window, idle, folder: Path) -> None:
    """Feed ``case`` to the app as a user would."""
    c = window.controller
    if case.kind in ("cube", "maps"):
        recipes = [p for p in case.files if p.suffix == ".toml"]
        # one file per map, or a job's slit settings: met through a session
        path = _session_of(recipes[0], folder) if recipes else case.files[0]
        c.open_path(path)
    elif case.kind == "session":
        c.open_path(case.files[0])
    elif case.kind == "geometry":
        key = "inc_deg" if "inclination" in case.name else "distance_mpc"
        value = {"zero": 0.0, "ninety": 90.0, "negative": -1.0}[case.name.split("_")[-1]]
        c.update_geometry("edit geometry", **{key: value})
    elif case.kind == "output":
        # Save onto an existing file, without the window's "Replace?" question
        c.save_session(case.files[0])
    elif case.kind == "rotation_curve":
        c.run_full()                 # the job was opened beforehand
    else:  # pragma: no cover - a new corpus kind must be given an app path
        raise AssertionError(f"no app path for corpus kind {case.kind!r}")
    idle()


@pytest.mark.parametrize("name", CASE_NAMES)
def test_bad_input_shows_one_error_dialog_and_keeps_the_slits(
        name, corpus, opened, shown, idle, monkeypatch, tmp_path):
    monkeypatch.setattr("gyrometer.app.mainwindow.MomentDialog", _OkMomentDialog)
    case = corpus[name]
    c = opened.controller
    _lay_out_slits(c)
    if case.kind == "rotation_curve":
        # a valid job whose rotation-curve table is bad: it opens fine
        session = _session_of(case.files[1], tmp_path)
        c.open_path(session)
        idle()
        assert not shown, shown
        assert c.source_path == str(session)
        _lay_out_slits(c)            # the user's slits on that job
    before = (c.maps, c.geometry, c.slits, c.undo_stack.count())
    with warnings.catch_warnings():
        # fuzzed headers may make astropy warn; the fault must still be ours
        warnings.simplefilter("ignore", Warning)
        _feed(case, opened, idle, tmp_path)
    assert len(shown) == 1, shown
    title, message = shown[0]
    assert title  # the dialog says which action failed
    assert "Unexpected" not in message and "Traceback" not in message
    expected = _APP_MESSAGE.get(name, case.message)
    assert expected.lower() in message.lower(), message
    if case.kind != "geometry":     # a geometry edit has no file
        assert case.files[0].name in message, message
    # nothing the user made is lost, and the window still takes edits
    assert (c.maps, c.geometry, c.slits, c.undo_stack.count()) == before
    for path, content in case.keep:
        assert path.read_bytes() == content
    c.select_slit(0)
    offset = c.slits.slits[0].offset_arcsec
    c.nudge_slit(0.5)
    assert c.slits.slits[0].offset_arcsec == pytest.approx(offset + 0.5)
    assert c.measurement is not None
    c.undo_stack.undo()
    assert c.slits == before[2]
    assert len(shown) == 1, shown


def test_slits_moved_off_the_data_leave_no_measurement_and_no_dialog(
        corpus, opened, shown):
    # corpus case slits_off_the_data, through the slit editor: the edit is
    # kept (undoable), the result says why there is none, no dialog
    c = opened.controller
    _lay_out_slits(c)
    before = c.slits
    notes: list[str] = []
    c.status.connect(notes.append)
    c.set_slits(SlitSet.generate(3, 3.0, 2.0, 5.0, first_offset_arcsec=500.0),
                "move slits off the map")
    assert not shown
    assert c.measurement is None
    assert any(corpus["slits_off_the_data"].message in n for n in notes), notes
    c.undo_stack.undo()
    assert c.slits == before and c.measurement is not None


def test_opening_a_recipe_says_it_is_not_a_session(corpus, opened, shown, idle):
    # the app opens sessions; a recipe (here a valid one) is refused with the
    # file's name and the way to run it, and nothing on screen changes
    c = opened.controller
    _lay_out_slits(c)
    before = (c.maps, c.geometry, c.slits)
    recipe = corpus["recipe_unknown_key"].files[0].with_name("regions_into.toml")
    c.open_path(recipe)
    idle()
    assert len(shown) == 1, shown
    message = shown[0][1]
    assert "regions_into.toml" in message and "not a session file" in message
    assert "gyrometer measure" in message
    assert (c.maps, c.geometry, c.slits) == before
