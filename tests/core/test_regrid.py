"""Tests of image resampling (gyrometer.core.regrid).

References: bilinear interpolation reproduces any function linear in the
source pixel coordinates exactly (textbook); two TAN projections about the
same tangent point are related by an affine pixel map (Calabretta & Greisen
2002, A&A 395, 1077), so a linear image stays exactly linear; flux
conservation is checked against the analytic total of a Gaussian.
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS

from gyrometer.core.errors import HeaderError
from gyrometer.core.fitsio import load_mapset, write_mapset
from gyrometer.core.dataset import MapSet
from gyrometer.core.regrid import regrid_image


def _wcs(scale_arcsec=0.5, rotation_deg=0.0, crpix=(20.0, 15.0),
         crval=(150.0, 2.0), frame=("RA---TAN", "DEC--TAN")) -> WCS:
    w = WCS(naxis=2)
    w.wcs.ctype = list(frame)
    w.wcs.crval = list(crval)
    w.wcs.crpix = list(crpix)
    w.wcs.cdelt = [-scale_arcsec / 3600, scale_arcsec / 3600]
    t = np.deg2rad(rotation_deg)
    w.wcs.pc = [[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]]
    return w


def test_identity_grid_returns_the_image():
    image = np.random.default_rng(0).normal(size=(30, 40))
    out = regrid_image(image, _wcs(), _wcs(), image.shape)
    np.testing.assert_allclose(out, image, atol=1e-9)


def test_linear_image_is_exact_under_rotation_scale_and_shift():
    src_wcs = _wcs(0.5, crpix=(40.0, 30.0))
    y, x = np.mgrid[0:60, 0:80].astype(float)
    image = 3.0 + 0.7 * x - 1.3 * y
    target = _wcs(0.8, rotation_deg=37.0, crpix=(10.0, 12.0))
    out = regrid_image(image, src_wcs, target, (20, 20))
    ty, tx = np.mgrid[0:20, 0:20].astype(float)
    sx, sy = src_wcs.world_to_pixel(target.pixel_to_world(tx, ty))
    np.testing.assert_allclose(out, 3.0 + 0.7 * sx - 1.3 * sy, atol=1e-8)
    assert np.all(np.isfinite(out))


def test_points_off_the_source_are_nan():
    image = np.ones((10, 10))
    target = _wcs(crpix=(-30.0, 5.0))  # shifted 50 px away
    out = regrid_image(image, _wcs(crpix=(20.0, 5.0)), target, (10, 10))
    assert np.all(np.isnan(out))


def test_galactic_target_frame_is_handled():
    src = _wcs()
    centre = src.pixel_to_world(19.0, 14.0).galactic
    target = _wcs(crval=(centre.l.deg, centre.b.deg),
                  frame=("GLON-TAN", "GLAT-TAN"), crpix=(5.0, 5.0))
    y, x = np.mgrid[0:40, 0:50].astype(float)
    out = regrid_image(x + 2 * y, src, target, (9, 9))
    # target pixel 4,4 (0-based) is the source pixel 19,14
    assert out[4, 4] == pytest.approx(19.0 + 2 * 14.0, abs=1e-6)


def test_conserve_flux_keeps_the_total_of_a_gaussian():
    y, x = np.mgrid[0:80, 0:80].astype(float)
    sigma = 6.0
    image = np.exp(-0.5 * ((x - 40) ** 2 + (y - 38) ** 2) / sigma ** 2)
    total = 2 * np.pi * sigma ** 2  # analytic flux of the blob
    src = _wcs(0.5, crpix=(41.0, 39.0))
    finer = _wcs(0.25, rotation_deg=20.0, crpix=(81.0, 79.0))
    out = regrid_image(image, src, finer, (160, 160), conserve_flux=True)
    assert np.nansum(out) == pytest.approx(total, rel=0.01)
    surface = regrid_image(image, src, finer, (160, 160))
    assert np.nansum(surface) == pytest.approx(4 * total, rel=0.01)


def test_singular_wcs_raises_header_error():
    bad = _wcs()
    bad.wcs.pc = [[1.0, 1.0], [1.0, 1.0]]
    with pytest.raises(HeaderError, match="cannot map"):
        regrid_image(np.ones((5, 5)), bad, _wcs(), (5, 5))


def test_load_mapset_with_separate_intensity_image(tmp_path):
    grid = _wcs(0.5, rotation_deg=-30.0, crpix=(10.0, 8.0))
    shape = (16, 20)
    maps = MapSet(intensity=np.ones(shape), velocity_kms=np.full(shape, 800.0),
                  wcs=grid, name="LBDP-037", tracer="stars")
    path = write_mapset(tmp_path / "maps.fits", maps)
    src = _wcs(0.2, crpix=(60.0, 50.0))
    y, x = np.mgrid[0:100, 0:120].astype(float)
    header = src.to_header()
    header["BUNIT"] = "nanomaggy"
    fits.PrimaryHDU(0.5 * x + y, header).writeto(tmp_path / "r-band.fits")
    loaded = load_mapset(path, intensity_image=tmp_path / "r-band.fits")
    ty, tx = np.mgrid[0:16, 0:20].astype(float)
    sx, sy = src.world_to_pixel(grid.pixel_to_world(tx, ty))
    np.testing.assert_allclose(loaded.intensity, 0.5 * sx + sy, atol=1e-5)
    assert loaded.intensity_unit == "nanomaggy"
