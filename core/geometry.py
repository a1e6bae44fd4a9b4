"""Disk geometry: centre, line of nodes, inclination, systemic velocity, distance.

Convention (used everywhere in Gyrometer): the position angle ``pa_deg`` is
the angle of the line of nodes measured from north through east to the
*receding* half of the major axis, in [0, 360). The inclination is 0 for a
face-on disk and 90 for edge-on.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import astropy.units as u
from astropy.coordinates import SkyCoord

from .errors import GeometryError

__all__ = ["DiskGeometry", "ARCSEC_PER_RADIAN", "kpc_per_arcsec"]

#: Arcseconds per radian (exact by definition).
ARCSEC_PER_RADIAN = 180.0 * 3600.0 / math.pi


def kpc_per_arcsec(distance_mpc: float) -> float:
    """Linear scale in kpc per arcsec at ``distance_mpc`` (small-angle).

    1 arcsec at 1 Mpc is 4.8481 pc (1e3 kpc / 206264.8).
    """
    return distance_mpc * 1.0e3 / ARCSEC_PER_RADIAN


@dataclass(frozen=True)
class DiskGeometry:
    """Projection of a thin disk on the sky, with 1-sigma uncertainties.

    Attributes
    ----------
    ra_deg, dec_deg : float
        ICRS centre, degrees.
    pa_deg : float
        Position angle of the receding half of the line of nodes, N through
        E, degrees, normalised to [0, 360).
    inc_deg : float
        Inclination, degrees, 0 < i < 90.
    vsys_kms : float
        Systemic velocity in the data's velocity convention, km/s.
    distance_mpc : float or None
        Distance, Mpc. Needed only for results in kpc.
    center_err_arcsec, pa_err_deg, inc_err_deg, vsys_err_kms, distance_err_mpc : float
        1-sigma uncertainties (0 = exact).
    source : str
        Free text saying where each value came from (``"user"``,
        ``"kinematic fit"``...), kept in sessions and result metadata.
    """

    ra_deg: float
    dec_deg: float
    pa_deg: float
    inc_deg: float
    vsys_kms: float = 0.0
    distance_mpc: float | None = None
    center_err_arcsec: float = 0.0
    pa_err_deg: float = 0.0
    inc_err_deg: float = 0.0
    vsys_err_kms: float = 0.0
    distance_err_mpc: float = 0.0
    source: str = "user"

    def __post_init__(self) -> None:
        values = dict(ra_deg=self.ra_deg, dec_deg=self.dec_deg,
                      pa_deg=self.pa_deg, inc_deg=self.inc_deg,
                      vsys_kms=self.vsys_kms)
        for name, value in values.items():
            if not isinstance(value, (int, float)) or not math.isfinite(value):
                raise GeometryError(f"{name} must be a finite number",
                                    keyword=name, value=value)
        if not -90.0 <= self.dec_deg <= 90.0:
            raise GeometryError("declination outside [-90, 90] degrees",
                                keyword="dec_deg", value=self.dec_deg)
        if not 0.0 < self.inc_deg < 90.0:
            raise GeometryError(
                "inclination must be strictly between 0 and 90 degrees: the "
                "method divides by sin i and deprojects with cos i",
                keyword="inc_deg", value=self.inc_deg,
                hint="face-on and edge-on disks cannot be measured")
        if self.distance_mpc is not None and not (
                math.isfinite(self.distance_mpc) and self.distance_mpc > 0):
            raise GeometryError("distance must be positive",
                                keyword="distance_mpc", value=self.distance_mpc)
        for name in ("center_err_arcsec", "pa_err_deg", "inc_err_deg",
                     "vsys_err_kms", "distance_err_mpc"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise GeometryError(f"{name} must be a non-negative number",
                                    keyword=name, value=value)
        object.__setattr__(self, "ra_deg", float(self.ra_deg) % 360.0)
        object.__setattr__(self, "pa_deg", float(self.pa_deg) % 360.0)

    # -- Quantity views -------------------------------------------------
    @property
    def center(self) -> SkyCoord:
        """The centre as an ICRS :class:`~astropy.coordinates.SkyCoord`."""
        return SkyCoord(self.ra_deg * u.deg, self.dec_deg * u.deg, frame="icrs")

    @property
    def pa(self) -> u.Quantity:
        return self.pa_deg * u.deg

    @property
    def inclination(self) -> u.Quantity:
        return self.inc_deg * u.deg

    @property
    def vsys(self) -> u.Quantity:
        return self.vsys_kms * u.km / u.s

    @property
    def distance(self) -> u.Quantity | None:
        return None if self.distance_mpc is None else self.distance_mpc * u.Mpc

    @property
    def sin_i(self) -> float:
        return math.sin(math.radians(self.inc_deg))

    @property
    def cos_i(self) -> float:
        return math.cos(math.radians(self.inc_deg))

    def with_(self, **changes) -> "DiskGeometry":
        """A copy with some fields changed (validated again)."""
        return replace(self, **changes)
