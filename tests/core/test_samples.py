"""Bundled sample files: byte-for-byte reproducible, readable, true to their JSON."""

import hashlib
import json
import math
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

from gyrometer.core import samples
from gyrometer.core.errors import OutputError
from gyrometer.core.fitsio import load_cube, load_mapset
from gyrometer.core.spectral import channel_velocities

SAMPLE_DIR = Path(__file__).resolve().parents[2] / "sample_cubes"


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory):
    folder = tmp_path_factory.mktemp("samples")
    paths = samples.write_samples(folder)
    return folder, paths


def test_regenerated_samples_are_byte_identical_to_the_bundled_ones(regenerated):
    folder, paths = regenerated
    assert [p.name for p in paths] == list(samples.SAMPLE_FILES)
    for name in samples.SAMPLE_FILES:
        assert _sha256(folder / name) == _sha256(SAMPLE_DIR / name), name


def test_samples_stay_small(regenerated):
    folder, _ = regenerated
    total = sum((folder / n).stat().st_size for n in samples.SAMPLE_FILES)
    assert total < 6 * 2**20


def test_existing_files_are_not_overwritten(regenerated, tmp_path):
    target = tmp_path / samples.SAMPLE_FILES[3]
    target.write_text("user data")
    with pytest.raises(OutputError, match="exists"):
        samples.write_samples(tmp_path)
    assert target.read_text() == "user data"
    assert sorted(p.name for p in tmp_path.iterdir()) == [target.name]


def test_command_line_refuses_then_forces(regenerated, tmp_path, capsys):
    folder, _ = regenerated
    (tmp_path / samples.SAMPLE_FILES[0]).write_text("keep me")
    assert samples.main([str(tmp_path)]) == 2
    assert "file exists" in capsys.readouterr().err
    assert (tmp_path / samples.SAMPLE_FILES[0]).read_text() == "keep me"
    assert samples.main([str(tmp_path), "--force"]) == 0
    out = capsys.readouterr().out
    assert out.count("wrote") == len(samples.SAMPLE_FILES)
    assert _sha256(tmp_path / samples.SAMPLE_FILES[0]) == _sha256(
        folder / samples.SAMPLE_FILES[0])


def _truth(folder, name):
    return json.loads((folder / f"{name}_truth.json").read_text())


def test_halpha_cube_reads_back_with_its_truth(regenerated):
    folder, _ = regenerated
    cube = load_cube(folder / "LBDP-011_halpha_cube.fits")
    record = _truth(folder, "LBDP-011")
    truth = record["truth"]
    assert cube.name == "LBDP-011" and cube.spectral.air
    assert cube.shape == (40, 96, 96) and cube.variance is not None
    assert truth["omega_p_kms_kpc"] == [60.0]
    # Omega in km/s/arcsec = Omega in km/s/kpc x D[Mpc] x 1e3 / 206264.806
    assert truth["omega_p_kms_arcsec"][0] == pytest.approx(
        60.0 * 18.0e3 / (180 * 3600 / math.pi))
    v, dv = channel_velocities(cube.spectral)
    data = np.asarray(cube.data, dtype=float)
    m0 = np.tensordot(dv, data, axes=1)
    m1 = np.tensordot(dv * v, data, axes=1) / m0
    bright = m0 > 0.3 * m0.max()
    # the line sits at V_sys in the optical convention (vacuum rest, air axis)
    assert np.median(m1[bright]) == pytest.approx(1850.0, abs=15.0)
    # the line fits in the window: the end channels are faint
    assert data[[0, -1]].max() < 0.1 * data.max()


def test_hi_cube_reads_back_with_two_patterns(regenerated):
    folder, _ = regenerated
    cube = load_cube(folder / "LBDP-023_hi_cube.fits")
    truth = _truth(folder, "LBDP-023")["truth"]
    assert cube.spectral.ctype == "FREQ" and cube.spectral.convention == "radio"
    assert cube.spectral.rest_value == pytest.approx(1420405751.768)
    assert truth["pattern_kinds"] == ["bar", "spiral"]
    assert truth["omega_p_kms_kpc"] == [44.0, 20.0]
    assert truth["zones_kpc"][0][1] < truth["zones_kpc"][1][0]


def test_stellar_maps_and_rotation_curve(regenerated):
    folder, _ = regenerated
    maps = load_mapset(folder / "LBDP-037_stellar_maps.fits")
    truth = _truth(folder, "LBDP-037")["truth"]
    assert maps.tracer == "stars" and maps.name == "LBDP-037"
    assert maps.dispersion_kms is not None and maps.velocity_err_kms is not None
    assert truth["geometry"]["pa_deg"] == 118.0
    # ratio of corotation to bar length in the fast range 1.0-1.4
    # (Debattista & Sellwood 2000, from memory; Aguerri et al. 2015)
    ratio = truth["corotation_kpc"][0] / truth["bar_length_kpc"]
    assert 1.0 < ratio < 1.4
    table = Table.read(folder / "LBDP-011_rotation_curve.ecsv",
                       format="ascii.ecsv")
    assert str(table["radius"].unit) == "arcsec"
    assert str(table["vc"].unit) == "km / s"
    model = samples.sample_models()["LBDP-011"]
    r_kpc = np.asarray(table["radius"]) * model.kpc_per_arcsec
    vc = (2 / math.pi) * 210.0 * np.arctan(r_kpc / 0.8)   # Courteau 1997 arctan
    z = (np.asarray(table["vc"]) - vc) / np.asarray(table["vc_err"])
    assert np.all(np.abs(z) < 4.0)


def test_bundled_readme_names_every_file():
    text = (SAMPLE_DIR / "README.md").read_text(encoding="utf-8")
    for name in samples.SAMPLE_FILES:
        assert name in text
    assert "python -m gyrometer.core.samples sample_cubes --force" in text
