"""Disk geometry estimated from velocity and intensity maps."""

import math

import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS
import astropy.units as u

from gyrometer.core.coords import lon_to_disk, pixel_to_offsets, sky_to_lon
from gyrometer.core.dataset import MapSet
from gyrometer.core.errors import DataContentError, GeometryError
from gyrometer.core.geometry import DiskGeometry
from gyrometer.core.geometry_estimate import (GeometryEstimate,
                                              inclination_from_axis_ratio,
                                              intensity_centroid,
                                              kinematic_geometry,
                                              photometric_geometry)

TRUE = DiskGeometry(ra_deg=210.0, dec_deg=35.0, pa_deg=122.0, inc_deg=58.0,
                    vsys_kms=4100.0, distance_mpc=30.0)


def _wcs(n, rot_deg=-35.0):
    """Rotated pixel grid with CDELT1 < 0, reference pixel off the galaxy."""
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [210.0 + 2.0 / 3600 / math.cos(math.radians(35.0)), 35.0 - 1.5 / 3600]
    w.wcs.crpix = [n / 2 + 0.5, n / 2 + 0.5]
    w.wcs.cdelt = [-1.0 / 3600, 1.0 / 3600]
    c, s = math.cos(math.radians(rot_deg)), math.sin(math.radians(rot_deg))
    w.wcs.pc = [[c, -s], [s, c]]
    return w


def _disk(geom=TRUE, n=80, noise_kms=4.0, seed=0, velocity=True):
    """Thin exponential disk (h = 9 arcsec) with an arctan curve, built here."""
    w = _wcs(n)
    yy, xx = np.mgrid[0:n, 0:n]
    east, north = pixel_to_offsets(w, geom.ra_deg, geom.dec_deg, xx, yy)
    X, Y = sky_to_lon(east, north, geom.pa_deg)
    R, cos_t, _ = lon_to_disk(X, Y, geom.inc_deg)
    rng = np.random.default_rng(seed)
    v = geom.vsys_kms + geom.sin_i * 190.0 * 2 / np.pi * np.arctan(R / 5.0) * cos_t
    v += rng.normal(0.0, noise_kms, v.shape)
    intensity = np.exp(-R / 9.0) + rng.normal(0.0, 1e-4, v.shape)
    return MapSet(intensity, v if velocity else np.full(v.shape, np.nan), w,
                  velocity_err_kms=np.full(v.shape, noise_kms),
                  intensity_err=np.full(v.shape, 1e-4), name="LBDP-037")


def _sep_arcsec(est, geom=TRUE):
    return SkyCoord(est.ra_deg * u.deg, est.dec_deg * u.deg).separation(
        geom.center).arcsec


def test_kinematic_fit_recovers_pa_inclination_vsys_and_centre():
    est = kinematic_geometry(_disk())
    assert est.pa_deg == pytest.approx(122.0, abs=max(0.5, 4 * est.pa_err_deg))
    assert est.inc_deg == pytest.approx(58.0, abs=max(1.5, 4 * est.inc_err_deg))
    assert est.vsys_kms == pytest.approx(4100.0, abs=max(0.5, 4 * est.vsys_err_kms))
    assert _sep_arcsec(est) < max(0.2, 4 * est.center_err_arcsec)
    assert 0.7 < est.reduced_chi2 < 1.3  # noise of 4 km/s with errors of 4
    assert est.extra["v_c_kms"] == pytest.approx(190.0, rel=0.03)
    assert "Begeman 1989" in est.method and "reduced chi^2" in est.method
    # errors are sensible: not zero, not absurd
    assert 0 < est.pa_err_deg < 1.0 and 0 < est.inc_err_deg < 3.0


def test_kinematic_pa_points_to_the_receding_side_from_a_flipped_start():
    start = TRUE.with_(pa_deg=TRUE.pa_deg + 180.0 - 10.0, inc_deg=45.0,
                       vsys_kms=4080.0)
    est = kinematic_geometry(_disk(seed=3), initial=start)
    assert (est.pa_deg - 122.0 + 180) % 360 - 180 == pytest.approx(0.0, abs=1.0)


def test_kinematic_fit_with_fixed_inclination_and_centre():
    start = TRUE.with_(pa_deg=130.0, vsys_kms=4090.0)
    est = kinematic_geometry(_disk(seed=5), initial=start, fit_center=False,
                             fit_inclination=False)
    assert est.inc_deg is None and est.ra_deg is None
    assert est.pa_deg == pytest.approx(122.0, abs=0.5)
    applied = est.apply_to(start)
    assert applied.inc_deg == 58.0 and applied.ra_deg == pytest.approx(210.0)
    assert applied.pa_deg == pytest.approx(est.pa_deg)


def test_intensity_centroid_finds_the_centre():
    est = intensity_centroid(_disk())
    assert _sep_arcsec(est) < 0.1
    assert est.center_err_arcsec < 0.5
    assert est.pa_deg is None


def test_photometric_moments_give_pa_and_inclination():
    # an infinitely thin model disk: q0 = 0 gives cos i = q exactly
    est = photometric_geometry(_disk(), q0=0.0)
    assert est.pa_deg == pytest.approx(122.0, abs=1.0)
    assert est.inc_deg == pytest.approx(58.0, abs=2.0)
    assert not est.pa_ambiguous
    assert est.extra["axis_ratio"] == pytest.approx(math.cos(math.radians(58.0)),
                                                    abs=0.03)
    # without velocities the PA is only known modulo 180 degrees
    bare = photometric_geometry(_disk(velocity=False), q0=0.0)
    assert bare.pa_ambiguous
    assert (bare.pa_deg - 122.0) % 180.0 == pytest.approx(0.0, abs=1.0) or \
        (bare.pa_deg - 122.0) % 180.0 == pytest.approx(180.0, abs=1.0)


def test_axis_ratio_to_inclination_follows_hubble_1926():
    # cos^2 i = (q^2 - q0^2) / (1 - q0^2) (Hubble 1926, ApJ 64, 321):
    # q = 0.5, q0 = 0.2 -> cos^2 i = 0.21/0.96 -> i = 62.11 deg
    assert float(inclination_from_axis_ratio(0.5, 0.2)) == pytest.approx(62.11, abs=0.01)
    assert float(inclination_from_axis_ratio(0.5, 0.0)) == pytest.approx(60.0)
    assert float(inclination_from_axis_ratio(0.1, 0.2)) == pytest.approx(90.0)
    assert float(inclination_from_axis_ratio(1.0, 0.2)) == pytest.approx(0.0)
    with pytest.raises(GeometryError):
        inclination_from_axis_ratio(0.5, 1.0)


def test_apply_to_keeps_the_users_values():
    est = GeometryEstimate(ra_deg=210.001, dec_deg=35.0, center_err_arcsec=0.3,
                           pa_deg=125.0, pa_err_deg=1.5, inc_deg=60.0,
                           inc_err_deg=2.0, vsys_kms=4102.0, vsys_err_kms=1.0,
                           method="kinematic thin-disk fit (test)")
    user = TRUE.with_(source="user")
    mixed = est.apply_to(user, keep=("pa",))
    assert mixed.pa_deg == 122.0 and mixed.pa_err_deg == 0.0
    assert mixed.inc_deg == 60.0 and mixed.inc_err_deg == 2.0
    assert mixed.vsys_kms == 4102.0 and mixed.distance_mpc == 30.0
    assert "kinematic thin-disk fit" in mixed.source
    with pytest.raises(GeometryError, match="neither estimated nor given"):
        GeometryEstimate(pa_deg=10.0, method="x").apply_to(None)
    with pytest.raises(GeometryError, match="unknown geometry item"):
        est.apply_to(user, keep=("distance",))


def test_too_few_pixels_are_refused():
    maps = _disk()
    empty = MapSet(np.full(maps.shape, np.nan), np.full(maps.shape, np.nan),
                   maps.wcs)
    with pytest.raises(DataContentError):
        kinematic_geometry(empty)
    with pytest.raises(DataContentError):
        photometric_geometry(empty)


def test_kinematic_and_photometric_geometry_of_a_synthetic_barred_galaxy():
    # generator of core/synthetic.py: bar inside 2 kpc (20.6 arcsec), thin
    # disk, rotated WCS, off-centre galaxy, PSF 1.5 arcsec
    from gyrometer.core.synthetic import GalaxyModel, PatternSpec, make_maps

    geom = DiskGeometry(ra_deg=150.0, dec_deg=2.0, pa_deg=250.0, inc_deg=55.0,
                        vsys_kms=3000.0, distance_mpc=20.0)
    bar = PatternSpec("bar", 40.0, 0.5, 0.0, 2.0, angle_deg=60.0)
    model = GalaxyModel("LBDP-011", geom, disk_scale_kpc=1.5, r_turn_kpc=0.5,
                        shape=(96, 96), pixel_scale_arcsec=1.0,
                        wcs_rotation_deg=30.0, center_offset_pix=(2.3, -1.7),
                        psf_fwhm_arcsec=1.5, subsample=2, patterns=(bar,))
    maps, _ = make_maps(model, rng=np.random.default_rng(1))
    kin = kinematic_geometry(maps, r_min_arcsec=22.0)
    # outside the bar zone the disk is axisymmetric: PA within 1 degree
    assert (kin.pa_deg - 250.0 + 180) % 360 - 180 == pytest.approx(0.0, abs=1.0)
    # with the bar included its streaming biases the PA by a few degrees
    biased = kinematic_geometry(maps)
    assert (biased.pa_deg - 250.0 + 180) % 360 - 180 == pytest.approx(0.0, abs=4.0)
    assert kin.inc_deg == pytest.approx(55.0, abs=3.0)
    assert kin.vsys_kms == pytest.approx(3000.0, abs=1.0)
    assert _sep_arcsec(kin, geom) < 0.5
    phot = photometric_geometry(maps, q0=0.0, light_fractions=(0.6, 0.9))
    assert (phot.pa_deg - 250.0 + 180) % 360 - 180 == pytest.approx(0.0, abs=3.0)
    assert phot.inc_deg == pytest.approx(55.0, abs=3.0)
    geometry = kin.apply_to(TRUE.with_(distance_mpc=20.0), keep=())
    assert geometry.distance_mpc == 20.0 and geometry.pa_err_deg > 0


def test_kinematic_errors_match_the_scatter_over_noise_realisations():
    # the covariance-based errors should describe the spread of the
    # estimates over independent noise draws (within a factor ~1.5)
    pas, incs, errs_pa, errs_inc = [], [], [], []
    for seed in range(10):
        est = kinematic_geometry(_disk(n=40, noise_kms=15.0, seed=100 + seed),
                                 initial=TRUE)
        pas.append(est.pa_deg)
        incs.append(est.inc_deg)
        errs_pa.append(est.pa_err_deg)
        errs_inc.append(est.inc_err_deg)
    assert np.std(pas, ddof=1) / np.mean(errs_pa) == pytest.approx(1.0, abs=0.5)
    assert np.std(incs, ddof=1) / np.mean(errs_inc) == pytest.approx(1.0, abs=0.5)
    assert np.mean(pas) == pytest.approx(122.0, abs=3 * np.mean(errs_pa))
