"""Tremaine-Weinberg integrals per slit and the pattern-speed fit.

For each slit (Tremaine & Weinberg 1984, ApJ 282, L5)::

    <X> = sum w S X / sum w S,    <V> = sum w S (V - Vsys) / sum w S

over the slit's pixels with exact overlap weights ``w``. The pattern speed
follows from the slope of ``<V>`` against ``<X>`` across slits (Merrifield
& Kuijken 1995, MNRAS 274, 933): ``<V> = Omega_p sin i <X> + c``, fitted
with the York et al. (2004) regression (:mod:`gyrometer.core.yorkfit`).

Masking and truncation work on bins of one pixel scale along ``X``,
centred on the minor axis (bin ``k`` covers ``|X - k dX| <= dX / 2``). In
symmetric mode a bin is used only when it and its mirror bin ``-k`` hold
no masked pixel and no pixel beyond the map edge, so an axisymmetric disk
(``S`` even and ``V - Vsys`` odd in ``X``) still cancels (derived; see
DEVELOPERS.md). Without symmetry every valid pixel is used.

Errors are propagated linearly from the error maps (or the cube's
variance), with the covariance of ``<X>`` and ``<V>``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .dataset import Cube, MapSet
from .errors import DataContentError, FitError, SlitError
from .geometry import DiskGeometry
from .progress import CancelFlag, ProgressCallback, check_cancel, report
from .results import LineFit, SlitIntegrals, TWMeasurement
from .slits import PixelFrame, Slit, SlitSet, SlitWeights, pixel_frame, slit_weights
from .yorkfit import york_fit

__all__ = [
    "slit_integrals_maps",
    "slit_integrals_cube",
    "fit_pattern_speed",
    "measure",
    "LiveMeasurer",
    "PreparedSlits",
    "prepare_slits",
    "OLS_METHOD",
]

#: Method string of the fallback fit used when no errors are available.
OLS_METHOD = ("ordinary least squares of <V> on <X> (no error maps; errors "
              "from the scatter)")

# Order of the per-row sums: B = sum wS, A = sum wSX, C = sum wS(V-Vsys),
# the (co)variances of B, A, C, then the valid-pixel count and weight.
_B, _A, _C, _VBB, _VAA, _VCC, _VAB, _VAC, _VBC, _NPIX, _WSUM = range(11)
_NSUMS = 11


@dataclass(frozen=True, eq=False)
class _Layout:
    """Pixels of all slits, grouped in rows = (slit, X bin)."""

    row: np.ndarray          # per entry
    flat: np.ndarray         # per entry, -1 beyond the map
    weight: np.ndarray       # per entry
    x_arcsec: np.ndarray     # per entry
    row_slit: np.ndarray     # per row
    row_mirror: np.ndarray   # per row
    row_absx: np.ndarray     # per row: |k| dX (bin centre)
    row_has: np.ndarray      # per row: any pixel of the strip (incl. beyond edge)
    row_outside: np.ndarray  # per row: weight beyond the map edge > 0
    row_start: np.ndarray    # per slit: first row
    area_pix: np.ndarray     # per slit
    dx_arcsec: float
    n_slits: int
    flat_safe: np.ndarray = None     # per entry: max(flat, 0)
    outside_idx: np.ndarray = None   # entries beyond the map edge


@dataclass(frozen=True, eq=False)
class _SlitRows:
    """Row sums of one slit (cached by :class:`LiveMeasurer`)."""

    sums: np.ndarray          # (11, n_rows)
    bad: np.ndarray
    row_has: np.ndarray
    row_outside: np.ndarray
    row_absx: np.ndarray
    area_pix: float
    dx_arcsec: float


def _slit_rows(weight: SlitWeights, maps: MapSet, vsys_kms: float) -> _SlitRows:
    layout = _layout((weight,))
    terms, valid = _pixel_terms_maps(layout, maps, vsys_kms)
    return _SlitRows(_row_sums(layout, terms, valid), _row_bad(layout, valid),
                     layout.row_has, layout.row_outside, layout.row_absx,
                     float(layout.area_pix[0]), layout.dx_arcsec)


def _combine_rows(parts: Sequence[_SlitRows]):
    """A row structure (for :func:`_reduce`) and sums from per-slit parts."""
    sizes = np.array([p.row_has.size for p in parts])
    start = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    mirror = np.concatenate([st + np.arange(n)[::-1] for st, n in zip(start, sizes)])
    empty = np.empty(0)
    rows = _Layout(empty.astype(np.int64), empty.astype(np.int64), empty, empty,
                   np.repeat(np.arange(len(parts)), sizes), mirror,
                   np.concatenate([p.row_absx for p in parts]),
                   np.concatenate([p.row_has for p in parts]),
                   np.concatenate([p.row_outside for p in parts]), start,
                   np.array([p.area_pix for p in parts]), parts[0].dx_arcsec, len(parts))
    return (rows, np.concatenate([p.sums for p in parts], axis=1),
            np.concatenate([p.bad for p in parts]))


def _layout(weights: Sequence[SlitWeights]) -> _Layout:
    n = len(weights)
    if n == 0:
        raise SlitError("the slit set is empty", hint="add at least one slit")
    dx = weights[0].pixel_scale_arcsec
    k_max = [int(math.ceil(np.max(np.abs(w.x_arcsec), initial=0.0) / dx + 0.5)) + 1
             for w in weights]
    n_rows = np.array([2 * k + 1 for k in k_max])
    row_start = np.concatenate([[0], np.cumsum(n_rows)[:-1]])
    rows, row_slit, row_mirror, row_absx = [], [], [], []
    for s, (w, k) in enumerate(zip(weights, k_max)):
        kk = np.rint(w.x_arcsec / dx).astype(np.int64)
        rows.append(row_start[s] + k + kk)
        local = np.arange(-k, k + 1)
        row_slit.append(np.full(local.size, s))
        row_mirror.append(row_start[s] + k - local)
        row_absx.append(np.abs(local) * dx)
    row = np.concatenate(rows)
    flat = np.concatenate([w.flat_index for w in weights])
    weight = np.concatenate([w.weight for w in weights])
    total = int(n_rows.sum())
    row_has = np.bincount(row, weights=weight, minlength=total) > 0
    row_outside = np.bincount(row, weights=weight * (flat < 0), minlength=total) > 0
    return _Layout(row, flat, weight, np.concatenate([w.x_arcsec for w in weights]),
                   np.concatenate(row_slit), np.concatenate(row_mirror),
                   np.concatenate(row_absx), row_has, row_outside, row_start,
                   np.array([w.area_pix for w in weights]), dx, n,
                   np.maximum(flat, 0), np.flatnonzero(flat < 0))


@dataclass(frozen=True, eq=False)
class PreparedSlits:
    """Slit weights arranged for repeated integration (see :func:`prepare_slits`).

    Attributes
    ----------
    weights : tuple of SlitWeights
    """

    weights: tuple[SlitWeights, ...]
    _layout: _Layout

    def __len__(self) -> int:
        return len(self.weights)


def prepare_slits(weights: Sequence[SlitWeights]) -> PreparedSlits:
    """Group the weighted pixels of all slits by ``X`` bin once, so that
    :func:`slit_integrals_maps` can be called repeatedly on new data (or in
    a loop) without redoing it."""
    weights = tuple(weights)
    return PreparedSlits(weights, _layout(weights))


def _gather(array, layout: _Layout):
    """``array.ravel()[flat]`` with NaN beyond the map edge."""
    if array is None:
        return None
    values = np.asarray(array, dtype=float).ravel().take(layout.flat_safe)
    values[layout.outside_idx] = np.nan
    return values


def _pixel_terms_maps(layout: _Layout, maps: MapSet, vsys_kms: float):
    """Per-entry integrands: S, S V', var S, var(S V'), cov(S, S V'), valid."""
    s = _gather(maps.intensity, layout)
    v = _gather(maps.velocity_kms, layout)
    v -= vsys_kms
    have_err = maps.intensity_err is not None and maps.velocity_err_kms is not None
    if have_err:
        es = _gather(maps.intensity_err, layout)
        ev = _gather(maps.velocity_err_kms, layout)
        valid = np.isfinite(s + v + es + ev)
    else:
        valid = np.isfinite(s + v)
    bad = ~valid
    s[bad] = 0.0
    v[bad] = 0.0
    if have_err:
        es[bad] = 0.0
        ev[bad] = 0.0
        vs = es * es
        vv = ev * ev
        sv = s * v
        terms = (s, sv, vs, vs * v * v + s * s * vv, vs * v)
    else:
        nan = np.full(s.shape, np.nan)
        terms = (s, s * v, nan, nan, nan)
    return terms, valid


def _row_sums(layout: _Layout, terms, valid) -> np.ndarray:
    """The 11 per-row sums from per-entry integrands (see ``_B`` ...)."""
    s, sv, var_s, var_sv, cov_s_sv = terms
    w = layout.weight * valid
    x = layout.x_arcsec
    n_rows = layout.row_slit.size
    out = np.empty((_NSUMS, n_rows))
    ws = w * s
    w2 = w * w
    wv = w2 * var_s
    wc = w2 * cov_s_sv
    wvx = wv * x
    for q, values in ((_B, ws), (_A, ws * x), (_C, w * sv), (_VBB, wv),
                      (_VAA, wvx * x), (_VCC, w2 * var_sv), (_VAB, wvx),
                      (_VAC, wc * x), (_VBC, wc), (_NPIX, valid.astype(float)),
                      (_WSUM, w)):
        out[q] = np.bincount(layout.row, weights=values, minlength=n_rows)
    return out


def _row_bad(layout: _Layout, valid) -> np.ndarray:
    """Rows holding a masked pixel or a pixel beyond the map edge."""
    n_rows = layout.row_slit.size
    masked = np.bincount(layout.row, weights=layout.weight * ~valid, minlength=n_rows)
    return (masked > 0) | layout.row_outside


def _used_rows(layout: _Layout, bad: np.ndarray, symmetric: bool) -> np.ndarray:
    if not symmetric:
        return layout.row_has.copy()
    ok = layout.row_has & ~bad
    return ok & ok[layout.row_mirror]


def _reduce(layout: _Layout, sums: np.ndarray, bad: np.ndarray, symmetric: bool,
            offsets: np.ndarray, half_lengths: np.ndarray) -> SlitIntegrals:
    """Slit integrals from row sums (shared by the map and cube routes)."""
    use = _used_rows(layout, bad, symmetric)
    slit_sums = np.add.reduceat(sums * use, layout.row_start, axis=1)
    b, a, c = slit_sums[_B], slit_sums[_A], slit_sums[_C]
    with np.errstate(divide="ignore", invalid="ignore"):
        ok = b > 0
        x_mean = np.where(ok, a / b, np.nan)
        v_mean = np.where(ok, c / b, np.nan)
        b2 = b * b
        var_x = (slit_sums[_VAA] - 2 * x_mean * slit_sums[_VAB]
                 + x_mean ** 2 * slit_sums[_VBB]) / b2
        var_v = (slit_sums[_VCC] - 2 * v_mean * slit_sums[_VBC]
                 + v_mean ** 2 * slit_sums[_VBB]) / b2
        cov = (slit_sums[_VAC] - x_mean * slit_sums[_VBC] - v_mean * slit_sums[_VAB]
               + x_mean * v_mean * slit_sums[_VBB]) / b2
        x_err = np.sqrt(np.maximum(var_x, 0.0))
        v_err = np.sqrt(np.maximum(var_v, 0.0))
        corr = np.clip(cov / (x_err * v_err), -1.0, 1.0)
    corr = np.where(np.isfinite(corr), corr, 0.0)
    # Truncation: a strip row dropped (symmetric) or a masked/outside pixel.
    dropped = layout.row_has & ~use if symmetric else layout.row_has & bad
    truncated = np.add.reduceat(dropped.astype(int), layout.row_start) > 0
    used_absx = np.where(use & layout.row_has, layout.row_absx + 0.5 * layout.dx_arcsec, 0.0)
    reach = np.maximum.reduceat(used_absx, layout.row_start)
    half_used = np.where(truncated, np.minimum(reach, half_lengths), half_lengths)
    coverage = np.clip(slit_sums[_WSUM] / layout.area_pix, 0.0, 1.0)
    return SlitIntegrals(
        offset_arcsec=np.asarray(offsets, dtype=float),
        x_mean_arcsec=x_mean, x_err_arcsec=x_err,
        v_mean_kms=v_mean, v_err_kms=v_err, xv_corr=corr,
        flux=b, flux_err=np.sqrt(np.maximum(slit_sums[_VBB], 0.0)),
        n_pixels=slit_sums[_NPIX].astype(int), coverage=coverage,
        truncated=truncated, half_length_used_arcsec=half_used)


def _slit_meta(slits):
    items = tuple(slits)
    offsets = np.array([s.offset_arcsec for s in items])
    halves = np.array([s.half_length_arcsec for s in items])
    return items, offsets, halves


def _check_weights(weights, shape):
    weights = tuple(weights)
    if not weights:
        raise SlitError("the slit set is empty", hint="add at least one slit")
    n_pix = shape[0] * shape[1]
    for w in weights:
        if w.flat_index.size and w.flat_index.max() >= n_pix:
            raise SlitError("slit weights were computed for a larger map",
                            hint="recompute the weights for this data set")
    return weights


def slit_integrals_maps(maps: MapSet, geometry: DiskGeometry,
                        weights: Sequence[SlitWeights] | PreparedSlits, *,
                        symmetric: bool = True,
                        offsets_arcsec=None, half_lengths_arcsec=None) -> SlitIntegrals:
    """Tremaine-Weinberg integrals of every slit from intensity and velocity maps.

    Parameters
    ----------
    maps : MapSet
        Intensity ``S`` (any linear unit), velocity ``V`` (km/s) and,
        optionally, their 1-sigma error maps.
    geometry : DiskGeometry
        ``vsys_kms`` is subtracted from ``V``.
    weights : sequence of SlitWeights or PreparedSlits
        From :func:`gyrometer.core.slits.slit_weights` for this map
        (optionally through :func:`prepare_slits`).
    symmetric : bool
        Truncate each slit symmetrically about the minor axis and mirror
        masked pixels ``X -> -X`` (see module notes).
    offsets_arcsec, half_lengths_arcsec : array_like, optional
        Slit offsets and nominal half-lengths stored in the result.

    Returns
    -------
    SlitIntegrals
        ``<X>`` (arcsec), ``<V>`` (km/s) with linearly propagated errors
        ``d<X>/dS_p = w_p (X_p - <X>) / B``, ``d<V>/dS_p = w_p (V_p - <V>) /
        B``, ``d<V>/dV_p = w_p S_p / B`` (``B = sum w S``), and their
        correlation. Errors are NaN without error maps.
    """
    if isinstance(weights, PreparedSlits):
        layout = weights._layout
        weights = _check_weights(weights.weights, maps.shape)
    else:
        weights = _check_weights(weights, maps.shape)
        layout = _layout(weights)
    terms, valid = _pixel_terms_maps(layout, maps, geometry.vsys_kms)
    return _integrals_from_terms(layout, terms, valid, len(weights), symmetric,
                                 offsets_arcsec, half_lengths_arcsec)



def _integrals_from_terms(layout, terms, valid, n: int, symmetric: bool,
                          offsets_arcsec, half_lengths_arcsec) -> SlitIntegrals:
    """Row sums, mirrored masking and normalisation shared by both routes."""
    sums = _row_sums(layout, terms, valid)
    bad = _row_bad(layout, valid)
    offsets = np.full(n, np.nan) if offsets_arcsec is None else offsets_arcsec
    halves = np.full(n, np.nan) if half_lengths_arcsec is None else half_lengths_arcsec
    return _reduce(layout, sums, bad, symmetric, np.asarray(offsets, float),
                   np.asarray(halves, float))

def _channel_velocities(cube: Cube):
    """Channel-centre velocities and widths (km/s) in the cube's convention."""
    from .spectral import channel_velocities
    v_kms, dv_kms = channel_velocities(cube.spectral)
    return np.asarray(v_kms, dtype=float), np.asarray(dv_kms, dtype=float)


def slit_integrals_cube(cube: Cube, geometry: DiskGeometry,
                        weights: Sequence[SlitWeights], *, symmetric: bool = True,
                        window_kms: tuple[float, float] | None = None,
                        velocities_kms=None, chunk_channels: int = 64,
                        offsets_arcsec=None, half_lengths_arcsec=None,
                        progress: ProgressCallback | None = None,
                        cancel: CancelFlag | None = None) -> SlitIntegrals:
    """Tremaine-Weinberg integrals straight from a spectral cube.

    With channel velocities ``v_c`` relative to ``Vsys``, widths ``dv_c``
    and intensities ``I(p, c)`` (DOMAIN notes, "Cubes directly")::

        int S dX    -> sum_p w_p sum_c I dv_c
        int S V dX  -> sum_p w_p sum_c I v_c dv_c
        int S X dX  -> sum_p w_p X_p sum_c I dv_c

    No moment map is formed: no ratio, clipping or line fit per pixel. Only
    the slit pixels are read, channel chunk by channel chunk (the cube may
    be a memory map); the spectral sums are linear, so the result equals
    that of summing slit spectra first, while masked pixels (any NaN in the
    window) can still be mirrored within each slit as in the map route.

    Parameters
    ----------
    cube : Cube
    geometry : DiskGeometry
    weights : sequence of SlitWeights
    symmetric : bool
    window_kms : (float, float), optional
        Velocity window relative to ``Vsys`` (km/s); all channels if None.
        Use a generous window: clipping the line biases ``<V>``.
    velocities_kms : array_like, optional
        Channel velocities (km/s), overriding the cube's spectral axis
        (which is converted by :func:`gyrometer.core.spectral.channel_velocities`
        in the axis' own convention and rest value; channel widths from the
        channel edges, so axes linear in frequency or wavelength are exact).
    chunk_channels : int
        Channels read at a time.
    progress, cancel
        See :mod:`gyrometer.core.progress`.

    Returns
    -------
    SlitIntegrals
        Errors from the cube's variance (NaN without one), assuming
        independent voxels.
    """
    if isinstance(weights, PreparedSlits):
        weights, layout = _check_weights(weights.weights, cube.spatial_shape), weights._layout
    else:
        weights = _check_weights(weights, cube.spatial_shape)
        layout = _layout(weights)
    if velocities_kms is None:
        v_kms, dv = _channel_velocities(cube)
    else:
        v_kms = np.asarray(velocities_kms, dtype=float)
        dv = np.abs(np.gradient(v_kms)) if v_kms.size > 1 else np.ones(1)
    if v_kms.size != cube.shape[0]:
        raise DataContentError("channel velocities do not match the cube",
                               value=(v_kms.size, cube.shape[0]))
    v_rel = v_kms - geometry.vsys_kms
    chans = np.arange(v_kms.size)
    if window_kms is not None:
        lo, hi = sorted(window_kms)
        chans = chans[(v_rel >= lo) & (v_rel <= hi)]
    if chans.size == 0:
        raise DataContentError("no channel inside the velocity window",
                               keyword="window_kms", value=window_kms)
    pix, inv = np.unique(layout.flat[layout.flat >= 0], return_inverse=True)
    m0 = np.zeros(pix.size)
    m1 = np.zeros(pix.size)
    var0 = np.zeros(pix.size)
    var1 = np.zeros(pix.size)
    cov01 = np.zeros(pix.size)
    bad_pix = np.zeros(pix.size, dtype=bool)
    ny, nx = cube.spatial_shape
    has_var = cube.variance is not None
    step = max(1, int(chunk_channels))
    total = chans.size
    for start in range(0, total, step):
        check_cancel(cancel, "cube slit integrals")
        cc = chans[start:start + step]
        sl = slice(cc[0], cc[-1] + 1)
        sel = cc - cc[0]
        block = np.asarray(cube.data[sl], dtype=float).reshape(-1, ny * nx)[sel][:, pix]
        vr, d = v_rel[cc][:, None], dv[cc][:, None]
        nan = ~np.isfinite(block)
        bad_pix |= nan.any(axis=0)
        block = np.where(nan, 0.0, block)
        m0 += (block * d).sum(axis=0)
        m1 += (block * vr * d).sum(axis=0)
        if has_var:
            var = np.asarray(cube.variance[sl], dtype=float).reshape(-1, ny * nx)[sel][:, pix]
            bad_pix |= ~np.isfinite(var).all(axis=0)
            var = np.where(np.isfinite(var), var, 0.0) * d * d
            var0 += var.sum(axis=0)
            var1 += (var * vr * vr).sum(axis=0)
            cov01 += (var * vr).sum(axis=0)
        report(progress, min(start + step, total), total, "cube slit integrals")
    entry = np.zeros(layout.flat.size, dtype=np.int64)
    entry[layout.flat >= 0] = inv
    inside = layout.flat >= 0
    valid = inside & ~bad_pix[entry]
    if not has_var:
        var0[:] = var1[:] = cov01[:] = np.nan
    terms = tuple(np.where(valid, arr[entry], 0.0) for arr in (m0, m1, var0, var1, cov01))
    return _integrals_from_terms(layout, terms, valid, len(weights), symmetric,
                                 offsets_arcsec, half_lengths_arcsec)


def _usable(integrals: SlitIntegrals, exclude=()) -> np.ndarray:
    used = (np.isfinite(integrals.x_mean_arcsec) & np.isfinite(integrals.v_mean_kms)
            & (integrals.flux > 0))
    for k in exclude:
        if 0 <= int(k) < used.size:
            used[int(k)] = False
    return used


def _ols_fit(x, y) -> LineFit:
    n = x.size
    xm, ym = x.mean(), y.mean()
    sxx = ((x - xm) ** 2).sum()
    if sxx == 0:
        raise FitError("all <X> values are equal: the slope is undefined")
    b = ((x - xm) * (y - ym)).sum() / sxx
    a = ym - b * xm
    chi2 = float(((y - a - b * x) ** 2).sum())
    s2 = chi2 / (n - 2) if n > 2 else float("nan")
    var_b = s2 / sxx
    return LineFit(float(b), float(a), math.sqrt(var_b),
                   math.sqrt(s2 * (1.0 / n + xm * xm / sxx)), -xm * var_b,
                   chi2, n - 2, OLS_METHOD)


def fit_pattern_speed(integrals: SlitIntegrals, *, exclude: Sequence[int] = ()):
    """Fit ``<V> = m <X> + c`` across the usable slits.

    Returns
    -------
    fit : LineFit
        York et al. (2004) regression with errors on both axes and their
        correlation; ordinary least squares (errors from the scatter) when
        the integrals carry no errors.
    used : numpy.ndarray of bool
        Slits that entered the fit.

    Raises
    ------
    FitError
        Fewer than two usable slits.
    """
    used = _usable(integrals, exclude)
    if used.sum() < 2:
        raise FitError("fewer than two slits have valid integrals",
                       value=int(used.sum()),
                       hint="add slits, lengthen them, or move them onto the data")
    x = integrals.x_mean_arcsec[used]
    y = integrals.v_mean_kms[used]
    sx = integrals.x_err_arcsec[used]
    sy = integrals.v_err_kms[used]
    if np.all(np.isfinite(sx)) and np.all(np.isfinite(sy)) and np.all((sx > 0) | (sy > 0)):
        fit = york_fit(x, y, sx, sy, integrals.xv_corr[used])
    else:
        fit = _ols_fit(x, y)
    return fit, used


def _omega_err(fit: LineFit, sin_i: float) -> float:
    """Fit-only error of Omega_p, km/s/arcsec: ``sigma_slope / sin i``.

    Not rescaled by the reduced chi-square: the noise-calibration tests
    show the York errors alone are calibrated for independent slits; extra
    scatter (adjacent slits closer than the PSF, systematics) is captured
    by the bootstrap term of :mod:`gyrometer.core.budget`.
    """
    return fit.slope_err / sin_i


def _assemble(integrals, geometry, route, exclude, warn, tracer) -> TWMeasurement:
    fit, used = fit_pattern_speed(integrals, exclude=exclude)
    sin_i = geometry.sin_i
    m = TWMeasurement(integrals=integrals, fit=fit, used=used, geometry=geometry,
                      route=route, omega_p_kms_arcsec=fit.slope / sin_i,
                      omega_p_err_kms_arcsec=_omega_err(fit, sin_i))
    from .diagnostics import check_measurement  # avoids an import cycle
    messages = check_measurement(m, tracer=tracer, issue=warn)
    return TWMeasurement(integrals=integrals, fit=fit, used=used, geometry=geometry,
                         route=route, omega_p_kms_arcsec=m.omega_p_kms_arcsec,
                         omega_p_err_kms_arcsec=m.omega_p_err_kms_arcsec,
                         warnings=tuple(messages))


def measure(data: MapSet | Cube, geometry: DiskGeometry, slits: SlitSet | Sequence[Slit],
            *, symmetric: bool | None = None, exclude: Sequence[int] = (),
            weights: Sequence[SlitWeights] | PreparedSlits | None = None, frame: PixelFrame | None = None,
            warn: bool = True, tracer: str | None = None, window_kms=None,
            velocities_kms=None, progress: ProgressCallback | None = None,
            cancel: CancelFlag | None = None) -> TWMeasurement:
    """Measure a pattern speed with the Tremaine-Weinberg method.

    Parameters
    ----------
    data : MapSet or Cube
        Maps (route ``"maps"``) or a cube (route ``"cube"``).
    geometry : DiskGeometry
    slits : SlitSet or sequence of Slit
    symmetric : bool, optional
        Symmetric truncation and mirrored masking; defaults to
        ``slits.symmetric`` (True for a plain sequence).
    exclude : sequence of int
        Slits left out of the fit (their integrals are still reported).
    weights, frame : optional
        Precomputed :func:`~gyrometer.core.slits.slit_weights` (or
        :func:`prepare_slits`) /
        :func:`~gyrometer.core.slits.pixel_frame` for this data set.
    warn : bool
        Issue the diagnostics (:func:`gyrometer.core.diagnostics.check_measurement`)
        as Python warnings too; they are always stored in
        :attr:`TWMeasurement.warnings`.
    tracer : str, optional
        Overrides ``data.tracer`` for the gas caveat.
    window_kms, velocities_kms, progress, cancel
        Cube route only; see :func:`slit_integrals_cube`.

    Returns
    -------
    TWMeasurement
        ``Omega_p = slope / sin i`` in km/s/arcsec (no distance needed) and,
        with ``geometry.distance_mpc``, km/s/kpc; see
        :attr:`TWMeasurement.omega_p`.
    """
    items, offsets, halves = _slit_meta(slits)
    if symmetric is None:
        symmetric = getattr(slits, "symmetric", True)
    if isinstance(data, Cube):
        shape, wcs, route = data.spatial_shape, data.wcs, "cube"
    elif isinstance(data, MapSet):
        shape, wcs, route = data.shape, data.wcs, "maps"
    else:
        raise DataContentError("measure() needs a MapSet or a Cube",
                               value=type(data).__name__)
    if weights is None:
        weights = slit_weights(items, geometry, wcs, shape, frame=frame)
    if route == "cube":
        integrals = slit_integrals_cube(
            data, geometry, weights, symmetric=symmetric, window_kms=window_kms,
            velocities_kms=velocities_kms, offsets_arcsec=offsets,
            half_lengths_arcsec=halves, progress=progress, cancel=cancel)
        tracer = tracer or "other"
    else:
        integrals = slit_integrals_maps(data, geometry, weights, symmetric=symmetric,
                                        offsets_arcsec=offsets,
                                        half_lengths_arcsec=halves)
        tracer = tracer or data.tracer
    return _assemble(integrals, geometry, route, exclude, warn, tracer)


class LiveMeasurer:
    """Fast re-measurement while slits are dragged (maps route).

    Caches the pixel frame, every slit's weights and every slit's binned
    sums; :meth:`update_slit` recomputes only the changed slit (its exact
    weights and sums), then combines all slits and refits. Diagnostics are
    stored in the result but not issued as Python warnings. Timings: see
    ``benchmarks/bench_tw.py``.

    Parameters
    ----------
    maps : MapSet
    geometry : DiskGeometry
    slits : SlitSet
    exclude : sequence of int
    """

    def __init__(self, maps: MapSet, geometry: DiskGeometry, slits: SlitSet, *,
                 exclude: Sequence[int] = ()) -> None:
        self._maps = maps
        self._exclude = tuple(exclude)
        self._geometry = geometry
        self._frame = pixel_frame(maps.wcs, maps.shape, geometry)
        self._set_slits(slits)

    def _set_slits(self, slits: SlitSet) -> None:
        if len(slits) == 0:
            raise SlitError("the slit set is empty", hint="add at least one slit")
        self._slits = slits
        self._weights = list(slit_weights(slits, self._geometry, self._maps.wcs,
                                          self._maps.shape, frame=self._frame))
        self._parts = [_slit_rows(w, self._maps, self._geometry.vsys_kms)
                       for w in self._weights]

    @property
    def slits(self) -> SlitSet:
        return self._slits

    @property
    def geometry(self) -> DiskGeometry:
        return self._geometry

    @property
    def weights(self) -> tuple[SlitWeights, ...]:
        return tuple(self._weights)

    def measure(self) -> TWMeasurement:
        """The measurement for the current slits and geometry."""
        rows, sums, bad = _combine_rows(self._parts)
        items, offsets, halves = _slit_meta(self._slits)
        integrals = _reduce(rows, sums, bad, self._slits.symmetric, offsets, halves)
        return _assemble(integrals, self._geometry, "maps", self._exclude, False,
                         self._maps.tracer)

    def update_slit(self, index: int, slit: Slit) -> TWMeasurement:
        """Replace slit ``index`` and re-measure (only that slit is recomputed)."""
        self._slits = self._slits.replaced(index, slit)
        self._weights[index] = slit_weights((slit,), self._geometry, self._maps.wcs,
                                            self._maps.shape, frame=self._frame)[0]
        self._parts[index] = _slit_rows(self._weights[index], self._maps,
                                        self._geometry.vsys_kms)
        return self.measure()

    def set_slits(self, slits: SlitSet) -> TWMeasurement:
        """Replace the whole slit set and re-measure."""
        self._set_slits(slits)
        return self.measure()

    def set_geometry(self, geometry: DiskGeometry) -> TWMeasurement:
        """Change the geometry and re-measure (weights are recomputed when the
        centre or PA changed, sums when Vsys changed too)."""
        old = self._geometry
        self._geometry = geometry
        if (old.ra_deg, old.dec_deg) != (geometry.ra_deg, geometry.dec_deg):
            self._frame = pixel_frame(self._maps.wcs, self._maps.shape, geometry)
        if (old.ra_deg, old.dec_deg, old.pa_deg, old.vsys_kms) != (
                geometry.ra_deg, geometry.dec_deg, geometry.pa_deg, geometry.vsys_kms):
            self._set_slits(self._slits)
        return self.measure()
