"""Display-only mapping between map pixels and sky offsets.

Overlays (slits, the line of nodes, resonance ellipses) are drawn many times
a second while the user drags. :class:`SkyFrame` linearises the map's WCS at
the disk centre once (core's
:func:`gyrometer.core.slits.pixel_frame`, the map the slit weights use) and then maps offsets to
pixels with a 2x2 matrix. It is used only to draw and to turn mouse motion
into slit offsets; every number that enters a measurement is computed by
core from the exact WCS.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gyrometer.core.coords import lon_to_sky, sky_to_lon
from gyrometer.core.slits import pixel_frame

__all__ = ["SkyFrame"]


@dataclass(frozen=True, eq=False)
class SkyFrame:
    """Affine map ``pixel = origin + matrix @ (east, north)``.

    Attributes
    ----------
    origin_pix : numpy.ndarray
        0-based pixel position ``(x, y)`` of the disk centre.
    matrix : numpy.ndarray
        2x2 pixels per arcsec; columns are the east and north directions.
    pa_deg : float
        Position angle of the line of nodes (display of slits).
    inc_deg : float
        Inclination (display of deprojected circles).
    pixel_scale_arcsec : float
    """

    origin_pix: np.ndarray
    matrix: np.ndarray
    pa_deg: float
    inc_deg: float
    pixel_scale_arcsec: float

    @classmethod
    def from_wcs(cls, wcs, geometry, shape: tuple[int, int]) -> "SkyFrame":
        """Invert core's linearised WCS at the disk centre.

        Uses :func:`gyrometer.core.slits.pixel_frame`, the same tangent map
        the slit weights are computed with, so what is drawn is what is
        measured.
        """
        frame = pixel_frame(wcs, shape, geometry)
        matrix = np.linalg.inv(frame.jac)           # pixels per arcsec
        origin = -matrix @ frame.origin             # pixel of the centre
        return cls(origin, matrix, float(geometry.pa_deg),
                   float(geometry.inc_deg), frame.pixel_scale_arcsec)

    # -- sky offsets <-> pixels ---------------------------------------
    def to_pixel(self, east, north):
        east = np.asarray(east, dtype=float)
        north = np.asarray(north, dtype=float)
        px = self.origin_pix[0] + self.matrix[0, 0] * east + self.matrix[0, 1] * north
        py = self.origin_pix[1] + self.matrix[1, 0] * east + self.matrix[1, 1] * north
        return px, py

    def to_offsets(self, px, py):
        inv = np.linalg.inv(self.matrix)
        dx = np.asarray(px, dtype=float) - self.origin_pix[0]
        dy = np.asarray(py, dtype=float) - self.origin_pix[1]
        return inv[0, 0] * dx + inv[0, 1] * dy, inv[1, 0] * dx + inv[1, 1] * dy

    def delta_to_offsets(self, dpx, dpy):
        inv = np.linalg.inv(self.matrix)
        return (inv[0, 0] * dpx + inv[0, 1] * dpy,
                inv[1, 0] * dpx + inv[1, 1] * dpy)

    # -- line-of-nodes frame <-> pixels -------------------------------
    def lon_to_pixel(self, X, Y):
        east, north = lon_to_sky(X, Y, self.pa_deg)
        return self.to_pixel(east, north)

    def pixel_to_lon(self, px, py):
        east, north = self.to_offsets(px, py)
        return sky_to_lon(east, north, self.pa_deg)

    def disk_circle(self, radius_arcsec: float, n: int = 121):
        """Pixel outline of a circle of ``radius_arcsec`` in the disk plane."""
        t = np.linspace(0.0, 2.0 * np.pi, n)
        X = radius_arcsec * np.cos(t)
        Y = radius_arcsec * np.cos(np.radians(self.inc_deg)) * np.sin(t)
        return self.lon_to_pixel(X, Y)

    def slit_outline(self, slit):
        """Closed pixel outline (5 points) of a slit."""
        x0 = slit.x_center_arcsec - slit.half_length_arcsec
        x1 = slit.x_center_arcsec + slit.half_length_arcsec
        y0 = slit.offset_arcsec - slit.width_arcsec / 2.0
        y1 = slit.offset_arcsec + slit.width_arcsec / 2.0
        X = np.array([x0, x1, x1, x0, x0])
        Y = np.array([y0, y0, y1, y1, y0])
        return self.lon_to_pixel(X, Y)

    def direction_pixel(self, east: float, north: float):
        """Unit pixel vector of a sky direction (for the compass)."""
        v = self.matrix @ np.array([east, north], dtype=float)
        return v / np.hypot(*v)
