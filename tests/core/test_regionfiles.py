"""Slit sets to DS9 / CRTF polygons and back."""

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord

from gyrometer.core.errors import InputFileError, OutputError, SlitError
from gyrometer.core.geometry import DiskGeometry
from gyrometer.core.regionfiles import (read_slit_regions,
                                        slits_to_regions_text,
                                        write_slit_regions)
from gyrometer.core.slits import Slit, SlitSet

GEOM = DiskGeometry(ra_deg=150.1, dec_deg=-30.2, pa_deg=123.4, inc_deg=50.0)
SLITS = SlitSet((Slit(-6.0, 1.5, 30.0), Slit(0.5, 2.0, 25.0, x_center_arcsec=1.25),
                 Slit(6.0, 1.5, 30.0)), symmetric=False)


def _assert_same(a: SlitSet, b: SlitSet, tol: float) -> None:
    assert len(a) == len(b)
    for s, t in zip(a, b):
        for name in ("offset_arcsec", "width_arcsec", "half_length_arcsec",
                     "x_center_arcsec"):
            assert getattr(s, name) == pytest.approx(getattr(t, name), abs=tol)


def test_ds9_round_trip_recovers_every_slit(tmp_path):
    path = write_slit_regions(tmp_path / "slits.reg", SLITS, GEOM)
    back = read_slit_regions(path, GEOM, symmetric=False)
    # DS9 coordinates are written with 8 decimals of a degree (3.6e-5 arcsec)
    _assert_same(SLITS, back, 1e-3)
    assert back.symmetric is False


def test_crtf_round_trip_recovers_every_slit(tmp_path):
    path = write_slit_regions(tmp_path / "slits.crtf", SLITS, GEOM)
    back = read_slit_regions(path, GEOM)
    # CRTF stores 6 decimals of a degree in FK5 J2000: 3.6 mas (derived)
    _assert_same(SLITS, back, 0.01)


def test_ds9_file_holds_icrs_polygons_with_explicit_corners():
    text = slits_to_regions_text(SLITS, GEOM, "ds9")
    lines = text.splitlines()
    assert "icrs" in lines
    polys = [line for line in lines if line.startswith("polygon(")]
    assert len(polys) == 3
    numbers = [float(v) for v in polys[0].split("(")[1].split(")")[0].split(",")]
    assert len(numbers) == 8  # four corners, RA/Dec each
    # first corner: X = -L, Y = offset - w/2 rotated by the PA (coords.py)
    pa = np.radians(GEOM.pa_deg)
    X, Y = -30.0, -6.0 - 0.75
    east = X * np.sin(pa) + Y * np.cos(pa)
    north = X * np.cos(pa) - Y * np.sin(pa)
    expected = GEOM.center.spherical_offsets_by(east * u.arcsec, north * u.arcsec)
    got = SkyCoord(numbers[0] * u.deg, numbers[1] * u.deg)
    assert got.separation(expected).arcsec < 1e-3


def test_a_rotated_polygon_is_refused_with_its_name(tmp_path):
    # slits written for PA 123.4 deg, read with PA 140: not parallel to the LON
    path = write_slit_regions(tmp_path / "slits.reg", SLITS, GEOM)
    with pytest.raises(SlitError, match="region 1.*not a rectangle"):
        read_slit_regions(path, GEOM.with_(pa_deg=140.0))


def test_non_polygons_and_bad_files_are_refused(tmp_path):
    circle = tmp_path / "circle.reg"
    circle.write_text("icrs\ncircle(150.1,-30.2,5\")\n")
    with pytest.raises(SlitError, match="CircleSkyRegion"):
        read_slit_regions(circle, GEOM)
    with pytest.raises(InputFileError, match="not found"):
        read_slit_regions(tmp_path / "missing.reg", GEOM)
    with pytest.raises(SlitError, match="unknown region file type"):
        read_slit_regions(tmp_path / "slits.txt", GEOM)


def test_region_file_is_not_overwritten_without_force(tmp_path):
    path = write_slit_regions(tmp_path / "slits.reg", SLITS, GEOM)
    with pytest.raises(OutputError):
        write_slit_regions(path, SLITS, GEOM)
    write_slit_regions(path, SLITS, GEOM, overwrite=True)
