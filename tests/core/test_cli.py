"""The gyrometer command line: subcommands, exit codes, messages."""

import io
import subprocess
import sys
import types
from pathlib import Path

import pytest

from gyrometer.core import cli
from gyrometer.core.cli import EXIT_CODES, ProgressBar, main

ROOT = Path(__file__).resolve().parents[2]
SAMPLES = ROOT / "sample_cubes"


@pytest.fixture(scope="module")
def small_recipe(tmp_path_factory):
    """A quick maps-route recipe on a small synthetic galaxy."""
    from gyrometer.core.fitsio import write_mapset
    from gyrometer.core.synthetic import barred_model, make_maps

    folder = tmp_path_factory.mktemp("small")
    maps, truth = make_maps(barred_model(name="LBDP-903", shape=(48, 48),
                                         pixel_scale_arcsec=1.0,
                                         psf_fwhm_arcsec=1.5))
    write_mapset(folder / "maps.fits", maps)
    g = truth.geometry
    text = f"""
[galaxy]
name = "LBDP-903"
[input]
maps = "maps.fits"
[geometry]
ra_deg = {g.ra_deg!r}
dec_deg = {g.dec_deg!r}
pa_deg = {g.pa_deg!r}
inc_deg = {g.inc_deg!r}
vsys_kms = {g.vsys_kms!r}
distance_mpc = 20.0
pa_err_deg = 2.0
[slits]
count = 5
spacing_arcsec = 3.0
[uncertainty]
draws = 20
[rotation_curve]
source = "none"
[bar]
length_arcsec = 0
[output]
folder = "out"
figures = []
"""
    path = folder / "small.toml"
    path.write_text(text)
    return path


def test_help_explains_the_commands_and_exit_codes(capsys):
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    for word in ("demo", "starter", "check", "measure", "moments", "merge",
                 "regions", "exit codes", "Tremaine-Weinberg"):
        assert word in out
    for command in ("demo", "measure", "starter", "check", "moments",
                    "merge"):
        assert main([command, "--help"]) == 0
        assert "exit codes" in capsys.readouterr().out
    assert set(EXIT_CODES) == {0, 1, 2, 3, 4, 5}


def test_usage_errors_exit_with_2(capsys):
    assert main([]) == 2
    assert main(["measure"]) == 2
    assert main(["frobnicate"]) == 2
    assert "usage:" in capsys.readouterr().err


def test_a_bad_recipe_gives_one_line_naming_the_key(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text('[geometry]\nmode = "given"\npa_deg = "sixty"\n')
    assert main(["check", str(path)]) == 1
    err = capsys.readouterr().err
    assert err.startswith("gyrometer: error: ")
    assert "geometry.pa_deg" in err and str(path) in err
    assert "Traceback" not in err


def test_check_accepts_a_good_recipe(small_recipe, capsys):
    assert main(["check", str(small_recipe)]) == 0
    out = capsys.readouterr().out
    assert "OK" in out and "5 slits" in out


def test_measure_writes_outputs_and_respects_force(small_recipe, tmp_path, capsys):
    out = tmp_path / "results"
    args = ["measure", str(small_recipe), "-o", str(out), "-q"]
    assert main(args) == 0
    assert (out / "LBDP-903.ecsv").is_file()
    assert (out / "LBDP-903.session.toml").is_file()
    assert capsys.readouterr().out == ""  # quiet
    assert main(args) == 4  # exists, no --force
    assert "--force" in capsys.readouterr().err
    assert main(args + ["--force", "--table", str(tmp_path / "paper.tex")]) == 0
    assert "deluxetable" in (tmp_path / "paper.tex").read_text()
    # merge: the paper table from results files
    table = tmp_path / "merged.tex"
    assert main(["merge", str(out / "LBDP-903.ecsv"), str(out / "LBDP-903.json"),
                 "-o", str(table), "--style", "tabular", "-q"]) == 0
    assert table.read_text().count("LBDP-903 &") == 2
    # the written session re-runs (reproduces) from the command line
    again = tmp_path / "again"
    assert main(["measure", str(out / "LBDP-903.session.toml"), "-o",
                 str(again), "-q"]) == 0
    assert (again / "LBDP-903.json").read_text() != ""


def test_measure_prints_a_summary(small_recipe, tmp_path, capsys):
    assert main(["measure", str(small_recipe), "-o", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "Omega_p = " in out and "km/s/kpc" in out and "km/s/arcsec" in out
    assert "uncertainty budget" in out and "all combined" in out


def test_starter_writes_a_recipe_that_checks(tmp_path, capsys):
    from gyrometer.core.fitsio import write_mapset
    from gyrometer.core.synthetic import barred_model, make_maps

    maps, _ = make_maps(barred_model(name="LBDP-904", shape=(32, 32),
                                     pixel_scale_arcsec=2.0))
    data = write_mapset(tmp_path / "d.fits", maps)
    recipe = tmp_path / "r.toml"
    assert main(["starter", str(data), "-o", str(recipe), "-q"]) == 0
    assert main(["check", str(recipe), "-q"]) == 0
    assert main(["starter", str(data), "-o", str(recipe)]) == 4
    assert main(["starter", str(data)]) == 0
    assert "[geometry]" in capsys.readouterr().out


def test_regions_export_and_import(small_recipe, tmp_path):
    reg = tmp_path / "slits.reg"
    assert main(["regions", "export", str(small_recipe), "-o", str(reg),
                 "-q"]) == 0
    assert "polygon(" in reg.read_text()
    session_path = tmp_path / "with_slits.toml"
    assert main(["regions", "import", str(reg), "--into", str(small_recipe),
                 "-o", str(session_path), "-q"]) == 0
    from gyrometer.core.session import load_session
    session = load_session(session_path)
    assert len(session.slits) == 5
    assert [round(s.offset_arcsec, 3) for s in session.slits] == \
        [-6.0, -3.0, 0.0, 3.0, 6.0]


def test_moments_writes_a_map_set(tmp_path):
    from gyrometer.core.fitsio import load_mapset

    out = tmp_path / "maps.fits"
    assert main(["moments", str(SAMPLES / "LBDP-011_halpha_cube.fits"),
                 "--line", "Halpha", "--vsys", "1850", "-o", str(out),
                 "-q"]) == 0
    maps = load_mapset(out)
    assert maps.shape == (96, 96)  # sample_cubes/README.md: 96 x 96 spaxels


def test_demo_without_display_runs_headless(tmp_path, monkeypatch, capsys):
    monkeypatch.delenv("DISPLAY", raising=False)
    monkeypatch.delenv("WAYLAND_DISPLAY", raising=False)
    monkeypatch.chdir(tmp_path)
    assert main(["demo", "--draws", "30", "--no-figures"]) == 0
    out = capsys.readouterr().out
    assert "no display found: running the same measurement headless" in out
    assert "LBDP-011" in out and "km/s/kpc" in out and "km/s/arcsec" in out
    assert "corotation" in out and "R = R_CR/R_bar" in out
    assert "true pattern speed is 60 km/s/kpc" in out
    assert (tmp_path / "gyrometer-demo-output" / "LBDP-011.ecsv").is_file()
    # a second demo does not overwrite without --force
    assert main(["demo", "--headless", "--draws", "30", "--no-figures"]) == 4


def test_demo_with_a_display_opens_the_app(monkeypatch):
    calls = []
    fake = types.ModuleType("gyrometer.app.main")
    fake.main = lambda argv: calls.append(list(argv)) or 0
    monkeypatch.setitem(sys.modules, "gyrometer.app.main", fake)
    monkeypatch.setenv("DISPLAY", ":99")
    assert main(["demo"]) == 0
    assert calls and calls[0][0].endswith("LBDP-011.recipe.toml")
    # the app is given a session file made from the sample recipe
    from gyrometer.core.session import load_session
    session = load_session(calls[0][0])
    assert session.name == "LBDP-011"
    assert session.input.cube == str(SAMPLES / "LBDP-011_halpha_cube.fits")


def test_interrupt_and_internal_errors_have_their_codes(small_recipe,
                                                        monkeypatch, capsys):
    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(cli, "_run_one", interrupted)
    assert main(["measure", str(small_recipe)]) == 3
    assert "interrupted" in capsys.readouterr().err

    def buggy(*a, **k):
        raise ZeroDivisionError("oops")

    monkeypatch.setattr(cli, "_run_one", buggy)
    assert main(["measure", str(small_recipe)]) == 5
    err = capsys.readouterr().err
    assert "internal error" in err and "Traceback" not in err


def test_progress_bar_on_a_terminal_and_in_a_log():
    class Tty(io.StringIO):
        def isatty(self):
            return True

    log = io.StringIO()
    bar = ProgressBar(log)
    for k in range(3):
        bar(k, 3, "uncertainty budget: noise")
    bar(1, 2, "rotation curve")
    assert log.getvalue().splitlines() == ["gyrometer: uncertainty budget...",
                                           "gyrometer: rotation curve..."]
    tty = Tty()
    bar = ProgressBar(tty)
    bar(1, 2, "pattern speed")
    assert "[##############..............]  50%  pattern speed" in tty.getvalue()
    bar.close()
    assert tty.getvalue().endswith("\r")


def test_console_script_is_installed():
    script = Path(sys.executable).with_name("gyrometer")
    assert script.is_file()
    done = subprocess.run([str(script), "--version"], capture_output=True,
                          text=True, timeout=60)
    assert done.returncode == 0 and done.stdout.startswith("gyrometer ")


@pytest.mark.parametrize("name", ["LBDP-023", "LBDP-037"])
def test_sample_recipes_check(name, capsys):
    root = Path(__file__).resolve().parents[2] / "sample_cubes"
    assert main(["check", str(root / f"{name}.recipe.toml")]) == 0
    out = capsys.readouterr().out
    assert "OK" in out and name in out
    if name == "LBDP-023":
        assert "pattern speed against radius: one annulus per slit pair" in out


def test_the_sample_subcommand_is_part_of_the_gyrometer_command():
    """`gyrometer sample` runs core.survey's command (one console script)."""
    from gyrometer.core import cli, survey

    args = cli.build_parser().parse_args(["sample", "survey.toml", "--workers", "2"])
    assert args.func is survey.run_sample_command
    assert args.workers == 2
