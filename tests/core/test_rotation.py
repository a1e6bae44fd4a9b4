"""Rotation curves: reading tables, validation, tilted rings, asymmetric drift."""

import math

import astropy.units as u
import numpy as np
import pytest
from astropy.table import QTable
from astropy.wcs import WCS

from gyrometer.core.coords import lon_to_disk, pixel_to_offsets, sky_to_lon
from gyrometer.core.dataset import MapSet
from gyrometer.core.errors import (DataContentError, FitError,
                                   InputFileError, RotationCurveError)
from gyrometer.core.geometry import DiskGeometry, kpc_per_arcsec
from gyrometer.core.rotation import (AsymmetricDrift, RotationCurve,
                                     asymmetric_drift_vc, load_rotation_curve,
                                     tilted_rings)

GEOM = DiskGeometry(ra_deg=150.0, dec_deg=-30.0, pa_deg=218.0, inc_deg=52.0,
                    vsys_kms=2400.0, distance_mpc=18.0)


def _wcs(n, scale_arcsec=1.0, rot_deg=25.0, ra=150.0, dec=-30.0):
    """A rotated, east-left WCS (CDELT1 < 0) centred near (ra, dec)."""
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [ra, dec]
    w.wcs.crpix = [(n + 1) / 2 + 0.3, (n + 1) / 2 - 0.4]
    w.wcs.cdelt = [-scale_arcsec / 3600.0, scale_arcsec / 3600.0]
    c, s = math.cos(math.radians(rot_deg)), math.sin(math.radians(rot_deg))
    w.wcs.pc = [[c, -s], [s, c]]
    return w


def _disk_maps(v_phi, *, geom=GEOM, n=72, sigma_r=None, sz_over_sr=0.6,
               noise_kms=0.0, psf=None, seed=0):
    """A thin rotating disk seen through a rotated WCS (built here)."""
    w = _wcs(n)
    yy, xx = np.mgrid[0:n, 0:n]
    east, north = pixel_to_offsets(w, geom.ra_deg, geom.dec_deg, xx, yy)
    X, Y = sky_to_lon(east, north, geom.pa_deg)
    R, cos_t, sin_t = lon_to_disk(X, Y, geom.inc_deg)
    rng = np.random.default_rng(seed)
    v = geom.vsys_kms + geom.sin_i * v_phi(R) * cos_t
    v = v + rng.normal(0.0, noise_kms, v.shape) if noise_kms else v
    disp = None
    if sigma_r is not None:
        s2 = (geom.sin_i**2 * (sin_t**2 + 0.5 * cos_t**2)
              + sz_over_sr**2 * geom.cos_i**2)
        disp = sigma_r(R) * np.sqrt(s2)
    intensity = np.exp(-R / 15.0)
    err = np.full(v.shape, noise_kms) if noise_kms else None
    return MapSet(intensity, v, w, velocity_err_kms=err, dispersion_kms=disp,
                  psf_fwhm_arcsec=psf, name="LBDP-023", tracer="stars")


# -- the data class and the reader -------------------------------------------

def test_rotation_curve_refuses_bad_points_and_names_the_file():
    good = dict(r_arcsec=[1.0, 2.0, 3.0], v_kms=[50.0, 80.0, 100.0],
                v_err_kms=[3.0, 3.0, 3.0], path="lbdp011_rc.ecsv")
    RotationCurve(**good)
    for change, text in ((dict(r_arcsec=[1.0, 2.0]), "differ in length"),
                         (dict(r_arcsec=[1.0, 3.0, 2.0]), "strictly increasing"),
                         (dict(v_kms=[50.0, np.nan, 100.0]), "non-finite"),
                         (dict(v_err_kms=[3.0, 0.0, 3.0]), "errors must be positive"),
                         (dict(r_arcsec=[-1.0, 2.0, 3.0]), ">= 0")):
        with pytest.raises(RotationCurveError, match=text) as info:
            RotationCurve(**{**good, **change})
        assert "lbdp011_rc.ecsv" in str(info.value)
    with pytest.raises(RotationCurveError, match="at least 3"):
        RotationCurve([1.0, 2.0], [1.0, 2.0], [1.0, 1.0])
    with pytest.raises(RotationCurveError, match="need a distance"):
        RotationCurve(**good).r_kpc


def test_ecsv_with_kpc_radii_is_converted_with_the_distance(tmp_path):
    t = QTable({"r": [0.5, 1.0, 2.0, 4.0] * u.kpc,
                "vc": [80.0, 140.0, 190.0, 200.0] * u.km / u.s,
                "e_vc": [10.0, 6.0, 5.0, 5.0] * u.km / u.s})
    path = tmp_path / "lbdp037_rc.ecsv"
    t.write(path, format="ascii.ecsv")
    curve = load_rotation_curve(path, distance_mpc=18.0)
    np.testing.assert_allclose(curve.r_kpc, [0.5, 1.0, 2.0, 4.0], rtol=1e-12)
    # 1 arcsec at 18 Mpc = 18e3 / 206264.806 kpc
    assert curve.r_arcsec[0] == pytest.approx(0.5 / (18e3 / 206264.806), rel=1e-8)
    np.testing.assert_allclose(curve.v_kms, [80, 140, 190, 200])
    with pytest.raises(RotationCurveError, match="needs the distance"):
        load_rotation_curve(path)
    # write -> read round trip through the curve's own table
    again = tmp_path / "again.ecsv"
    curve.to_table().write(again, format="ascii.ecsv")
    back = load_rotation_curve(again, distance_mpc=18.0)
    np.testing.assert_allclose(back.r_arcsec, curve.r_arcsec, rtol=1e-12)
    np.testing.assert_allclose(back.v_err_kms, curve.v_err_kms)


def test_csv_and_whitespace_tables_with_unit_suffixes_or_arguments(tmp_path):
    csv = tmp_path / "rc.csv"
    csv.write_text("r_arcsec,v_kms,v_err_kms\n1,20,4\n3,60,4\n6,100,4\n")
    curve = load_rotation_curve(csv)
    np.testing.assert_allclose(curve.r_arcsec, [1, 3, 6])
    np.testing.assert_allclose(curve.v_kms, [20, 60, 100])
    txt = tmp_path / "rc.txt"
    txt.write_text("# radius vrot err\n0.5 30 5\n1.0 55 5\n1.5 70 5\n")
    arcmin = load_rotation_curve(txt, radius_unit="arcmin")
    np.testing.assert_allclose(arcmin.r_arcsec, [30, 60, 90])
    with pytest.raises(RotationCurveError, match="unit of column 'radius'"):
        load_rotation_curve(txt)
    ms = tmp_path / "rc_ms.txt"
    ms.write_text("r_arcsec v e_v\n1 20000 3000\n2 40000 3000\n3 50000 3000\n")
    assert load_rotation_curve(ms, velocity_unit="m/s").v_kms[2] == pytest.approx(50.0)


def test_reader_errors_name_the_file_and_the_fault(tmp_path):
    with pytest.raises(InputFileError, match="not found"):
        load_rotation_curve(tmp_path / "missing.ecsv")
    bad = tmp_path / "nocols.csv"
    bad.write_text("radius_arcsec,flux,width\n1,2,3\n2,3,4\n3,4,5\n")
    with pytest.raises(RotationCurveError, match="no velocity column") as info:
        load_rotation_curve(bad)
    assert "nocols.csv" in str(info.value)
    text = tmp_path / "text.csv"
    text.write_text("r_arcsec,v_kms,v_err_kms\n1,a,3\n2,b,3\n3,c,3\n")
    with pytest.raises(RotationCurveError, match="not numeric"):
        load_rotation_curve(text)
    dup = tmp_path / "dup.csv"
    dup.write_text("r_arcsec,v_kms,v_err_kms\n1,2,3\n1,3,3\n3,4,3\n")
    with pytest.raises(RotationCurveError, match="strictly increasing"):
        load_rotation_curve(dup)


def test_table_out_of_order_is_refused_not_sorted(tmp_path):
    # radii decreasing at the third data row: refused with the file, the
    # column, the row and the hint to sort (never sorted silently)
    table = tmp_path / "jumbled.csv"
    table.write_text("r_arcsec,v_kms,v_err_kms\n1,20,4\n3,60,4\n2,45,4\n6,100,4\n")
    with pytest.raises(RotationCurveError) as info:
        load_rotation_curve(table)
    text = str(info.value)
    assert "jumbled.csv" in text and "r_arcsec" in text
    assert "strictly increasing" in text
    assert "row 3 (2) is smaller than row 2 (3)" in text
    assert "sort the table" in text
    assert info.value.keyword == "r_arcsec" and info.value.value == 2.0
    # a repeated radius names the repeat; a kpc column is checked as written
    dup = tmp_path / "repeat.txt"
    dup.write_text("r_kpc v_kms v_err_kms\n0.5 20 4\n1.0 60 4\n1.5 70 4\n1.5 71 4\n")
    with pytest.raises(RotationCurveError, match=r"row 4 \(1.5\) repeats row 3"):
        load_rotation_curve(dup, distance_mpc=10.0)
    # the same rows in order load unchanged
    table.write_text("r_arcsec,v_kms,v_err_kms\n1,20,4\n2,45,4\n3,60,4\n6,100,4\n")
    np.testing.assert_allclose(load_rotation_curve(table).v_kms, [20, 45, 60, 100])


# -- tilted rings ------------------------------------------------------------

def _arctan(r):
    return 180.0 * 2 / np.pi * np.arctan(r / 6.0)


def test_tilted_rings_recover_a_thin_disk_within_errors():
    maps = _disk_maps(_arctan, noise_kms=5.0, seed=1)
    result = tilted_rings(maps, GEOM, ring_width_arcsec=3.0, r_max_arcsec=33.0)
    c = result.curve
    truth = _arctan(c.r_arcsec)
    pull = (c.v_kms - truth) / c.v_err_kms
    # a ring averages over its width: compare with the ring-mean truth
    assert np.mean(np.abs(pull) < 3) >= 0.9
    assert np.all(np.abs(c.v_kms[c.r_arcsec > 9] - truth[c.r_arcsec > 9]) < 4.0)
    np.testing.assert_allclose(c.v_rad_kms, 0.0, atol=4 * c.v_rad_err_kms.max())
    assert c.distance_mpc == 18.0
    assert c.source == "tilted rings"
    table = result.rings.to_table()
    assert table["vrot"].unit == u.km / u.s and len(table) == len(c)
    out = c.to_table()
    assert out["r_kpc"].unit == u.kpc
    np.testing.assert_allclose(out["r_kpc"].value,
                               c.r_arcsec * kpc_per_arcsec(18.0))


def test_tilted_rings_with_free_geometry_recover_pa_and_inclination():
    maps = _disk_maps(_arctan, noise_kms=3.0, seed=2)
    start = GEOM.with_(pa_deg=GEOM.pa_deg + 4.0, inc_deg=GEOM.inc_deg - 5.0,
                       vsys_kms=GEOM.vsys_kms + 6.0)
    result = tilted_rings(maps, start, ring_width_arcsec=4.0, r_max_arcsec=32.0,
                          free_geometry=("vsys", "pa", "inc"))
    rings = result.rings
    outer = rings.r_arcsec > 10
    assert np.median(rings.pa_deg[outer]) == pytest.approx(218.0, abs=1.0)
    assert np.median(rings.inc_deg[outer]) == pytest.approx(52.0, abs=3.0)
    assert np.median(rings.vsys_kms) == pytest.approx(2400.0, abs=1.0)
    assert np.all(rings.pa_err_deg[outer] > 0)


def test_rings_inside_two_psf_fwhm_are_flagged_as_beam_smeared():
    maps = _disk_maps(_arctan, noise_kms=2.0, psf=3.0)
    result = tilted_rings(maps, GEOM, ring_width_arcsec=2.0, r_max_arcsec=30.0,
                          pixels_correlated=True)
    c = result.curve
    np.testing.assert_array_equal(c.flagged, c.r_arcsec < 6.0)
    assert any("beam smearing" in note for note in result.notes)
    # correlated pixels inflate errors by sqrt(beam area / pixel area),
    # beam area = pi/(4 ln 2) FWHM^2 (Gaussian)
    plain = tilted_rings(maps, GEOM, ring_width_arcsec=2.0, r_max_arcsec=30.0,
                         pixels_correlated=False)
    ratio = np.median(c.v_err_kms / plain.curve.v_err_kms)
    assert ratio == pytest.approx(math.sqrt(math.pi / (4 * math.log(2)) * 9.0),
                                  rel=1e-6)


def test_asymmetric_drift_correction_recovers_the_circular_velocity():
    # a stellar disk: V_c = 200 flat, h = 12 arcsec, sigma_R^2 ~ exp(-R/h);
    # Vbar_phi^2 = V_c^2 - sigma_R^2 (2R/h - 1/2) (Binney & Tremaine 2008
    # §4.8.2 with the assumptions of DOMAIN.md §3, derived)
    h = 12.0

    def sigma_r(r):
        return 90.0 * np.exp(-r / (2 * h))

    def v_phi(r):
        return np.sqrt(200.0**2 - sigma_r(r) ** 2 * (2 * r / h - 0.5))

    maps = _disk_maps(v_phi, sigma_r=sigma_r, noise_kms=2.0, seed=4)
    settings = AsymmetricDrift(scale_length_arcsec=h, sigma_z_over_sigma_r=0.6)
    result = tilted_rings(maps, GEOM, ring_width_arcsec=3.0, r_max_arcsec=33.0,
                          asymmetric_drift=settings)
    c = result.curve
    outer = c.r_arcsec > 4
    np.testing.assert_allclose(c.v_kms[outer], 200.0, atol=3.0)
    np.testing.assert_allclose(result.rings.sigma_r_kms, sigma_r(c.r_arcsec),
                               rtol=0.03)
    assert np.all(result.rings.vrot_kms[outer] < c.v_kms[outer])
    assert any("asymmetric drift" in n for n in result.notes)
    with pytest.raises(DataContentError, match="dispersion map"):
        tilted_rings(_disk_maps(v_phi), GEOM, asymmetric_drift=settings)


def test_asymmetric_drift_formula_for_a_flat_curve():
    # V_c^2 = Vphi^2 + sigma_R^2 (2R/h - 1/2) at R = h: + 1.5 sigma_R^2
    vc, err = asymmetric_drift_vc(10.0, 180.0, 2.0, 40.0, 0.0,
                                  AsymmetricDrift(scale_length_arcsec=10.0))
    assert vc == pytest.approx(math.sqrt(180.0**2 + 1.5 * 40.0**2))
    assert err == pytest.approx(180.0 * 2.0 / vc)


def test_tilted_rings_refuse_empty_maps_and_unknown_parameters():
    maps = _disk_maps(_arctan)
    empty = MapSet(maps.intensity, np.full(maps.shape, np.nan), maps.wcs)
    with pytest.raises(DataContentError):
        tilted_rings(empty, GEOM)
    with pytest.raises(FitError, match="unknown free geometry"):
        tilted_rings(maps, GEOM, free_geometry=("centre",))


def test_round_trip_with_the_synthetic_barred_galaxy_outside_the_bar(barred_test_model):
    # the generator's input curve (Truth.vc) is recovered within the errors
    # outside the bar's zone, where the tracer circulates at V_c
    from gyrometer.core.synthetic import make_maps

    geom, model = barred_test_model
    maps, truth = make_maps(model, rng=np.random.default_rng(0))
    result = tilted_rings(maps, geom, ring_width_arcsec=2.0)
    c = result.curve
    v_true = np.interp(c.r_arcsec * kpc_per_arcsec(20.0), truth.r_kpc,
                       truth.vc_kms)
    outside = c.r_arcsec > truth.zones_arcsec[0][1] + 1.0
    assert outside.sum() >= 10
    pull = (c.v_kms[outside] - v_true[outside]) / c.v_err_kms[outside]
    assert np.mean(np.abs(pull) < 2.5) >= 0.9
    assert abs(np.mean(pull)) < 1.0
