"""Fixtures shared by the core tests."""

import pytest


@pytest.fixture
def barred_test_model():
    """A small barred galaxy of core.synthetic: bar (40 km/s/kpc) inside 2 kpc
    (20.6 arcsec at 20 Mpc), PA 250, i 55, rotated WCS, off-centre, PSF 1.5″.

    Returns ``(geometry, model)``.
    """
    from gyrometer.core.geometry import DiskGeometry
    from gyrometer.core.synthetic import GalaxyModel, PatternSpec

    geom = DiskGeometry(ra_deg=150.0, dec_deg=2.0, pa_deg=250.0, inc_deg=55.0,
                        vsys_kms=3000.0, distance_mpc=20.0)
    bar = PatternSpec("bar", 40.0, 0.5, 0.0, 2.0, angle_deg=60.0)
    model = GalaxyModel("LBDP-011", geom, disk_scale_kpc=1.5, r_turn_kpc=0.5,
                        shape=(96, 96), pixel_scale_arcsec=1.0,
                        wcs_rotation_deg=30.0, center_offset_pix=(2.3, -1.7),
                        psf_fwhm_arcsec=1.5, subsample=2, patterns=(bar,))
    return geom, model
