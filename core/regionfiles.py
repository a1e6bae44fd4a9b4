"""Slit sets to and from sky region files (DS9 and CASA CRTF).

Each slit is written as a sky **polygon** with its four corners given
explicitly in ICRS, because the angle conventions of rotated boxes differ
between viewers (common practice). Files are written with the astropy
``regions`` package, formats ``ds9`` (``.reg``) and ``crtf`` (``.crtf``).

Reading back turns each polygon into a :class:`~gyrometer.core.slits.Slit`
by expressing its corners in the line-of-nodes frame of a given
:class:`~gyrometer.core.geometry.DiskGeometry` (see
:mod:`gyrometer.core.coords`) and fitting the rectangle
``X in [x_c - L, x_c + L]``, ``Y in [Y_k - w/2, Y_k + w/2]``; a polygon that
is not such a rectangle (within a tolerance) is refused with a message that
names the file and the region.
"""

from __future__ import annotations

import os
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord

from .coords import sky_to_lon
from .errors import InputFileError, SlitError
from .geometry import DiskGeometry
from .safeio import atomic_output
from .slits import Slit, SlitSet, slit_corners_sky

__all__ = ["REGION_FORMATS", "region_format", "slit_polygons", "slits_to_regions_text", "write_slit_regions",
           "read_slit_regions"]

#: File suffix -> regions-package format name.
REGION_FORMATS = {".reg": "ds9", ".ds9": "ds9", ".crtf": "crtf"}

#: Accepted mismatch between a polygon and its fitted rectangle, as a
#: fraction of the slit width (plus an absolute floor in arcsec covering the
#: coordinate precision of the file formats: 1e-6 deg in CRTF).
_REL_TOL = 1e-3
_ABS_TOL_ARCSEC = 0.01


def region_format(path: str | os.PathLike, fmt: str | None = None) -> str:
    """Regions-package format for ``path`` (``"ds9"`` or ``"crtf"``)."""
    if fmt is not None:
        if fmt not in ("ds9", "crtf"):
            raise SlitError("region format must be 'ds9' or 'crtf'",
                            keyword="format", value=fmt)
        return fmt
    suffix = Path(path).suffix.lower()
    if suffix not in REGION_FORMATS:
        raise SlitError("unknown region file type (use .reg for DS9 or "
                        ".crtf for CASA)", keyword="path", value=str(path))
    return REGION_FORMATS[suffix]


def slit_polygons(slit_set: SlitSet, geometry: DiskGeometry) -> list:
    """One ``regions.PolygonSkyRegion`` (ICRS) per slit, labelled ``slit k``."""
    from regions import PolygonSkyRegion, RegionMeta

    polygons = []
    for k, slit in enumerate(slit_set, start=1):
        corners = slit_corners_sky(slit, geometry)
        polygons.append(PolygonSkyRegion(
            SkyCoord(corners.ra, corners.dec, frame="icrs"),
            meta=RegionMeta({"text": f"slit {k}", "tag": ["gyrometer"]})))
    return polygons


def slits_to_regions_text(slit_set: SlitSet, geometry: DiskGeometry,
                          fmt: str = "ds9") -> str:
    """Region-file text of a slit set (``fmt`` = ``"ds9"`` or ``"crtf"``)."""
    from regions import Regions

    if len(slit_set) == 0:
        raise SlitError("the slit set is empty; nothing to export")
    text = Regions(slit_polygons(slit_set, geometry)).serialize(
        format=region_format("x", fmt))
    if fmt == "ds9":
        # a comment line helps a reader, and is ignored by viewers
        header = (f"# Gyrometer slits: PA = {geometry.pa_deg:.3f} deg, "
                  f"centre RA = {geometry.ra_deg:.7f} deg, "
                  f"Dec = {geometry.dec_deg:.7f} deg\n")
        text = header + text
    return text


def write_slit_regions(path: str | os.PathLike, slit_set: SlitSet,
                       geometry: DiskGeometry, *, fmt: str | None = None,
                       overwrite: bool = False) -> Path:
    """Write the slit set as a region file (format from the suffix)."""
    text = slits_to_regions_text(slit_set, geometry, region_format(path, fmt))
    with atomic_output(path, overwrite) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def _polygon_to_slit(vertices: SkyCoord, geometry: DiskGeometry,
                     label: str, path: str) -> Slit:
    n = len(vertices)
    if n != 4:
        raise SlitError(f"{label} has {n} corners; a slit has 4", path=path,
                        hint="draw slits as 4-corner polygons (rectangles)")
    east, north = geometry.center.spherical_offsets_to(vertices.icrs)
    X, Y = sky_to_lon(east.to_value(u.arcsec), north.to_value(u.arcsec),
                      geometry.pa_deg)
    x_lo, x_hi = np.min(X), np.max(X)
    y_lo, y_hi = np.min(Y), np.max(Y)
    width = y_hi - y_lo
    half_length = (x_hi - x_lo) / 2.0
    tol = max(_ABS_TOL_ARCSEC, _REL_TOL * max(width, 1e-9))
    # every corner must sit on a corner of the bounding rectangle
    on_x = np.minimum(np.abs(X - x_lo), np.abs(X - x_hi)) <= tol
    on_y = np.minimum(np.abs(Y - y_lo), np.abs(Y - y_hi)) <= tol
    # and the four corners must be the four distinct rectangle corners
    keys = {(bool(abs(x - x_lo) <= tol), bool(abs(y - y_lo) <= tol))
            for x, y in zip(X, Y)}
    if not (on_x.all() and on_y.all()) or len(keys) != 4 \
            or width <= tol or half_length <= tol:
        raise SlitError(
            f"{label} is not a rectangle parallel to the line of nodes "
            f"(PA = {geometry.pa_deg:.2f} deg)", path=path,
            hint="check that the geometry matches the one the slits were "
                 "drawn for")
    return Slit(offset_arcsec=float((y_lo + y_hi) / 2.0),
                width_arcsec=float(width),
                half_length_arcsec=float(half_length),
                x_center_arcsec=float((x_lo + x_hi) / 2.0))


def read_slit_regions(path: str | os.PathLike, geometry: DiskGeometry, *,
                      fmt: str | None = None, symmetric: bool = True
                      ) -> SlitSet:
    """Read polygons from a region file back into a :class:`SlitSet`.

    Parameters
    ----------
    path : path-like
        ``.reg`` (DS9) or ``.crtf`` (CASA) file of sky polygons.
    geometry : DiskGeometry
        Centre and position angle defining the line-of-nodes frame.
    fmt : str, optional
        Force ``"ds9"`` or ``"crtf"``.
    symmetric : bool
        The ``symmetric`` flag of the returned set.

    Raises
    ------
    InputFileError
        The file is missing or cannot be parsed.
    SlitError
        A region is not a polygon, or not a rectangle parallel to the line
        of nodes of ``geometry``.
    """
    from regions import PolygonSkyRegion, Regions

    p = Path(path)
    kind = region_format(p, fmt)
    if not p.is_file():
        raise InputFileError("region file not found", path=str(p))
    try:
        regions = Regions.read(str(p), format=kind)
    except Exception as exc:  # the parser raises many kinds
        raise InputFileError(f"cannot parse the {kind} region file ({exc})",
                             path=str(p)) from exc
    slits = []
    for k, region in enumerate(regions, start=1):
        label = f"region {k}"
        text = getattr(region, "meta", {}).get("text")
        if text:
            label += f" ('{text}')"
        if not isinstance(region, PolygonSkyRegion):
            raise SlitError(f"{label} is a {type(region).__name__}; only sky "
                            "polygons are read as slits", path=str(p),
                            hint="export slits from Gyrometer or draw "
                                 "4-corner polygons in sky coordinates")
        slits.append(_polygon_to_slit(region.vertices, geometry, label,
                                      str(p)))
    if not slits:
        raise SlitError("the region file holds no regions", path=str(p))
    return SlitSet(tuple(slits), symmetric=symmetric)
