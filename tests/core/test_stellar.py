"""Tests of the absorption-line (slit-spectra) route (gyrometer.core.stellar)."""

import threading

import numpy as np
import pytest
from astropy.io import fits

from gyrometer.core import tw
from gyrometer.core.dataset import Cube, MapSet, SpectralAxis
from gyrometer.core.errors import (Cancelled, DataContentError, GyrometerError,
                                   SpectralAxisError)
from gyrometer.core.slits import SlitSet, slit_weights
from gyrometer.core.stellar import (AbsorptionResult, StellarSettings,
                                    measure_absorption, slit_spectra)
from gyrometer.core.synthetic import barred_model, make_maps
from gyrometer.core.synthetic_stellar import make_absorption_cube, synthetic_template

# 48 x 48 spaxels of 2 arcsec: the bar (4 kpc = 41 arcsec at 20 Mpc) fits in
# the field, and slits of half-length 46 arcsec reach where it fades, so the
# moment-map route recovers Omega_p to 1e-4 on this model.
MODEL = barred_model(shape=(48, 48), pixel_scale_arcsec=2.0, dispersion_kms=80.0,
                     noise_frac=0.02)
SLITS = SlitSet.generate(4, 5.0, 5.0, 46.0)


@pytest.fixture(scope="module")
def clean():
    cube, truth, scene = make_absorption_cube(MODEL, noise=False)
    maps, _ = make_maps(MODEL, noise=False)
    return cube, truth, scene, maps


@pytest.fixture(scope="module")
def synthetic_result(clean):
    cube, truth, scene, _ = clean
    settings = StellarSettings(n_mc=0, continuum_band_A=scene.continuum_band_A)
    return measure_absorption(cube, truth.geometry, SLITS, settings,
                              template=synthetic_template(), warn=False)


@pytest.fixture(scope="module")
def maps_result(clean):
    _, truth, _, maps = clean
    return tw.measure(maps, truth.geometry, SLITS, warn=False)


def test_x_integrals_equal_the_map_route(synthetic_result, maps_result):
    # continuum band flux is proportional to the map intensity (same pixels)
    a, b = synthetic_result.measurement.integrals, maps_result.integrals
    assert np.allclose(a.x_mean_arcsec, b.x_mean_arcsec, atol=1e-6)
    assert np.array_equal(a.n_pixels, b.n_pixels)
    assert np.array_equal(a.truncated, b.truncated)
    ratio = a.flux / b.flux
    assert np.allclose(ratio, ratio[0], rtol=1e-6)


def test_omega_p_within_3_percent_on_noiseless_cube(clean, synthetic_result):
    # Truth: the model's pattern speed (Tremaine & Weinberg 1984 integrals are
    # exact for it); the tolerance is 3 %.
    truth = clean[1]
    m = synthetic_result.measurement
    assert m.route == "absorption"
    assert m.omega_p_kms_arcsec == pytest.approx(truth.omega_p_kms_arcsec[0], rel=0.03)
    assert m.omega_p_kms_arcsec == pytest.approx(truth.omega_p_kms_arcsec[0], rel=0.005)


def test_agrees_with_the_moment_map_route(synthetic_result, maps_result):
    # Same galaxy, same slits: <V> of the summed spectra versus
    # sum w S V / sum w S of the maps.
    a = synthetic_result.measurement
    b = maps_result
    assert np.allclose(a.integrals.v_mean_kms, b.integrals.v_mean_kms, atol=0.25)
    assert a.omega_p_kms_arcsec == pytest.approx(b.omega_p_kms_arcsec, rel=0.01)


def test_galaxy_template_recovers_omega_p(clean, maps_result):
    cube, truth, scene, _ = clean
    settings = StellarSettings(n_mc=0, continuum_band_A=scene.continuum_band_A)
    result = measure_absorption(cube, truth.geometry, SLITS, settings, warn=False)
    assert "galaxy centre" in result.template.origin
    m = result.measurement
    assert m.omega_p_kms_arcsec == pytest.approx(truth.omega_p_kms_arcsec[0], rel=0.03)
    assert np.allclose(m.integrals.v_mean_kms, maps_result.integrals.v_mean_kms, atol=0.5)


def test_noise_monte_carlo_gives_errors_that_cover_the_truth(clean):
    cube, truth, scene = make_absorption_cube(MODEL, noise=True,
                                              rng=np.random.default_rng(11))
    _, _, _, maps = clean
    settings = StellarSettings(n_mc=12, continuum_band_A=scene.continuum_band_A, seed=5)
    result = measure_absorption(cube, truth.geometry, SLITS, settings,
                                template=synthetic_template(), warn=False)
    assert isinstance(result, AbsorptionResult)
    ints = result.measurement.integrals
    assert np.all(np.isfinite(ints.v_err_kms)) and np.all(ints.v_err_kms > 0)
    assert np.all(ints.x_err_arcsec > 0)
    exact = tw.measure(maps, truth.geometry, SLITS, warn=False).integrals.v_mean_kms
    # 4 sigma: 12 draws estimate the error to ~20 %
    assert np.all(np.abs(ints.v_mean_kms - exact) < 4 * ints.v_err_kms)
    m = result.measurement
    assert abs(m.omega_p_kms_arcsec - truth.omega_p_kms_arcsec[0]) < 4 * m.omega_p_err_kms_arcsec
    draws = result.omega_p_draws_kms_arcsec
    assert draws.shape == (12,)
    # the spread of the noise draws is of the order of the fit error
    assert 0.3 < np.std(draws) / m.omega_p_err_kms_arcsec < 3.0
    fit = result.slit_fits[0]
    assert fit.draws_kms.shape == (12,)
    assert fit.model.shape == fit.flux.shape == fit.wave_A.shape
    assert 100 < fit.snr < 1000


def test_slit_spectra_equal_direct_sums_for_any_chunk_size(clean):
    cube, truth, _, _ = clean
    slits = SlitSet.generate(3, 6.0, 4.0, 30.0)
    weights = slit_weights(slits, truth.geometry, cube.wcs, cube.spatial_shape)
    a = slit_spectra(cube, weights, chunk_channels=7)
    b = slit_spectra(cube, weights, chunk_channels=1000)
    assert np.allclose(a.flux, b.flux, rtol=1e-12)
    data = np.asarray(cube.data, float).reshape(cube.shape[0], -1)
    for k, w in enumerate(weights):
        on = w.flat_index >= 0
        direct = data[:, w.flat_index[on]] @ w.weight[on]
        assert not a.integrals.truncated[k]
        # float32 cube: products in single precision (relative rounding ~1e-7)
        assert np.allclose(a.flux[k], direct, rtol=1e-6)
        assert np.allclose(a.variance[k], (w.weight[on] ** 2).sum()
                           * float(cube.variance[0, 0, 0]), rtol=1e-6)


def test_nan_pixels_are_mirrored_like_the_map_route(clean):
    cube, truth, scene, maps = clean
    data = np.array(cube.data)
    weights = slit_weights(SLITS, truth.geometry, cube.wcs, cube.spatial_shape)
    flat = weights[1].flat_index[weights[1].flat_index >= 0]
    hole = flat[len(flat) // 3]
    data.reshape(data.shape[0], -1)[5, hole] = np.nan  # one channel only
    holey = Cube(data, cube.wcs, cube.spectral, cube.unit, cube.provenance,
                 variance=cube.variance)
    spectra = slit_spectra(holey, weights, band_A=scene.continuum_band_A)
    intensity = np.array(maps.intensity)
    intensity.ravel()[hole] = np.nan
    masked = MapSet(intensity, maps.velocity_kms, maps.wcs)
    ref = tw.slit_integrals_maps(masked, truth.geometry, weights)
    assert spectra.integrals.truncated[1]
    assert np.allclose(spectra.integrals.x_mean_arcsec, ref.x_mean_arcsec, atol=1e-6)
    assert np.array_equal(spectra.integrals.n_pixels, ref.n_pixels)
    assert np.all(np.isfinite(spectra.flux))


def test_user_template_file_in_vacuum_is_converted_to_air(clean, tmp_path,
                                                          synthetic_result):
    from gyrometer.core.spectral import air_to_vacuum
    cube, truth, scene, _ = clean
    tpl = synthetic_template()
    vac = air_to_vacuum(tpl.wave_A)
    table = fits.BinTableHDU.from_columns([
        fits.Column(name="WAVE", format="D", array=vac, unit="Angstrom"),
        fits.Column(name="FLUX", format="D", array=tpl.flux)])
    path = tmp_path / "lbdp_template_vac.fits"
    fits.HDUList([fits.PrimaryHDU(), table]).writeto(path)
    # a table has no air/vacuum flag: read it, mark it vacuum, pass it in
    from gyrometer.core.losvd import Template, read_template
    raw = read_template(str(path))
    marked = Template(raw.wave_A, raw.flux, air=False, origin=raw.origin)
    settings = StellarSettings(n_mc=0, continuum_band_A=scene.continuum_band_A)
    result = measure_absorption(cube, truth.geometry, SLITS, settings,
                                template=marked, warn=False)
    assert "to air" in result.template.origin
    assert np.allclose(result.measurement.integrals.v_mean_kms,
                       synthetic_result.measurement.integrals.v_mean_kms, atol=0.05)


def test_template_path_in_settings_is_read(clean, tmp_path):
    cube, truth, scene, _ = clean
    tpl = synthetic_template()
    hdu = fits.PrimaryHDU(tpl.flux)
    hdu.header.update(CRVAL1=tpl.wave_A[0], CDELT1=tpl.wave_A[1] - tpl.wave_A[0],
                      CRPIX1=1.0, CTYPE1="AWAV", CUNIT1="Angstrom")
    path = tmp_path / "lbdp_template.fits"
    hdu.writeto(path)
    settings = StellarSettings(n_mc=0, template=str(path),
                               continuum_band_A=scene.continuum_band_A)
    result = measure_absorption(cube, truth.geometry, SLITS,
                                settings, warn=False)
    assert result.template.origin == str(path)
    assert result.measurement.omega_p_kms_arcsec == pytest.approx(
        truth.omega_p_kms_arcsec[0], rel=0.03)


def test_cube_without_variance_uses_residual_noise(clean):
    cube, truth, scene = make_absorption_cube(MODEL, noise=True,
                                              rng=np.random.default_rng(2))
    bare = Cube(cube.data, cube.wcs, cube.spectral, cube.unit, cube.provenance)
    settings = StellarSettings(n_mc=4, continuum_band_A=scene.continuum_band_A)
    result = measure_absorption(bare, truth.geometry, SLITS, settings,
                                template=synthetic_template(), warn=False)
    ints = result.measurement.integrals
    assert np.all(np.isfinite(ints.v_err_kms)) and np.all(ints.v_err_kms > 0)
    assert np.isfinite(result.measurement.omega_p_kms_arcsec)


def test_progress_is_reported_and_cancel_stops(clean):
    cube, truth, scene, _ = clean
    calls = []
    settings = StellarSettings(n_mc=1, continuum_band_A=scene.continuum_band_A)
    measure_absorption(cube, truth.geometry, SLITS, settings,
                       template=synthetic_template(), warn=False,
                       progress=lambda d, t, s: calls.append((d, t, s)))
    stages = {s for _, _, s in calls}
    assert {"summing slit spectra", "fitting slit spectra"} <= stages
    last = [c for c in calls if c[2] == "fitting slit spectra"][-1]
    assert last[0] == last[1] == len(SLITS) * 2
    flag = threading.Event()
    flag.set()
    with pytest.raises(Cancelled):
        measure_absorption(cube, truth.geometry, SLITS, settings,
                           template=synthetic_template(), cancel=flag)


def test_bad_inputs_raise_clear_errors(clean):
    cube, truth, _, _ = clean
    vel = SpectralAxis("VRAD", np.linspace(-300, 300, cube.shape[0]), "km / s")
    radio = Cube(cube.data, cube.wcs, vel, cube.unit, cube.provenance)
    with pytest.raises(SpectralAxisError, match="wavelength axis"):
        measure_absorption(radio, truth.geometry, SLITS)
    with pytest.raises(DataContentError, match="outside the cube"):
        measure_absorption(cube, truth.geometry, SLITS,
                           StellarSettings(fit_window_A=(5000.0, 5100.0)))
    with pytest.raises(GyrometerError, match="fit_window_A"):
        StellarSettings(fit_window_A=(6000.0, 5000.0))


def test_slit_off_the_data_is_reported_and_left_out(clean):
    cube, truth, scene, _ = clean
    slits = SLITS.added(SLITS.slits[0].with_(offset_arcsec=400.0))
    settings = StellarSettings(n_mc=0, continuum_band_A=scene.continuum_band_A)
    result = measure_absorption(cube, truth.geometry, slits, settings,
                                template=synthetic_template(), warn=False)
    assert result.slit_fits[-1].message == "no valid pixels in this slit"
    assert not result.measurement.used[-1]
    assert result.measurement.used[:-1].all()


def test_monte_carlo_is_reproducible_with_a_seed(clean):
    cube, truth, scene = make_absorption_cube(MODEL, noise=True,
                                              rng=np.random.default_rng(4))
    settings = StellarSettings(n_mc=3, continuum_band_A=scene.continuum_band_A, seed=9)
    a = measure_absorption(cube, truth.geometry, SLITS, settings,
                           template=synthetic_template(), warn=False)
    b = measure_absorption(cube, truth.geometry, SLITS, settings,
                           template=synthetic_template(), warn=False)
    assert np.array_equal(a.measurement.integrals.v_err_kms,
                          b.measurement.integrals.v_err_kms)


def test_decreasing_wavelength_axis_and_float64_data_give_the_same_result(
        clean, synthetic_result):
    cube, truth, scene, _ = clean
    axis = SpectralAxis("AWAV", cube.spectral.values[::-1], "Angstrom", air=True)
    flipped = Cube(np.asarray(cube.data, float)[::-1], cube.wcs, axis, cube.unit,
                   cube.provenance, variance=np.asarray(cube.variance)[::-1])
    settings = StellarSettings(n_mc=0, continuum_band_A=scene.continuum_band_A)
    result = measure_absorption(flipped, truth.geometry, SLITS, settings,
                                template=synthetic_template(), warn=False)
    assert np.allclose(result.measurement.integrals.v_mean_kms,
                       synthetic_result.measurement.integrals.v_mean_kms, atol=1e-3)
    assert np.allclose(result.measurement.integrals.x_mean_arcsec,
                       synthetic_result.measurement.integrals.x_mean_arcsec, atol=1e-9)
