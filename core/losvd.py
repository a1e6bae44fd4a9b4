"""Line-of-sight velocity distributions fitted to absorption-line spectra.

A galaxy spectrum is modelled in "velocity space", ``u = c ln(lambda)``,
where a Doppler factor ``(1 + v/c)`` becomes a shift of ``c ln(1 + v/c)``.
There the observed spectrum is the rest-frame template convolved with the
line-of-sight velocity distribution (LOSVD), times a low-order continuum
polynomial (plus, optionally, an additive polynomial):

    G(u) = P_mult(u) * [T * L](u) + P_add(u).

The LOSVD is a Gauss-Hermite series (van der Marel & Franx 1993, ApJ 407,
525, eqs. 3-4 and their normalised Hermite polynomials H_m):

    L(v) = alpha(y) / sigma * [1 + sum_{m>=3} h_m H_m(y)],
    y = (v - V) / sigma, alpha(y) = exp(-y^2 / 2) / sqrt(2 pi),

where ``H_m(y) = He_m^phys(y) / sqrt(2^m m!)`` in terms of the physicists'
Hermite polynomials. The convolution is done in Fourier space with the
exact transform of ``L`` (derived: the Hermite functions
``He_m^phys(y) exp(-y^2/2)`` are eigenfunctions of the unitary Fourier
transform with eigenvalue ``(-i)^m``, a textbook property; the same
transform is used by Cappellari 2017, MNRAS 466, 798, from memory):

    L^(k) = exp(-i k V - (k sigma)^2 / 2) [1 + sum_m h_m (-i)^m H_m(k sigma)],

so sub-pixel shifts and dispersions below one pixel are represented exactly.

Mean velocity. The peak parameter ``V`` of a skewed profile is not its mean.
We report the first moment of the fitted LOSVD,

    <v> = int v L dv / int L dv
        = V + sigma [sqrt(3) h3 + ...] / [1 + (sqrt(6)/4) h4 + ...],

which to first order is ``V + sqrt(3) sigma h3`` (van der Marel & Franx
1993, sect. 2); the exact integrals of every order are done here by
Gauss-Hermite quadrature (exact for polynomial times Gaussian), so the
normalisation term in ``h4`` is kept. A velocity in ``u`` is turned into an
optical-convention velocity (cz) by ``c (exp(u / c) - 1)``.

The linear coefficients (polynomials) are solved by weighted linear least
squares inside every evaluation of the non-linear parameters ``(V, sigma,
h3, h4, ...)`` (variable projection, Golub & Pereyra 1973, SIAM J. Numer.
Anal. 10, 413), which the :func:`scipy.optimize.least_squares` solver then
fits.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
import scipy.sparse
from numpy.polynomial import hermite as _herm
from numpy.polynomial import hermite_e as _herme
from numpy.polynomial import legendre as _leg
from scipy.optimize import least_squares

from .errors import DataContentError, FitError, InputFileError, SpectralAxisError

__all__ = [
    "C_KMS",
    "LogGrid",
    "Template",
    "PreparedTemplate",
    "LosvdFitOptions",
    "SpectrumFit",
    "pixel_edges",
    "resampling_matrix",
    "resample_spectrum",
    "gauss_hermite_losvd",
    "gauss_hermite_moments",
    "gauss_hermite_fourier",
    "shift_to_cz",
    "cz_to_shift",
    "prepare_template",
    "fit_spectrum",
    "fourier_shift",
    "mask_from_ranges",
    "read_template",
]

#: Speed of light, km/s (exact, SI definition of the metre).
C_KMS = 299792.458


# -- velocity conversions ----------------------------------------------------
def shift_to_cz(shift_kms, ref_kms: float = 0.0):
    """Optical velocity (cz) of a shift in ``u = c ln(lambda)``.

    A spectrum at optical velocity ``cz`` relative to a template at
    ``ref_kms`` is shifted by ``u = c ln((1 + cz/c) / (1 + ref/c))``
    (Doppler factors multiply), so ``cz = (c + ref) exp(u / c) - c``.
    """
    return (C_KMS + ref_kms) * np.exp(np.asarray(shift_kms, float) / C_KMS) - C_KMS


def cz_to_shift(cz_kms, ref_kms: float = 0.0):
    """Inverse of :func:`shift_to_cz`."""
    return C_KMS * np.log((C_KMS + np.asarray(cz_kms, float)) / (C_KMS + ref_kms))


# -- log-lambda grid ---------------------------------------------------------
@dataclass(frozen=True)
class LogGrid:
    """Pixels of constant width in ``ln(lambda)`` (constant velocity step).

    Attributes
    ----------
    ln_start : float
        ``ln(lambda / Angstrom)`` of the centre of pixel 0.
    step_kms : float
        Pixel width in ``u = c ln(lambda)``, km/s.
    size : int
        Number of pixels.
    """

    ln_start: float
    step_kms: float
    size: int

    def __post_init__(self) -> None:
        if not (math.isfinite(self.step_kms) and self.step_kms > 0):
            raise SpectralAxisError("log-wavelength step must be positive",
                                    keyword="step_kms", value=self.step_kms)
        if int(self.size) < 8:
            raise SpectralAxisError("a spectrum needs at least 8 pixels",
                                    keyword="size", value=self.size)
        object.__setattr__(self, "size", int(self.size))

    @property
    def step_ln(self) -> float:
        return self.step_kms / C_KMS

    @property
    def ln_wave(self) -> np.ndarray:
        return self.ln_start + self.step_ln * np.arange(self.size)

    @property
    def wave_A(self) -> np.ndarray:
        """Pixel centres, Angstrom."""
        return np.exp(self.ln_wave)

    @property
    def edges_A(self) -> np.ndarray:
        """Pixel edges (``size + 1``), Angstrom."""
        return np.exp(self.ln_start + self.step_ln * (np.arange(self.size + 1) - 0.5))

    @classmethod
    def covering(cls, wave_min_A: float, wave_max_A: float,
                 step_kms: float) -> "LogGrid":
        """Grid whose pixel centres run from ``wave_min_A`` to at most ``wave_max_A``."""
        if not 0 < wave_min_A < wave_max_A:
            raise SpectralAxisError("wavelength range must be positive and increasing",
                                    value=(wave_min_A, wave_max_A))
        n = int(math.floor(C_KMS * math.log(wave_max_A / wave_min_A) / step_kms)) + 1
        return cls(math.log(wave_min_A), float(step_kms), n)

    def extended(self, n_left: int, n_right: int) -> "LogGrid":
        """The same grid with extra pixels on both ends."""
        return LogGrid(self.ln_start - n_left * self.step_ln, self.step_kms,
                       self.size + n_left + n_right)


# -- flux-conserving resampling ----------------------------------------------
def pixel_edges(wave_A) -> np.ndarray:
    """Edges of pixels with increasing centres ``wave_A`` (mid-points; the
    outer edges extrapolated by half the neighbouring spacing)."""
    w = np.asarray(wave_A, dtype=float)
    if w.ndim != 1 or w.size < 2 or not np.all(np.diff(w) > 0):
        raise SpectralAxisError("wavelengths must be a strictly increasing 1D array")
    mid = 0.5 * (w[1:] + w[:-1])
    return np.concatenate([[w[0] - (mid[0] - w[0])], mid, [w[-1] + (w[-1] - mid[-1])]])


def resampling_matrix(src_wave_A, grid: LogGrid):
    """Sparse matrix that rebins flux densities onto ``grid``, conserving flux.

    Output pixel ``j`` gets ``sum_i f_i overlap_ij / width_j`` where
    ``overlap_ij`` is the wavelength overlap of input pixel ``i`` with output
    pixel ``j`` (exact drizzle-free rebinning of a piecewise-constant
    spectrum). Variances propagate with the squared matrix (neighbouring
    output pixels then covary; common practice ignores that in the fit,
    and the noise Monte Carlo of :mod:`gyrometer.core.stellar` perturbs the
    native pixels, which keeps it).

    Returns
    -------
    matrix : scipy.sparse.csr_matrix, shape (grid.size, len(src_wave_A))
    coverage : numpy.ndarray
        Fraction of each output pixel covered by input pixels (0..1).
    """
    src_edges = pixel_edges(src_wave_A)
    out_edges = grid.edges_A
    lo = max(src_edges[0], out_edges[0])
    hi = min(src_edges[-1], out_edges[-1])
    n_out, n_src = grid.size, src_edges.size - 1
    if hi <= lo:
        return scipy.sparse.csr_matrix((n_out, n_src)), np.zeros(n_out)
    cuts = np.union1d(src_edges[(src_edges > lo) & (src_edges < hi)],
                      out_edges[(out_edges > lo) & (out_edges < hi)])
    cuts = np.concatenate([[lo], cuts, [hi]])
    mids = 0.5 * (cuts[1:] + cuts[:-1])
    lengths = np.diff(cuts)
    i_src = np.searchsorted(src_edges, mids) - 1
    j_out = np.searchsorted(out_edges, mids) - 1
    width = np.diff(out_edges)
    values = lengths / width[j_out]
    matrix = scipy.sparse.coo_matrix((values, (j_out, i_src)),
                                     shape=(n_out, n_src)).tocsr()
    coverage = np.bincount(j_out, weights=values, minlength=n_out)
    return matrix, coverage


def resample_spectrum(src_wave_A, flux, grid: LogGrid, variance=None,
                      *, min_coverage: float = 0.999):
    """Rebin a spectrum (or a stack, last axis spectral) onto ``grid``.

    Input pixels that are NaN count as missing; output pixels covered less
    than ``min_coverage`` come out NaN.

    Returns
    -------
    flux, variance : numpy.ndarray
        Resampled; ``variance`` is None when none was given.
    """
    src_wave_A = np.asarray(src_wave_A, float)
    order = np.argsort(src_wave_A)
    flux = np.asarray(flux, float)[..., order]
    matrix, _ = resampling_matrix(src_wave_A[order], grid)
    good = np.isfinite(flux)
    if variance is not None:
        variance = np.asarray(variance, float)[..., order]
        good &= np.isfinite(variance)
    f0 = np.where(good, flux, 0.0)
    cov = (good.astype(float) @ matrix.T)
    out = f0 @ matrix.T
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(cov >= min_coverage, out / np.where(cov > 0, cov, 1), np.nan)
    out_var = None
    if variance is not None:
        v0 = np.where(good, variance, 0.0)
        out_var = v0 @ matrix.multiply(matrix).T
        with np.errstate(invalid="ignore", divide="ignore"):
            out_var = np.where(cov >= min_coverage,
                               out_var / np.where(cov > 0, cov, 1) ** 2, np.nan)
    return out, out_var


# -- Gauss-Hermite LOSVD ------------------------------------------------------
def _hermite_coeffs(h: tuple[float, ...]) -> np.ndarray:
    """Physicists' Hermite coefficients of ``1 + sum h_m H_m`` (vdM&F 1993)."""
    c = np.zeros(3 + len(h))
    c[0] = 1.0
    for k, hm in enumerate(h):
        m = 3 + k
        c[m] = hm / math.sqrt(2.0 ** m * math.factorial(m))
    return c


def gauss_hermite_losvd(v_kms, v0_kms: float, sigma_kms: float,
                        h: tuple[float, ...] = ()):
    """Gauss-Hermite LOSVD (van der Marel & Franx 1993, eqs. 3-4), per km/s.

    Parameters
    ----------
    v_kms : array_like
        Velocities where it is evaluated.
    v0_kms, sigma_kms : float
        Centre and width of the Gaussian.
    h : tuple of float
        ``(h3, h4, h5, ...)``.
    """
    y = (np.asarray(v_kms, float) - v0_kms) / sigma_kms
    alpha = np.exp(-0.5 * y * y) / math.sqrt(2.0 * math.pi)
    return alpha / sigma_kms * _herm.hermval(y, _hermite_coeffs(tuple(h)))


_GH_NODES, _GH_WEIGHTS = _herme.hermegauss(24)  # exact for degree <= 47


def gauss_hermite_moments(v0_kms: float, sigma_kms: float,
                          h: tuple[float, ...] = ()) -> tuple[float, float]:
    """First moment and dispersion of a Gauss-Hermite LOSVD, exactly.

    ``int v^k L dv`` is a Gaussian times a polynomial, integrated exactly by
    Gauss-Hermite quadrature (probabilists' nodes). To first order the mean
    is ``V + sqrt(3) sigma h3`` (van der Marel & Franx 1993, sect. 2); the
    exact value divides by the normalisation ``1 + (sqrt(6)/4) h4 + ...``.

    Returns
    -------
    mean_kms, dispersion_kms : float
        ``<v>`` and ``sqrt(<v^2> - <v>^2)`` of the (possibly partly
        negative) series; dispersion is NaN if the variance is negative.
    """
    series = _herm.hermval(_GH_NODES, _hermite_coeffs(tuple(h)))
    w = _GH_WEIGHTS * series
    m0 = w.sum()
    if m0 <= 0:
        return float("nan"), float("nan")
    m1 = (w * _GH_NODES).sum() / m0
    m2 = (w * _GH_NODES ** 2).sum() / m0
    var = m2 - m1 * m1
    return (float(v0_kms + sigma_kms * m1),
            float(sigma_kms * math.sqrt(var)) if var > 0 else float("nan"))


def gauss_hermite_fourier(k_per_kms, v0_kms: float, sigma_kms: float,
                          h: tuple[float, ...] = ()) -> np.ndarray:
    """Fourier transform ``int L(v) exp(-i k v) dv`` of the LOSVD (exact)."""
    k = np.asarray(k_per_kms, float)
    w = k * sigma_kms
    if not any(h):
        return np.exp(-1j * k * v0_kms - 0.5 * w * w)
    c = _hermite_coeffs(tuple(h)).astype(complex)
    c *= (-1j) ** np.arange(c.size)
    return np.exp(-1j * k * v0_kms - 0.5 * w * w) * _herm.hermval(w, c)


def fourier_shift(values, shift_pixels: float) -> np.ndarray:
    """Shift a sampled signal by a fraction of a pixel (periodic, exact for
    band-limited signals); positive moves features to higher index."""
    values = np.asarray(values, float)
    n = values.shape[-1]
    n_fft = scipy.fft.next_fast_len(2 * n)
    pad = np.empty(values.shape[:-1] + (n_fft,))
    pad[..., :n] = values
    # ramp between the two ends so the periodic copy has no jump
    ramp = np.linspace(1.0, 0.0, n_fft - n + 2)[1:-1]
    pad[..., n:] = (values[..., -1:] * ramp + values[..., :1] * (1.0 - ramp))
    k = 2.0 * np.pi * scipy.fft.rfftfreq(n_fft)
    out = scipy.fft.irfft(scipy.fft.rfft(pad) * np.exp(-1j * k * shift_pixels), n_fft)
    return out[..., :n]


# -- templates ---------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Template:
    """A high-S/N rest-frame spectrum used to fit LOSVDs.

    Attributes
    ----------
    wave_A : numpy.ndarray
        Rest-frame wavelengths (increasing), Angstrom.
    flux : numpy.ndarray
        Flux density (any unit; only the shape matters).
    air : bool or None
        True for air wavelengths, False for vacuum, None if unknown.
    origin : str
        Where it came from (file path, ``"galaxy centre"``, ``"synthetic"``).
    """

    wave_A: np.ndarray
    flux: np.ndarray
    air: bool | None = None
    origin: str = ""

    def __post_init__(self) -> None:
        w = np.asarray(self.wave_A, float)
        f = np.asarray(self.flux, float)
        if w.ndim != 1 or w.shape != f.shape or w.size < 8:
            raise DataContentError("a template needs matching 1D wavelength and "
                                   "flux arrays of at least 8 pixels",
                                   path=self.origin or None)
        order = np.argsort(w)
        w, f = w[order], f[order]
        good = np.isfinite(w) & np.isfinite(f)
        if good.sum() < 8:
            raise DataContentError("the template has fewer than 8 finite pixels",
                                   path=self.origin or None)
        for name, arr in (("wave_A", w[good]), ("flux", f[good])):
            arr.flags.writeable = False
            object.__setattr__(self, name, arr)


def read_template(path: str, hdu: int | str | None = None) -> Template:
    """Read a 1D template spectrum from a FITS file.

    Either an image HDU with a linear (``CRVAL1``, ``CDELT1``/``CD1_1``,
    ``CRPIX1``) or logarithmic (``CTYPE1 = 'WAVE-LOG'``, or ``DC-FLAG = 1``
    with ``log10`` wavelengths) axis, or a table HDU with a wavelength
    column (``wave``, ``wavelength``, ``lambda``, ``loglam``) and a flux
    column (``flux``, ``data``, ``spec``). Wavelength unit from ``CUNIT1``
    or the column unit (default Angstrom). ``CTYPE1`` starting with
    ``AWAV`` marks air wavelengths, ``WAVE`` vacuum.
    """
    from astropy.io import fits
    import astropy.units as u

    try:
        hdul = fits.open(path, memmap=False)
    except (OSError, ValueError) as exc:
        raise InputFileError(f"cannot read the template spectrum ({exc})",
                             path=path) from exc
    with hdul:
        candidates = [hdu] if hdu is not None else range(len(hdul))
        for index in candidates:
            try:
                item = hdul[index]
            except (KeyError, IndexError) as exc:
                raise InputFileError("no such HDU in the template file",
                                     path=path, hdu=index) from exc
            if item.data is None:
                continue
            header = item.header
            if isinstance(item, (fits.BinTableHDU, fits.TableHDU)):
                names = {n.lower(): n for n in item.columns.names}
                wcol = next((names[n] for n in ("wave", "wavelength", "lambda",
                                                "loglam") if n in names), None)
                fcol = next((names[n] for n in ("flux", "data", "spec")
                             if n in names), None)
                if wcol is None or fcol is None:
                    raise InputFileError(
                        "the template table needs a wavelength column (wave, "
                        "wavelength, lambda or loglam) and a flux column "
                        "(flux, data or spec)", path=path, hdu=index,
                        value=item.columns.names)
                wave = np.asarray(item.data[wcol], float).ravel()
                flux = np.asarray(item.data[fcol], float).ravel()
                if wcol.lower() == "loglam":
                    wave = 10.0 ** wave
                unit = item.columns[wcol].unit or "Angstrom"
                air = None
            else:
                data = np.asarray(item.data, float)
                if data.ndim != 1:
                    data = np.squeeze(data)
                if data.ndim != 1:
                    raise InputFileError("the template image must be 1D",
                                         path=path, hdu=index, value=item.data.shape)
                n = data.size
                try:
                    crval = float(header["CRVAL1"])
                    cdelt = float(header.get("CDELT1", header.get("CD1_1")))
                except (KeyError, TypeError, ValueError) as exc:
                    raise SpectralAxisError(
                        "the template has no CRVAL1 and CDELT1/CD1_1",
                        path=path, hdu=index, keyword="CRVAL1/CDELT1") from exc
                crpix = float(header.get("CRPIX1", 1.0))
                pix = np.arange(n) + 1.0 - crpix
                ctype = str(header.get("CTYPE1", "")).upper()
                if ctype.endswith("-LOG"):
                    wave = crval * np.exp(cdelt * pix / crval)
                elif int(header.get("DC-FLAG", 0)) == 1:
                    wave = 10.0 ** (crval + cdelt * pix)
                else:
                    wave = crval + cdelt * pix
                flux = data
                unit = header.get("CUNIT1", "Angstrom") or "Angstrom"
                air = (True if ctype.startswith("AWAV") else
                       False if ctype.startswith("WAVE") else None)
            try:
                wave = (wave * u.Unit(unit)).to_value(u.AA, u.spectral())
            except (ValueError, u.UnitsError) as exc:
                raise SpectralAxisError("the template's wavelength unit is not "
                                        "a wavelength", path=path, hdu=index,
                                        value=unit) from exc
            return Template(wave, flux, air=air, origin=str(path))
    raise InputFileError("the template file holds no spectrum", path=path)


@dataclass(frozen=True, eq=False)
class PreparedTemplate:
    """A template resampled onto a data grid and Fourier transformed once.

    Attributes
    ----------
    grid : LogGrid
        The data grid.
    ref_kms : float
        Optical velocity the template was redshifted to; fitted shifts are
        relative to it.
    pad : int
        Template pixels before data pixel 0.
    n_fft : int
    spectrum_fft : numpy.ndarray
        ``rfft`` of the padded template.
    k_per_kms : numpy.ndarray
        Angular frequencies of ``spectrum_fft``, rad per km/s.
    covered : numpy.ndarray of bool
        Data pixels the template covers with ``margin_kms`` to spare.
    margin_kms : float
    origin : str
    """

    grid: LogGrid
    ref_kms: float
    pad: int
    n_fft: int
    spectrum_fft: np.ndarray
    k_per_kms: np.ndarray
    covered: np.ndarray
    margin_kms: float
    origin: str = ""

    def broadened(self, v0_kms: float, sigma_kms: float,
                  h: tuple[float, ...] = ()) -> np.ndarray:
        """Template convolved with a Gauss-Hermite LOSVD, on the data grid."""
        kernel = gauss_hermite_fourier(self.k_per_kms, v0_kms, sigma_kms, h)
        full = scipy.fft.irfft(self.spectrum_fft * kernel, self.n_fft)
        return full[self.pad:self.pad + self.grid.size]


def prepare_template(template: Template, grid: LogGrid, *, ref_kms: float = 0.0,
                     margin_kms: float = 2500.0) -> PreparedTemplate:
    """Redshift ``template`` to ``ref_kms``, rebin it onto ``grid`` extended
    by ``margin_kms`` on each side, and Fourier transform it.

    Data pixels that the template does not cover with ``margin_kms / 2`` to
    spare are flagged in ``covered``; the fit ignores them.
    """
    n_margin = int(math.ceil(margin_kms / grid.step_kms))
    ext = grid.extended(n_margin, n_margin)
    wave_obs = template.wave_A * (1.0 + ref_kms / C_KMS)
    flux, _ = resample_spectrum(wave_obs, template.flux, ext, min_coverage=0.999)
    valid = np.isfinite(flux)
    if valid.sum() < 8:
        raise DataContentError("the template does not overlap the fitted "
                               "wavelength range", path=template.origin or None,
                               hint="choose a template covering the fit window")
    idx = np.flatnonzero(valid)
    flux = np.interp(np.arange(ext.size), idx, flux[idx])  # edge values outside
    scale = np.median(np.abs(flux[valid]))
    if not scale > 0:
        raise DataContentError("the template is zero", path=template.origin or None)
    flux = flux / scale
    n_fft = scipy.fft.next_fast_len(ext.size + 2 * n_margin)
    padded = np.empty(n_fft)
    padded[:ext.size] = flux
    ramp = np.linspace(1.0, 0.0, n_fft - ext.size + 2)[1:-1]
    padded[ext.size:] = flux[-1] * ramp + flux[0] * (1.0 - ramp)
    half = n_margin // 2
    ok = np.zeros(ext.size, bool)
    ok[idx[0] + half: idx[-1] - half + 1] = True
    covered = ok[n_margin:n_margin + grid.size]
    k = 2.0 * np.pi * scipy.fft.rfftfreq(n_fft, d=grid.step_kms)
    return PreparedTemplate(grid, float(ref_kms), n_margin, n_fft,
                            scipy.fft.rfft(padded), k, covered,
                            float(margin_kms), template.origin)


def mask_from_ranges(wave_A, ranges_A) -> np.ndarray:
    """True where ``wave_A`` falls inside any ``(lo, hi)`` range."""
    wave_A = np.asarray(wave_A, float)
    out = np.zeros(wave_A.shape, bool)
    for lo, hi in ranges_A:
        out |= (wave_A >= min(lo, hi)) & (wave_A <= max(lo, hi))
    return out


# -- the fit -----------------------------------------------------------------
@dataclass(frozen=True)
class LosvdFitOptions:
    """How a spectrum is fitted.

    Attributes
    ----------
    n_hermite : int
        Gauss-Hermite terms beyond the Gaussian: 0 (Gaussian), 2 (h3, h4) or
        4 (h3..h6).
    multiplicative_degree : int
        Degree of the Legendre polynomial multiplying the broadened template
        (continuum shape, flux calibration); -1 for a constant scale only.
    additive_degree : int
        Degree of an additive Legendre polynomial (-1 = none); absorbs
        template mismatch in line depth at the cost of more freedom.
    v_range_kms : float
        Search range of the shift about the template's reference velocity.
    sigma_bounds_kms : tuple of float
        Allowed Gaussian width.
    h_bound : float
        Bound on each ``|h_m|``.
    sigma_start_kms : float
    losvd : {'gauss-hermite', 'binned'}
        Shape whose first moment is reported. ``'gauss-hermite'``: the
        series above. ``'binned'``: after the Gauss-Hermite fit, a
        non-negative piecewise-linear LOSVD on nodes ``bin_kms`` apart
        (a sum of triangle kernels, so its first moment is exactly
        ``sum v_j L_j / sum L_j``) is fitted by non-negative least squares
        (Lawson & Hanson 1974, "Solving Least Squares Problems", ch. 23;
        :func:`scipy.optimize.nnls`), alternating with the polynomials. Non-parametric LOSVDs follow the idea of e.g. Saha &
        Williams (1994, AJ 107, 1295; from memory). It follows broad,
        flat-topped or double-horned distributions (a long slit across a
        rotating disk) that a truncated Gauss-Hermite series cannot, whose
        first moment is then biased by a few per cent.
    bin_kms : float or None
        Node spacing of the binned LOSVD (default: the grid step).
    """

    n_hermite: int = 2
    multiplicative_degree: int = 2
    additive_degree: int = -1
    v_range_kms: float = 800.0
    sigma_bounds_kms: tuple[float, float] = (1.0, 600.0)
    h_bound: float = 0.3
    sigma_start_kms: float = 100.0
    losvd: str = "gauss-hermite"
    bin_kms: float | None = None

    def bin_kms_or(self, grid: LogGrid) -> float:
        """Node spacing of the binned LOSVD on ``grid``."""
        return float(self.bin_kms or grid.step_kms)

    def __post_init__(self) -> None:
        if self.losvd not in ("gauss-hermite", "binned"):
            raise FitError("losvd must be 'gauss-hermite' or 'binned'",
                           keyword="losvd", value=self.losvd)
        if self.bin_kms is not None and not self.bin_kms > 0:
            raise FitError("bin_kms must be positive", keyword="bin_kms",
                           value=self.bin_kms)
        if self.n_hermite not in (0, 2, 4):
            raise FitError("n_hermite must be 0, 2 or 4", keyword="n_hermite",
                           value=self.n_hermite)
        if self.multiplicative_degree < -1 or self.additive_degree < -1:
            raise FitError("polynomial degrees must be -1 or more",
                           keyword="multiplicative_degree/additive_degree",
                           value=(self.multiplicative_degree, self.additive_degree))


@dataclass(frozen=True, eq=False)
class SpectrumFit:
    """A fitted LOSVD and the model spectrum.

    Attributes
    ----------
    mean_shift_kms : float
        First moment of the fitted LOSVD in ``u = c ln(lambda)``, relative
        to the template's reference velocity.
    mean_cz_kms : float
        The same as an optical velocity (cz): ``(c + ref) exp(u/c) - c``.
    v0_kms, sigma_kms : float
        Gauss-Hermite centre and width (in ``u``).
    h : tuple of float
        ``(h3, h4, ...)``.
    dispersion_kms : float
        Second-moment dispersion of the fitted LOSVD.
    mean_shift_err_kms : float
        Formal 1-sigma error of the Gauss-Hermite first moment (from the
        Jacobian, scaled by the reduced chi-square when no variance was
        given); for a binned LOSVD the same number, as an approximation.
    chi2 : float
    dof : int
    model : numpy.ndarray
        Best-fit model on the data grid (NaN where not fitted).
    good : numpy.ndarray of bool
        Pixels used.
    success : bool
    message : str
    """

    mean_shift_kms: float
    mean_cz_kms: float
    v0_kms: float
    sigma_kms: float
    h: tuple[float, ...]
    dispersion_kms: float
    mean_shift_err_kms: float
    chi2: float
    dof: int
    model: np.ndarray
    good: np.ndarray
    success: bool
    message: str = ""
    params: np.ndarray = field(default=None, repr=False)
    losvd_v_kms: np.ndarray | None = None
    losvd: np.ndarray | None = None

    @property
    def reduced_chi2(self) -> float:
        return self.chi2 / self.dof if self.dof > 0 else float("nan")


class _Problem:
    """Variable-projection residuals of one spectrum."""

    def __init__(self, flux, weight, template: PreparedTemplate, good, opts):
        self.t = template
        self.good = good
        self.y = flux[good] * weight[good]
        self.w = weight[good]
        x = np.linspace(-1.0, 1.0, template.grid.size)[good]
        md = max(opts.multiplicative_degree, 0)
        self.mult = _leg.legvander(x, md).T  # (md+1, n)
        self.add = (_leg.legvander(x, opts.additive_degree).T
                    if opts.additive_degree >= 0 else np.empty((0, x.size)))
        self.coef = None

    def scan(self, v_trial: np.ndarray, sigma: float) -> np.ndarray:
        """Chi-square of Gaussian LOSVDs at many velocities (vectorised)."""
        t = self.t
        gauss = t.spectrum_fft * np.exp(-0.5 * (t.k_per_kms * sigma) ** 2)
        phase = np.exp(-1j * np.outer(v_trial, t.k_per_kms))
        full = scipy.fft.irfft(gauss[None, :] * phase, t.n_fft, axis=1)
        b = full[:, t.pad:t.pad + t.grid.size][:, self.good]
        cols = np.concatenate([self.mult[None, :, :] * b[:, None, :],
                               np.broadcast_to(self.add, (b.shape[0],) + self.add.shape)],
                              axis=1) * self.w
        gram = np.einsum("tin,tjn->tij", cols, cols)
        rhs = np.einsum("tin,n->ti", cols, self.y)
        gram += np.eye(gram.shape[1]) * 1e-12 * np.trace(gram, axis1=1, axis2=2)[:, None, None]
        coef = np.linalg.solve(gram, rhs[..., None])[..., 0]
        return float(self.y @ self.y) - np.einsum("ti,ti->t", coef, rhs)

    def design(self, p):
        h = tuple(p[2:])
        b = self.t.broadened(p[0], p[1], h)[self.good]
        cols = np.vstack([self.mult * b, self.add])
        return cols

    def residuals(self, p):
        cols = self.design(p)
        a = (cols * self.w).T
        coef, *_ = np.linalg.lstsq(a, self.y, rcond=None)
        self.coef = coef
        return a @ coef - self.y


def _triangle_fourier(k_per_kms, half_width_kms: float) -> np.ndarray:
    """Fourier transform of a unit-area triangle of half-width ``h``:
    ``[sin(k h / 2) / (k h / 2)]^2`` (derived)."""
    x = 0.5 * k_per_kms * half_width_kms
    return np.sinc(x / np.pi) ** 2


def _binned_stage(prob: "_Problem", template: PreparedTemplate, p_gh: np.ndarray,
                  opts: "LosvdFitOptions", n_iter: int = 3):
    """Non-negative piecewise-linear LOSVD about a Gauss-Hermite start.

    Returns ``(v_nodes, L, coef, full_columns_fn)`` where the model is
    ``(a . P_mult) * sum_j L_j B_j + additive``.
    """
    from scipy.optimize import nnls

    grid = template.grid
    bin_kms = float(opts.bin_kms or grid.step_kms)
    mean, disp = gauss_hermite_moments(p_gh[0], p_gh[1], tuple(p_gh[2:]))
    if not np.isfinite(disp):
        disp = p_gh[1]
    if not np.isfinite(mean):
        mean = p_gh[0]
    half = max(4.0 * max(disp, p_gh[1]), 3.0 * bin_kms)
    n_half = int(math.ceil(half / bin_kms))
    nodes = mean + bin_kms * np.arange(-n_half, n_half + 1)
    tri = _triangle_fourier(template.k_per_kms, bin_kms)
    base = template.spectrum_fft * tri
    basis = np.empty((nodes.size, prob.good.sum()))
    for j, v in enumerate(nodes):
        full = scipy.fft.irfft(base * np.exp(-1j * template.k_per_kms * v),
                               template.n_fft)
        basis[j] = full[template.pad:template.pad + grid.size][prob.good]
    n_mult = prob.mult.shape[0]
    n_add = prob.add.shape[0]
    prob.residuals(p_gh)
    a = prob.coef[:n_mult].copy()
    w = prob.w
    lvec = None
    add = np.zeros(n_add)
    for _ in range(n_iter):
        pm = a @ prob.mult
        # free additive terms enter as differences of two non-negative ones
        cols = np.vstack([basis * pm, prob.add, -prob.add]) * w
        sol, _ = nnls(cols.T, prob.y, maxiter=50 * cols.shape[0])
        lvec = sol[:nodes.size]
        add = sol[nodes.size:nodes.size + n_add] - sol[nodes.size + n_add:]
        if lvec.sum() <= 0:
            break
        conv = lvec @ basis
        cols2 = np.vstack([prob.mult * conv, prob.add]) * w
        coef, *_ = np.linalg.lstsq(cols2.T, prob.y, rcond=None)
        a, add = coef[:n_mult], coef[n_mult:]
    return nodes, lvec, a, add, base


def _gauss_hermite_stages(prob, p0, start, lo, hi, options):
    """Gaussian fit, then (if asked) the Hermite terms; returns the solver result."""
    vr = options.v_range_kms
    s_lo, s_hi = options.sigma_bounds_kms
    p0 = np.array(p0, float)
    p0[0] = np.clip(p0[0], -vr, vr)
    p0[1] = np.clip(p0[1], s_lo * 1.0001, s_hi * 0.9999)
    res = least_squares(prob.residuals, p0, bounds=(lo, hi), x_scale=[10.0, 10.0],
                        method="trf")
    if options.n_hermite:
        hb = options.h_bound
        h0 = np.zeros(options.n_hermite)
        if start is not None and len(start) > 2:
            h0[:len(start) - 2] = np.clip(start[2:2 + options.n_hermite],
                                          -hb * 0.99, hb * 0.99)
        p1 = np.concatenate([res.x, h0])
        res = least_squares(prob.residuals, p1,
                            bounds=(lo + [-hb] * options.n_hermite,
                                    hi + [hb] * options.n_hermite),
                            x_scale=[10.0, 10.0] + [0.02] * options.n_hermite,
                            method="trf")
    return res


def fit_spectrum(flux, variance, template: PreparedTemplate, *,
                 options: LosvdFitOptions = LosvdFitOptions(),
                 good=None, start: tuple[float, ...] | None = None) -> SpectrumFit:
    """Fit a LOSVD to one spectrum on the template's grid.

    Parameters
    ----------
    flux : numpy.ndarray
        Spectrum on ``template.grid`` (NaN = missing).
    variance : numpy.ndarray or None
        Its variance; None gives equal weights (and errors scaled by the
        reduced chi-square).
    template : PreparedTemplate
    options : LosvdFitOptions
    good : numpy.ndarray of bool, optional
        Pixels to use (masks of emission lines and sky residuals are
        applied by the caller as ``good = ~mask``).
    start : tuple of float, optional
        Starting ``(V, sigma, h3, h4, ...)``. Without it a coarse scan of
        ``V`` over ``options.v_range_kms`` picks the start (avoids locking on
        a neighbouring absorption line).

    Returns
    -------
    SpectrumFit
    """
    grid = template.grid
    flux = np.asarray(flux, float)
    if flux.shape != (grid.size,):
        raise FitError("spectrum and template grid differ in length",
                       value=(flux.shape, grid.size))
    use = np.isfinite(flux) & template.covered
    if variance is not None:
        variance = np.asarray(variance, float)
        use &= np.isfinite(variance) & (variance > 0)
        weight = np.zeros(grid.size)
        weight[use] = 1.0 / np.sqrt(variance[use])
    else:
        weight = np.ones(grid.size)
    if good is not None:
        use &= np.asarray(good, bool)
    n_lin = (max(options.multiplicative_degree, 0) + 1
             + max(options.additive_degree + 1, 0))
    n_par = 2 + options.n_hermite
    if use.sum() < n_lin + n_par + 5:
        raise FitError("too few usable pixels to fit the spectrum",
                       value=int(use.sum()),
                       hint="widen the fit window or relax the masks")
    prob = _Problem(flux, weight, template, use, options)
    vr = options.v_range_kms
    s_lo, s_hi = options.sigma_bounds_kms
    if start is None:
        s0 = float(np.clip(options.sigma_start_kms, s_lo, s_hi))
        v_trial = np.arange(-vr, vr + 1e-9, max(grid.step_kms, s0 / 2.0))
        p0 = np.array([v_trial[int(np.argmin(prob.scan(v_trial, s0)))], s0])
    else:
        p0 = np.array(start[:2], float)
    lo = [-vr, s_lo]
    hi = [vr, s_hi]
    quick = (start is not None and options.losvd == "binned"
             and len(start) == n_par)
    if quick:
        # Monte Carlo draws of the binned LOSVD: the Gauss-Hermite start
        # only places the nodes and the first polynomial.
        p = np.array(start, float)
        res = None
    else:
        res = _gauss_hermite_stages(prob, p0, start, lo, hi, options)
        p = res.x
    resid = prob.residuals(p)
    chi2 = float(resid @ resid)
    dof = int(use.sum() - n_lin - n_par)
    h = tuple(float(x) for x in p[2:])
    mean_u, disp = gauss_hermite_moments(p[0], p[1], h)
    # formal error of the first moment from the Jacobian
    err = float("nan")
    if res is not None:
        try:
            cov = np.linalg.pinv(res.jac.T @ res.jac)
            if variance is None and dof > 0:
                cov *= chi2 / dof
            eps = np.maximum(1e-4 * np.abs(p), 1e-6)
            grad = np.zeros(p.size)
            for j in range(p.size):
                dp = np.zeros(p.size)
                dp[j] = eps[j]
                up = gauss_hermite_moments(*(p + dp)[:2], tuple((p + dp)[2:]))[0]
                dn = gauss_hermite_moments(*(p - dp)[:2], tuple((p - dp)[2:]))[0]
                grad[j] = (up - dn) / (2 * eps[j])
            err = float(np.sqrt(max(grad @ cov @ grad, 0.0)))
        except (np.linalg.LinAlgError, ValueError):
            pass
    # model on the full grid
    x_all = np.linspace(-1.0, 1.0, grid.size)
    md = max(options.multiplicative_degree, 0)
    mult = _leg.legvander(x_all, md).T
    add = (_leg.legvander(x_all, options.additive_degree).T
           if options.additive_degree >= 0 else np.empty((0, grid.size)))
    nodes = lvec = None
    if options.losvd == "binned":
        nodes, lvec, a, a_add, base = _binned_stage(prob, template, p, options)
        if lvec is not None and lvec.sum() > 0:
            mean_u = float(nodes @ lvec / lvec.sum())
            disp = float(np.sqrt(max((nodes - mean_u) ** 2 @ lvec / lvec.sum()
                                     + options.bin_kms_or(grid) ** 2 / 6.0, 0.0)))
            kern = (np.exp(-1j * np.outer(nodes, template.k_per_kms)).T @ lvec)
            full = scipy.fft.irfft(base * kern, template.n_fft)
            conv = full[template.pad:template.pad + grid.size]
            model = a @ (mult * conv) + a_add @ add
            resid = (model - flux)[use] * weight[use]
            chi2 = float(resid @ resid)
            dof = int(use.sum() - n_lin - nodes.size)
            # err stays the Gauss-Hermite first moment's formal error (an
            # approximation; use a noise Monte Carlo for the binned shape)
        else:
            raise FitError("the binned LOSVD fit found no positive solution")
    else:
        b = template.broadened(p[0], p[1], h)
        model = prob.coef @ np.vstack([mult * b, add])
    model = np.where(template.covered, model, np.nan)
    return SpectrumFit(
        mean_shift_kms=float(mean_u),
        mean_cz_kms=float(shift_to_cz(mean_u, template.ref_kms)),
        v0_kms=float(p[0]), sigma_kms=float(p[1]), h=h,
        dispersion_kms=float(disp), mean_shift_err_kms=err,
        chi2=chi2, dof=dof, model=model, good=use, success=True if res is None else bool(res.success),
        message="" if res is None else str(res.message), params=p.copy(),
        losvd_v_kms=nodes,
        losvd=lvec)
