"""Resampling a separate image onto a map's pixel grid.

The centre of every target pixel is taken to the sky with the target WCS
and back to a (fractional) pixel of the source image with the source WCS
(through :class:`~astropy.coordinates.SkyCoord`, so the two may use
different projections, rotations, flips or celestial frames). The source is
interpolated there bilinearly (:func:`scipy.ndimage.map_coordinates`,
``order=1``; any NaN among the four neighbours gives NaN, and points off the
source image are NaN; the outer half of each edge pixel takes the edge
value).

Surface brightness (per unit solid angle) needs no rescaling. For images in
flux *per pixel*, ``conserve_flux=True`` multiplies by the ratio of target to
source pixel area (local Jacobian of the pixel-to-pixel mapping), which
conserves the total flux to the accuracy of the interpolation when the
target pixels are not much coarser than the source pixels. (It is not an
exact area-weighted drizzle: when shrinking by a large factor, smooth the
source first.)
"""

from __future__ import annotations

import numpy as np
from astropy.wcs import WCS
from scipy import ndimage

from .errors import HeaderError

__all__ = ["regrid_image"]


def _check_wcs(wcs: WCS, which: str) -> None:
    try:
        det = float(np.linalg.det(wcs.celestial.pixel_scale_matrix))
    except Exception as exc:
        raise HeaderError(f"the {which} WCS is not a usable celestial WCS "
                          f"({exc})", keyword="CTYPE/CDELT/PC") from exc
    if not np.isfinite(det) or det == 0.0:
        raise HeaderError(f"cannot map between the two WCS: the {which} WCS "
                          "matrix is singular", keyword="CDELT/CD/PC")


def _target_to_source(image_wcs: WCS, target_wcs: WCS, x: np.ndarray,
                      y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    try:
        sky = target_wcs.celestial.pixel_to_world(x, y)
        sx, sy = image_wcs.celestial.world_to_pixel(sky)
    except Exception as exc:
        raise HeaderError(f"cannot map between the two WCS ({exc})",
                          keyword="CTYPE/CRVAL") from exc
    return np.asarray(sx, dtype=float), np.asarray(sy, dtype=float)


def regrid_image(image: np.ndarray, image_wcs: WCS, target_wcs: WCS,
                 target_shape: tuple[int, int], *,
                 conserve_flux: bool = False) -> np.ndarray:
    """Resample ``image`` onto the grid of ``target_wcs``/``target_shape``.

    Parameters
    ----------
    image : numpy.ndarray
        Source image, shape ``(ny, nx)``.
    image_wcs, target_wcs : astropy.wcs.WCS
        Celestial WCS of the source and of the target grid.
    target_shape : tuple of int
        ``(ny, nx)`` of the target.
    conserve_flux : bool
        Scale by the target/source pixel-area ratio (for flux-per-pixel
        images); False for surface brightness.

    Returns
    -------
    numpy.ndarray
        float64, shape ``target_shape``; NaN off the source image.
    """
    _check_wcs(image_wcs, "image")
    _check_wcs(target_wcs, "target")
    image = np.asarray(image, dtype=float)
    ny, nx = (int(n) for n in target_shape)
    y, x = np.mgrid[0:ny, 0:nx].astype(float)
    sx, sy = _target_to_source(image_wcs, target_wcs, x, y)
    # 'nearest' holds the edge pixels' values out to their outer edges;
    # beyond the outer edge of the source image the result is NaN
    out = ndimage.map_coordinates(image, [sy, sx], order=1, mode="nearest",
                                  prefilter=False)
    off = (sx < -0.5) | (sy < -0.5) | (sx > image.shape[1] - 0.5) | (
        sy > image.shape[0] - 0.5)
    out[off] = np.nan
    if conserve_flux:
        out *= _area_ratio(image_wcs, target_wcs, x, y, sx, sy)
    return out


def _area_ratio(image_wcs: WCS, target_wcs: WCS, x: np.ndarray,
                y: np.ndarray, sx: np.ndarray, sy: np.ndarray) -> np.ndarray:
    """|det d(source pixel)/d(target pixel)|: source pixels per target pixel."""
    step = 0.5
    sx_x, sy_x = _target_to_source(image_wcs, target_wcs, x + step, y)
    sx_y, sy_y = _target_to_source(image_wcs, target_wcs, x, y + step)
    det = ((sx_x - sx) * (sy_y - sy) - (sx_y - sx) * (sy_x - sy)) / step ** 2
    return np.abs(det)
