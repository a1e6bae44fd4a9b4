"""Synthetic absorption-line cubes of barred disks with a known pattern speed.

The surface brightness ``S``, mean line-of-sight velocity ``V`` and
dispersion ``sigma`` of every spaxel come from the emission-free fields of
:func:`gyrometer.core.synthetic.make_maps` (noiseless; PSF-convolved and
pixel-integrated, so ``V = V_sys + conv(S v) / conv(S)``). Each spaxel's
spectrum is a stellar-like template made of absorption lines at real rest
wavelengths, Doppler shifted by ``V`` and broadened by ``sigma``:

    F(lambda) = S c(lambda) [1 - sum_k d_k (w_k / s_k) exp(-(lambda - l_k)^2 / 2 s_k^2)]

with ``l_k = lambda_k (1 + V/c)`` (optical convention, exact Doppler factor),
``s_k = (1 + V/c) sqrt(w_k^2 + (lambda_k sigma / c)^2)`` (the intrinsic
width stretched by the Doppler factor, convolved with a Gaussian LOSVD), a
gently sloped continuum ``c(lambda)``, and each channel the exact average
of ``F`` over its width (differences of the normal CDF). Because every
spaxel's LOSVD is symmetric about its ``V``, a slit-summed spectrum's mean
velocity is exactly ``sum w S V / sum w S``, the Tremaine-Weinberg ``<V>`` of
the maps (Tremaine & Weinberg 1984, ApJ 282, L5).

Lines (band ``"cat"``, the near-infrared calcium triplet region): Ca II
8498.02, 8542.09, 8662.14 Angstrom (air) from the line table of
:mod:`gyrometer.core.lines` (NIST ASD vacuum values, stored there as "from
memory", converted to air with Morton 2000, ApJS 130, 403); the air values
agree with the CaT line centres of Cenarro et al. 2001, MNRAS 326, 959 (from
memory). Plus weaker Fe I 8514.07, 8688.63 and Mg I 8806.76 Angstrom (air;
NIST ASD, from memory). Depths and widths are illustrative, not a stellar
population model.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr

from .dataset import Cube, MapSet, Provenance, SpectralAxis
from .lines import get_line
from .losvd import C_KMS, LogGrid, Template
from .synthetic import GalaxyModel, ModelError, Truth, make_maps

__all__ = [
    "AbsorptionLine",
    "AbsorptionScene",
    "BANDS",
    "band_lines",
    "synthetic_template",
    "absorption_scene",
    "make_absorption_cube",
]

_MEM = "NIST ASD air wavelength (from memory)"


@dataclass(frozen=True)
class AbsorptionLine:
    """One absorption line of the synthetic template.

    Attributes
    ----------
    name : str
    air_A : float
        Rest wavelength in air, Angstrom.
    depth : float
        Central depth relative to the continuum at the intrinsic width.
    width_A : float
        Intrinsic Gaussian sigma, Angstrom.
    source : str
        Source of the wavelength.
    """

    name: str
    air_A: float
    depth: float
    width_A: float
    source: str


def _cat_lines() -> tuple[AbsorptionLine, ...]:
    out = []
    for name, depth in (("CaT8498", 0.45), ("CaT8542", 0.65), ("CaT8662", 0.55)):
        line = get_line(name)
        out.append(AbsorptionLine(line.label, float(line.air_angstrom), depth, 1.6,
                                  line.source + "; air by Morton (2000)"))
    out += [AbsorptionLine("Fe I 8514", 8514.07, 0.12, 0.9, _MEM),
            AbsorptionLine("Fe I 8689", 8688.63, 0.18, 0.9, _MEM),
            AbsorptionLine("Mg I 8807", 8806.76, 0.20, 1.0, _MEM)]
    return tuple(out)


#: Bands: rest-frame wavelength range (air, Angstrom), a line-poor
#: continuum sub-band (rest, air), and the line list builder.
BANDS = {
    "cat": dict(range_A=(8420.0, 8880.0), continuum_A=(8560.0, 8640.0),
                lines=_cat_lines),
}


def band_lines(band: str = "cat") -> tuple[AbsorptionLine, ...]:
    """The absorption lines of a band (see :data:`BANDS`)."""
    if band not in BANDS:
        raise ModelError(f"unknown band; choose one of {sorted(BANDS)}",
                             keyword="band", value=band)
    return BANDS[band]["lines"]()


def _line_block(edges_A: np.ndarray, v_kms: np.ndarray, sigma_kms: np.ndarray,
                lines) -> np.ndarray:
    """Channel-averaged ``1 - sum dips`` for pixels (rows) and channels.

    ``edges_A`` has ``n_chan + 1`` entries; ``v_kms`` and ``sigma_kms`` are
    per pixel. Returns ``(n_pix, n_chan)``.
    """
    n_pix, n_chan = v_kms.size, edges_A.size - 1
    out = np.ones((n_pix, n_chan))
    width = np.diff(edges_A)
    doppler = 1.0 + v_kms / C_KMS
    for line in lines:
        centre = line.air_A * doppler
        s = doppler * np.sqrt(line.width_A ** 2 + (line.air_A * sigma_kms / C_KMS) ** 2)
        lo = np.min(centre - 9 * s)
        hi = np.max(centre + 9 * s)
        j0 = max(int(np.searchsorted(edges_A, lo)) - 1, 0)
        j1 = min(int(np.searchsorted(edges_A, hi)) + 1, n_chan)
        if j1 <= j0:
            continue
        e = edges_A[j0:j1 + 1]
        cdf = ndtr((e[None, :] - centre[:, None]) / s[:, None])
        # area of the dip: d * w * sqrt(2 pi) * doppler (depth kept, width stretched)
        area = line.depth * line.width_A * math.sqrt(2 * math.pi) * doppler
        out[:, j0:j1] -= area[:, None] * np.diff(cdf, axis=1) / width[None, j0:j1]
    return out


def synthetic_template(band: str = "cat", *, step_A: float = 0.05) -> Template:
    """The band's rest-frame template (continuum 1, intrinsic line widths).

    Sampled finely (``step_A``) as channel averages; use it as the known
    template when fitting a cube from :func:`make_absorption_cube`.
    """
    lo, hi = BANDS[band]["range_A"] if band in BANDS else (None, None)
    lines = band_lines(band)
    lo, hi = lo - 150.0, hi + 150.0
    edges = np.arange(lo, hi + step_A, step_A)
    flux = _line_block(edges, np.zeros(1), np.zeros(1), lines)[0]
    wave = 0.5 * (edges[1:] + edges[:-1])
    return Template(wave, flux, air=True, origin=f"synthetic {band} template")


@dataclass(frozen=True, eq=False)
class AbsorptionScene:
    """Per-spaxel fields and the spectral grid of a synthetic absorption cube.

    Attributes
    ----------
    maps : MapSet
        Noiseless maps of the model (intensity ``S``, velocity, dispersion).
    truth : Truth
    wave_A : numpy.ndarray
        Channel centres (observed frame, air), Angstrom.
    edges_A : numpy.ndarray
        Channel edges.
    lines : tuple of AbsorptionLine
    continuum_slope : float
        Fractional change of the continuum across the band.
    noise_sigma : float
        1-sigma noise per voxel (constant).
    continuum_band_A : tuple of float
        Line-poor band in the observed frame, Angstrom.
    """

    maps: MapSet
    truth: Truth
    wave_A: np.ndarray
    edges_A: np.ndarray
    lines: tuple[AbsorptionLine, ...]
    continuum_slope: float
    noise_sigma: float
    continuum_band_A: tuple[float, float]

    @property
    def n_channels(self) -> int:
        return int(self.wave_A.size)

    def planes(self, start: int, stop: int, *, rng: np.random.Generator | None = None,
               dtype=np.float32) -> np.ndarray:
        """Channels ``start:stop`` of the cube, shape ``(n, ny, nx)``.

        Noise is added when ``rng`` is given.
        """
        ny, nx = self.maps.shape
        s = np.asarray(self.maps.intensity, float).ravel()
        v = np.asarray(self.maps.velocity_kms, float).ravel()
        d = np.asarray(self.maps.dispersion_kms, float).ravel()
        e = self.edges_A[start:stop + 1]
        mid = 0.5 * (self.wave_A[0] + self.wave_A[-1])
        span = self.wave_A[-1] - self.wave_A[0]
        cont = 1.0 + self.continuum_slope * (0.5 * (e[1:] + e[:-1]) - mid) / span
        out = np.empty((stop - start, ny * nx), dtype=dtype)
        rows = 4096
        for p0 in range(0, s.size, rows):
            p1 = min(p0 + rows, s.size)
            block = _line_block(e, v[p0:p1], d[p0:p1], self.lines)
            block *= cont[None, :] * s[p0:p1, None]
            if rng is not None:
                block += rng.normal(0.0, self.noise_sigma, block.shape)
            out[:, p0:p1] = block.T
        return out.reshape(stop - start, ny, nx)


def absorption_scene(model: GalaxyModel, *, band: str = "cat",
                     step_kms: float | None = 40.0, step_A: float | None = None,
                     continuum_slope: float = 0.1, snr: float | None = None,
                     wave_A=None) -> AbsorptionScene:
    """Fields and spectral grid of an absorption-line cube of ``model``.

    Parameters
    ----------
    model : GalaxyModel
        From :mod:`gyrometer.core.synthetic` (e.g. ``barred_model``).
    band : str
        Key of :data:`BANDS`.
    step_kms : float or None
        Constant velocity step: a log-wavelength axis (as in MaNGA-like
        LOGCUBEs). Ignored when ``step_A`` is given.
    step_A : float or None
        Constant wavelength step (linear axis, as MUSE).
    continuum_slope : float
        Fractional continuum change across the band.
    snr : float or None
        Signal-to-noise per channel of the brightest spaxel's continuum;
        default ``1 / model.noise_frac``.
    wave_A : array_like, optional
        Explicit increasing channel centres (observed, air, Angstrom), e.g. a
        whole IFU axis; overrides ``step_kms`` and ``step_A``. Outside the
        band the spectrum is a featureless continuum.
    """
    lines = band_lines(band)
    maps, truth = make_maps(model, noise=False)
    z1 = 1.0 + model.geometry.vsys_kms / C_KMS
    lo, hi = (x * z1 for x in BANDS[band]["range_A"])
    if wave_A is not None:
        from .losvd import pixel_edges
        wave = np.asarray(wave_A, float)
        edges = pixel_edges(wave)
    elif step_A is not None:
        n = int(math.floor((hi - lo) / step_A)) + 1
        wave = lo + step_A * np.arange(n)
        edges = lo + step_A * (np.arange(n + 1) - 0.5)
    elif step_kms is not None:
        grid = LogGrid.covering(lo, hi, step_kms)
        wave, edges = grid.wave_A, grid.edges_A
    else:
        raise ModelError("give step_kms or step_A", keyword="step_kms/step_A")
    peak = float(np.nanmax(maps.intensity))
    if snr is None:
        noise_sigma = model.noise_frac * peak
    else:
        noise_sigma = peak / float(snr)
    c_lo, c_hi = (x * z1 for x in BANDS[band]["continuum_A"])
    return AbsorptionScene(maps, truth, wave, edges, lines, float(continuum_slope),
                           float(noise_sigma), (c_lo, c_hi))


def make_absorption_cube(model: GalaxyModel, *, band: str = "cat",
                         step_kms: float | None = 40.0, step_A: float | None = None,
                         continuum_slope: float = 0.1, snr: float | None = None,
                         rng: np.random.Generator | None = None,
                         noise: bool = True) -> tuple[Cube, Truth, AbsorptionScene]:
    """An absorption-line cube (``AWAV`` axis, float32, with variance).

    See :func:`absorption_scene` for the parameters; ``noise=False`` gives
    the exact cube (variance still returned). Write it with
    :func:`gyrometer.core.fitsio.write_cube`.

    Returns
    -------
    Cube, Truth, AbsorptionScene
    """
    scene = absorption_scene(model, band=band, step_kms=step_kms, step_A=step_A,
                             continuum_slope=continuum_slope, snr=snr)
    if noise and rng is None:
        rng = np.random.default_rng(model.seed)
    data = scene.planes(0, scene.n_channels, rng=rng if noise else None)
    variance = np.full(data.shape, scene.noise_sigma ** 2, dtype=np.float32)
    axis = SpectralAxis(ctype="AWAV", values=scene.wave_A, unit="Angstrom",
                        convention="optical", air=True, specsys="BARYCENT")
    cube = Cube(data=data, wcs=scene.maps.wcs, spectral=axis,
                unit="1e-20 erg / (Angstrom s cm2)",
                provenance=Provenance(path="", hdu="synthetic"),
                variance=variance, name=model.name,
                psf_fwhm_arcsec=(model.psf_fwhm_arcsec or None))
    return cube, scene.truth, scene
