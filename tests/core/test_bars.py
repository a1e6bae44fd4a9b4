"""Bar length, rotation rate R = R_CR/R_bar and its class."""

import math

import numpy as np
import pytest

from gyrometer.core.bars import (RATE_BOUNDARIES, BarRate, classify_rate,
                                 deproject_length, estimate_bar_length,
                                 fourier_profile, rotation_rate,
                                 user_bar_length)
from gyrometer.core.errors import FitError, GeometryError
from gyrometer.core.geometry import DiskGeometry

GEOM = DiskGeometry(ra_deg=150.0, dec_deg=2.0, pa_deg=250.0, inc_deg=55.0,
                    vsys_kms=3000.0, distance_mpc=20.0)


def test_deprojected_bar_length_check_value():
    # DOMAIN.md §6 (derived): 30 arcsec at phi = 40 deg, i = 60 deg -> 44.90
    assert float(deproject_length(30.0, 40.0, 60.0)) == pytest.approx(44.90, abs=0.005)
    # along the line of nodes nothing changes; along the minor axis 1/cos i
    assert float(deproject_length(30.0, 0.0, 60.0)) == pytest.approx(30.0)
    assert float(deproject_length(30.0, 90.0, 60.0)) == pytest.approx(60.0)
    with pytest.raises(GeometryError):
        deproject_length(30.0, 10.0, 90.0)


def test_user_length_on_the_sky_is_deprojected_with_the_bar_angle():
    geom = GEOM.with_(pa_deg=100.0, inc_deg=60.0)
    bar = user_bar_length(30.0, 3.0, on_sky=True, bar_pa_deg=140.0, geometry=geom)
    assert bar.length_arcsec == pytest.approx(44.90, abs=0.005)
    assert bar.err_arcsec == pytest.approx(4.490, abs=0.001)
    plain = user_bar_length(25.0, 2.0)
    assert plain.length_arcsec == 25.0 and plain.err_arcsec == 2.0
    with pytest.raises(GeometryError, match="bar PA"):
        user_bar_length(30.0, on_sky=True)
    with pytest.raises(GeometryError):
        user_bar_length(-1.0)


def test_rate_classes_use_the_published_boundaries():
    # ultrafast R < 1.0 (Contopoulos 1980); fast 1.0 <= R <= 1.4; slow > 1.4
    # (Debattista & Sellwood 2000; Aguerri et al. 2015)
    assert RATE_BOUNDARIES == (1.0, 1.4)
    assert classify_rate(0.99) == "ultrafast"
    assert classify_rate(1.0) == "fast"
    assert classify_rate(1.4) == "fast"
    assert classify_rate(1.41) == "slow"


def test_rotation_rate_monte_carlo():
    rng = np.random.default_rng(2)
    cr = np.full(4000, 24.0)
    exact = rotation_rate(cr, 20.0, 0.0, rng)
    assert (exact.p16, exact.median, exact.p84) == pytest.approx((1.2, 1.2, 1.2))
    assert exact.classification == "fast" and exact.p_fast == 1.0
    # R = CR / L with L ~ N(20, 2): the percentiles of 1/L are 1/p84, 1/p16
    rate = rotation_rate(cr, 20.0, 2.0, rng)
    assert rate.p16 == pytest.approx(24.0 / 22.0, rel=0.02)
    assert rate.p84 == pytest.approx(24.0 / 18.0, rel=0.02)
    assert rate.p_ultrafast + rate.p_fast + rate.p_slow == pytest.approx(1.0)
    # draws without corotation are excluded and counted
    half = np.where(np.arange(4000) % 2 == 0, 35.0, np.nan)
    slow = rotation_rate(half, 20.0, 1.0, rng)
    assert isinstance(slow, BarRate)
    assert slow.fraction_cr_found == pytest.approx(0.5)
    assert slow.classification == "slow"
    with pytest.raises(FitError, match="corotation was not found"):
        rotation_rate(np.full(10, np.nan), 20.0, 1.0, rng)
    with pytest.raises(GeometryError, match="bar-length error"):
        rotation_rate(cr, 20.0, -1.0, rng)


def _barred_galaxy(amplitude=0.5, seed=0):
    from gyrometer.core.synthetic import GalaxyModel, PatternSpec, make_maps

    patterns = ()
    if amplitude:
        patterns = (PatternSpec("bar", 40.0, amplitude, 0.0, 2.0, angle_deg=60.0),)
    model = GalaxyModel("LBDP-011", GEOM, disk_scale_kpc=1.5, r_turn_kpc=0.5,
                        shape=(96, 96), pixel_scale_arcsec=1.0,
                        wcs_rotation_deg=30.0, center_offset_pix=(2.3, -1.7),
                        psf_fwhm_arcsec=1.5, subsample=2, patterns=patterns)
    return make_maps(model, rng=np.random.default_rng(seed))


def test_bar_length_from_the_synthetic_barred_galaxy():
    # the generator's bar: zone 0-2 kpc with a 0.6 kpc taper; its reported
    # semi-major axis (half amplitude of the outer taper) is 1.7 kpc
    maps, truth = _barred_galaxy()
    bar = estimate_bar_length(maps, GEOM)
    assert bar.length_arcsec == pytest.approx(truth.bar_length_arcsec, rel=0.15)
    assert abs(bar.length_arcsec - truth.bar_length_arcsec) < 3 * bar.err_arcsec
    assert set(bar.estimates) >= {"phase", "bar/interbar", "A2 peak"}
    assert bar.estimates["A2 peak"] < bar.length_arcsec
    assert bar.angle_disk_deg == pytest.approx(truth.bar_angle_deg, abs=5.0)
    assert bar.pa_sky_deg == pytest.approx(truth.bar_pa_sky_deg % 180, abs=5.0)


def test_fourier_profile_of_an_axisymmetric_disk_has_no_m2_and_no_bar():
    maps, _ = _barred_galaxy(amplitude=0.0)
    prof = fourier_profile(maps.intensity, maps.wcs, GEOM, ring_width_arcsec=2.0,
                           intensity_err=maps.intensity_err)
    assert np.all(prof.a2 < 0.02)
    with pytest.raises(FitError, match="no bar found"):
        estimate_bar_length(maps, GEOM)


def test_rotation_rate_from_resonance_draws_end_to_end():
    # corotation of a flat 200 km/s curve for Omega_p = 40 +- 4 km/s/kpc at
    # 20 Mpc, bar of 25 +- 2 arcsec: R ~ (200/40 kpc) / (25 arcsec) = 2.06
    import astropy.units as u

    from gyrometer.core.rcmodels import FunctionCurve
    from gyrometer.core.resonances import resonance_budget

    curve = FunctionCurve(lambda r: np.full_like(r, 200.0), (1.0, 200.0),
                          lambda r: np.zeros_like(r))
    rng = np.random.default_rng(9)
    table = resonance_budget(curve, 40.0 * u.km / u.s / u.kpc,
                             omega_p_p16=36.0 * u.km / u.s / u.kpc,
                             omega_p_p84=44.0 * u.km / u.s / u.kpc,
                             distance_mpc=20.0, rng=rng, n_draws=600,
                             vary_curve=False, n_grid=200)
    rate = rotation_rate(table.draws_arcsec["CR"], 25.0, 2.0, rng)
    r_cr_arcsec = 5.0 / (20.0e3 / 206264.806)
    assert rate.median == pytest.approx(r_cr_arcsec / 25.0, rel=0.03)
    assert rate.classification == "slow"
    assert 0 < rate.p16 < rate.median < rate.p84
    assert math.isclose(rate.fraction_cr_found, 1.0)
