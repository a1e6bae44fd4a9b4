"""Tests of the synthetic absorption-line cubes (gyrometer.core.synthetic_stellar)."""

import numpy as np
import pytest

from gyrometer.core.fitsio import load_cube, write_cube
from gyrometer.core.losvd import C_KMS
from gyrometer.core.synthetic import barred_model, make_maps
from gyrometer.core.synthetic_stellar import (
    BANDS, _line_block, absorption_scene, band_lines, make_absorption_cube,
    synthetic_template)


@pytest.fixture(scope="module")
def model():
    return barred_model(shape=(24, 24), pixel_scale_arcsec=4.0, dispersion_kms=80.0)


def test_calcium_triplet_at_published_air_wavelengths():
    # Ca II triplet air wavelengths 8498.02, 8542.09, 8662.14 A: centres of the
    # CaT index of Cenarro et al. (2001, MNRAS 326, 959) / NIST ASD (from memory).
    cat = [line.air_A for line in band_lines("cat") if line.name.startswith("Ca II")]
    assert cat == pytest.approx([8498.02, 8542.09, 8662.14], abs=0.03)


def test_each_line_is_centred_at_the_doppler_shifted_wavelength():
    # Centroid of every dip, by numerical integration, sits at
    # lambda_k (1 + V/c) (optical convention, exact Doppler factor).
    lines = band_lines("cat")
    v, sigma = np.array([1843.0]), np.array([95.0])
    edges = np.arange(8300.0, 9100.0, 0.02)
    wave = 0.5 * (edges[1:] + edges[:-1])
    for line in lines:
        dip = 1.0 - _line_block(edges, v, sigma, (line,))[0]
        c = line.air_A * (1 + v[0] / C_KMS)
        centroid = np.sum(wave * dip) / np.sum(dip)
        assert centroid == pytest.approx(c, abs=2e-3)
        # the equivalent width is Doppler-stretched: d w sqrt(2 pi) (1 + V/c)
        ew = np.sum(dip * 0.02)
        assert ew == pytest.approx(line.depth * line.width_A * np.sqrt(2 * np.pi)
                                   * (1 + v[0] / C_KMS), rel=1e-4)


def test_continuum_band_flux_is_proportional_to_surface_brightness(model):
    cube, truth, scene = make_absorption_cube(model, noise=False)
    lo, hi = scene.continuum_band_A
    sel = (scene.wave_A >= lo) & (scene.wave_A <= hi)
    band = np.asarray(cube.data[sel], float).sum(axis=0)
    ratio = band / scene.maps.intensity
    assert np.allclose(ratio, ratio.mean(), rtol=1e-5)


def test_cube_is_noiseless_on_request_and_noisy_with_stated_variance(model):
    clean, _, scene = make_absorption_cube(model, noise=False)
    noisy, _, _ = make_absorption_cube(model, noise=True, rng=np.random.default_rng(3))
    diff = np.asarray(noisy.data, float) - np.asarray(clean.data, float)
    assert np.std(diff) == pytest.approx(np.sqrt(float(noisy.variance[0, 0, 0])), rel=0.02)
    assert clean.spectral.ctype == "AWAV" and clean.spectral.air
    # log-lambda axis: constant velocity step
    step = C_KMS * np.diff(np.log(scene.wave_A))
    assert np.allclose(step, 40.0)


def test_cube_round_trips_through_fits(model, tmp_path):
    cube, _, scene = make_absorption_cube(model, noise=False, step_kms=None, step_A=1.25)
    path = write_cube(tmp_path / "lbdp_absorption.fits", cube)
    back = load_cube(path)
    assert back.spectral.air
    assert np.allclose(back.spectral.values, scene.wave_A, atol=1e-6)
    assert np.array_equal(np.asarray(back.data), np.asarray(cube.data))
    assert back.variance is not None


def test_template_matches_a_spaxel_at_rest(model):
    tpl = synthetic_template("cat")
    lo, hi = BANDS["cat"]["range_A"]
    assert tpl.wave_A[0] < lo and tpl.wave_A[-1] > hi
    assert tpl.air is True
    assert np.max(tpl.flux) == pytest.approx(1.0)
    assert np.min(tpl.flux) < 0.5


def test_scene_uses_the_noiseless_model_maps(model):
    scene = absorption_scene(model)
    maps, _ = make_maps(model, noise=False)
    assert np.array_equal(scene.maps.velocity_kms, maps.velocity_kms)
    assert np.array_equal(scene.maps.intensity, maps.intensity)
