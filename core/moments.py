"""Moment maps of one emission line from a cube, streamed channel by channel.

Method
------
1. Channel velocities ``v_c`` and widths ``dv_c`` (km/s) come from
   :func:`gyrometer.core.spectral.channel_velocities` in the chosen
   convention (absolute velocities, not relative to the systemic velocity).
2. A velocity window ``|v - vsys| <= window_halfwidth`` selects the line's
   channels (all channels when no systemic velocity is given).
3. Up to ``noise_channels`` line-free channels on each side of the window
   (the *sidebands*) give, per spaxel, a continuum level (the median of each
   side, joined linearly in channel) and the noise (1.4826 x the median
   absolute deviation of the continuum-subtracted sidebands; robust against
   a stray line). Continuum subtraction is on by default for wavelength
   axes (optical IFU lines sit on stellar continuum) and off for frequency
   and velocity axes (radio cubes are normally continuum-subtracted).
4. Mask (``mask='smooth'``): the cube is smoothed spatially (to a FWHM of
   ``smooth_fwhm_pix``, default the PSF: averaged over bins of half that
   size, then a Gaussian on the binned grid) and spectrally (boxcar of
   ``smooth_channels``); voxels above ``snr_threshold`` times the noise of
   the *smoothed* cube (measured the same way in the sidebands, or
   propagated from the variance) are kept, and the mask is dilated by
   ``dilation_channels`` channels and ``dilation_pixels`` pixels; the
   moments are then taken of the unsmoothed data inside the mask. This is
   the "smooth and mask" practice of Dame (2011, arXiv:1101.1499): it keeps
   the faint line wings that clipping the raw noisy cube would cut, which
   biases the first moment. ``mask='none'`` keeps every valid channel of
   the window.
5. Moments (sums over masked channels)::

       M0 = sum I dv                        (intensity x km/s)
       M1 = sum I v dv / M0                 (km/s)
       M2 = sqrt(sum I (v - M1)^2 dv / M0)  (km/s, dispersion)

6. Uncertainties by first-order (linear) error propagation with independent
   channels, from the cube's variance where present, else from the sideband
   noise (the continuum level's own error is neglected)::

       var(M0) = sum s^2 dv^2
       var(M1) = sum s^2 dv^2 (v - M1)^2 / M0^2
       var(M2) = sum s^2 dv^2 ((v - M1)^2 - M2^2)^2 / (4 M2^2 M0^2)

Streaming
---------
The window is read in blocks of ``chunk_channels`` channels from the
(memory-mapped) cube, each block extended by a halo of ``smooth_channels//2
+ dilation_channels`` channels so that smoothing and dilation see the same
neighbours whatever the block size (the mask is identical for any block
size). Each block is read once into native float32 and summed with one
matrix product in float32 (float64 for float64 cubes); the per-block sums
are accumulated in float64. The result therefore depends on the block size
only at the level of float32 rounding (~1e-7 relative). With the smooth
mask the blocks are independent and are worked on by up to two threads
(numpy releases the GIL in its loops), each in its own reused work arrays;
their sums are added in block order, so the result is the same as a serial
run. A block whose float sum is finite has no NaN or infinity and skips
the NaN bookkeeping. Memory: a few blocks of ``chunk_channels`` (default
about 32 MiB each) per thread plus the sideband channels used for the
noise.
"""

from __future__ import annotations

import os
import threading
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, fields

import astropy.units as u
import numpy as np

from .coords import pixel_scale_arcsec
from .dataset import Cube, MapSet
from .errors import (DataContentError, GyrometerError, RecipeError,
                     SpectralAxisError)
from .progress import CancelFlag, ProgressCallback, check_cancel, report
from .spectral import channel_velocities

__all__ = ["MomentSettings", "compute_moments", "MASK_METHODS",
           "CONTINUUM_METHODS"]

#: Mask methods: smooth-and-clip-then-dilate, or every valid channel.
MASK_METHODS = ("smooth", "none")
#: Continuum handling: by axis type, linear from the sidebands, or none.
CONTINUUM_METHODS = ("auto", "sidebands", "none")
_MAD_TO_SIGMA = 1.482602218505602  # 1 / Phi^-1(3/4), normal distribution
_CHUNK_BYTES = 32 * 2**20
#: Threads for the smooth-mask blocks (numpy releases the GIL in its loops).
_WORKERS = max(1, min(2, os.cpu_count() or 1))


@dataclass(frozen=True)
class MomentSettings:
    """How to make moment maps from a cube.

    Attributes
    ----------
    line : str or None
        Line name for the rest value (see :func:`gyrometer.core.lines.get_line`);
        on an air-wavelength axis its air wavelength is used.
    rest_value : float or None
        Rest frequency/wavelength overriding ``line`` and the header.
    rest_unit : str
        Unit of ``rest_value`` (``"Angstrom"``, ``"GHz"`` ...).
    rest_air : bool
        ``rest_value`` is an air wavelength.
    convention : str or None
        ``"radio"``, ``"optical"`` or ``"relativistic"``; default the axis's.
    vsys_kms : float or None
        Centre of the velocity window, km/s (same convention). None: the
        whole spectral axis is the window.
    window_halfwidth_kms : float
        Half-width of the velocity window, km/s.
    mask : str
        ``"smooth"`` (smooth-and-clip, then dilate) or ``"none"``.
    snr_threshold : float
        Clip level in units of the smoothed cube's noise.
    smooth_fwhm_pix : float or None
        FWHM of the mask's spatial smoothing, pixels; default the PSF FWHM
        in pixels (at least 1.5), or 2 pixels if the PSF is unknown.
    smooth_channels : int
        Width of the spectral boxcar (odd; 1 = no spectral smoothing).
    dilation_channels, dilation_pixels : int
        Growth of the mask along the spectrum and on the sky.
    continuum : str
        ``"auto"``, ``"sidebands"`` or ``"none"``.
    noise_channels : int
        Maximum number of sideband channels used on each side.
    chunk_channels : int or None
        Channels per streamed block; default about 32 MiB of float64.
    air_method : str
        Air/vacuum formula (``"morton"``, ``"ciddor"``, ``"greisen"``).
    tracer : str or None
        Tracer of the output map set; default from the line (else "other").
    """

    line: str | None = None
    rest_value: float | None = None
    rest_unit: str = ""
    rest_air: bool = False
    convention: str | None = None
    vsys_kms: float | None = None
    window_halfwidth_kms: float = 500.0
    mask: str = "smooth"
    snr_threshold: float = 4.0
    smooth_fwhm_pix: float | None = None
    smooth_channels: int = 3
    dilation_channels: int = 2
    dilation_pixels: int = 1
    continuum: str = "auto"
    noise_channels: int = 30
    chunk_channels: int | None = None
    air_method: str = "morton"
    tracer: str | None = None

    def __post_init__(self) -> None:
        def bad(name: str, why: str) -> RecipeError:
            return RecipeError(f"moment setting {name}={getattr(self, name)!r}"
                               f" {why}", keyword=name,
                               value=getattr(self, name))
        if self.mask not in MASK_METHODS:
            raise bad("mask", f"is not one of {MASK_METHODS}")
        if self.continuum not in CONTINUUM_METHODS:
            raise bad("continuum", f"is not one of {CONTINUUM_METHODS}")
        if not self.window_halfwidth_kms > 0:
            raise bad("window_halfwidth_kms", "must be positive")
        if not self.snr_threshold > 0:
            raise bad("snr_threshold", "must be positive")
        if self.smooth_channels < 1 or self.smooth_channels % 2 == 0:
            raise bad("smooth_channels", "must be a positive odd number")
        for name in ("dilation_channels", "dilation_pixels", "noise_channels"):
            if getattr(self, name) < 0:
                raise bad(name, "must not be negative")
        if self.chunk_channels is not None and self.chunk_channels < 1:
            raise bad("chunk_channels", "must be at least 1")
        if self.smooth_fwhm_pix is not None and self.smooth_fwhm_pix < 0:
            raise bad("smooth_fwhm_pix", "must not be negative")

    def replace(self, **changes: object) -> "MomentSettings":
        """A copy with some fields changed."""
        values = {f.name: getattr(self, f.name) for f in fields(self)}
        values.update(changes)
        return MomentSettings(**values)


def _rest_argument(settings: MomentSettings):
    if settings.rest_value is not None:
        return settings.rest_value * u.Unit(settings.rest_unit or "Hz")
    return settings.line


class _Workspace:
    """Reused work arrays of one thread, by name (grown when too small).

    Large fresh arrays cost page faults, which threads of one process
    serialise on; the smooth-mask blocks therefore work in these.
    """

    def __init__(self) -> None:
        self.arrays: dict[str, np.ndarray] = {}

    def get(self, name: str, shape: tuple[int, ...], dtype) -> np.ndarray:
        size = int(np.prod(shape))
        array = self.arrays.get(name)
        if array is None or array.size < size or array.dtype != dtype:
            array = np.empty(max(size, 1), dtype)
            self.arrays[name] = array
        return array[:size].reshape(shape)


def _empty(ws: _Workspace | None, name: str, shape: tuple[int, ...],
           dtype) -> np.ndarray:
    if ws is None:
        return np.empty(shape, dtype)
    return ws.get(name, shape, dtype)


def _gaussian_kernel(sigma_pix: float) -> np.ndarray:
    """Normalised Gaussian taps, truncated at 2 sigma (enough for a mask)."""
    radius = max(1, int(2.0 * sigma_pix + 0.5))
    x = np.arange(-radius, radius + 1, dtype=float)
    kernel = np.exp(-0.5 * (x / sigma_pix) ** 2)
    return kernel / kernel.sum()


def _index(ndim: int, axis: int, part: slice) -> tuple:
    index = [slice(None)] * ndim
    index[axis] = part
    return tuple(index)


def _correlate(a: np.ndarray, kernel: np.ndarray, axis: int,
               ws: _Workspace | None = None) -> np.ndarray:
    """Correlate with a symmetric odd kernel along ``axis`` (1 or 2 of a
    3D block); zeros beyond the edges. Shifted-slice sums: contiguous and
    vectorised. Along the last axis the rows are padded with ``radius``
    zeros and shifted as one flat array, so that no per-row loop is
    needed (the padding supplies the zeros beyond each row's ends).
    Each tap's product is rounded to the array's precision and then
    added, in the same order whether or not a workspace ``ws`` is used."""
    radius = kernel.size // 2
    taps = [a.dtype.type(k) for k in kernel]
    name = f"correlate{axis}"
    if axis == a.ndim - 1:
        n = a.shape[-1]
        padded = _empty(ws, name + "pad", a.shape[:-1] + (n + radius,),
                        a.dtype)
        padded[..., n:] = 0
        padded[..., :n] = a
        flat = padded.reshape(-1)
        out = np.multiply(flat, taps[radius],
                          out=_empty(ws, name, flat.shape, a.dtype))
        product = _empty(ws, "product", flat.shape, a.dtype)
        for j in range(1, radius + 1):
            out[j:] += np.multiply(taps[radius + j], flat[:-j],
                                   out=product[:-j])
            out[:-j] += np.multiply(taps[radius - j], flat[j:],
                                    out=product[j:])
        return out.reshape(padded.shape)[..., :n]
    out = np.multiply(a, taps[radius], out=_empty(ws, name, a.shape, a.dtype))
    product = _empty(ws, "product", a.shape, a.dtype)
    n = a.shape[axis]
    for j in range(1, min(radius, n - 1) + 1):
        head = _index(a.ndim, axis, slice(j, None))
        tail = _index(a.ndim, axis, slice(None, -j))
        out[head] += np.multiply(taps[radius + j], a[tail],
                                 out=product[head])
        out[tail] += np.multiply(taps[radius - j], a[head],
                                 out=product[tail])
    return out


def _boxcar0(a: np.ndarray, width: int, scale: float,
             ws: _Workspace | None = None) -> np.ndarray:
    """``scale`` x sum over ``width`` neighbouring channels (axis 0), the
    edge channels repeated beyond the ends of ``a``."""
    half = width // 2
    out = _empty(ws, "boxcar", a.shape, a.dtype)
    np.copyto(out, a)
    n = a.shape[0]
    for j in range(1, half + 1):
        k = min(j, n)
        out[j:] += a[:-j] if j < n else 0
        out[:k] += a[0]
        out[:-j] += a[j:] if j < n else 0
        out[n - k:] += a[-1]
    out *= a.dtype.type(scale)
    return out


def _grow(mask: np.ndarray, reach: int, axes: tuple[int, ...]) -> np.ndarray:
    """Binary dilation by ``reach`` elements along each of ``axes``
    (a box structuring element); nothing beyond the edges. The last axis
    is handled as one flat array with ``reach`` False pads per row."""
    for axis in axes:
        src = mask
        if axis == src.ndim - 1:
            n = src.shape[-1]
            padded = np.zeros(src.shape[:-1] + (n + reach,), bool)
            padded[..., :n] = src
            flat = padded.reshape(-1)
            grown = flat.copy()
            for j in range(1, reach + 1):
                grown[j:] |= flat[:-j]
                grown[:-j] |= flat[j:]
            mask = grown.reshape(padded.shape)[..., :n]
            continue
        mask = mask.copy()
        for j in range(1, min(reach, src.shape[axis] - 1) + 1):
            head = _index(src.ndim, axis, slice(j, None))
            tail = _index(src.ndim, axis, slice(None, -j))
            mask[head] |= src[tail]
            mask[tail] |= src[head]
    return mask


class _Smoother:
    """Smoothing for the signal mask, per channel block.

    The block is first averaged over ``bin x bin`` spaxels (``bin`` = half
    the smoothing FWHM, at least 1), then smoothed by a spectral boxcar of
    ``n_channels`` channels and, on the binned grid, by a Gaussian that
    brings the total spatial smoothing to about ``fwhm_pix`` (FWHMs added in
    quadrature, the box of ``bin`` pixels counting as FWHM ``bin``). Binning
    first keeps the cost of the mask near one pass over the data.
    :meth:`variance` gives the variance of the smoothed data for
    independent voxels (squared weights); :meth:`upsample` takes a binned
    mask back to full resolution.
    """

    def __init__(self, fwhm_pix: float, n_channels: int) -> None:
        self.bin = max(1, int(fwhm_pix // 2))
        residual_fwhm = np.sqrt(max(fwhm_pix ** 2 - self.bin ** 2, 0.0))
        sigma = residual_fwhm / np.sqrt(8.0 * np.log(2.0)) / self.bin
        self.kernel = _gaussian_kernel(sigma) if sigma >= 0.3 else None
        self.n_channels = n_channels

    def _binned(self, block: np.ndarray, scale: float,
                ws: _Workspace | None = None) -> np.ndarray:
        b = self.bin
        if b == 1:
            return block if scale == 1.0 else block * block.dtype.type(scale)
        nb, ny, nx = block.shape
        big_y, big_x = -(-ny // b) * b, -(-nx // b) * b
        if (big_y, big_x) != (ny, nx):
            padded = np.zeros((nb, big_y, big_x), block.dtype)
            padded[:, :ny, :nx] = block
            block = padded
        rows = np.add(block[:, 0::b], block[:, 1::b],
                      out=_empty(ws, "rows", (nb, big_y // b, big_x),
                                 block.dtype))
        for i in range(2, b):
            np.add(rows, block[:, i::b], out=rows)
        out = np.add(rows[:, :, 0::b], rows[:, :, 1::b],
                     out=_empty(ws, "binned", (nb, big_y // b, big_x // b),
                                block.dtype))
        for j in range(2, b):
            np.add(out, rows[:, :, j::b], out=out)
        out *= out.dtype.type(scale)
        return out

    def data(self, block: np.ndarray, ws: _Workspace | None = None
             ) -> np.ndarray:
        """Smoothed ``block`` on the binned grid (in ``ws`` arrays if
        given: valid until the next call with the same workspace)."""
        out = self._binned(block, 1.0 / self.bin ** 2, ws)
        if self.n_channels > 1:
            out = _boxcar0(out, self.n_channels, 1.0 / self.n_channels, ws)
        if self.kernel is not None:
            out = _correlate(_correlate(out, self.kernel, 1, ws),
                             self.kernel, 2, ws)
        return out

    def variance(self, block: np.ndarray) -> np.ndarray:
        out = self._binned(block, 1.0 / self.bin ** 4)
        if self.n_channels > 1:
            out = _boxcar0(out, self.n_channels, 1.0 / self.n_channels ** 2)
        if self.kernel is not None:
            k2 = self.kernel ** 2
            out = _correlate(_correlate(out, k2, 1), k2, 2)
        return out

    def upsample(self, mask: np.ndarray, shape: tuple[int, ...],
                 ws: _Workspace | None = None, name: str = "upsampled"
                 ) -> np.ndarray:
        b = self.bin
        if b == 1:
            return mask
        nb, ny, nx = shape
        out = _empty(ws, name, (nb, mask.shape[1] * b, mask.shape[2] * b),
                     mask.dtype)
        for i in range(b):
            for j in range(b):
                out[:, i::b, j::b] = mask
        return out[:, :ny, :nx]


def _read(cube: Cube, start: int, stop: int, variance: bool = False
          ) -> np.ndarray:
    """A private copy of channels ``start:stop`` as native-order float32
    (one pass over the memory map; float64 input stays float64)."""
    source = cube.variance if variance else cube.data
    block = source[start:stop]
    dtype = np.float64 if block.dtype.itemsize > 4 and block.dtype.kind == "f" \
        else np.float32
    return np.array(block, dtype=dtype, order="C", copy=True)


def _nanmedian0(values: np.ndarray) -> np.ndarray:
    """Median along axis 0 ignoring NaN (NaN where a column has none).

    Works on the transposed, contiguous columns: a partial sort
    (:func:`numpy.partition`) when nothing is NaN, else a full sort with
    NaN last and the middle of each column's finite values. Much faster
    than :func:`numpy.nanmedian` for many short columns.
    """
    n = values.shape[0]
    columns = np.ascontiguousarray(values.reshape(n, -1).T)
    finite = np.isfinite(columns)
    if finite.all():
        low, high = (n - 1) // 2, n // 2
        part = np.partition(columns, (low, high), axis=1)
        median = 0.5 * (part[:, low].astype(np.float64)
                        + part[:, high].astype(np.float64))
        return median.reshape(values.shape[1:])
    columns = np.sort(columns, axis=1)  # NaN last
    n_finite = np.count_nonzero(finite, axis=1)
    low = np.maximum((n_finite - 1) // 2, 0)
    high = np.maximum(n_finite // 2, 0)
    rows = np.arange(columns.shape[0])
    median = 0.5 * (columns[rows, low].astype(np.float64)
                    + columns[rows, high].astype(np.float64))
    median[n_finite == 0] = np.nan
    return median.reshape(values.shape[1:])


def _mad_sigma(values: np.ndarray) -> np.ndarray:
    """Robust standard deviation along axis 0 (NaN-aware):
    1.4826 x median absolute deviation (normal distribution)."""
    centre = _nanmedian0(values).astype(values.dtype)
    return _MAD_TO_SIGMA * _nanmedian0(np.abs(values - centre[None]))


class _Continuum:
    """Per-spaxel linear continuum in channel index from two sidebands."""

    def __init__(self, lower: tuple[int, int] | None,
                 upper: tuple[int, int] | None, cube: Cube,
                 subtract: bool) -> None:
        self.points: list[tuple[float, np.ndarray]] = []
        if not subtract:
            return
        for band in (lower, upper):
            if band is None:
                continue
            level = _nanmedian0(_read(cube, *band))
            self.points.append((0.5 * (band[0] + band[1] - 1),
                                np.nan_to_num(level)))

    def __call__(self, start: int, stop: int) -> np.ndarray | float:
        if not self.points:
            return 0.0
        if len(self.points) == 1:
            return self.points[0][1][None]
        (c_a, level_a), (c_b, level_b) = self.points
        channels = np.arange(start, stop, dtype=float)[:, None, None]
        slope = (level_b - level_a) / (c_b - c_a)
        return level_a[None] + slope[None] * (channels - c_a)


def _window(v_kms: np.ndarray, settings: MomentSettings, path: str
            ) -> tuple[int, int]:
    if settings.vsys_kms is None:
        return 0, v_kms.size
    inside = np.flatnonzero(np.abs(v_kms - settings.vsys_kms)
                            <= settings.window_halfwidth_kms)
    if inside.size == 0:
        raise DataContentError(
            f"the velocity window {settings.vsys_kms:g} +/- "
            f"{settings.window_halfwidth_kms:g} km/s lies outside the cube "
            f"({np.nanmin(v_kms):.1f} to {np.nanmax(v_kms):.1f} km/s)",
            path=path, keyword="vsys_kms",
            hint="check the systemic velocity, the line and the convention")
    return int(inside[0]), int(inside[-1]) + 1


def _smoothing_fwhm_pix(cube: Cube, settings: MomentSettings) -> float:
    """Spatial smoothing FWHM of the mask, pixels."""
    if settings.smooth_fwhm_pix is not None:
        return float(settings.smooth_fwhm_pix)
    if cube.psf_fwhm_arcsec:
        try:
            return max(1.5, cube.psf_fwhm_arcsec / pixel_scale_arcsec(cube.wcs))
        except GyrometerError:  # no usable pixel scale: keep the default
            pass
    return 2.0


def compute_moments(cube: Cube, settings: MomentSettings | None = None, *,
                    progress: ProgressCallback | None = None,
                    cancel: CancelFlag | None = None) -> MapSet:
    """Moment 0, 1 and 2 maps with uncertainties from a cube.

    Parameters
    ----------
    cube : Cube
        The data, possibly memory-mapped; read in channel blocks.
    settings : MomentSettings, optional
        Line, window, mask and streaming settings (see the module docstring
        for the method).
    progress, cancel
        See :mod:`gyrometer.core.progress`.

    Returns
    -------
    MapSet
        ``intensity`` = moment 0 (cube unit x km/s), ``velocity_kms`` =
        moment 1 (absolute, in the chosen convention), ``dispersion_kms`` =
        moment 2, and their 1-sigma errors (None if no noise estimate is
        possible). Spaxels without positive moment 0 have NaN velocity and
        dispersion.

    Raises
    ------
    SpectralAxisError
        No rest value for a frequency or wavelength axis.
    DataContentError
        The window is outside the cube; no noise estimate for the mask.
    Cancelled
        ``cancel`` was set.
    """
    settings = settings or MomentSettings()
    path = cube.provenance.path or cube.name
    try:
        v_kms, dv_kms = channel_velocities(
            cube.spectral, _rest_argument(settings), settings.convention,
            rest_air=settings.rest_air, air_method=settings.air_method)
    except SpectralAxisError as exc:
        if exc.path is not None:
            raise
        raise SpectralAxisError(exc.message, path=path, keyword=exc.keyword,
                                value=exc.value, hint=exc.hint) from exc
    n_chan = v_kms.size
    ny, nx = cube.spatial_shape
    w0, w1 = _window(v_kms, settings, path)
    n_side = settings.noise_channels
    lower = (max(0, w0 - n_side), w0) if w0 > 0 and n_side else None
    upper = (w1, min(n_chan, w1 + n_side)) if w1 < n_chan and n_side else None
    family = cube.spectral.ctype.upper()[:4]
    subtract = settings.continuum == "sidebands" or (
        settings.continuum == "auto" and family in ("WAVE", "AWAV"))
    continuum = _Continuum(lower, upper, cube, subtract)
    smoother = _Smoother(_smoothing_fwhm_pix(cube, settings),
                         settings.smooth_channels)
    use_mask = settings.mask == "smooth"

    # --- noise from the sidebands (per spaxel) --------------------------
    sigma_raw = sigma_smooth = None
    bands = [b for b in (lower, upper) if b is not None]
    if bands:
        raw, smooth = [], []
        for band in bands:
            block = _read(cube, *band)
            if continuum.points:
                block -= continuum(*band).astype(block.dtype)
            raw.append(block)
            if use_mask:
                finite = np.isfinite(block)
                filled = np.where(finite, block, 0.0)
                covered = smoother.data(finite.astype(filled.dtype)) > 0
                smooth.append(np.where(covered, smoother.data(filled), np.nan))
        sigma_raw = _mad_sigma(np.concatenate(raw))
        if use_mask:
            sigma_smooth = _mad_sigma(np.concatenate(smooth))
        del raw, smooth
    has_variance = cube.variance is not None
    if use_mask and sigma_smooth is None and not has_variance:
        raise DataContentError(
            "no noise estimate for the signal mask: the window covers the "
            "whole cube and there is no variance extension", path=path,
            keyword="window_halfwidth_kms",
            hint="give vsys_kms and a window that leaves line-free channels, "
                 "or use mask='none'")
    with_errors = has_variance or sigma_raw is not None

    # --- streamed sums --------------------------------------------------
    v_ref = float(settings.vsys_kms if settings.vsys_kms is not None
                  else np.median(v_kms[w0:w1]))
    chunk = settings.chunk_channels or max(1, _CHUNK_BYTES // (4 * ny * nx))
    halo = (settings.smooth_channels // 2 + settings.dilation_channels
            if use_mask else 0)
    n_pix = ny * nx
    sums = np.zeros((3, n_pix))
    err_sums = np.zeros((5, n_pix)) if with_errors else None
    any_finite = np.zeros(n_pix, dtype=bool)
    any_valid = np.zeros(n_pix, dtype=bool)
    sigma2 = None if sigma_raw is None else (sigma_raw ** 2).reshape(1, -1)
    total = w1 - w0
    report(progress, 0, total, "moments")
    if use_mask:
        jobs = [(c0, min(c0 + chunk, w1)) for c0 in range(w0, w1, chunk)]
        masked = _MaskedSums(cube, continuum, smoother, settings,
                             sigma_smooth, sigma2, (w0, w1), halo, v_kms,
                             dv_kms, v_ref, with_errors)
        for (c0, c1), part in _in_order(masked, jobs, cancel):
            block_sums, block_err, block_finite, block_valid = part
            sums += block_sums
            if err_sums is not None:
                err_sums += block_err
            any_finite |= block_finite
            any_valid |= block_valid
            report(progress, c1 - w0, total, "moments")
    else:
        for c0 in range(w0, w1, chunk):
            check_cancel(cancel, "moment maps")
            c1 = min(c0 + chunk, w1)
            n = c1 - c0
            r0, r1 = max(0, c0 - halo), min(n_chan, c1 + halo)
            block = _read(cube, r0, r1)
            if continuum.points:
                block -= continuum(r0, r1).astype(block.dtype)
            u_kms = v_kms[c0:c1] - v_ref
            dv = dv_kms[c0:c1]
            # per-block sums in the block's precision, accumulated in float64
            weights = np.stack([dv, dv * u_kms, dv * u_kms ** 2]
                               ).astype(block.dtype)
            # no mask: sum first, then redo only the spaxels that met a NaN
            values = block.reshape(n, -1)
            partial = weights @ values
            bad = ~np.isfinite(partial).all(axis=0)
            keep = None
            if bad.any():
                cols = np.flatnonzero(bad)
                sub = values[:, cols]
                fin = np.isfinite(sub)
                sub[~fin] = 0
                partial[:, cols] = weights @ sub
                any_finite[cols] |= fin.any(axis=0)
                if err_sums is not None:
                    keep = np.ones(values.shape, bool)
                    keep[:, cols] = fin
            any_finite |= ~bad
            any_valid[:] = any_finite
            sums += partial
            if err_sums is not None:
                if has_variance:
                    var = _read(cube, c0, c1, variance=True).reshape(n, -1)
                else:
                    var = np.broadcast_to(sigma2.astype(values.dtype),
                                          values.shape)
                if keep is not None:
                    var = np.where(keep, var, 0)
                dv2 = dv ** 2
                err_weights = np.stack([dv2 * u_kms ** k for k in range(5)])
                err_sums += err_weights.astype(var.dtype) @ var
            report(progress, c1 - w0, total, "moments")
    if not any_finite.any():
        raise DataContentError(
            f"no valid data in the velocity window ({v_kms[w0]:.1f} to "
            f"{v_kms[w1 - 1]:.1f} km/s): every channel there is NaN, "
            "infinite or blank", path=path, keyword="vsys_kms",
            hint="check the systemic velocity and the window, or the "
                 "cube's blanking")
    return _assemble(cube, settings, sums, err_sums, any_valid, any_finite,
                     v_ref, (ny, nx))


class _MaskedSums:
    """The smooth-mask path's work on one channel block ``(c0, c1)``.

    Returns the block's moment sums (3 x n_pix, block precision), its
    error sums (5 x n_pix, float64, or None), and which spaxels had a
    finite / a kept voxel. Blocks are independent, so they may run on
    several threads; each thread reads into its own reused buffer (no
    fresh pages per block). A block without NaN or infinity (its float sum
    is finite) skips the NaN bookkeeping, and without a variance extension
    its error sums are taken on the binned mask, where every kept voxel of
    a bin has the same sideband noise (exact up to float32 rounding).
    """

    def __init__(self, cube: Cube, continuum: _Continuum, smoother: _Smoother,
                 settings: MomentSettings, sigma_smooth: np.ndarray | None,
                 sigma2: np.ndarray | None, window: tuple[int, int],
                 halo: int, v_kms: np.ndarray, dv_kms: np.ndarray,
                 v_ref: float, with_errors: bool) -> None:
        self.cube, self.continuum, self.smoother = cube, continuum, smoother
        self.settings, self.sigma_smooth = settings, sigma_smooth
        self.sigma2, self.window, self.halo = sigma2, window, halo
        self.v_kms, self.dv_kms, self.v_ref = v_kms, dv_kms, v_ref
        self.with_errors = with_errors
        self.ny, self.nx = cube.spatial_shape
        self.local = threading.local()

    def _workspace(self) -> _Workspace:
        ws = getattr(self.local, "ws", None)
        if ws is None:
            ws = self.local.ws = _Workspace()
        return ws

    def _read(self, start: int, stop: int, ws: _Workspace) -> np.ndarray:
        """Like :func:`_read`, into this thread's reused buffer."""
        source = self.cube.data[start:stop]
        dtype = (np.float64 if source.dtype.itemsize > 4
                 and source.dtype.kind == "f" else np.float32)
        block = ws.get("block", (stop - start, self.ny, self.nx), dtype)
        np.copyto(block, source, casting="unsafe")
        return block

    def __call__(self, job: tuple[int, int]) -> tuple:
        c0, c1 = job
        n, n_pix = c1 - c0, self.ny * self.nx
        r0 = max(0, c0 - self.halo)
        r1 = min(self.v_kms.size, c1 + self.halo)
        ws = self._workspace()
        block = self._read(r0, r1, ws)
        if self.continuum.points:
            block -= self.continuum(r0, r1).astype(block.dtype)
        u_kms = self.v_kms[c0:c1] - self.v_ref
        dv = self.dv_kms[c0:c1]
        # per-block sums in the block's precision, accumulated in float64
        weights = np.stack([dv, dv * u_kms, dv * u_kms ** 2]
                           ).astype(block.dtype)
        with np.errstate(over="ignore", invalid="ignore"):
            clean = bool(np.isfinite(np.add.reduce(block, axis=None)))
        finite = None
        if not clean:
            finite = np.isfinite(block)
            np.copyto(block, 0, where=~finite)  # NaN -> 0, in place
        inner = slice(c0 - r0, c1 - r0)
        mask = _signal_mask(block, self.smoother, self.settings,
                            self.sigma_smooth, self.cube, (r0, r1),
                            self.window, ws)[inner]
        values = block[inner].reshape(n, -1)  # a view, zeroed in place
        shape = (n, self.ny, self.nx)
        upsample = self.smoother.upsample
        if finite is None:
            keep = None
            drop = upsample(~mask, shape, ws).reshape(n, -1)
            np.copyto(values, 0, where=drop)
            block_finite = np.ones(n_pix, dtype=bool)
            block_valid = upsample(np.logical_or.reduce(mask, axis=0)[None],
                                   (1, self.ny, self.nx)).reshape(-1)
        else:
            keep = finite[inner].reshape(n, -1)
            block_finite = np.logical_or.reduce(keep, axis=0)
            keep = keep & upsample(mask, shape).reshape(n, -1)
            np.copyto(values, 0, where=~keep)
            block_valid = np.logical_or.reduce(keep, axis=0)
        block_sums = weights @ values
        block_err = None
        if self.with_errors:
            dv2 = dv ** 2
            err_weights = np.stack([dv2 * u_kms ** k for k in range(5)])
            if self.cube.variance is not None:
                if keep is None:
                    keep = ~drop
                var = _read(self.cube, c0, c1, variance=True).reshape(n, -1)
                var = np.where(keep, var, 0)
                block_err = err_weights.astype(var.dtype) @ var
            else:
                # sum_c w_c keep_c s^2 = s^2 x (sum_c w_c keep_c)
                ew = err_weights.astype(values.dtype)
                if keep is None:  # kept voxels are whole bins of the mask
                    my, mx = mask.shape[1:]
                    binned = ew @ mask.reshape(n, -1).astype(values.dtype)
                    counts = upsample(binned.reshape(5, my, mx),
                                      (5, self.ny, self.nx)).reshape(5, -1)
                else:
                    counts = ew @ keep.astype(values.dtype)
                block_err = counts * self.sigma2
        return block_sums, block_err, block_finite, block_valid


def _in_order(work: Callable[[tuple[int, int]], tuple],
              jobs: Sequence[tuple[int, int]], cancel: CancelFlag | None
              ) -> Iterator[tuple[tuple[int, int], tuple]]:
    """``(job, work(job))`` in job order, computed on up to ``_WORKERS``
    threads with at most ``workers + 1`` blocks in flight (bounded memory).
    The caller accumulates in job order, so the result is the same as a
    serial run. ``cancel`` is checked before each block."""
    workers = max(1, min(_WORKERS, len(jobs)))
    # a pool even for one worker: its threads' work arrays end with it
    pool = ThreadPoolExecutor(max_workers=workers,
                              thread_name_prefix="gyrometer-moments")
    try:
        queue = iter(jobs)
        pending = deque()
        for job in queue:
            pending.append((job, pool.submit(work, job)))
            if len(pending) > workers:
                break
        while pending:
            check_cancel(cancel, "moment maps")
            job, future = pending.popleft()
            result = future.result()
            following = next(queue, None)
            if following is not None:
                pending.append((following, pool.submit(work, following)))
            yield job, result
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _signal_mask(block: np.ndarray, smoother: _Smoother,
                 settings: MomentSettings, sigma_smooth: np.ndarray | None,
                 cube: Cube, read: tuple[int, int], window: tuple[int, int],
                 ws: _Workspace | None = None) -> np.ndarray:
    """Smooth, clip at snr_threshold x smoothed noise, dilate.

    ``block`` holds channels ``read[0]:read[1]`` with NaN set to 0. The
    mask is returned on the smoother's binned grid (see
    :meth:`_Smoother.upsample`).
    """
    smooth = smoother.data(block, ws)
    if sigma_smooth is not None:
        limit = (settings.snr_threshold * sigma_smooth[None]).astype(smooth.dtype)
    else:
        var = _read(cube, *read, variance=True)
        np.copyto(var, 0, where=~np.isfinite(var))
        limit = settings.snr_threshold * np.sqrt(smoother.variance(var))
    with np.errstate(invalid="ignore"):
        above = np.greater(smooth, limit,
                           out=_empty(ws, "above", smooth.shape, bool))
    channels = np.arange(*read)
    above &= ((channels >= window[0]) & (channels < window[1]))[:, None, None]
    if settings.dilation_channels:
        above = _grow(above, settings.dilation_channels, (0,))
    if settings.dilation_pixels:
        reach = -(-settings.dilation_pixels // smoother.bin)
        above = _grow(above, reach, (1, 2))
    return above


def _assemble(cube: Cube, settings: MomentSettings, sums: np.ndarray,
              err_sums: np.ndarray | None, any_valid: np.ndarray,
              any_finite: np.ndarray, v_ref: float,
              shape: tuple[int, int]) -> MapSet:
    s0, s1, s2 = sums
    with np.errstate(divide="ignore", invalid="ignore"):
        mom0 = np.where(any_finite, s0, np.nan)
        good = any_valid & (s0 > 0)
        mean_u = np.where(good, s1 / s0, np.nan)
        var_v = s2 / s0 - mean_u ** 2
        mom1 = v_ref + mean_u
        mom2 = np.where(good & (var_v >= 0), np.sqrt(np.maximum(var_v, 0)),
                        np.nan)
        errs: list[np.ndarray | None] = [None, None, None]
        if err_sums is not None:
            w0, w1, w2, w3, w4 = err_sums
            err0 = np.where(any_finite, np.sqrt(w0), np.nan)
            # sum w (u - mu)^2 with mu = mean_u
            central2 = w2 - 2 * mean_u * w1 + mean_u ** 2 * w0
            err1 = np.sqrt(np.maximum(central2, 0)) / s0
            # sum w ((u - mu)^2 - m2^2)^2, expanded in powers of u
            beta = -2 * mean_u
            gamma = mean_u ** 2 - var_v
            quartic = (w4 + 2 * beta * w3 + (beta ** 2 + 2 * gamma) * w2
                       + 2 * beta * gamma * w1 + gamma ** 2 * w0)
            err2 = np.sqrt(np.maximum(quartic, 0)) / (2 * mom2 * s0)
            err2 = np.where(mom2 > 0, err2, np.nan)
            errs = [err0, np.where(good, err1, np.nan), err2]
    from .lines import get_line

    tracer = settings.tracer
    if tracer is None and settings.line:
        tracer = get_line(settings.line).tracer
    try:
        unit = (u.Unit(cube.unit, parse_strict="raise") * u.km / u.s
                ).to_string() if cube.unit else "km / s"
    except Exception:  # unparseable BUNIT: keep the text
        unit = f"{cube.unit} km/s"
    reshape = (lambda a: None if a is None else a.reshape(shape))
    return MapSet(
        intensity=reshape(mom0), velocity_kms=reshape(mom1), wcs=cube.wcs,
        intensity_err=reshape(errs[0]), velocity_err_kms=reshape(errs[1]),
        dispersion_kms=reshape(mom2), dispersion_err_kms=reshape(errs[2]),
        intensity_unit=unit, name=cube.name, tracer=tracer or "other",
        psf_fwhm_arcsec=cube.psf_fwhm_arcsec,
        velocity_convention=(settings.convention
                             or cube.spectral.convention),
        specsys=cube.spectral.specsys, provenance=(cube.provenance,))
