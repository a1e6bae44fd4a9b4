"""Sky offsets of pixels and the line-of-nodes frame.

Pixel positions are turned into true angular offsets from the disk centre
with :meth:`astropy.coordinates.SkyCoord.spherical_offsets_to`, so rotated,
flipped or sheared WCS (PC/CD matrices, CDELT1 < 0) need no special cases.

Frames (all offsets in arcsec):

* ``east, north``: offsets on the sky from the centre (east = +RA).
* ``X, Y``: line-of-nodes frame. ``X`` runs along the line of nodes,
  positive on the receding side; ``Y`` is perpendicular:
  ``X = east sin PA + north cos PA``, ``Y = east cos PA - north sin PA``
  (Tremaine & Weinberg 1984 geometry, PA north through east).
* ``x, y``: disk plane, ``x = X``, ``y = Y / cos i``.
"""

from __future__ import annotations

from dataclasses import dataclass

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS
from astropy.wcs.utils import proj_plane_pixel_scales

from .errors import HeaderError

__all__ = [
    "SkyGrid",
    "sky_grid",
    "pixel_scale_arcsec",
    "sky_to_lon",
    "lon_to_sky",
    "lon_to_disk",
    "offsets_to_pixel",
    "pixel_to_offsets",
]


@dataclass(frozen=True, eq=False)
class SkyGrid:
    """Offsets of every pixel centre from a sky position.

    Attributes
    ----------
    east_arcsec, north_arcsec : numpy.ndarray
        Shape ``(ny, nx)``.
    ra_deg, dec_deg : float
        The reference position.
    pixel_scale_arcsec : float
        Geometric-mean pixel scale.
    """

    east_arcsec: np.ndarray
    north_arcsec: np.ndarray
    ra_deg: float
    dec_deg: float
    pixel_scale_arcsec: float

    @property
    def shape(self) -> tuple[int, int]:
        return self.east_arcsec.shape

    def shifted(self, d_east_arcsec: float, d_north_arcsec: float) -> "SkyGrid":
        """Grid relative to a centre moved by small offsets (tangent plane)."""
        return SkyGrid(self.east_arcsec - d_east_arcsec,
                       self.north_arcsec - d_north_arcsec,
                       self.ra_deg, self.dec_deg, self.pixel_scale_arcsec)


def pixel_scale_arcsec(wcs: WCS) -> float:
    """Geometric-mean pixel scale of a celestial WCS, arcsec per pixel."""
    try:
        scales = proj_plane_pixel_scales(wcs.celestial)
    except Exception as exc:  # singular matrices and the like
        raise HeaderError(f"cannot derive a pixel scale from the WCS ({exc})",
                          keyword="CDELT/CD/PC") from exc
    scale = float(np.sqrt(abs(scales[0] * scales[1]))) * 3600.0
    try:
        det = float(np.linalg.det(wcs.celestial.pixel_scale_matrix))
    except Exception:  # noqa: BLE001 - any failure means no usable matrix
        det = float("nan")
    if not np.isfinite(det) or abs(det) * 3600.0 ** 2 <= 1e-10 * scale ** 2:
        raise HeaderError("the WCS matrix is singular: pixels have no area "
                          "on the sky", keyword="CDELT/CD/PC", value=det)
    if not np.isfinite(scale) or scale <= 0:
        raise HeaderError("the WCS has a zero or invalid pixel scale",
                          keyword="CDELT/CD/PC", value=scale)
    return scale


def sky_grid(wcs: WCS, shape: tuple[int, int], ra_deg: float,
             dec_deg: float) -> SkyGrid:
    """Angular offsets of all pixel centres of a ``shape`` map from a centre.

    Parameters
    ----------
    wcs : astropy.wcs.WCS
        Celestial WCS of the map.
    shape : tuple of int
        ``(ny, nx)``.
    ra_deg, dec_deg : float
        Reference position (ICRS degrees).
    """
    ny, nx = shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    world = wcs.celestial.pixel_to_world(xx.ravel(), yy.ravel())
    center = SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="icrs")
    d_east, d_north = center.spherical_offsets_to(world.icrs)
    east = d_east.to_value(u.arcsec).reshape(shape)
    north = d_north.to_value(u.arcsec).reshape(shape)
    return SkyGrid(east, north, float(ra_deg), float(dec_deg),
                   pixel_scale_arcsec(wcs))


def sky_to_lon(east, north, pa_deg: float):
    """Rotate sky offsets into the line-of-nodes frame; returns ``(X, Y)``."""
    pa = np.radians(pa_deg)
    s, c = np.sin(pa), np.cos(pa)
    east = np.asarray(east, dtype=float)
    north = np.asarray(north, dtype=float)
    return east * s + north * c, east * c - north * s


def lon_to_sky(X, Y, pa_deg: float):
    """Inverse of :func:`sky_to_lon`; returns ``(east, north)``."""
    pa = np.radians(pa_deg)
    s, c = np.sin(pa), np.cos(pa)
    X = np.asarray(X, dtype=float)
    Y = np.asarray(Y, dtype=float)
    return X * s + Y * c, X * c - Y * s


def lon_to_disk(X, Y, inc_deg: float):
    """Deproject line-of-nodes offsets; returns ``(R, cos_theta, sin_theta)``.

    ``x = X``, ``y = Y / cos i``, ``R = hypot(x, y)``; theta is the disk
    azimuth from the receding line of nodes.
    """
    x = np.asarray(X, dtype=float)
    y = np.asarray(Y, dtype=float) / np.cos(np.radians(inc_deg))
    r = np.hypot(x, y)
    with np.errstate(invalid="ignore", divide="ignore"):
        cos_t = np.where(r > 0, x / r, 1.0)
        sin_t = np.where(r > 0, y / r, 0.0)
    return r, cos_t, sin_t


def offsets_to_pixel(wcs: WCS, ra_deg: float, dec_deg: float, east, north):
    """Pixel coordinates ``(px, py)`` (0-based) of sky offsets from a centre."""
    center = SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="icrs")
    points = center.spherical_offsets_by(np.asarray(east) * u.arcsec,
                                         np.asarray(north) * u.arcsec)
    px, py = wcs.celestial.world_to_pixel(points)
    return np.asarray(px, dtype=float), np.asarray(py, dtype=float)


def pixel_to_offsets(wcs: WCS, ra_deg: float, dec_deg: float, px, py):
    """Sky offsets ``(east, north)`` in arcsec of pixel positions."""
    center = SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="icrs")
    world = wcs.celestial.pixel_to_world(np.asarray(px), np.asarray(py))
    d_east, d_north = center.spherical_offsets_to(world.icrs)
    return d_east.to_value(u.arcsec), d_north.to_value(u.arcsec)
