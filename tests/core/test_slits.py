"""Pseudo-slits: exact pixel weights against analytic areas."""

import numpy as np
import pytest
from astropy.wcs import WCS
from hypothesis import given, settings, strategies as st

from gyrometer.core.coords import pixel_to_offsets, sky_to_lon
from gyrometer.core.errors import SlitError
from gyrometer.core.geometry import DiskGeometry
from gyrometer.core.slits import (Slit, SlitSet, _clip_square_area, pixel_frame,
                                  slit_corners_pixel, slit_corners_sky, slit_weight,
                                  slit_weights)

SCALE = 1.0  # arcsec per pixel


def make_wcs(n=40, scale=SCALE, rot_deg=0.0, flip=False):
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [150.0, 2.0]
    w.wcs.crpix = [(n + 1) / 2.0, (n + 1) / 2.0]      # centre of the map
    w.wcs.cdelt = [(1 if flip else -1) * scale / 3600, scale / 3600]
    r = np.radians(rot_deg)
    w.wcs.pc = [[np.cos(r), -np.sin(r)], [np.sin(r), np.cos(r)]]
    return w


GEO = DiskGeometry(150.0, 2.0, pa_deg=90.0, inc_deg=45.0)


def weight_image(sw, n):
    img = np.zeros(n * n)
    np.add.at(img, sw.flat_index[sw.flat_index >= 0], sw.weight[sw.flat_index >= 0])
    return img.reshape(n, n)


def test_axis_aligned_strip_has_analytic_edge_fractions():
    # PA = 90: X runs east (toward -x pixels), Y toward south (-y pixels).
    # Map centre at pixel (19.5, 19.5); slit of width 2.5 px centred on
    # Y = -0.25 arcsec covers py in [19.75 - 1.25, 19.75 + 1.25] = [18.5, 21.0].
    n = 40
    slit = Slit(offset_arcsec=-0.25, width_arcsec=2.5, half_length_arcsec=5.0)
    sw = slit_weight(slit, GEO, make_wcs(n), (n, n))
    img = weight_image(sw, n)
    col = img[:, 19]                                  # inside the slit's length
    # rows 19, 20 fully in; row 21 = [20.5, 21.0] half in (derived)
    assert col[19] == pytest.approx(1.0, abs=1e-9)
    assert col[20] == pytest.approx(1.0, abs=1e-9)
    assert col[21] == pytest.approx(0.5, abs=1e-6)
    assert col[18] == pytest.approx(0.0, abs=1e-6)
    # total weight equals the strip area in pixels (10 x 2.5)
    assert sw.weight.sum() == pytest.approx(25.0, rel=1e-6)
    assert not sw.clipped_by_edge


def test_corner_pixel_of_an_axis_aligned_strip_is_a_quarter():
    # The strip X in [-5, 5], Y in [-1, 1] around pixel centre (19.5, 19.5):
    # with the centre halfway between pixels, shift by half a pixel so a
    # corner falls on a pixel centre: x_center = 0.5 puts X = -4.5..5.5.
    n = 40
    slit = Slit(offset_arcsec=0.5, width_arcsec=2.0, half_length_arcsec=5.0,
                x_center_arcsec=0.5)
    sw = slit_weight(slit, GEO, make_wcs(n), (n, n))
    # a corner lying exactly on a pixel centre cuts it into quarters (derived)
    quarters = np.isclose(sw.weight, 0.25, atol=1e-6)
    assert quarters.sum() == 4
    assert sw.weight.sum() == pytest.approx(20.0, rel=1e-6)


def test_strip_at_45_degrees_total_and_half_pixels():
    n = 60
    geo = GEO.with_(pa_deg=45.0)
    # Pixel centres sit at half-integer offsets, so at PA = 45 their Y are
    # multiples of 1/sqrt(2): edges at Y = +-4/sqrt(2) pass through centres.
    half_w = 4.0 / np.sqrt(2.0)
    slit = Slit(offset_arcsec=0.0, width_arcsec=2 * half_w, half_length_arcsec=12.0)
    sw = slit_weight(slit, geo, make_wcs(n), (n, n))
    assert sw.weight.sum() == pytest.approx(2 * half_w * 24.0, rel=1e-6)
    assert np.all((sw.weight > 0) & (sw.weight <= 1 + 1e-12))
    # A pixel whose centre lies on a long edge of a 45-degree strip, away
    # from the corners, is cut in half by symmetry (derived).
    on_edge = np.isclose(np.abs(sw.y_arcsec), half_w, atol=1e-6) & (np.abs(sw.x_arcsec) < 10)
    assert on_edge.any()
    assert np.allclose(sw.weight[on_edge], 0.5, atol=1e-6)
    interior = (np.abs(sw.y_arcsec) < half_w - 0.71) & (np.abs(sw.x_arcsec) < 12 - 0.71)
    assert np.allclose(sw.weight[interior], 1.0)


def test_clip_area_of_known_polygons():
    # unit square at (0, 0) cut by x + y >= 0 -> half (derived)
    planes = np.array([[[1.0, 1.0, 0.0]]])
    assert _clip_square_area(np.zeros(1), np.zeros(1), planes)[0] == pytest.approx(0.5)
    # cut by x >= 0.25 and y >= -0.5 -> 0.25 x 1 (derived)
    planes = np.array([[[1.0, 0.0, -0.25], [0.0, 1.0, 0.5]]])
    assert _clip_square_area(np.zeros(1), np.zeros(1), planes)[0] == pytest.approx(0.25)
    # corner triangle x + y >= 0.5: area 1/8 (derived)
    planes = np.array([[[1.0, 1.0, -0.5]]])
    assert _clip_square_area(np.zeros(1), np.zeros(1), planes)[0] == pytest.approx(0.125)


def _supersampled(slit, geo, wcs, n, sub=40):
    """Brute-force overlap by sub-pixel sampling (agrees to ~1/sub**2 per edge)."""
    frame = pixel_frame(wcs, (n, n), geo)
    t = (np.arange(sub) + 0.5) / sub - 0.5
    yy, xx = np.mgrid[0:n, 0:n]
    shape4 = (n, n, sub, sub)
    px = np.broadcast_to(xx[..., None, None] + t[None, None, None, :], shape4).ravel()
    py = np.broadcast_to(yy[..., None, None] + t[None, None, :, None], shape4).ravel()
    east = frame.jac[0, 0] * px + frame.jac[0, 1] * py + frame.origin[0]
    north = frame.jac[1, 0] * px + frame.jac[1, 1] * py + frame.origin[1]
    x, y = sky_to_lon(east, north, geo.pa_deg)
    inside = ((np.abs(x - slit.x_center_arcsec) <= slit.half_length_arcsec)
              & (np.abs(y - slit.offset_arcsec) <= 0.5 * slit.width_arcsec))
    return inside.reshape(n, n, sub * sub).mean(axis=2)


@settings(max_examples=12, deadline=None)
@given(pa=st.floats(0, 360), rot=st.floats(-180, 180), off=st.floats(-8, 8),
       width=st.floats(0.6, 5), half=st.floats(2, 30), flip=st.booleans())
def test_weights_match_supersampling_and_area_on_map(pa, rot, off, width, half, flip):
    n = 24
    wcs = make_wcs(n, rot_deg=rot, flip=flip)
    geo = GEO.with_(pa_deg=pa)
    slit = Slit(off, width, half)
    sw = slit_weight(slit, geo, wcs, (n, n))
    exact = weight_image(sw, n)
    brute = _supersampled(slit, geo, wcs, n)
    # area of strip inside the map = sum of weights on the map
    assert exact.sum() == pytest.approx(sw.inside_area_pix, rel=1e-9)
    assert np.abs(exact - brute).max() < 0.03           # sub=40 sampling error
    assert exact.sum() == pytest.approx(brute.sum(), abs=0.02 * max(1.0, brute.sum()) + 0.5)
    # every pixel of the strip, including beyond the edge, adds up to its area
    assert sw.weight.sum() == pytest.approx(sw.area_pix, rel=1e-9) or sw.clipped_by_edge
    assert sw.clipped_by_edge == (sw.inside_area_pix < sw.area_pix * (1 - 1e-9))


def test_pixel_scale_from_wcs_sets_angular_size():
    n = 40
    slit = Slit(0.0, 2.0, 6.0)
    coarse = slit_weight(slit, GEO, make_wcs(n, scale=2.0), (n, n))
    fine = slit_weight(slit, GEO, make_wcs(n, scale=0.5), (n, n))
    # 12" x 2" is 6 px^2 at 2"/px and 96 px^2 at 0.5"/px (derived)
    assert coarse.weight.sum() == pytest.approx(6.0, rel=1e-6)
    assert fine.weight.sum() == pytest.approx(96.0, rel=1e-6)


def test_slit_off_the_edge_is_flagged_and_keeps_outside_pixels():
    n = 20
    slit = Slit(0.0, 2.0, 30.0)                        # 60" long on a 20" map
    sw = slit_weight(slit, GEO, make_wcs(n), (n, n))
    assert sw.clipped_by_edge
    assert sw.inside_area_pix == pytest.approx(20.0 * 2.0, rel=1e-6)
    assert np.any(sw.flat_index < 0)


def test_corners_on_sky_and_in_pixels_agree_with_weights():
    n = 50
    wcs = make_wcs(n, rot_deg=33.0)
    geo = GEO.with_(pa_deg=120.0)
    slit = Slit(3.0, 4.0, 10.0)
    px, py = slit_corners_pixel(slit, geo, wcs)
    sky = slit_corners_sky(slit, geo)
    qx, qy = wcs.world_to_pixel(sky)
    assert np.allclose(px, qx, atol=1e-6) and np.allclose(py, qy, atol=1e-6)
    east, north = pixel_to_offsets(wcs, geo.ra_deg, geo.dec_deg, px, py)
    x, y = sky_to_lon(east, north, geo.pa_deg)
    assert np.allclose(np.sort(x), [-10, -10, 10, 10], atol=1e-4)
    assert np.allclose(np.sort(y), [1, 1, 5, 5], atol=1e-4)
    # shoelace area of the pixel corners equals the strip area in pixels
    area = 0.5 * abs(np.dot(px, np.roll(py, -1)) - np.dot(py, np.roll(px, -1)))
    assert slit_weight(slit, geo, wcs, (n, n)).weight.sum() == pytest.approx(area, rel=1e-6)


def test_slit_set_generation_and_editing_keep_fields():
    ss = SlitSet.generate(5, 3.0, 2.0, 20.0, symmetric=False)
    assert np.allclose(ss.offsets_arcsec, [-6, -3, 0, 3, 6])
    assert not ss.symmetric
    ss2 = ss.replaced(1, ss.slits[1].with_(offset_arcsec=-4.0))
    assert ss2.slits[1].offset_arcsec == -4.0 and ss.slits[1].offset_arcsec == -3.0
    weights = slit_weights(ss2, GEO, make_wcs(40), (40, 40))
    assert len(weights) == 5
    with pytest.raises(SlitError):
        Slit(0.0, -1.0, 5.0)
