"""Pseudo-slits parallel to the line of nodes.

A slit is a strip on the sky, parallel to the line of nodes, at offset ``Y``
from the centre, of full width ``width_arcsec`` and extending from
``x_center - half_length`` to ``x_center + half_length`` along ``X``
(line-of-nodes frame of :mod:`gyrometer.core.coords`). Slits are pure
geometry; their pixel weights are computed by :func:`slit_weights`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord

from .coords import lon_to_sky, offsets_to_pixel, pixel_scale_arcsec, pixel_to_offsets
from .errors import SlitError
from .geometry import DiskGeometry

__all__ = ["Slit", "SlitSet", "PixelFrame", "pixel_frame", "SlitWeights",
           "slit_weights", "slit_weight", "slit_corners_sky",
           "slit_corners_pixel"]


@dataclass(frozen=True)
class Slit:
    """One pseudo-slit.

    Attributes
    ----------
    offset_arcsec : float
        ``Y`` offset of the slit's centre line from the disk centre.
    width_arcsec : float
        Full width across the slit.
    half_length_arcsec : float
        Half-length along the line of nodes.
    x_center_arcsec : float
        Centre of the slit along ``X`` (0 = centred on the minor axis).
    """

    offset_arcsec: float
    width_arcsec: float
    half_length_arcsec: float
    x_center_arcsec: float = 0.0

    def __post_init__(self) -> None:
        for name in ("offset_arcsec", "width_arcsec", "half_length_arcsec",
                     "x_center_arcsec"):
            value = getattr(self, name)
            if not isinstance(value, (int, float, np.floating, np.integer)) \
                    or not np.isfinite(value):
                raise SlitError(f"slit {name} must be a finite number",
                                keyword=name, value=value)
            object.__setattr__(self, name, float(value))
        if self.width_arcsec <= 0 or self.half_length_arcsec <= 0:
            raise SlitError("slit width and half-length must be positive",
                            keyword="width_arcsec/half_length_arcsec",
                            value=(self.width_arcsec, self.half_length_arcsec))

    def with_(self, **changes) -> "Slit":
        return replace(self, **changes)


@dataclass(frozen=True)
class SlitSet:
    """An ordered set of slits.

    Attributes
    ----------
    slits : tuple of Slit
    symmetric : bool
        When True, each slit is truncated to the same extent on both sides
        of the minor axis and masked pixels are mirrored ``X -> -X`` within
        the slit, so an axisymmetric disk cancels exactly.
    """

    slits: tuple[Slit, ...]
    symmetric: bool = True

    def __post_init__(self) -> None:
        object.__setattr__(self, "slits", tuple(self.slits))
        for s in self.slits:
            if not isinstance(s, Slit):
                raise SlitError("a slit set holds Slit objects only", value=s)

    def __len__(self) -> int:
        return len(self.slits)

    def __iter__(self):
        return iter(self.slits)

    @classmethod
    def generate(cls, count: int, spacing_arcsec: float, width_arcsec: float,
                 half_length_arcsec: float, *, first_offset_arcsec: float | None = None,
                 symmetric: bool = True) -> "SlitSet":
        """``count`` slits at equal spacing, centred on the minor axis.

        The offsets run symmetrically about the centre:
        ``(k - (count - 1) / 2) * spacing`` for ``k = 0..count-1``, unless
        ``first_offset_arcsec`` is given, in which case they start there.
        """
        if int(count) < 1:
            raise SlitError("a slit set needs at least one slit",
                            keyword="count", value=count)
        if spacing_arcsec <= 0:
            raise SlitError("slit spacing must be positive",
                            keyword="spacing_arcsec", value=spacing_arcsec)
        k = np.arange(int(count), dtype=float)
        if first_offset_arcsec is None:
            offsets = (k - (count - 1) / 2.0) * spacing_arcsec
        else:
            offsets = first_offset_arcsec + k * spacing_arcsec
        return cls(tuple(Slit(float(y), width_arcsec, half_length_arcsec)
                         for y in offsets), symmetric=symmetric)

    def replaced(self, index: int, slit: Slit) -> "SlitSet":
        items = list(self.slits)
        items[index] = slit
        return replace(self, slits=tuple(items))

    def added(self, slit: Slit) -> "SlitSet":
        return replace(self, slits=self.slits + (slit,))

    def removed(self, index: int) -> "SlitSet":
        items = list(self.slits)
        del items[index]
        return replace(self, slits=tuple(items))

    @property
    def offsets_arcsec(self) -> np.ndarray:
        return np.array([s.offset_arcsec for s in self.slits])


# ---------------------------------------------------------------------------
# Pixel weights
# ---------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class PixelFrame:
    """Affine map from pixel coordinates to sky offsets from the disk centre.

    ``east = jac[0] @ (px, py) + origin[0]`` and likewise ``north`` (arcsec).
    The map is the tangent of the exact spherical offsets
    (:func:`gyrometer.core.coords.pixel_to_offsets`) at the disk centre (see
    :func:`pixel_frame`), so rotated, flipped or sheared WCS need no special
    case; this is the "locally linear WCS" of the strip geometry.

    Attributes
    ----------
    jac : numpy.ndarray, shape (2, 2)
        ``[[d east/d px, d east/d py], [d north/d px, d north/d py]]``,
        arcsec per pixel.
    origin : numpy.ndarray, shape (2,)
        ``(east, north)`` of pixel ``(0, 0)``, arcsec.
    shape : tuple of int
        ``(ny, nx)`` of the map.
    pixel_scale_arcsec : float
        Geometric-mean pixel scale (arcsec); also the width of the ``X``
        bins used for mirrored masking.
    """

    jac: np.ndarray
    origin: np.ndarray
    shape: tuple[int, int]
    pixel_scale_arcsec: float

    def shifted(self, d_east_arcsec: float, d_north_arcsec: float) -> "PixelFrame":
        """The frame of a centre moved by ``(d_east, d_north)`` arcsec."""
        return PixelFrame(self.jac, self.origin - np.array([d_east_arcsec,
                                                            d_north_arcsec]),
                          self.shape, self.pixel_scale_arcsec)

    def lon_gradients(self, pa_deg):
        """Linear ``X`` and ``Y`` of the line-of-nodes frame in pixels.

        Returns ``(gX, X0, gY, Y0)`` with ``X = gX @ (px, py) + X0``;
        ``pa_deg`` may be an array (leading axes broadcast).
        """
        pa = np.radians(np.asarray(pa_deg, dtype=float))[..., None]
        s, c = np.sin(pa), np.cos(pa)
        g_x = s * self.jac[0] + c * self.jac[1]
        g_y = c * self.jac[0] - s * self.jac[1]
        x0 = s[..., 0] * self.origin[0] + c[..., 0] * self.origin[1]
        y0 = c[..., 0] * self.origin[0] - s[..., 0] * self.origin[1]
        return g_x, x0, g_y, y0


def pixel_frame(wcs, shape: tuple[int, int], geometry: DiskGeometry) -> PixelFrame:
    """The :class:`PixelFrame` of a map of ``shape`` centred on ``geometry``.

    The affine map is the tangent of the exact pixel -> sky-offset mapping
    at the disk centre (central differences of
    :func:`~gyrometer.core.coords.pixel_to_offsets` over +-1 pixel), so the
    centre maps to (0, 0) exactly and two WCS that differ by a rotation
    about the centre give the same slit weights. The neglected curvature of
    the projection grows as the square of the distance from the centre:
    about 1e-8 relative at 30 arcsec and 3e-5 at 30 arcmin (TAN; derived).
    """
    ny, nx = (int(n) for n in shape)
    if ny < 1 or nx < 1:
        raise SlitError("the map is empty", value=shape)
    px0, py0 = offsets_to_pixel(wcs, geometry.ra_deg, geometry.dec_deg, 0.0, 0.0)
    px0, py0 = float(px0), float(py0)
    if not (np.isfinite(px0) and np.isfinite(py0)):
        raise SlitError("the disk centre cannot be placed on the map's WCS",
                        keyword="ra_deg/dec_deg", value=(geometry.ra_deg, geometry.dec_deg))
    h = 1.0
    east, north = pixel_to_offsets(wcs, geometry.ra_deg, geometry.dec_deg,
                                   np.array([px0 + h, px0 - h, px0, px0]),
                                   np.array([py0, py0, py0 + h, py0 - h]))
    jac = np.array([[(east[0] - east[1]) / (2 * h), (east[2] - east[3]) / (2 * h)],
                    [(north[0] - north[1]) / (2 * h), (north[2] - north[3]) / (2 * h)]])
    if not np.all(np.isfinite(jac)) or abs(np.linalg.det(jac)) <= 0:
        raise SlitError("the WCS maps pixels to a degenerate sky patch",
                        keyword="WCS")
    origin = -jac @ np.array([px0, py0])
    return PixelFrame(jac, origin, (ny, nx), pixel_scale_arcsec(wcs))


@dataclass(frozen=True, eq=False)
class SlitWeights:
    """Pixels of one slit and their exact fractional overlap with the strip.

    Attributes
    ----------
    flat_index : numpy.ndarray of int64
        Flat (row-major) index of each pixel in the ``(ny, nx)`` map; ``-1``
        for pixels beyond the map edge (kept so that truncation is known).
    weight : numpy.ndarray
        Area of the pixel inside the strip, as a fraction of the pixel
        (0 < weight <= 1).
    x_arcsec, y_arcsec : numpy.ndarray
        Line-of-nodes coordinates of the pixel centres.
    area_pix : float
        Area of the whole strip in pixels.
    inside_area_pix : float
        Area of the strip that falls on the map (sum of weights of the
        pixels with ``flat_index >= 0``).
    clipped_by_edge : bool
        True when the map edge cuts the strip.
    pixel_scale_arcsec : float
        Pixel scale of the map (width of the mirroring bins along ``X``).
    """

    flat_index: np.ndarray
    weight: np.ndarray
    x_arcsec: np.ndarray
    y_arcsec: np.ndarray
    area_pix: float
    inside_area_pix: float
    clipped_by_edge: bool
    pixel_scale_arcsec: float

    @property
    def n_pixels(self) -> int:
        return int(np.count_nonzero(self.flat_index >= 0))


def _cdf_box_sum(t, a, b):
    """CDF at ``t`` of ``U(-a/2, a/2) + U(-b/2, b/2)`` with ``a >= b >= 0``.

    This is the fraction of a unit pixel on which a linear function with
    gradient components of sizes ``a`` and ``b`` lies below its centre value
    plus ``t`` (a trapezoidal density; derived).
    """
    u_ = t + 0.5 * (a + b)
    # b may be subnormal (a strip edge parallel to a pixel axis to within
    # 1e-300): the unused branches then overflow; np.select picks the right one
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ab2 = 2.0 * a * b
        r1 = u_ * u_ / ab2
        r2 = (u_ - 0.5 * b) / a
        r3 = 1.0 - (a + b - u_) ** 2 / ab2
    return np.select([u_ <= 0.0, u_ < b, u_ < a, u_ < a + b],
                     [0.0, r1, r2, r3], 1.0)


def _slab_fraction(center, lo, hi, g0, g1):
    """Fraction of a unit pixel where ``lo <= f <= hi`` for a linear ``f``.

    ``center`` is ``f`` at the pixel centre and ``(g0, g1)`` its gradient
    per pixel. Exact (closed form): ``CDF(hi - c) - CDF(lo - c)`` of the
    trapezoidal distribution, evaluated only where an edge crosses the
    pixel (``|edge - c| < (|g0| + |g1|) / 2``).
    """
    a = np.maximum(np.abs(g0), np.abs(g1))
    b = np.minimum(np.abs(g0), np.abs(g1))
    pad = 0.5 * (a + b)
    t_hi = hi - center
    t_lo = lo - center
    out = (t_hi > -pad).astype(float)          # 1 unless entirely above hi
    out[t_lo >= pad] = 0.0                      # entirely below lo
    k = np.flatnonzero((np.abs(t_hi) < pad) & (t_lo < pad))
    if k.size:
        out[k] = _cdf_box_sum(t_hi[k], a[k], b[k])
    k = np.flatnonzero((np.abs(t_lo) < pad) & (t_hi > -pad))
    if k.size:
        out[k] -= _cdf_box_sum(t_lo[k], a[k], b[k])
    return np.clip(out, 0.0, 1.0)


def _clip_square_area(px, py, planes):
    """Exact area of unit pixels cut by half-planes (Sutherland-Hodgman).

    Parameters
    ----------
    px, py : numpy.ndarray, shape (N,)
        Pixel centres.
    planes : numpy.ndarray, shape (N, K, 3)
        Half-planes ``a x + b y + c >= 0``.

    Notes
    -----
    Vectorised Sutherland & Hodgman (1974, Commun. ACM 17, 32) clipping of
    all squares at once; each clip adds at most one vertex to a convex
    polygon. Area by the shoelace formula.
    """
    n_poly = px.size
    poly = np.empty((n_poly, 4, 2))
    poly[:, :, 0] = px[:, None] + np.array([-0.5, 0.5, 0.5, -0.5])
    poly[:, :, 1] = py[:, None] + np.array([-0.5, -0.5, 0.5, 0.5])
    count = np.full(n_poly, 4)
    rows = np.arange(n_poly)[:, None]
    for k in range(planes.shape[1]):
        m = poly.shape[1]
        j = np.arange(m)[None, :]
        live = j < count[:, None]
        nxt = np.where(j + 1 < count[:, None], j + 1, 0)
        a, b, c = (planes[:, k, q][:, None] for q in range(3))
        d = a * poly[:, :, 0] + b * poly[:, :, 1] + c
        d_next = d[rows, nxt]
        p_next = poly[rows, nxt]
        inside = d >= 0.0
        crosses = inside != (d_next >= 0.0)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            t = np.where(crosses, d / (d - d_next), 0.0)
        inter = poly + t[..., None] * (p_next - poly)
        cand = np.stack([poly, inter], axis=2).reshape(n_poly, 2 * m, 2)
        keep = np.stack([inside & live, crosses & live], axis=2).reshape(n_poly, 2 * m)
        order = np.argsort(~keep, axis=1, kind="stable")[:, :m + 1]
        poly = cand[rows, order]
        count = keep.sum(axis=1)
    m = poly.shape[1]
    j = np.arange(m)[None, :]
    nxt = np.where(j + 1 < count[:, None], j + 1, 0)
    live = j < count[:, None]
    x, y = poly[:, :, 0], poly[:, :, 1]
    cross = x * y[rows, nxt] - x[rows, nxt] * y
    return 0.5 * np.abs(np.where(live, cross, 0.0).sum(axis=1))


def _column_interval(grad, off, lo, hi, j, pad_sign):
    """Columns ``i`` of pixel row ``j`` where ``lo - p <= f <= hi + p``.

    ``f = g0 i + g1 j + off`` is linear; ``p = pad_sign (|g0| + |g1|) / 2``
    (``pad_sign = +1``: the pixel square touches the slab; ``-1``: it lies
    entirely inside). Returns real bounds ``(a, b)``, possibly empty.
    """
    g0, g1 = grad[:, 0], grad[:, 1]
    pad = pad_sign * 0.5 * (np.abs(g0) + np.abs(g1))
    base = g1 * j + off
    lo_v, hi_v = lo - pad - base, hi + pad - base
    flat_g = np.abs(g0) < 1e-12 * (np.abs(g1) + 1e-300)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ta, tb = lo_v / g0, hi_v / g0
    ok_flat = (lo_v <= 0) & (hi_v >= 0)
    a = np.where(flat_g, np.where(ok_flat, -np.inf, np.inf), np.minimum(ta, tb))
    b = np.where(flat_g, np.where(ok_flat, np.inf, -np.inf), np.maximum(ta, tb))
    empty = lo_v > hi_v                      # slab thinner than a pixel's reach
    return np.where(empty, np.inf, a), np.where(empty, -np.inf, b)


def _expand_runs(first, count):
    """Concatenate integer runs ``first[r] .. first[r] + count[r] - 1``.

    Returns the run index of every element and the element values.
    """
    run = np.repeat(np.arange(first.size), count)
    start = np.cumsum(count) - count
    return run, first[run] + (np.arange(run.size) - start[run])


def _strip_pixels(g_x, x0, g_y, y0, x_lo, x_hi, y_lo, y_hi, shape):
    """Pixels overlapping strips ``x_lo <= X <= x_hi``, ``y_lo <= Y <= y_hi``.

    All arguments are per strip (leading axis ``n``): ``g_x, g_y`` of shape
    ``(n, 2)`` (gradients of ``X`` and ``Y`` per pixel), the rest ``(n,)``.
    Pixels beyond the map by up to two pixels are returned too (their
    flat index is ``-1``), so that a strip cut by the edge can be detected.

    Returns
    -------
    strip, flat, weight, x, y : numpy.ndarray
        One entry per (strip, pixel) with a positive overlap; ``weight``
        is the exact area fraction: 1 for pixels entirely inside (found per
        pixel row from the strip's edges, without a per-pixel test), closed
        form where only one pair of strip edges crosses the pixel, polygon
        clipping where both do.
    """
    ny, nx = shape
    n = g_x.shape[0]
    if n == 0:
        e = np.empty(0)
        return e.astype(np.int64), e.astype(np.int64), e, e, e
    # Rows spanned by each strip (corners in pixel space: p = M^-1 (lon - lon0)).
    mat = np.stack([g_x, g_y], axis=1)                      # (n, 2, 2)
    inv = np.linalg.inv(mat)
    cx = np.stack([x_lo, x_hi, x_hi, x_lo], axis=1) - x0[:, None]
    cy = np.stack([y_lo, y_lo, y_hi, y_hi], axis=1) - y0[:, None]
    corner_py = inv[:, 1, 0, None] * cx + inv[:, 1, 1, None] * cy
    j_lo = np.clip(np.floor(corner_py.min(axis=1) - 1.0), -2, ny + 1).astype(np.int64)
    j_hi = np.clip(np.ceil(corner_py.max(axis=1) + 1.0), -2, ny + 1).astype(np.int64)
    strip_r, j = _expand_runs(j_lo, np.maximum(j_hi - j_lo + 1, 0))
    fj_r = j.astype(float)
    gxr, gyr = g_x[strip_r], g_y[strip_r]
    x0r, y0r = x0[strip_r], y0[strip_r]
    xlo, xhi, ylo, yhi = x_lo[strip_r], x_hi[strip_r], y_lo[strip_r], y_hi[strip_r]
    # Candidate columns (pixel touches both slabs) and interior columns
    # (pixel entirely inside both) of every (strip, row).
    ca, cb = _column_interval(gxr, x0r, xlo, xhi, fj_r, 1.0)
    da, db = _column_interval(gyr, y0r, ylo, yhi, fj_r, 1.0)
    c_first = np.ceil(np.clip(np.maximum(ca, da), -3.0, nx + 2.0)).astype(np.int64)
    c_last = np.floor(np.clip(np.minimum(cb, db), -3.0, nx + 2.0)).astype(np.int64)
    c_last = np.minimum(c_last, nx + 1)
    c_first = np.maximum(c_first, -2)
    ia, ib = _column_interval(gxr, x0r, xlo, xhi, fj_r, -1.0)
    ka, kb = _column_interval(gyr, y0r, ylo, yhi, fj_r, -1.0)
    i_first = np.ceil(np.clip(np.maximum(ia, ka), -3.0, nx + 2.0)).astype(np.int64)
    i_last = np.floor(np.clip(np.minimum(ib, kb), -3.0, nx + 2.0)).astype(np.int64)
    i_first = np.maximum(i_first, c_first)
    i_last = np.minimum(i_last, c_last)
    has_int = i_last >= i_first
    # Boundary runs: candidate columns left and right of the interior run.
    left_last = np.where(has_int, i_first - 1, c_last)
    right_first = np.where(has_int, i_last + 1, c_last + 1)
    n_left = np.maximum(left_last - c_first + 1, 0)
    n_right = np.maximum(c_last - right_first + 1, 0)
    n_int = np.where(has_int, i_last - i_first + 1, 0)
    firsts = np.concatenate([c_first, right_first, i_first])
    counts = np.concatenate([n_left, n_right, n_int])
    run, i = _expand_runs(firsts, counts)
    n_r = strip_r.size
    interior = run >= 2 * n_r
    run = run % n_r
    strip = strip_r[run]
    jj = j[run]
    fi = i.astype(float)
    x = gxr[:, 0][run] * fi + (gxr[:, 1] * fj_r + x0r)[run]
    y = gyr[:, 0][run] * fi + (gyr[:, 1] * fj_r + y0r)[run]
    weight = np.ones(i.size)
    bnd = np.flatnonzero(~interior)
    if bnd.size:
        rb = run[bnd]
        f_x = np.ones(bnd.size)
        f_y = np.ones(bnd.size)
        for frac, coord, grad, lo_a, hi_a in ((f_x, x, gxr, xlo, xhi),
                                              (f_y, y, gyr, ylo, yhi)):
            g0, g1 = grad[rb, 0], grad[rb, 1]
            pad = 0.5 * (np.abs(g0) + np.abs(g1))
            c = coord[bnd]
            near = np.flatnonzero((c - lo_a[rb] < pad) | (hi_a[rb] - c < pad))
            frac[near] = _slab_fraction(c[near], lo_a[rb][near], hi_a[rb][near],
                                        g0[near], g1[near])
        wb = f_x * f_y
        both = (f_x > 0) & (f_x < 1) & (f_y > 0) & (f_y < 1)
        if np.any(both):
            k = np.flatnonzero(both)
            s = strip[bnd[k]]
            planes = np.empty((k.size, 4, 3))
            for q, (grad, off, bound, sign) in enumerate((
                    (g_x, x0, x_lo, 1.0), (g_x, x0, x_hi, -1.0),
                    (g_y, y0, y_lo, 1.0), (g_y, y0, y_hi, -1.0))):
                planes[:, q, 0] = sign * grad[s, 0]
                planes[:, q, 1] = sign * grad[s, 1]
                planes[:, q, 2] = sign * (off[s] - bound[s])
            wb[k] = _clip_square_area(fi[bnd[k]], jj[bnd[k]].astype(float), planes)
        weight[bnd] = wb
    keep = weight > 1e-12
    inside = (i >= 0) & (i < nx) & (jj >= 0) & (jj < ny)
    flat = np.where(inside, jj * nx + i, -1)
    return strip[keep], flat[keep], weight[keep], x[keep], y[keep]


def _strip_bounds(slit: Slit, x_limit: float):
    """``X`` and ``Y`` bounds of a slit, ``X`` limited to ``|X| <= x_limit``."""
    x_lo = max(slit.x_center_arcsec - slit.half_length_arcsec, -x_limit)
    x_hi = min(slit.x_center_arcsec + slit.half_length_arcsec, x_limit)
    half_w = 0.5 * slit.width_arcsec
    return x_lo, x_hi, slit.offset_arcsec - half_w, slit.offset_arcsec + half_w


def _x_limit(frame: PixelFrame, g_x, x0) -> float:
    """Largest ``|X|`` reached by the map (corners), plus two pixels."""
    ny, nx = frame.shape
    corners = np.array([[-0.5, -0.5], [nx - 0.5, -0.5], [nx - 0.5, ny - 0.5],
                        [-0.5, ny - 0.5]])
    return float(np.max(np.abs(corners @ g_x + x0))) + 2.0 * frame.pixel_scale_arcsec


def _weights_from_frame(slits, geometry: DiskGeometry, frame: PixelFrame):
    g_x, x0, g_y, y0 = frame.lon_gradients(geometry.pa_deg)
    x_limit = _x_limit(frame, g_x, x0)
    n = len(slits)
    bounds = np.array([_strip_bounds(s, x_limit) for s in slits]).reshape(n, 4)
    # A slit entirely beyond the map along X keeps an empty pixel list.
    live = bounds[:, 0] < bounds[:, 1]
    idx = np.flatnonzero(live)
    strip, flat, weight, x, y = _strip_pixels(
        np.repeat(g_x[None], idx.size, 0), np.full(idx.size, x0),
        np.repeat(g_y[None], idx.size, 0), np.full(idx.size, y0),
        bounds[idx, 0], bounds[idx, 1], bounds[idx, 2], bounds[idx, 3],
        frame.shape)
    pix_area = abs(np.linalg.det(frame.jac))        # arcsec^2 per pixel
    order = np.argsort(strip, kind="stable")
    strip, flat, weight, x, y = (a[order] for a in (strip, flat, weight, x, y))
    edges = np.searchsorted(strip, np.arange(idx.size + 1))
    out = []
    pos = {k: q for q, k in enumerate(idx)}
    for k, slit in enumerate(slits):
        area = 2.0 * slit.half_length_arcsec * slit.width_arcsec / pix_area
        if k in pos:
            sl = slice(edges[pos[k]], edges[pos[k] + 1])
            f, w = flat[sl], weight[sl]
            xs, ys = x[sl], y[sl]
        else:
            f = np.empty(0, np.int64)
            w = xs = ys = np.empty(0)
        inside = float(w[f >= 0].sum())
        out.append(SlitWeights(f, w, xs, ys, area, inside,
                               bool(inside < area * (1.0 - 1e-9)),
                               frame.pixel_scale_arcsec))
    return tuple(out)


def slit_weights(slits: SlitSet | Sequence[Slit], geometry: DiskGeometry, wcs,
                 shape: tuple[int, int], *,
                 frame: PixelFrame | None = None) -> tuple[SlitWeights, ...]:
    """Exact pixel weights of every slit of a set.

    Parameters
    ----------
    slits : SlitSet or sequence of Slit
    geometry : DiskGeometry
        Centre and position angle define the line-of-nodes frame.
    wcs : astropy.wcs.WCS
        Celestial WCS of the map (any rotation, flip or shear).
    shape : tuple of int
        ``(ny, nx)`` of the map.
    frame : PixelFrame, optional
        A cached :func:`pixel_frame` for this WCS, shape and centre.

    Returns
    -------
    tuple of SlitWeights
        One per slit, in order.

    Notes
    -----
    The weight of a pixel is the exact area of the unit pixel square inside
    the strip (a parallelogram in pixel space). Where only one pair of
    parallel strip edges crosses the pixel, the area follows in closed form
    from the trapezoidal distribution of a linear function over a square;
    where both pairs cross it (the four corners), the pixel is clipped
    against the strip's four half-planes (Sutherland & Hodgman 1974).
    """
    items = tuple(slits)
    if frame is None:
        frame = pixel_frame(wcs, shape, geometry)
    return _weights_from_frame(items, geometry, frame)


def slit_weight(slit: Slit, geometry: DiskGeometry, wcs, shape: tuple[int, int], *,
                frame: PixelFrame | None = None) -> SlitWeights:
    """Weights of a single slit (for live dragging); see :func:`slit_weights`."""
    return slit_weights((slit,), geometry, wcs, shape, frame=frame)[0]


def _corner_offsets(slit: Slit):
    x_lo = slit.x_center_arcsec - slit.half_length_arcsec
    x_hi = slit.x_center_arcsec + slit.half_length_arcsec
    y_lo = slit.offset_arcsec - 0.5 * slit.width_arcsec
    y_hi = slit.offset_arcsec + 0.5 * slit.width_arcsec
    return np.array([x_lo, x_hi, x_hi, x_lo]), np.array([y_lo, y_lo, y_hi, y_hi])


def slit_corners_sky(slit: Slit, geometry: DiskGeometry) -> SkyCoord:
    """The four corners of a slit on the sky (ICRS), in drawing order.

    Offsets are applied with :meth:`SkyCoord.spherical_offsets_by`, the
    inverse of the offsets used for the pixel grid, so a polygon region
    written from these corners matches the weights.
    """
    x, y = _corner_offsets(slit)
    east, north = lon_to_sky(x, y, geometry.pa_deg)
    return geometry.center.spherical_offsets_by(east * u.arcsec, north * u.arcsec)


def slit_corners_pixel(slit: Slit, geometry: DiskGeometry, wcs):
    """The four corners of a slit in 0-based pixel coordinates ``(px, py)``."""
    x, y = _corner_offsets(slit)
    east, north = lon_to_sky(x, y, geometry.pa_deg)
    return offsets_to_pixel(wcs, geometry.ra_deg, geometry.dec_deg, east, north)
