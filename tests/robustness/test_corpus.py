"""Every bad input of the corpus gets a clear message, never a traceback.

Each case of ``make_corpus.py`` goes through

1. the Python API: the project exception named by the case, its message
   holding the case's fragment;
2. the command line, in process (:func:`gyrometer.core.cli.main`, the
   console script's entry point, with the real argument parsing and
   error handling): the exit status of the case (1 = bad input, 4 =
   output refused), ``gyrometer: error:`` and the fragment on stderr, no
   ``Traceback``, no output file left behind and the user's files intact;
3. the installed ``gyrometer`` console script in a subprocess, for one
   case of each subcommand (each start costs 1-4 s on a loaded machine).
   Set ``GYROMETER_CLI_ALL=1`` to run every case as a subprocess.

Odd but valid files (unusual BITPIX, a spectral axis decreasing in
velocity, non-ASCII header text) must load with the right values.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import subprocess
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest

from gyrometer.core import cli
from gyrometer.core.errors import GyrometerError


def _load_make_corpus():
    name = "gyrometer_tests_make_corpus"  # the same key as conftest.py
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(
            name, Path(__file__).with_name("make_corpus.py"))
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module
        spec.loader.exec_module(module)
    return sys.modules[name]


_MC = _load_make_corpus()
with tempfile.TemporaryDirectory() as _scratch:
    _CASES = _MC.build_corpus(_scratch)
CASE_NAMES = [c.name for c in _CASES]


def _subprocess_names() -> list[str]:
    """One case per subcommand and exit status (all with GYROMETER_CLI_ALL)."""
    if os.environ.get("GYROMETER_CLI_ALL"):
        return CASE_NAMES
    seen, names = set(), []
    for case in _CASES:
        key = (case.cli[0], case.exit_code)
        if key not in seen:
            seen.add(key)
            names.append(case.name)
    return names


def _snapshot(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _check_files_kept(case) -> None:
    for path, content in case.keep:
        assert path.read_bytes() == content, f"{path} was changed"


def test_corpus_covers_every_fault_of_the_issue():
    # the faults named in the robustness issue, each by at least one case
    needed = ["not_fits", "truncated_data", "2d_not_cube", "no_spectral_axis",
              "no_celestial_wcs", "unknown_spectral_ctype",
              "velocity_without_rest_value", "empty_data", "all_nan_cube",
              "maps_shapes_disagree", "maps_wcs_disagree",
              "velocity_unit_not_velocity", "unusual_bitpix_24", "all_inf_cube",
              "nan_only_in_line_window", "zero_width_channels", "maps_one_pixel",
              "very_thin_map", "singular_wcs_matrix", "naxis_larger_than_file",
              "non_ascii_spectral_ctype", "recipe_wrong_type",
              "recipe_unknown_key", "recipe_missing_file", "slits_off_the_data",
              "inclination_zero", "inclination_ninety", "distance_zero",
              "distance_negative", "rotation_curve_two_points",
              "rotation_curve_repeated_radius"]
    missing = [n for n in needed if n not in CASE_NAMES]
    assert not missing
    assert all(issubclass(c.error, GyrometerError) for c in _CASES)


def test_corpus_builder_runs_as_a_script(tmp_path):
    # ``python make_corpus.py FOLDER`` writes the corpus and lists it
    assert _MC.main([str(tmp_path / "c")]) == 0
    assert (tmp_path / "c" / "not_fits.fits").is_file()
    assert (tmp_path / "c" / "tolerated" / "bitpix_8.fits").is_file()


@pytest.mark.parametrize("name", CASE_NAMES)
def test_python_api_raises_the_project_error(corpus, name):
    case = corpus[name]
    with warnings.catch_warnings():
        # fuzzed headers may make astropy warn; the fault must still be ours
        warnings.simplefilter("ignore", Warning)
        with pytest.raises(case.error) as info:
            case.load()
    assert case.message.lower() in str(info.value).lower()
    _check_files_kept(case)


def _outputs_named(case) -> list[Path]:
    args = list(case.cli)
    out = []
    for flag in ("-o", "--output"):
        if flag in args:
            out.append(Path(args[args.index(flag) + 1]))
    return out


@pytest.mark.parametrize("name", CASE_NAMES)
def test_command_line_reports_the_fault_without_traceback(corpus, name, capsys,
                                                          tmp_path, monkeypatch):
    case = corpus[name]
    monkeypatch.chdir(tmp_path)  # anything written by mistake lands here
    before = _snapshot(case.files[0].parent)
    outputs = [p for p in _outputs_named(case) if not p.exists()]
    with warnings.catch_warnings(record=True):
        # as in a real shell, warnings (e.g. the regions parser skipping a
        # line) are reports, never errors: record them instead of raising
        warnings.simplefilter("always")
        code = cli.main(list(case.cli))
    err = capsys.readouterr().err
    assert code == case.exit_code, err
    assert "gyrometer: error:" in err
    assert case.expected_cli_message.lower() in err.lower(), err
    assert "Traceback" not in err
    assert not any(p.exists() for p in outputs), "an output was written"
    assert _snapshot(case.files[0].parent) == before  # nothing changed or added
    assert not list(tmp_path.iterdir())
    _check_files_kept(case)


def _console_script() -> list[str]:
    script = Path(sys.executable).with_name("gyrometer")
    if script.is_file():
        return [str(script)]
    return [sys.executable, "-m", "gyrometer.core.cli"]


@pytest.mark.parametrize("name", _subprocess_names())
def test_console_script_exits_non_zero_without_traceback(corpus, name, tmp_path):
    case = corpus[name]
    outputs = [p for p in _outputs_named(case) if not p.exists()]
    env = dict(os.environ, PYTHONWARNINGS="default")
    run = subprocess.run(_console_script() + list(case.cli), cwd=tmp_path,
                         capture_output=True, text=True, timeout=300, env=env)
    assert run.returncode == case.exit_code, run.stderr
    assert case.expected_cli_message.lower() in run.stderr.lower(), run.stderr
    assert "Traceback" not in run.stderr
    assert not any(p.exists() for p in outputs), "an output was written"
    _check_files_kept(case)


# -- odd but valid -------------------------------------------------------------
@pytest.mark.parametrize("name", _MC.TOLERATED)
def test_odd_but_valid_cubes_load_with_the_right_values(tolerated, name):
    from gyrometer.core.fitsio import load_cube

    path, expected = tolerated[name]
    cube = load_cube(path)
    # BSCALE/BZERO are applied in float32: 1 part in 1e7 of the values
    np.testing.assert_allclose(np.asarray(cube.data, float), expected,
                               rtol=2e-7, atol=1e-6)
    assert cube.name.isprintable() and cube.name.isascii()


def test_velocity_decreasing_axis_gives_the_same_moments(tolerated):
    # the same spectra against velocity, channels in the opposite order:
    # the moment maps must agree (channel widths are positive either way)
    from gyrometer.core.fitsio import load_cube
    from gyrometer.core.moments import MomentSettings, compute_moments
    from gyrometer.core.spectral import channel_velocities

    up = load_cube(tolerated["bitpix_minus_64"][0])
    down = load_cube(tolerated["decreasing_spectral_axis"][0])
    v_up, dv_up = channel_velocities(up.spectral)
    v_down, dv_down = channel_velocities(down.spectral)
    assert np.all(np.diff(v_up) > 0) and np.all(np.diff(v_down) < 0)
    np.testing.assert_allclose(v_down[::-1], v_up, rtol=0, atol=1e-6)
    np.testing.assert_allclose(dv_down[::-1], dv_up, rtol=1e-9)
    settings = MomentSettings(vsys_kms=1500.0, window_halfwidth_kms=40.0,
                              mask="none")
    a = compute_moments(up, settings)
    b = compute_moments(down, settings)
    # float32 data: agreement to ~1e-6 relative
    np.testing.assert_allclose(b.velocity_kms, a.velocity_kms, atol=1e-4)
    np.testing.assert_allclose(b.intensity, a.intensity, rtol=1e-5,
                               atol=1e-6 * np.nanmax(a.intensity))
