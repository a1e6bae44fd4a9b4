"""Tests of moment maps (gyrometer.core.moments).

Reference: the moments of a Gaussian line A exp(-(v - v0)^2 / 2 s^2) are
M0 = A s sqrt(2 pi), M1 = v0, M2 = s (textbook; sampled sums of a
well-resolved Gaussian equal the integrals to far below the tolerances
used). Error propagation is checked against the scatter of noisy
realisations (Monte Carlo, common practice).
"""

from __future__ import annotations

import threading

import astropy.units as u
import numpy as np
import pytest
from astropy.wcs import WCS

from gyrometer.core.dataset import Cube, Provenance, SpectralAxis
from gyrometer.core.errors import (Cancelled, DataContentError, RecipeError,
                                   SpectralAxisError)
from gyrometer.core.fitsio import load_cube, write_cube
from gyrometer.core.moments import MomentSettings, compute_moments
from gyrometer.core.spectral import channel_velocities, vacuum_to_air

NY, NX = 8, 9
AMP, SIGMA_KMS = 2.0, 40.0


def _wcs() -> WCS:
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [150.0, 2.0]
    w.wcs.crpix = [4.0, 4.0]
    w.wcs.cdelt = [-0.5 / 3600, 0.5 / 3600]
    return w


def _centres(ny=NY, nx=NX) -> np.ndarray:
    """Line centre per spaxel, km/s: a velocity gradient along x."""
    return 1500.0 + 10.0 * (np.arange(nx)[None, :] - nx // 2) + 0 * np.arange(ny)[:, None]


def _axes() -> dict[str, SpectralAxis]:
    ha_air = float(vacuum_to_air(6564.608))
    z = 1500.0 / 299792.458
    return {
        "AWAV": SpectralAxis("AWAV", ha_air * (1 + z) + 0.5 * np.arange(-60, 61),
                             "Angstrom", 6564.608, "Angstrom", "optical",
                             air=True),
        "FREQ": SpectralAxis("FREQ", 115.2712018e9 * (1 - 1500.0 / 299792.458)
                             - 2.0e6 * np.arange(-60, 61), "Hz",
                             115.2712018e9, "Hz", "radio"),
        "VRAD": SpectralAxis("VRAD", 1500.0 + 5.0 * np.arange(-60, 61),
                             "km / s", convention="radio"),
        "decreasing VOPT": SpectralAxis("VOPT", 1500.0 - 5.0 * np.arange(-60, 61),
                                        "km / s", convention="optical"),
    }


def _gaussian_cube(axis: SpectralAxis, *, noise=0.0, seed=0, continuum=0.0,
                   variance=False, ny=NY, nx=NX) -> Cube:
    v_kms, _ = channel_velocities(axis)
    centres = _centres(ny, nx)
    data = AMP * np.exp(-0.5 * ((v_kms[:, None, None] - centres) / SIGMA_KMS) ** 2)
    data = data + continuum
    if noise:
        data = data + np.random.default_rng(seed).normal(0, noise, data.shape)
    var = np.full(data.shape, noise ** 2, np.float32) if variance else None
    return Cube(data.astype(np.float32), _wcs(), axis, "K",
                Provenance("/data/lbdp-011.fits", "0"), variance=var,
                name="LBDP-011", psf_fwhm_arcsec=1.0)


@pytest.mark.parametrize("kind", list(_axes()))
def test_moments_of_analytic_gaussian(kind):
    cube = _gaussian_cube(_axes()[kind])
    settings = MomentSettings(vsys_kms=1500.0, window_halfwidth_kms=280.0,
                              mask="none", continuum="none")
    maps = compute_moments(cube, settings)
    area = AMP * SIGMA_KMS * np.sqrt(2 * np.pi)
    # the FREQ axis in radio convention and the others are uniform in v
    np.testing.assert_allclose(maps.intensity, area, rtol=1e-5)
    np.testing.assert_allclose(maps.velocity_kms, _centres(), atol=1e-3)
    np.testing.assert_allclose(maps.dispersion_kms, SIGMA_KMS, rtol=1e-4)
    assert maps.intensity_unit == "K km / s"
    assert maps.name == "LBDP-011" and maps.provenance == (cube.provenance,)


def test_optical_convention_on_frequency_axis_uses_varying_widths():
    axis = _axes()["FREQ"]
    cube = _gaussian_cube(SpectralAxis(axis.ctype, axis.values, axis.unit,
                                       axis.rest_value, axis.rest_unit,
                                       "optical"))
    maps = compute_moments(cube, MomentSettings(
        vsys_kms=1507.6, window_halfwidth_kms=280.0, mask="none"))
    np.testing.assert_allclose(maps.intensity, AMP * SIGMA_KMS * np.sqrt(2 * np.pi),
                               rtol=1e-3)
    np.testing.assert_allclose(maps.velocity_kms, _centres(), atol=0.05)
    assert maps.velocity_convention == "optical"


@pytest.mark.parametrize("mask, fwhm_pix", [("smooth", None), ("smooth", 4.5),
                                             ("none", None)])
def test_same_answer_for_any_chunk_size(mask, fwhm_pix):
    # fwhm 4.5 px: the mask is made on 2x2-binned spaxels (8 x 9 is padded)
    cube = _gaussian_cube(_axes()["AWAV"], noise=0.1, seed=4)
    data = np.array(cube.data)
    data[:, 0, :3] = np.nan  # off the field
    data[50:52, 3, 3] = np.nan  # a bad pixel inside the window
    cube = Cube(data, cube.wcs, cube.spectral, cube.unit, cube.provenance,
                psf_fwhm_arcsec=cube.psf_fwhm_arcsec)
    base = MomentSettings(line="Halpha", vsys_kms=1500.0,
                          window_halfwidth_kms=200.0, mask=mask,
                          noise_channels=20, smooth_fwhm_pix=fwhm_pix)
    results = [compute_moments(cube, base.replace(chunk_channels=k))
               for k in (1, 7, None)]
    # float32 data are summed per block in float32 (then accumulated in
    # float64), so results agree to float32 rounding (amplified a little in
    # the dispersion, a difference of squares); a mask or halo fault
    # at a block boundary would change them by orders of magnitude more
    for other in results[1:]:
        for name in ("intensity", "velocity_kms", "dispersion_kms",
                     "intensity_err", "velocity_err_kms",
                     "dispersion_err_kms"):
            np.testing.assert_allclose(getattr(other, name),
                                       getattr(results[0], name),
                                       rtol=1e-5, atol=1e-9, equal_nan=True)
    assert np.isnan(results[0].velocity_kms).sum() == np.isnan(
        results[1].velocity_kms).sum()
    assert np.isnan(results[0].intensity[0, :3]).all()
    assert np.isfinite(results[0].velocity_kms[3, 3])


def test_same_answer_for_any_chunk_size_float64_exactly():
    cube = _gaussian_cube(_axes()["VRAD"], noise=0.1, seed=5)
    cube = Cube(np.asarray(cube.data, dtype=np.float64), cube.wcs,
                cube.spectral, cube.unit, cube.provenance)
    base = MomentSettings(vsys_kms=1500.0, window_halfwidth_kms=200.0,
                          noise_channels=20)
    one, seven = (compute_moments(cube, base.replace(chunk_channels=k))
                  for k in (1, 7))
    np.testing.assert_allclose(seven.velocity_kms, one.velocity_kms,
                               rtol=1e-12, equal_nan=True)


def test_smooth_mask_recovers_noisy_line_without_clipping_bias():
    cube = _gaussian_cube(_axes()["VRAD"], noise=0.15, seed=2)
    maps = compute_moments(cube, MomentSettings(vsys_kms=1500.0,
                                                window_halfwidth_kms=200.0))
    np.testing.assert_allclose(np.nanmean(maps.velocity_kms - _centres()), 0.0,
                               atol=1.0)
    np.testing.assert_allclose(np.nanmedian(maps.dispersion_kms), SIGMA_KMS,
                               rtol=0.08)
    # hard clipping of the raw cube at 4 sigma loses the wings: M2 too small
    raw = np.asarray(cube.data)
    clipped = np.where(raw > 4 * 0.15, raw, 0.0)
    v_kms, _ = channel_velocities(cube.spectral)
    m0 = clipped.sum(0)
    m1 = (clipped * v_kms[:, None, None]).sum(0) / m0
    m2 = np.sqrt((clipped * (v_kms[:, None, None] - m1) ** 2).sum(0) / m0)
    assert np.median(m2) < 0.9 * SIGMA_KMS < np.nanmedian(maps.dispersion_kms)


def test_continuum_is_removed_from_sidebands_on_wavelength_axes():
    cube = _gaussian_cube(_axes()["AWAV"], continuum=5.0)
    settings = MomentSettings(line="Halpha", vsys_kms=1500.0,
                              window_halfwidth_kms=250.0, mask="none")
    maps = compute_moments(cube, settings)
    np.testing.assert_allclose(maps.intensity, AMP * SIGMA_KMS * np.sqrt(2 * np.pi),
                               rtol=1e-3)
    np.testing.assert_allclose(maps.velocity_kms, _centres(), atol=0.05)
    kept = compute_moments(cube, settings.replace(continuum="none"))
    assert np.all(kept.intensity > 2 * maps.intensity)


def test_errors_from_variance_match_monte_carlo_scatter():
    noise = 0.2
    ny = nx = 24
    cube = _gaussian_cube(_axes()["VRAD"], noise=noise, seed=11, variance=True,
                          ny=ny, nx=nx)
    cube = Cube(cube.data, cube.wcs, cube.spectral, cube.unit,
                cube.provenance, variance=cube.variance)
    # one line for every spaxel: the scatter across spaxels is the MC spread
    v_kms, _ = channel_velocities(cube.spectral)
    line = AMP * np.exp(-0.5 * ((v_kms - 1500.0) / SIGMA_KMS) ** 2)
    data = line[:, None, None] + np.random.default_rng(5).normal(
        0, noise, (v_kms.size, ny, nx))
    cube = Cube(data.astype(np.float32), cube.wcs, cube.spectral, "K",
                cube.provenance, variance=cube.variance)
    maps = compute_moments(cube, MomentSettings(
        vsys_kms=1500.0, window_halfwidth_kms=150.0, mask="none"))
    for value, error in ((maps.intensity, maps.intensity_err),
                         (maps.velocity_kms, maps.velocity_err_kms),
                         (maps.dispersion_kms, maps.dispersion_err_kms)):
        assert np.std(value) == pytest.approx(np.mean(error), rel=0.15)
    # without the variance, the sideband noise gives similar errors
    no_var = Cube(cube.data, cube.wcs, cube.spectral, "K", cube.provenance)
    sideband = compute_moments(no_var, MomentSettings(
        vsys_kms=1500.0, window_halfwidth_kms=150.0, mask="none"))
    assert np.median(sideband.velocity_err_kms) == pytest.approx(
        np.median(maps.velocity_err_kms), rel=0.15)


@pytest.mark.parametrize("variance", [False, True])
def test_nan_voxels_are_skipped_and_empty_spaxels_are_nan(variance):
    cube = _gaussian_cube(_axes()["VRAD"], noise=0.01, variance=variance)
    data = np.array(cube.data)
    data[:, 0, 0] = np.nan
    data[55:58, 1, 1] = np.nan
    cube = Cube(data, cube.wcs, cube.spectral, "K", cube.provenance,
                variance=cube.variance)
    maps = compute_moments(cube, MomentSettings(
        vsys_kms=1500.0, window_halfwidth_kms=280.0, mask="none"))
    assert np.isnan(maps.intensity[0, 0]) and np.isnan(maps.velocity_kms[0, 0])
    assert np.isnan(maps.intensity_err[0, 0])
    assert np.isfinite(maps.velocity_kms[1, 1])
    if variance:  # three channels fewer: a smaller moment-0 error
        assert maps.intensity_err[1, 1] < maps.intensity_err[1, 2]
    assert np.all(np.isfinite(maps.velocity_kms[2:]))
    assert np.all(np.isfinite(maps.velocity_err_kms[2:]))


def test_cube_from_file_gives_same_maps_as_in_memory(tmp_path):
    cube = _gaussian_cube(_axes()["AWAV"], noise=0.05, seed=3)
    loaded = load_cube(write_cube(tmp_path / "c.fits", cube))
    settings = MomentSettings(line="Halpha", vsys_kms=1500.0,
                              window_halfwidth_kms=200.0)
    a, b = compute_moments(cube, settings), compute_moments(loaded, settings)
    np.testing.assert_allclose(a.velocity_kms, b.velocity_kms, rtol=1e-9,
                               equal_nan=True)
    assert b.tracer == "ionised gas"


def test_rest_value_override():
    axis = _axes()["FREQ"]
    no_rest = SpectralAxis("FREQ", axis.values, "Hz", convention="radio")
    cube = _gaussian_cube(axis)
    cube = Cube(cube.data, cube.wcs, no_rest, "K", cube.provenance)
    with pytest.raises(SpectralAxisError, match="lbdp-011.fits.*RESTFRQ"):
        compute_moments(cube, MomentSettings(vsys_kms=1500.0))
    maps = compute_moments(cube, MomentSettings(
        rest_value=115.2712018, rest_unit="GHz", vsys_kms=1500.0,
        window_halfwidth_kms=280.0, mask="none"))
    np.testing.assert_allclose(maps.velocity_kms, _centres(), atol=1e-3)
    maps = compute_moments(cube, MomentSettings(
        line="CO(1-0)", vsys_kms=1500.0, window_halfwidth_kms=280.0,
        mask="none"))
    np.testing.assert_allclose(maps.velocity_kms, _centres(), atol=1e-3)
    assert maps.tracer == "CO"


def test_progress_and_cancel():
    cube = _gaussian_cube(_axes()["VRAD"], noise=0.1)
    calls = []
    compute_moments(cube, MomentSettings(vsys_kms=1500.0, chunk_channels=10,
                                         window_halfwidth_kms=200.0),
                    progress=lambda done, total, stage: calls.append((done, total)))
    assert calls[-1][0] == calls[-1][1] and len(calls) > 3
    flag = threading.Event()
    flag.set()
    with pytest.raises(Cancelled):
        compute_moments(cube, MomentSettings(vsys_kms=1500.0, mask="none"),
                        cancel=flag)



def test_cancel_during_smooth_mask_blocks_stops_the_run():
    # the smooth-mask blocks run on worker threads; cancelling after the
    # first block must still raise Cancelled and report no further blocks
    cube = _gaussian_cube(_axes()["VRAD"], noise=0.1)
    flag = threading.Event()
    calls = []

    def progress(done, total, stage):
        calls.append(done)
        if done > 0:
            flag.set()

    with pytest.raises(Cancelled):
        compute_moments(cube, MomentSettings(vsys_kms=1500.0, chunk_channels=5,
                                             window_halfwidth_kms=200.0),
                        progress=progress, cancel=flag)
    assert len(calls) == 2  # the start and the first block, then cancelled

def test_window_outside_cube():
    cube = _gaussian_cube(_axes()["VRAD"])
    with pytest.raises(DataContentError, match="lbdp-011.fits.*outside the cube"):
        compute_moments(cube, MomentSettings(vsys_kms=9000.0))


def test_mask_without_any_noise_estimate():
    cube = _gaussian_cube(_axes()["VRAD"])
    with pytest.raises(DataContentError, match="no noise estimate"):
        compute_moments(cube, MomentSettings())  # whole cube, no variance
    maps = compute_moments(cube, MomentSettings(mask="none"))
    assert maps.velocity_err_kms is None


@pytest.mark.parametrize("field, value", [
    ("mask", "magic"), ("continuum", "guess"), ("smooth_channels", 2),
    ("window_halfwidth_kms", 0.0), ("chunk_channels", 0),
    ("dilation_channels", -1), ("snr_threshold", -3.0),
])
def test_invalid_settings_are_refused(field, value):
    with pytest.raises(RecipeError, match=field):
        MomentSettings(**{field: value})


def test_rest_unit_defaults_are_quantities():
    # rest_value with a wavelength unit works on a wavelength axis
    cube = _gaussian_cube(_axes()["AWAV"])
    maps = compute_moments(cube, MomentSettings(
        rest_value=float(vacuum_to_air(6564.608)), rest_unit="Angstrom",
        rest_air=True, vsys_kms=1500.0, window_halfwidth_kms=280.0,
        mask="none", continuum="none"))
    np.testing.assert_allclose(maps.velocity_kms, _centres(), atol=1e-3)
    assert u.Unit(maps.intensity_unit) == u.K * u.km / u.s


def test_fast_nanmedian_matches_numpy():
    from gyrometer.core.moments import _nanmedian0

    rng = np.random.default_rng(8)
    values = rng.normal(size=(13, 5, 4)).astype(np.float32)
    values[rng.random(values.shape) < 0.3] = np.nan
    values[:, 0, 0] = np.nan  # an all-NaN column gives NaN
    with pytest.warns(RuntimeWarning):  # numpy warns on the all-NaN column
        expected = np.nanmedian(values.astype(np.float64), axis=0)
    np.testing.assert_allclose(_nanmedian0(values), expected, rtol=1e-7,
                               equal_nan=True)


def test_shifted_slice_filters_match_scipy_ndimage():
    from scipy import ndimage

    from gyrometer.core.moments import (_boxcar0, _correlate,
                                        _gaussian_kernel, _grow)

    rng = np.random.default_rng(9)
    block = rng.normal(size=(6, 9, 11))
    kernel = _gaussian_kernel(1.3)
    for axis in (1, 2):
        np.testing.assert_allclose(
            _correlate(block, kernel, axis),
            ndimage.correlate1d(block, kernel, axis=axis, mode="constant"),
            atol=1e-14)
    for width, n in ((3, 6), (5, 1), (7, 2)):
        np.testing.assert_allclose(
            _boxcar0(block[:n], width, 1.0 / width),
            ndimage.uniform_filter1d(block[:n], width, axis=0, mode="nearest"),
            atol=1e-14)
    mask = rng.random(block.shape) > 0.9
    np.testing.assert_array_equal(
        _grow(mask, 2, (1, 2)),
        ndimage.maximum_filter(mask, size=(1, 5, 5), mode="constant", cval=0))
    np.testing.assert_array_equal(
        _grow(mask, 1, (0,)),
        ndimage.maximum_filter1d(mask, 3, axis=0, mode="constant", cval=0))
