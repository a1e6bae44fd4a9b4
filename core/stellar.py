"""Pattern speeds from absorption-line cubes: the slit-spectra route.

For each pseudo-slit the spaxel spectra inside the slit are summed with the
slit's pixel weights. The surface-brightness-weighted mean velocity along
the slit, ``<V>``, is the mean velocity of that summed spectrum, because a
sum of spectra has the brightness-weighted sum of the spaxels' LOSVDs as
its LOSVD; ``<X>`` comes from the continuum intensity (integrated over a
band) along the slit. This is the integrated-spectrum form of the
Tremaine & Weinberg (1984, ApJ 282, L5) method used with long slits
(Merrifield & Kuijken 1995, MNRAS 274, 933).

``<V>`` of each slit is the first moment of the LOSVD fitted to the summed
spectrum in log-wavelength space (:mod:`gyrometer.core.losvd`), minus
``V_sys``. By default the LOSVD is a non-negative binned (piecewise-linear)
distribution started from a Gauss-Hermite fit: a slit across a rotating disk
has a broad, flat-topped or double-horned LOSVD that a Gauss-Hermite series
to h4 misses, biasing its first moment by several per cent (measured on the
synthetic cubes of :mod:`gyrometer.core.synthetic_stellar`); the
Gauss-Hermite first moment ``V + sqrt(3) sigma h3 / (1 + sqrt(6)/4 h4)``
(van der Marel & Franx 1993, ApJ 407, 525) is the alternative. The error
of ``<V>`` comes from a noise Monte Carlo on the summed spectrum (draws on
the native channels, propagated through the same resampling and fit; a
galaxy template is perturbed by its own noise in each draw). The line fit across slits, the warnings and the
result class are those of the other routes (:mod:`gyrometer.core.tw`).

The cube is read once, channel chunk by channel chunk, through a sparse
weight matrix, so a cube larger than memory (a memory map) is never loaded
whole. Pixels are grouped in rows of one pixel along ``X`` as in
:mod:`gyrometer.core.tw`: a pixel with a NaN anywhere in the channels read
removes its row, and, in symmetric mode, the mirror row ``X -> -X``, from
both the spectrum and the continuum sums.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Sequence

import astropy.units as u
import numpy as np
import scipy.sparse

from . import tw as _tw
from .coords import sky_grid, sky_to_lon
from .dataset import Cube
from .errors import DataContentError, FitError, SpectralAxisError
from .geometry import DiskGeometry
from .losvd import (C_KMS, LogGrid, LosvdFitOptions, SpectrumFit, Template,
                    fit_spectrum, fourier_shift, mask_from_ranges,
                    prepare_template, read_template, resampling_matrix,
                    shift_to_cz)
from .progress import CancelFlag, ProgressCallback, check_cancel, report
from .results import SlitIntegrals, TWMeasurement
from .slits import Slit, SlitSet, SlitWeights, slit_weights
from .yorkfit import york_slopes

__all__ = [
    "StellarSettings",
    "SlitSpectra",
    "SlitSpectrumFit",
    "AbsorptionResult",
    "slit_spectra",
    "galaxy_template",
    "measure_absorption",
    "DEFAULT_SKY_LINES_A",
]

#: Bright night-sky emission lines often left as residuals, air Angstrom:
#: [O I] 5577.34, 6300.30, 6363.78 (from memory; common practice to mask).
DEFAULT_SKY_LINES_A = (5577.34, 6300.30, 6363.78)


@dataclass(frozen=True)
class StellarSettings:
    """Settings of the absorption-line route.

    Attributes
    ----------
    fit_window_A : tuple of float or None
        Observed-frame wavelength range fitted, Angstrom (default: the
        cube's range less 1 % at each end).
    continuum_band_A : tuple of float or None
        Observed-frame band whose integrated intensity is the surface
        brightness for ``<X>`` (default: the fit window).
    emission_lines_A : tuple of float or None
        Rest wavelengths (the cube's medium, air or vacuum) of emission
        lines to mask; None = the built-in ionised-gas lines of
        :mod:`gyrometer.core.lines`.
    emission_halfwidth_kms : float
        Half-width of each emission-line mask, km/s, about
        ``lambda (1 + V_sys / c)``.
    sky_lines_A : tuple of float
        Observed wavelengths of sky lines to mask.
    sky_halfwidth_A : float
        Half-width of each sky mask, Angstrom.
    mask_ranges_A : tuple of (float, float)
        Further observed-frame ranges to mask, Angstrom.
    multiplicative_degree, additive_degree : int
        Legendre polynomial degrees (see
        :class:`~gyrometer.core.losvd.LosvdFitOptions`).
    n_hermite : int
        0 (Gaussian), 2 (h3, h4) or 4 (to h6).
    losvd : {'binned', 'gauss-hermite'}
        Whose first moment is ``<V>``: a non-negative binned LOSVD started
        from the Gauss-Hermite fit (default; follows the broad,
        double-horned LOSVD of a long slit across a rotating disk), or the
        Gauss-Hermite series itself (see :class:`~gyrometer.core.losvd.LosvdFitOptions`).
    bin_kms : float or None
        Node spacing of the binned LOSVD (default: the log-grid step).
    v_range_kms : float
        Search range of the mean velocity about ``V_sys``.
    template : str
        ``"galaxy"`` (built from the central spaxels) or the path of a 1D
        FITS spectrum (:func:`gyrometer.core.losvd.read_template`).
    template_radius_arcsec : float
        Radius of the central aperture of a galaxy template.
    template_min_spaxels : int
        The aperture grows to hold at least this many spaxels: the
        template's noise is not part of the Monte Carlo, so it should be
        well above the slits' signal-to-noise.
    template_iterations : int
        Align-and-stack iterations of a galaxy template.
    template_groups : int
        The aperture's spaxels are summed in this many equal-count bins of
        ``X`` (along the line of nodes, where the rotation is nearly
        constant) before the bins are aligned and stacked.
    step_kms : float or None
        Log-wavelength pixel, km/s (default: the cube's finest velocity
        step).
    n_mc : int
        Noise Monte Carlo draws per slit (0 = formal errors only).
    seed : int
        Seed of the Monte Carlo generator when none is passed.
    chunk_channels : int
        Channels read at a time.
    """

    fit_window_A: tuple[float, float] | None = None
    continuum_band_A: tuple[float, float] | None = None
    emission_lines_A: tuple[float, ...] | None = None
    emission_halfwidth_kms: float = 400.0
    sky_lines_A: tuple[float, ...] = DEFAULT_SKY_LINES_A
    sky_halfwidth_A: float = 4.0
    mask_ranges_A: tuple[tuple[float, float], ...] = ()
    multiplicative_degree: int = 3
    additive_degree: int = -1
    n_hermite: int = 2
    losvd: str = "binned"
    bin_kms: float | None = None
    v_range_kms: float = 800.0
    template: str = "galaxy"
    template_radius_arcsec: float = 1.5
    template_min_spaxels: int = 25
    template_groups: int = 9
    template_iterations: int = 2
    step_kms: float | None = None
    n_mc: int = 30
    seed: int = 20240611
    chunk_channels: int = 128

    def __post_init__(self) -> None:
        for name in ("fit_window_A", "continuum_band_A"):
            value = getattr(self, name)
            if value is not None:
                if (len(value) != 2 or not all(np.isfinite(value))
                        or value[0] <= 0 or value[1] <= value[0]):
                    raise FitError(f"{name} must be (low, high) in Angstrom "
                                         "with 0 < low < high", keyword=name,
                                         value=value)
                object.__setattr__(self, name, (float(value[0]), float(value[1])))
        if self.n_mc < 0 or self.template_iterations < 0:
            raise FitError("n_mc and template_iterations must be >= 0",
                                 keyword="n_mc/template_iterations",
                                 value=(self.n_mc, self.template_iterations))
        if self.template_radius_arcsec <= 0:
            raise FitError("template_radius_arcsec must be positive",
                                 keyword="template_radius_arcsec",
                                 value=self.template_radius_arcsec)
        # validates the fit options early
        self.fit_options()

    def fit_options(self) -> LosvdFitOptions:
        return LosvdFitOptions(n_hermite=self.n_hermite,
                               multiplicative_degree=self.multiplicative_degree,
                               additive_degree=self.additive_degree,
                               v_range_kms=self.v_range_kms,
                               losvd=self.losvd, bin_kms=self.bin_kms)


@dataclass(frozen=True, eq=False)
class SlitSpectra:
    """Summed spectra of slits and their continuum integrals.

    Attributes
    ----------
    wave_A : numpy.ndarray
        Observed wavelengths of the channels read (increasing), Angstrom.
    flux : numpy.ndarray
        ``(n_slit, n_chan)``: ``sum_p w_p I_p(lambda)`` over the used pixels.
    variance : numpy.ndarray or None
        ``sum_p w_p^2 var_p(lambda)``; None when the cube has no variance.
    integrals : SlitIntegrals
        ``<X>`` (with errors), continuum flux, pixel counts, coverage and
        truncation, from the band-integrated intensity; ``v_mean_kms`` is 0
        until the spectra are fitted.
    continuum_map : numpy.ndarray
        ``(ny, nx)`` band-integrated intensity of the pixels read (NaN
        elsewhere), intensity unit times Angstrom.
    extra_flux, extra_variance : numpy.ndarray or None
        Spectra of the extra pixels requested (e.g. a template aperture).
    """

    wave_A: np.ndarray
    flux: np.ndarray
    variance: np.ndarray | None
    integrals: SlitIntegrals
    continuum_map: np.ndarray
    extra_flux: np.ndarray | None = None
    extra_variance: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class SlitSpectrumFit:
    """One slit's summed spectrum and its best fit, for display and checks.

    Attributes
    ----------
    wave_A : numpy.ndarray
        Observed wavelengths of the log-wavelength grid, Angstrom.
    flux, error, model : numpy.ndarray
        Summed spectrum, its 1-sigma error (NaN without variance) and the
        best-fit model on that grid.
    good : numpy.ndarray of bool
        Pixels used by the fit.
    mean_velocity_kms : float
        ``<V>``: first moment of the fitted LOSVD as an optical velocity,
        minus ``V_sys``.
    mean_velocity_err_kms : float
        Its error: half the 16-84 percentile range of the Monte Carlo draws
        (the formal error when ``n_mc = 0``).
    v0_kms, sigma_kms : float
        Gauss-Hermite centre (relative to ``V_sys``, in ``c ln lambda``) and
        width.
    h : tuple of float
        ``(h3, h4, ...)``.
    reduced_chi2 : float
    snr : float
        Median flux / error over the fitted pixels.
    draws_kms : numpy.ndarray
        Monte Carlo draws of ``<V>``.
    message : str
        Empty, or why the slit could not be fitted.
    """

    wave_A: np.ndarray
    flux: np.ndarray
    error: np.ndarray
    model: np.ndarray
    good: np.ndarray
    mean_velocity_kms: float
    mean_velocity_err_kms: float
    v0_kms: float
    sigma_kms: float
    h: tuple[float, ...]
    reduced_chi2: float
    snr: float
    draws_kms: np.ndarray
    message: str = ""


@dataclass(frozen=True, eq=False)
class AbsorptionResult:
    """Result of :func:`measure_absorption`.

    Attributes
    ----------
    measurement : TWMeasurement
        ``route = "absorption"``; feeds the usual diagnostics, uncertainty
        budget and resonance steps.
    slit_fits : tuple of SlitSpectrumFit
        One per slit, in order.
    template : Template
        The template used (rest frame).
    settings : StellarSettings
    grid : LogGrid
        The log-wavelength grid of the fits.
    continuum_map : numpy.ndarray
        Band-integrated intensity of the pixels read.
    omega_p_draws_kms_arcsec : numpy.ndarray
        Omega_p of each noise Monte Carlo draw (all slits of draw ``j``
        refitted across slits with the York regression and the nominal
        errors), km/s/arcsec: the "noise" term of an uncertainty budget.
        Empty when ``n_mc = 0``.
    """

    measurement: TWMeasurement
    slit_fits: tuple[SlitSpectrumFit, ...]
    template: Template
    settings: StellarSettings
    grid: LogGrid
    continuum_map: np.ndarray
    omega_p_draws_kms_arcsec: np.ndarray = field(default_factory=lambda: np.empty(0))


# -- reading the cube -----------------------------------------------------------
def _wavelengths_A(cube: Cube) -> np.ndarray:
    axis = cube.spectral
    family = axis.ctype.upper()[:4]
    if family not in ("WAVE", "AWAV"):
        raise SpectralAxisError(
            "the absorption-line route needs a wavelength axis (WAVE or AWAV)",
            path=cube.provenance.path or None, hdu=cube.provenance.hdu or None,
            keyword="CTYPE3", value=axis.ctype,
            hint="use the cube or moment-map route for velocity or frequency axes")
    try:
        wave = (np.asarray(axis.values, float) * u.Unit(axis.unit or "Angstrom")
                ).to_value(u.AA)
    except (ValueError, u.UnitsError) as exc:
        raise SpectralAxisError("the wavelength unit is not a length",
                                path=cube.provenance.path or None,
                                keyword="CUNIT3", value=axis.unit) from exc
    if wave.size < 16 or not np.all(np.isfinite(wave)) or np.any(wave <= 0):
        raise SpectralAxisError("the wavelength axis is too short or invalid",
                                path=cube.provenance.path or None,
                                keyword="CTYPE3", value=wave.size)
    d = np.diff(wave)
    if not (np.all(d > 0) or np.all(d < 0)):
        raise SpectralAxisError("the wavelengths are not monotonic",
                                path=cube.provenance.path or None, keyword="CDELT3")
    return wave


def _channel_range(wave: np.ndarray, ranges) -> np.ndarray:
    """Indices of channels inside any of the ``(lo, hi)`` ranges."""
    keep = np.zeros(wave.size, bool)
    for lo, hi in ranges:
        keep |= (wave >= lo) & (wave <= hi)
    return np.flatnonzero(keep)


def slit_spectra(cube: Cube, weights: Sequence[SlitWeights], *,
                 window_A: tuple[float, float] | None = None,
                 band_A: tuple[float, float] | None = None,
                 symmetric: bool = True, extra_pixels=None,
                 offsets_arcsec=None, half_lengths_arcsec=None,
                 chunk_channels: int = 128,
                 progress: ProgressCallback | None = None,
                 cancel: CancelFlag | None = None) -> SlitSpectra:
    """Sum the spectra of each slit's pixels, streaming the cube once.

    Parameters
    ----------
    cube : Cube
        Wavelength axis (``WAVE``/``AWAV``); ``data`` may be a memory map.
    weights : sequence of SlitWeights
        From :func:`gyrometer.core.slits.slit_weights` for this cube.
    window_A : (float, float), optional
        Observed wavelengths to sum (default: all channels).
    band_A : (float, float), optional
        Continuum band for ``<X>`` (default: the window).
    symmetric : bool
        Mirror dropped rows ``X -> -X`` (see module notes).
    extra_pixels : array_like of int, optional
        Flat pixel indices whose individual spectra are also returned.
    offsets_arcsec, half_lengths_arcsec : array_like, optional
        Stored in the integrals.
    chunk_channels : int
    progress, cancel
        See :mod:`gyrometer.core.progress`.

    Returns
    -------
    SlitSpectra

    Notes
    -----
    Row sums ``R @ block`` with a sparse ``R`` (rows = slit x one-pixel X
    bin, columns = the pixels touched) cost ``O(nnz x channels)``; memory is
    ``O(rows x channels)`` plus one chunk.
    """
    wave_all = _wavelengths_A(cube)
    weights = _tw._check_weights(weights, cube.spatial_shape)
    layout = _tw._layout(weights)
    ny, nx = cube.spatial_shape
    lo_all, hi_all = float(np.min(wave_all)), float(np.max(wave_all))
    window = window_A or (lo_all, hi_all)
    band = band_A or window
    chans = _channel_range(wave_all, [window, band])
    if chans.size < 16:
        raise DataContentError("fewer than 16 channels inside the fit window",
                               path=cube.provenance.path or None,
                               keyword="fit_window_A", value=window,
                               hint=f"the cube covers {lo_all:.1f}-{hi_all:.1f} Angstrom")
    c_first, c_last = int(chans.min()), int(chans.max())
    in_window = (wave_all[c_first:c_last + 1] >= window[0]) & (
        wave_all[c_first:c_last + 1] <= window[1])
    in_band = (wave_all[c_first:c_last + 1] >= band[0]) & (
        wave_all[c_first:c_last + 1] <= band[1])
    if not in_band.any():
        raise DataContentError("no channel inside the continuum band",
                               path=cube.provenance.path or None,
                               keyword="continuum_band_A", value=band)
    dlam = np.abs(np.gradient(wave_all))[c_first:c_last + 1]
    inside = layout.flat >= 0
    extra = (np.empty(0, np.int64) if extra_pixels is None
             else np.asarray(extra_pixels, np.int64).ravel())
    if extra.size and (extra.min() < 0 or extra.max() >= ny * nx):
        raise DataContentError("extra pixel index outside the map", value=extra)
    union, inv = np.unique(np.concatenate([layout.flat[inside], extra]),
                           return_inverse=True)
    col_entry = np.zeros(layout.flat.size, np.int64)
    col_entry[inside] = inv[:int(inside.sum())]
    col_extra = inv[int(inside.sum()):]
    n_rows = layout.row_slit.size
    rmat = scipy.sparse.csr_matrix(
        (layout.weight[inside], (layout.row[inside], col_entry[inside])),
        shape=(n_rows, union.size))
    rmat2 = rmat.multiply(rmat).tocsr()
    # Single-precision data are multiplied in single precision: a row holds a
    # handful of pixels (one pixel along X), so the relative rounding is
    # ~1e-7; rows are then accumulated in double precision.
    dtype = np.float32 if np.dtype(cube.data.dtype).itemsize <= 4 else np.float64
    rmat = rmat.astype(dtype)
    rmat2 = rmat2.astype(dtype)
    n_chan = c_last - c_first + 1
    has_var = cube.variance is not None
    row_flux = np.zeros((n_rows, n_chan), dtype)
    row_var = np.zeros((n_rows, n_chan), dtype) if has_var else None
    ex_flux = np.zeros((extra.size, n_chan))
    ex_var = np.zeros((extra.size, n_chan)) if has_var else None
    cont = np.zeros(union.size)
    cont_var = np.zeros(union.size)
    bad_pix = np.zeros(union.size, bool)
    step = max(1, int(chunk_channels))
    for start in range(0, n_chan, step):
        check_cancel(cancel, "summing slit spectra")
        stop = min(start + step, n_chan)
        sl = slice(c_first + start, c_first + stop)
        block = _read_block(cube.data, sl, ny * nx, union, dtype)
        nan = ~np.isfinite(block)
        if nan.any():
            bad_pix |= nan.any(axis=0)
            block[nan] = 0.0
        # (a C-ordered transpose makes the sparse product 3-4x faster)
        row_flux[:, start:stop] = rmat @ np.ascontiguousarray(block.T)
        ex_flux[:, start:stop] = block[:, col_extra].T
        band_w = np.where(in_band[start:stop], dlam[start:stop], 0.0).astype(dtype)
        if band_w.any():
            cont += band_w @ block
        if has_var:
            vb = _read_block(cube.variance, sl, ny * nx, union, dtype)
            vnan = ~np.isfinite(vb)
            if vnan.any():
                bad_pix |= vnan.any(axis=0)
                vb[vnan] = 0.0
            row_var[:, start:stop] = rmat2 @ np.ascontiguousarray(vb.T)
            ex_var[:, start:stop] = vb[:, col_extra].T
            if band_w.any():
                cont_var += (band_w * band_w) @ vb
        report(progress, stop, n_chan, "summing slit spectra")
    # rows, masking and <X> exactly as the other routes
    valid = inside & ~bad_pix[col_entry]
    masked_rows = np.bincount(layout.row, weights=layout.weight * (inside & ~valid),
                              minlength=n_rows) > 0
    if not symmetric:
        # a row's spectrum keeps a NaN pixel's other channels, so the whole
        # row goes (pixels beyond the map edge only shorten it)
        valid &= ~masked_rows[layout.row]
    bad = _tw._row_bad(layout, valid)
    zeros = np.zeros(layout.flat.size)
    s = np.where(valid, cont[col_entry], 0.0)
    var_s = np.where(valid, cont_var[col_entry], 0.0) if has_var else np.full(s.shape, np.nan)
    terms = (s, zeros, var_s, zeros if has_var else var_s, zeros if has_var else var_s)
    sums = _tw._row_sums(layout, terms, valid)
    n = len(weights)
    offsets = np.full(n, np.nan) if offsets_arcsec is None else offsets_arcsec
    halves = np.full(n, np.nan) if half_lengths_arcsec is None else half_lengths_arcsec
    integrals = _tw._reduce(layout, sums, bad, symmetric, np.asarray(offsets, float),
                            np.asarray(halves, float))
    use = _tw._used_rows(layout, bad, symmetric)
    if not symmetric:
        use &= ~masked_rows
    keep = use[:, None].astype(dtype)
    flux = np.add.reduceat(row_flux * keep, layout.row_start, axis=0, dtype=np.float64)
    var = (np.add.reduceat(row_var * keep, layout.row_start, axis=0, dtype=np.float64)
           if has_var else None)
    if extra.size:  # a spaxel with any NaN gives no spectrum
        ex_flux[bad_pix[col_extra]] = np.nan
    cmap = np.full(ny * nx, np.nan)
    cmap[union] = np.where(bad_pix, np.nan, cont)
    wave = wave_all[c_first:c_last + 1]
    order = np.argsort(wave)
    sel = order[in_window[order]]
    return SlitSpectra(
        wave_A=wave[sel], flux=flux[:, sel],
        variance=None if var is None else var[:, sel],
        integrals=integrals, continuum_map=cmap.reshape(ny, nx),
        extra_flux=ex_flux[:, sel] if extra.size else None,
        extra_variance=(ex_var[:, sel] if (extra.size and has_var) else None))


def _read_block(array, channels: slice, n_pix: int, columns: np.ndarray, dtype):
    """Channels ``channels`` of a (possibly memory-mapped, big-endian) cube,
    only the pixel ``columns``, as a native ``dtype`` array (n_chan, n_col)."""
    raw = np.asarray(array[channels])
    return raw.reshape(raw.shape[0], n_pix)[:, columns].astype(dtype, copy=False)


# -- resampling helper ---------------------------------------------------------
class _Rebinner:
    """Native channels -> log-wavelength grid, flux conserving."""

    def __init__(self, wave_A: np.ndarray, grid: LogGrid):
        self.matrix, self.coverage = resampling_matrix(wave_A, grid)
        self.matrix_t = self.matrix.T.tocsr()
        self.matrix2_t = self.matrix.multiply(self.matrix).T.tocsr()
        self.ok = self.coverage >= 0.999

    def flux(self, f: np.ndarray) -> np.ndarray:
        f = np.where(np.isfinite(f), f, 0.0)
        out = np.asarray(f @ self.matrix_t)
        return np.where(self.ok, out, np.nan)

    def variance(self, v: np.ndarray | None):
        if v is None:
            return None
        v = np.where(np.isfinite(v), v, 0.0)
        out = np.asarray(v @ self.matrix2_t)
        return np.where(self.ok, out, np.nan)


# -- galaxy template -------------------------------------------------------------
def galaxy_template(grid: LogGrid, spectra: np.ndarray, variances: np.ndarray | None,
                    vsys_kms: float, *, iterations: int = 2, good=None,
                    options: LosvdFitOptions | None = None, air: bool | None = None,
                    origin: str = "galaxy centre") -> Template:
    """A rest-frame template stacked from a galaxy's own spectra.

    The spectra (on ``grid``) are summed; then, ``iterations`` times, each is
    fitted against the current stack with a Gaussian LOSVD, shifted back by
    its velocity (relative to the flux-weighted mean, so the frame does not
    drift) with an exact Fourier shift, and re-summed. The stack is put at
    rest by dividing the wavelengths by ``1 + V_sys / c``: the central
    aperture's mean velocity is taken to be ``V_sys`` (an offset only moves
    the intercept of the ``<V>``-``<X>`` fit, not the slope).
    """
    spectra = np.atleast_2d(np.asarray(spectra, float))
    if spectra.shape[1] != grid.size:
        raise DataContentError("template spectra and grid differ in length")
    total = np.nansum(spectra, axis=0)
    finite = np.all(np.isfinite(spectra), axis=0)
    opts = options or LosvdFitOptions(n_hermite=0)
    opts = replace(opts, n_hermite=0)
    rest = grid.wave_A / (1.0 + vsys_kms / C_KMS)
    template = Template(rest[finite], total[finite], air=air, origin=origin)
    if spectra.shape[0] < 2:
        return template
    for _ in range(int(iterations)):
        pt = prepare_template(template, grid, ref_kms=vsys_kms)
        n_spec = spectra.shape[0]
        shifts = np.full(n_spec, np.nan)
        flux = np.maximum(np.nansum(spectra, axis=1), 0.0)
        for k in range(n_spec):
            var = None if variances is None else variances[k]
            try:
                shifts[k] = fit_spectrum(spectra[k], var, pt, options=opts,
                                         good=good).mean_shift_kms
            except FitError:
                continue
        ok = np.isfinite(shifts)
        if ok.sum() < 2:
            break
        mean = (float(np.average(shifts[ok], weights=flux[ok]))
                if flux[ok].sum() > 0 else float(np.mean(shifts[ok])))
        stack = np.zeros(grid.size)
        idx = np.flatnonzero(finite)
        for k in np.flatnonzero(ok):
            s = np.interp(np.arange(grid.size), idx, spectra[k][idx])
            stack += fourier_shift(s, -(shifts[k] - mean) / grid.step_kms)
        template = Template(rest[finite], stack[finite], air=air, origin=origin)
    return template


# -- the measurement -----------------------------------------------------------
def _emission_lines(air: bool) -> tuple[float, ...]:
    from .lines import list_lines
    out = []
    for line in list_lines():
        if line.tracer == "ionised gas" and line.vacuum_angstrom is not None:
            out.append(line.air_angstrom if air else line.vacuum_angstrom)
    return tuple(out)


def _good_pixels(grid: LogGrid, settings: StellarSettings, vsys_kms: float,
                 air: bool) -> np.ndarray:
    wave = grid.wave_A
    lines = (settings.emission_lines_A if settings.emission_lines_A is not None
             else _emission_lines(air))
    z1 = 1.0 + vsys_kms / C_KMS
    hw = settings.emission_halfwidth_kms / C_KMS
    ranges = [(lam * z1 * (1 - hw), lam * z1 * (1 + hw)) for lam in lines]
    ranges += [(lam - settings.sky_halfwidth_A, lam + settings.sky_halfwidth_A)
               for lam in settings.sky_lines_A]
    ranges += list(settings.mask_ranges_A)
    return ~mask_from_ranges(wave, ranges)


def _template_pixels(cube: Cube, geometry: DiskGeometry, radius_arcsec: float,
                     min_pixels: int, n_groups: int,
                     max_pixels: int = 2000) -> tuple[np.ndarray, np.ndarray]:
    """Flat indices of the central aperture (at least ``min_pixels``) and a
    group label per pixel: ``n_groups`` equal-count bins of ``X`` (along the
    line of nodes), where the rotation velocity is nearly constant."""
    grid = sky_grid(cube.wcs, cube.spatial_shape, geometry.ra_deg, geometry.dec_deg)
    r = np.hypot(grid.east_arcsec, grid.north_arcsec).ravel()
    order = np.argsort(r)
    n = max(int(np.count_nonzero(r <= radius_arcsec)), int(min_pixels), 1)
    n = min(n, r.size)
    # keep whole rings of equal distance, so a symmetric aperture stays symmetric
    limit = r[order[n - 1]] * (1.0 + 1e-9) + 1e-12
    inside = order[r[order] <= limit][:max_pixels]
    x, _ = sky_to_lon(grid.east_arcsec.ravel()[inside],
                      grid.north_arcsec.ravel()[inside], geometry.pa_deg)
    labels = np.empty(inside.size, np.int64)
    for g, part in enumerate(np.array_split(np.argsort(x, kind="stable"),
                                            max(1, min(n_groups, inside.size)))):
        labels[part] = g
    return inside, labels


def _resolve_template(cube: Cube, settings: StellarSettings, template) -> Template | None:
    if template is None and settings.template != "galaxy":
        template = read_template(settings.template)
    if template is None:
        return None
    cube_air = bool(cube.spectral.air)
    if template.air is not None and template.air != cube_air:
        from .spectral import air_to_vacuum, vacuum_to_air
        wave = (air_to_vacuum(template.wave_A) if template.air
                else vacuum_to_air(template.wave_A))
        template = Template(np.asarray(wave), template.flux, air=cube_air,
                            origin=template.origin + (" (to vacuum)" if template.air
                                                      else " (to air)"))
    return template


def _half_range(draws: np.ndarray) -> float:
    draws = draws[np.isfinite(draws)]
    if draws.size < 2:
        return float("nan")
    p16, p84 = np.percentile(draws, [16.0, 84.0])
    return 0.5 * float(p84 - p16)


def _empty_fit(grid: LogGrid, flux, error, message: str) -> SlitSpectrumFit:
    nan = float("nan")
    return SlitSpectrumFit(grid.wave_A, flux, error, np.full(grid.size, np.nan),
                           np.zeros(grid.size, bool), nan, nan, nan, nan, (), nan, nan,
                           np.empty(0), message)


def measure_absorption(cube: Cube, geometry: DiskGeometry,
                       slits: SlitSet | Sequence[Slit],
                       settings: StellarSettings = StellarSettings(), *,
                       template: Template | None = None,
                       rng: np.random.Generator | None = None,
                       symmetric: bool | None = None, exclude: Sequence[int] = (),
                       weights: Sequence[SlitWeights] | None = None,
                       warn: bool = True,
                       progress: ProgressCallback | None = None,
                       cancel: CancelFlag | None = None) -> AbsorptionResult:
    """Measure a pattern speed from the slit spectra of an absorption-line cube.

    Parameters
    ----------
    cube : Cube
        Wavelength axis (``WAVE`` or ``AWAV``), linear or logarithmic.
    geometry : DiskGeometry
        ``vsys_kms`` is an optical velocity (cz).
    slits : SlitSet or sequence of Slit
    settings : StellarSettings
    template : Template, optional
        Overrides ``settings.template`` (e.g. a synthetic template).
    rng : numpy.random.Generator, optional
        Noise Monte Carlo (default: ``default_rng(settings.seed)``).
    symmetric : bool, optional
        Defaults to ``slits.symmetric``.
    exclude : sequence of int
        Slits left out of the line fit.
    weights : sequence of SlitWeights, optional
        Precomputed weights for this cube.
    warn : bool
        Issue the diagnostics as Python warnings too.
    progress, cancel
        See :mod:`gyrometer.core.progress`.

    Returns
    -------
    AbsorptionResult
        ``measurement.route == "absorption"``. ``<V>`` of slit k is
        ``(c + V_sys) exp(u_k / c) - c - V_sys`` with ``u_k`` the first
        moment (in ``c ln lambda``, relative to ``V_sys``) of the fitted
        LOSVD (binned or Gauss-Hermite, ``settings.losvd``); its error is
        half the 16-84 percentile range of ``settings.n_mc`` noise draws. ``<X>`` and ``<V>`` errors are taken as uncorrelated (they
        come from the continuum level and from line positions).
    """
    wave_all = _wavelengths_A(cube)
    items, offsets, halves = _tw._slit_meta(slits)
    if symmetric is None:
        symmetric = getattr(slits, "symmetric", True)
    if weights is None:
        weights = slit_weights(items, geometry, cube.wcs, cube.spatial_shape)
    lo, hi = float(wave_all.min()), float(wave_all.max())
    window = settings.fit_window_A or (lo + 0.01 * (hi - lo), hi - 0.01 * (hi - lo))
    if window[1] <= lo or window[0] >= hi:
        raise DataContentError("the fit window lies outside the cube",
                               path=cube.provenance.path or None,
                               keyword="fit_window_A", value=window,
                               hint=f"the cube covers {lo:.1f}-{hi:.1f} Angstrom")
    window = (max(window[0], lo), min(window[1], hi))
    user_template = _resolve_template(cube, settings, template)
    extra = labels = None
    if user_template is None:
        extra, labels = _template_pixels(cube, geometry, settings.template_radius_arcsec,
                                         settings.template_min_spaxels,
                                         settings.template_groups)
    spectra = slit_spectra(cube, weights, window_A=window,
                           band_A=settings.continuum_band_A, symmetric=symmetric,
                           extra_pixels=extra, offsets_arcsec=offsets,
                           half_lengths_arcsec=halves,
                           chunk_channels=settings.chunk_channels,
                           progress=progress, cancel=cancel)
    wave = spectra.wave_A
    step = settings.step_kms or float(C_KMS * np.min(np.diff(wave) / wave[1:]))
    grid = LogGrid.covering(wave[0], wave[-1], step)
    rebin = _Rebinner(wave, grid)
    air = bool(cube.spectral.air)
    good = _good_pixels(grid, settings, geometry.vsys_kms, air)
    opts = settings.fit_options()
    tpl_sd = None
    if user_template is None:
        check_cancel(cancel, "building the template")
        report(progress, 0, 1, "building the galaxy template")
        ok = np.all(np.isfinite(spectra.extra_flux), axis=1)
        if not ok.any():
            raise DataContentError(
                "no valid spaxel in the central aperture for a galaxy template",
                path=cube.provenance.path or None, keyword="template",
                hint="enlarge template_radius_arcsec or give a template file")
        kept = np.unique(labels[ok], return_inverse=True)[1]
        group_flux = np.zeros((int(kept.max()) + 1, wave.size))
        np.add.at(group_flux, kept, spectra.extra_flux[ok])
        tpl_flux = rebin.flux(group_flux)
        tpl_var = None
        if spectra.extra_variance is not None:
            group_var = np.zeros_like(group_flux)
            np.add.at(group_var, kept, spectra.extra_variance[ok])
            tpl_var = rebin.variance(group_var)
        user_template = galaxy_template(
            grid, tpl_flux, tpl_var, geometry.vsys_kms,
            iterations=settings.template_iterations, good=good,
            options=opts, air=air,
            origin=f"galaxy centre ({int(ok.sum())} central spaxels)")
        if tpl_var is not None:
            finite = np.all(np.isfinite(tpl_flux), axis=0)
            tpl_sd = np.sqrt(np.maximum(np.nansum(tpl_var, axis=0)[finite], 0.0))
        report(progress, 1, 1, "building the galaxy template")
    prepared = prepare_template(user_template, grid, ref_kms=geometry.vsys_kms)
    if rng is None:
        rng = np.random.default_rng(settings.seed)
    vsys = geometry.vsys_kms
    n_slit = spectra.flux.shape[0]
    n_mc = int(settings.n_mc)
    flux_log = rebin.flux(spectra.flux)
    var_log = rebin.variance(spectra.variance)
    total = n_slit * (1 + n_mc)
    done = 0
    best: list[SpectrumFit | None] = []
    messages: list[str] = []
    for k in range(n_slit):
        check_cancel(cancel, "fitting slit spectra")
        f = flux_log[k]
        var = None if var_log is None else var_log[k]
        fit, message = None, ""
        if not (spectra.integrals.flux[k] > 0) or not np.any(np.isfinite(f) & (f != 0)):
            message = "no valid pixels in this slit"
        else:
            try:
                fit = fit_spectrum(f, var, prepared, options=opts, good=good)
            except FitError as exc:
                message = str(exc)
        best.append(fit)
        messages.append(message)
        done += 1
        report(progress, done, total, "fitting slit spectra")
    # Noise Monte Carlo: every draw perturbs all summed spectra on their
    # native channels (and a galaxy template by its own noise), then refits.
    draws = np.full((n_slit, n_mc), np.nan)
    fitted = [k for k in range(n_slit) if best[k] is not None]
    noise_log = {}
    if spectra.variance is None:  # noise level from the fit residuals
        for k in fitted:
            resid = (flux_log[k] - best[k].model)[best[k].good]
            noise_log[k] = float(np.std(resid)) if resid.size > 2 else 0.0
    sd_native = (None if spectra.variance is None
                 else np.sqrt(np.maximum(spectra.variance, 0.0)))
    for j in range(n_mc):
        check_cancel(cancel, "noise Monte Carlo")
        prepared_j = prepared
        if tpl_sd is not None:
            noisy = Template(user_template.wave_A,
                             user_template.flux + rng.normal(0.0, 1.0, tpl_sd.size) * tpl_sd,
                             air=user_template.air, origin=user_template.origin)
            prepared_j = prepare_template(noisy, grid, ref_kms=vsys)
        for k in range(n_slit):
            if best[k] is not None:
                if sd_native is not None:
                    fj = rebin.flux(spectra.flux[k]
                                    + rng.normal(0.0, 1.0, sd_native.shape[1]) * sd_native[k])
                else:
                    fj = flux_log[k] + rng.normal(0.0, noise_log[k], grid.size)
                var = None if var_log is None else var_log[k]
                try:
                    dj = fit_spectrum(fj, var, prepared_j, options=opts, good=good,
                                      start=tuple(best[k].params))
                    draws[k, j] = float(shift_to_cz(dj.mean_shift_kms, vsys) - vsys)
                except FitError:
                    pass
            done += 1
            report(progress, done, total, "fitting slit spectra")
    v_mean = np.full(n_slit, np.nan)
    v_err = np.full(n_slit, np.nan)
    fits: list[SlitSpectrumFit] = []
    for k in range(n_slit):
        f = flux_log[k]
        var = None if var_log is None else var_log[k]
        err = np.sqrt(var) if var is not None else np.full(grid.size, np.nan)
        fit = best[k]
        if fit is None:
            fits.append(_empty_fit(grid, f, err, messages[k]))
            continue
        v_mean[k] = float(shift_to_cz(fit.mean_shift_kms, vsys) - vsys)
        if n_mc:
            v_err[k] = _half_range(draws[k])
        else:  # formal error of the Gauss-Hermite first moment
            v_err[k] = float(fit.mean_shift_err_kms * (1.0 + vsys / C_KMS))
        with np.errstate(invalid="ignore", divide="ignore"):
            snr = (float(np.nanmedian((f / err)[fit.good])) if var is not None
                   else float("nan"))
        fits.append(SlitSpectrumFit(
            wave_A=grid.wave_A, flux=f, error=err, model=fit.model, good=fit.good,
            mean_velocity_kms=v_mean[k], mean_velocity_err_kms=v_err[k],
            v0_kms=fit.v0_kms, sigma_kms=fit.sigma_kms, h=fit.h,
            reduced_chi2=fit.reduced_chi2, snr=snr, draws_kms=draws[k].copy()))
    integrals = replace(spectra.integrals, v_mean_kms=v_mean, v_err_kms=v_err,
                        xv_corr=np.zeros(n_slit))
    if spectra.variance is None:
        integrals = replace(integrals, x_err_arcsec=np.zeros(n_slit))
    measurement = _tw._assemble(integrals, geometry, "absorption", tuple(exclude),
                                warn, "stars")
    omega_draws = np.empty(0)
    used = measurement.used
    if n_mc and used.sum() >= 2:
        ints = measurement.integrals
        sx = ints.x_err_arcsec[used]
        sy = ints.v_err_kms[used]
        if np.all(np.isfinite(sx)) and np.all(np.isfinite(sy)) and np.all((sx > 0) | (sy > 0)):
            y = draws[used].T                                   # (n_mc, n_used)
            x = np.broadcast_to(ints.x_mean_arcsec[used], y.shape)
            slopes = york_slopes(x, y, np.broadcast_to(sx, y.shape),
                                 np.broadcast_to(sy, y.shape))
            omega_draws = np.asarray(slopes, float) / geometry.sin_i
            omega_draws = omega_draws[np.isfinite(omega_draws)]
    return AbsorptionResult(measurement, tuple(fits), user_template, settings, grid,
                            spectra.continuum_map, omega_draws)
