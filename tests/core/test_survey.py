"""Sample runs: engines agree with serial runs, restarts resume, failures stay local."""

import json
import os
import subprocess
import sys
import threading
import warnings
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

from dataclasses import replace

from gyrometer.core import pipeline, survey
from gyrometer.core.errors import (Cancelled, GyrometerError, OutputError,
                                   RecipeError)
from gyrometer.core.fitsio import write_mapset
from gyrometer.core.session import sha256_file
from gyrometer.core.synthetic import barred_model, make_maps

#: Pattern speeds of the synthetic galaxies, km/s/kpc (the models' truth).
OMEGAS = {"LBDP-101": 30.0, "LBDP-103": 40.0, "LBDP-104": 45.0}
CORRUPT = "LBDP-102"

_RECIPE = """[galaxy]
name = "{name}"
[input]
kind = "maps"
maps = "../data/{name}_maps.fits"
[geometry]
mode = "given"
ra_deg = 150.1234
dec_deg = -12.3456
pa_deg = 30.0
inc_deg = 50.0
vsys_kms = 2000.0
distance_mpc = 20.0
pa_err_deg = 2.0
"""

_SAMPLE = """[sample]
name = "LBDP test sample"
folder = "recipes"
output = "run"
[engine]
kind = "serial"
[defaults.uncertainty]
draws = 20
[defaults.rotation_curve]
source = "none"
[defaults.bar]
length_arcsec = 0
[defaults.output]
figures = []
tables = ["ecsv"]
"""


def _write_galaxies(folder: Path) -> Path:
    """Three small synthetic barred galaxies and one garbage .fits file."""
    (folder / "data").mkdir()
    (folder / "recipes").mkdir()
    for name, omega in OMEGAS.items():
        model = barred_model(name=name, omega_p_kms_kpc=omega, shape=(48, 48),
                             pixel_scale_arcsec=1.5, psf_fwhm_arcsec=2.0,
                             seed=int(name[-3:]))
        maps, _ = make_maps(model)
        write_mapset(folder / "data" / f"{name}_maps.fits", maps)
    (folder / "data" / f"{CORRUPT}_maps.fits").write_bytes(
        b"\x00garbage, not FITS\xff" * 200)
    for name in sorted([*OMEGAS, CORRUPT]):
        (folder / "recipes" / f"{name}.toml").write_text(
            _RECIPE.format(name=name))
    sample = folder / "sample.toml"
    sample.write_text(_SAMPLE)
    return sample


@pytest.fixture(scope="module")
def sample_file(tmp_path_factory):
    return _write_galaxies(tmp_path_factory.mktemp("survey"))


@pytest.fixture(scope="module")
def serial(sample_file, tmp_path_factory):
    spec = survey.load_sample(sample_file)
    out = tmp_path_factory.mktemp("serial") / "run"
    seen = []
    run = survey.run_sample(spec, engine="serial", output_dir=out,
                            status=seen.append)
    return run, seen


@pytest.fixture(scope="module")
def serial_run(serial):
    return serial[0]


def _numbers(path: Path) -> dict:
    table = Table.read(path, format="ascii.ecsv")
    return {name: np.asarray(table[name]) for name in table.colnames}


def _assert_same_results(a: Path, b: Path) -> None:
    ta, tb = _numbers(a), _numbers(b)
    assert list(ta) == list(tb)
    for name in ta:
        if ta[name].dtype.kind == "f":
            assert np.array_equal(ta[name], tb[name], equal_nan=True), name
        else:
            assert list(ta[name]) == list(tb[name]), name


# -- the serial reference ---------------------------------------------------------
def test_serial_run_measures_every_good_galaxy_and_merges_them(serial_run):
    run = serial_run
    assert (run.n_total, run.n_done, run.n_failed) == (4, 3, 1)
    table = Table.read(run.results_ecsv, format="ascii.ecsv")
    assert list(table["galaxy"]) == sorted(OMEGAS)
    for row in table:
        true = OMEGAS[row["galaxy"]]
        err = max(row["omega_p_kpc_plus"], row["omega_p_kpc_minus"])
        # exact synthetic construction (DOMAIN notes, "Exact synthetic
        # test", derived): the measurement must agree within 3 sigma
        assert abs(row["omega_p_kpc"] - true) < 3 * err, row["galaxy"]
    assert "deluxetable" in run.results_tex.read_text()
    for name in OMEGAS:
        folder = run.output_dir / "galaxies" / name
        assert (folder / f"{name}.ecsv").is_file()
        assert (folder / f"{name}.session.toml").is_file()


def test_one_corrupt_input_gives_one_failure_row(serial_run):
    failures = Table.read(serial_run.failures_ecsv, format="ascii.ecsv")
    assert len(failures) == 1
    row = failures[0]
    assert row["galaxy"] == CORRUPT
    assert row["error_type"] == "InputFileError"
    assert f"{CORRUPT}_maps.fits" in row["message"]  # names the file
    assert "Traceback" not in row["message"]
    assert row["input"].endswith(f"{CORRUPT}_maps.fits")


def test_manifest_records_finished_and_failed_galaxies(serial_run):
    doc = json.loads(serial_run.manifest.read_text())
    assert doc["schema"] == survey.MANIFEST_SCHEMA
    statuses = {g: r["status"] for g, r in doc["galaxies"].items()}
    assert statuses == {**{g: "done" for g in OMEGAS}, CORRUPT: "failed"}
    assert all(len(r["key"]) == 64 for r in doc["galaxies"].values())


def test_progress_counts_and_time_left(serial):
    run, seen = serial
    first = next(s for s in seen if s.done == 1)
    assert (first.running, first.failed, first.pending) == (0, 0, 3)
    # time left = mean duration x (pending + running) / workers
    assert first.eta_s == pytest.approx(3 * run.outcomes[0].duration_s)
    assert "about" in first.text() and "1/4 done" in first.text()
    assert (seen[-1].done, seen[-1].failed, seen[-1].pending) == (3, 1, 0)


# -- engines agree with the serial run -------------------------------------------------
def test_local_process_pool_gives_the_serial_results(sample_file, serial_run,
                                                     tmp_path):
    spec = survey.load_sample(sample_file)
    seen = []
    run = survey.run_sample(spec, engine="local", workers=2,
                            output_dir=tmp_path / "run", status=seen.append)
    _assert_same_results(serial_run.results_ecsv, run.results_ecsv)
    _assert_same_results(serial_run.failures_ecsv, run.failures_ecsv)
    assert max(s.running for s in seen) == 2  # both workers were used
    workers = {o.worker for o in run.outcomes}
    assert all(not w.endswith(f":{os.getpid()}") for w in workers)
    assert seen[-1].done == 3 and seen[-1].failed == 1


def test_dask_local_cluster_gives_the_serial_results(sample_file, serial_run,
                                                     tmp_path):
    distributed = pytest.importorskip("distributed")
    spec = survey.load_sample(sample_file)
    with warnings.catch_warnings():
        # the scheduler (in this process) warns when creating its scratch
        # folder takes over 1 s, which happens on a busy shared machine;
        # harmless here (distributed/core.py, warn_on_duration)
        warnings.filterwarnings("ignore", category=UserWarning,
                                message="Creating scratch directories")
        cluster = distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True,
            host="127.0.0.1", dashboard_address=None)
        try:
            run = survey.run_sample(spec, engine="dask",
                                    scheduler=cluster.scheduler_address,
                                    output_dir=tmp_path / "run")
        finally:
            cluster.close()
    _assert_same_results(serial_run.results_ecsv, run.results_ecsv)
    _assert_same_results(serial_run.failures_ecsv, run.failures_ecsv)


def test_unreachable_dask_scheduler_is_a_clear_error(sample_file, tmp_path,
                                                    monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(survey, "DASK_CONNECT_TIMEOUT_S", 1.0)
    spec = survey.load_sample(sample_file)
    with pytest.raises(GyrometerError, match="Dask scheduler"):
        # port 9 (discard) on loopback: nothing listens there
        survey.run_sample(spec, engine="dask", scheduler="tcp://127.0.0.1:9",
                          output_dir=tmp_path / "run")
    assert not (tmp_path / "run").exists()  # nothing written


def test_missing_dask_is_a_clear_error_and_core_imports_without_it(
        sample_file, tmp_path, monkeypatch):
    code = ("import sys, gyrometer.core.survey, gyrometer.core.pipeline; "
            "print(sorted(m for m in sys.modules "
            "if m.split('.')[0] in ('dask', 'distributed')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True,
                         text=True, check=True).stdout
    assert out.strip() == "[]"
    monkeypatch.setitem(sys.modules, "distributed", None)  # "not installed"
    spec = survey.load_sample(sample_file)
    with pytest.raises(GyrometerError, match="needs the 'distributed'"):
        survey.run_sample(spec, engine="dask", scheduler="tcp://127.0.0.1:9",
                          output_dir=tmp_path / "run")


def test_memory_estimate_of_a_cube_counts_its_pages(tmp_path):
    from gyrometer.core.session import InputSpec, Session

    cube = tmp_path / "cube.fits"
    cube.write_bytes(b"\0" * 2880 * 100)  # size is all the rule reads
    session = Session(input=InputSpec(kind="cube", cube=str(cube)))
    # the documented rule: base + 1.25 x the cube file
    assert survey.estimate_memory_bytes(session) == \
        survey.BASE_MEMORY_BYTES + int(1.25 * 2880 * 100)


def test_memory_rule_holds_back_galaxies_that_do_not_fit(sample_file,
                                                         tmp_path):
    spec = survey.load_sample(sample_file)
    good = [e for e in spec.galaxies if e.session is not None]
    need = survey.estimate_memory_bytes(good[0].session)
    size = (Path(good[0].session.input.maps)).stat().st_size
    assert need == survey.BASE_MEMORY_BYTES + int(4.0 * size)
    available = survey.available_memory_bytes()
    assert available is not None and available > 2 * need
    # room for one galaxy but not two: the two workers take turns
    engine = survey.EngineSettings(kind="local", workers=2,
                                   memory_fraction=1.1 * need / available)
    seen = []
    run = survey.run_sample(replace(spec, engine=engine),
                            output_dir=tmp_path / "run", status=seen.append)
    assert run.n_done == 3
    assert max(s.running for s in seen) == 1


def test_unexpected_exception_becomes_a_failure_record(sample_file,
                                                       monkeypatch):
    spec = survey.load_sample(sample_file)
    entry = spec.galaxies[0]

    def broken(session, **kw):
        raise ZeroDivisionError("division by zero")

    monkeypatch.setattr(pipeline, "run_session", broken)
    task = survey.GalaxyTask(entry.galaxy, entry.source, entry.session, "k")
    outcome = survey.run_galaxy(task)
    assert outcome.status == "failed"
    assert outcome.error_type == "ZeroDivisionError"
    assert "division by zero" in outcome.message
    assert "please report it" in outcome.message


# -- resuming ---------------------------------------------------------------------------
def _stamps(run_dir: Path, names) -> dict:
    return {n: (run_dir / "galaxies" / n / f"{n}.ecsv").stat().st_mtime_ns
            for n in names}


def test_cancelled_run_resumes_without_redoing_finished_galaxies(
        sample_file, serial_run, tmp_path):
    spec = survey.load_sample(sample_file)
    out = tmp_path / "run"
    cancel = threading.Event()

    def stop_after_first(state):
        if state.done >= 1:
            cancel.set()

    with pytest.raises(Cancelled, match="run the same command again"):
        survey.run_sample(spec, output_dir=out, status=stop_after_first,
                          cancel=cancel)
    first = json.loads((out / "manifest.json").read_text())["galaxies"]
    finished = [g for g, r in first.items() if r["status"] == "done"]
    assert finished == ["LBDP-101"]
    stamps = _stamps(out, finished)
    run = survey.run_sample(spec, output_dir=out)
    assert run.skipped == ("LBDP-101",)
    assert {o.galaxy for o in run.outcomes} == {CORRUPT, "LBDP-103",
                                                "LBDP-104"}
    assert _stamps(out, finished) == stamps  # not rewritten
    _assert_same_results(serial_run.results_ecsv, run.results_ecsv)


def test_killed_run_resumes_where_it_stopped(sample_file, serial_run,
                                             tmp_path):
    out = tmp_path / "run"
    code = ("import sys; from gyrometer.core import survey; "
            "survey.run_sample(survey.load_sample(sys.argv[1]), "
            "engine='serial', output_dir=sys.argv[2])")
    child = subprocess.Popen([sys.executable, "-c", code, str(sample_file),
                              str(out)], stdout=subprocess.DEVNULL,
                             stderr=subprocess.DEVNULL)
    manifest = out / "manifest.json"
    finished: list[str] = []
    try:
        while child.poll() is None and not finished:
            if manifest.is_file():
                with_status = json.loads(manifest.read_text())["galaxies"]
                finished = [g for g, r in with_status.items()
                            if r["status"] == "done"]
            if not finished:
                threading.Event().wait(0.02)
    finally:
        child.kill()  # a crash: no chance to clean up
        child.wait()
    finished = [g for g, r in json.loads(manifest.read_text())[
        "galaxies"].items() if r["status"] == "done"]
    assert 1 <= len(finished) < len(OMEGAS)  # killed midway
    stamps = _stamps(out, finished)
    run = survey.run_sample(survey.load_sample(sample_file), engine="serial",
                            output_dir=out)
    assert set(run.skipped) == set(finished)
    assert not {o.galaxy for o in run.outcomes} & set(finished)
    assert _stamps(out, finished) == stamps
    assert run.n_done == 3 and run.n_failed == 1
    _assert_same_results(serial_run.results_ecsv, run.results_ecsv)


def test_changed_settings_rerun_the_galaxy(sample_file, serial_run, tmp_path):
    spec = survey.load_sample(sample_file)
    entry = next(e for e in spec.galaxies if e.galaxy == "LBDP-101")
    sums = {"maps": sha256_file(entry.session.input.maps)}
    key = survey.galaxy_key(entry.session, sums)
    moved = entry.session.with_(input=replace(
        entry.session.input, maps="/elsewhere/LBDP-101_maps.fits"))
    assert survey.galaxy_key(moved, sums) == key  # paths do not count
    more = entry.session.with_(budget=replace(entry.session.budget,
                                                     n_draws=21))
    assert survey.galaxy_key(more, sums) != key
    assert survey.galaxy_key(entry.session, {"maps": "0" * 64}) != key


# -- the sample file ----------------------------------------------------------------------
def test_unknown_sample_key_is_named_with_a_suggestion(tmp_path):
    path = tmp_path / "s.toml"
    path.write_text('[sample]\nrecipe = ["a.toml"]\n')
    with pytest.raises(RecipeError, match="did you mean 'recipes'") as info:
        survey.load_sample(path)
    assert info.value.keyword == "sample.recipe"
    assert str(path) in str(info.value)


def test_sample_needs_exactly_one_galaxy_source(tmp_path):
    path = tmp_path / "s.toml"
    path.write_text('[sample]\nfolder = "a"\ntable = "b.ecsv"\n')
    with pytest.raises(RecipeError, match="exactly one") as info:
        survey.load_sample(path)
    assert info.value.keyword == "sample"


def test_bad_default_is_blamed_on_the_sample_file(sample_file, tmp_path):
    text = sample_file.read_text().replace("draws = 20", 'draws = "many"')
    bad = sample_file.parent / "bad_defaults.toml"
    bad.write_text(text)
    try:
        spec = survey.load_sample(bad)
    finally:
        bad.unlink()
    messages = {e.message for e in spec.galaxies}
    assert all(e.session is None for e in spec.galaxies)
    assert len(messages) == 1
    (message,) = messages
    assert "bad_defaults.toml" in message
    assert "defaults.uncertainty.draws" in message


def test_inputs_table_with_shared_defaults(sample_file, tmp_path):
    data = sample_file.parent / "data"
    table = Table({"name": ["LBDP-101", "LBDP-103"],
                   "maps": [str(data / "LBDP-101_maps.fits"),
                            str(data / "LBDP-103_maps.fits")],
                   "ra_deg": [150.1234, 150.1234],
                   "dec_deg": [-12.3456, -12.3456],
                   "geometry.pa_deg": [30.0, 31.0],
                   "inc_deg": [50.0, 52.0], "vsys_kms": [2000.0, 2000.0]})
    table.write(tmp_path / "inputs.ecsv", format="ascii.ecsv")
    (tmp_path / "s.toml").write_text(
        '[sample]\ntable = "inputs.ecsv"\n[defaults.geometry]\n'
        'mode = "given"\ndistance_mpc = 20.0\n[defaults.uncertainty]\n'
        'draws = 30\n')
    spec = survey.load_sample(tmp_path / "s.toml")
    assert [e.galaxy for e in spec.galaxies] == ["LBDP-101", "LBDP-103"]
    s = spec.galaxies[1].session
    assert s.geometry.pa_deg == 31.0 and s.geometry.inc_deg == 52.0
    assert s.geometry.distance_mpc == 20.0  # from [defaults]
    assert s.budget.n_draws == 30
    assert spec.output_dir == str(tmp_path / "s-run")


def test_ambiguous_table_column_asks_for_the_section(sample_file, tmp_path):
    Table({"name": ["LBDP-101"], "pa_deg": [30.0]}).write(
        tmp_path / "inputs.ecsv", format="ascii.ecsv")
    (tmp_path / "s.toml").write_text('[sample]\ntable = "inputs.ecsv"\n')
    with pytest.raises(RecipeError, match="geometry.pa_deg") as info:
        survey.load_sample(tmp_path / "s.toml")
    assert info.value.keyword == "pa_deg"


def test_duplicate_galaxy_names_are_refused(sample_file, tmp_path):
    recipe = sample_file.parent / "recipes" / "LBDP-101.toml"
    (tmp_path / "s.toml").write_text(
        f'[sample]\nrecipes = ["{recipe}", "{recipe}"]\n')
    with pytest.raises(RecipeError, match="share the name 'LBDP-101'"):
        survey.load_sample(tmp_path / "s.toml")


def test_foreign_non_empty_folder_is_not_written_into(sample_file, tmp_path):
    (tmp_path / "run").mkdir()
    keep = tmp_path / "run" / "notes.txt"
    keep.write_text("mine")
    spec = survey.load_sample(sample_file)
    with pytest.raises(OutputError, match="holds no sample manifest"):
        survey.run_sample(spec, output_dir=tmp_path / "run")
    assert keep.read_text() == "mine"
    assert sorted(p.name for p in (tmp_path / "run").iterdir()) == \
        ["notes.txt"]


# -- command line ---------------------------------------------------------------------------
def _parse(argv):
    import argparse

    parser = argparse.ArgumentParser(prog="gyrometer")
    sub = parser.add_subparsers(dest="command")
    survey.add_sample_subcommand(sub)
    return parser.parse_args(argv)


def test_sample_command_reports_finished_and_failed(sample_file, serial_run,
                                                    tmp_path, capsys):
    out = tmp_path / "run"
    args = _parse(["sample", str(sample_file), "-o", str(out), "--engine",
                   "serial"])
    assert args.func(args, None, None) == 1  # one galaxy failed
    text = capsys.readouterr().out
    assert "3 of 4 galaxies finished" in text and "1 failed" in text
    assert f"{CORRUPT}: InputFileError" in text
    _assert_same_results(serial_run.results_ecsv, out / "results.ecsv")
    args = _parse(["sample", str(sample_file), "--check"])
    assert args.func(args, None, None) == 0
    assert "4 galaxies" in capsys.readouterr().out
