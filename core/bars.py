"""Bar length, bar rotation rate R = R_CR / R_bar and its class.

Bar length from an intensity map (deprojected to the disk plane with the
disk geometry), by azimuthal Fourier decomposition in rings (Ohta, Hamabe &
Wakamatsu 1990, ApJ 357, 71; Aguerri et al. 2000, A&A 361, 841):

* ``"phase"``: the m = 2 phase stays constant along the bar; the bar ends at
  the last radius, outward of the peak of A2/A0, where the phase is within
  ``phase_tolerance_deg`` (default 10 degrees, common practice) of its value
  at the peak.
* ``"bar/interbar"``: with Fourier amplitudes relative to A0,
  ``I_b = 1 + A2 + A4 + A6`` and ``I_ib = 1 - A2 + A4 - A6``; the bar is
  where ``I_b/I_ib`` exceeds half its range above its minimum, and ends at
  the outer edge of that region (Aguerri et al. 2000).
* ``"A2 peak"``: the radius of the maximum of A2/A0, reported for reference
  only (it underestimates the bar length).

The adopted length is the mean of the first two and the error half their
difference, at least half a ring width (the spread over estimators, as in
Aguerri et al. 2015, A&A 576, A102).

A length measured on the sky is deprojected with
``L = L_sky sqrt(cos^2 phi + sin^2 phi / cos^2 i)``, phi = angle on the sky
between the bar and the line of nodes (derived for a thin disk).

Classes of R (boundaries): ``"ultrafast"`` R < 1.0 (not allowed for
self-consistent bars, Contopoulos 1980, A&A 81, 198); ``"fast"``
1.0 <= R <= 1.4; ``"slow"`` R > 1.4 (Debattista & Sellwood 2000, ApJ 543,
704; Aguerri et al. 2015 use the same 1.4 boundary).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .coords import lon_to_disk, lon_to_sky, sky_grid, sky_to_lon
from .errors import DataContentError, FitError, GeometryError
from .geometry import DiskGeometry

__all__ = [
    "RATE_BOUNDARIES",
    "RATE_BOUNDARIES_SOURCE",
    "deproject_length",
    "FourierProfile",
    "fourier_profile",
    "BarLength",
    "estimate_bar_length",
    "user_bar_length",
    "BarRate",
    "classify_rate",
    "rotation_rate",
]

#: (ultrafast/fast, fast/slow) boundaries of R = R_CR / R_bar.
RATE_BOUNDARIES = (1.0, 1.4)
RATE_BOUNDARIES_SOURCE = (
    "R < 1.0 ultrafast (forbidden for self-consistent bars, Contopoulos 1980); "
    "1.0 <= R <= 1.4 fast, R > 1.4 slow (Debattista & Sellwood 2000; "
    "Aguerri et al. 2015)")


def deproject_length(length_sky_arcsec, phi_deg, inc_deg):
    """Deprojected length of a bar seen at sky angle ``phi`` from the LON.

    ``L = L_sky sqrt(cos^2 phi + sin^2 phi / cos^2 i)`` (derived: the
    component along the line of nodes is unchanged, the perpendicular one
    is stretched by 1/cos i).
    """
    if not 0.0 <= inc_deg < 90.0:
        raise GeometryError("inclination must be in [0, 90) degrees",
                            keyword="inc_deg", value=inc_deg)
    phi = np.radians(phi_deg)
    c = math.cos(math.radians(inc_deg))
    return np.asarray(length_sky_arcsec) * np.sqrt(np.cos(phi) ** 2
                                                   + np.sin(phi) ** 2 / c**2)


@dataclass(frozen=True, eq=False)
class FourierProfile:
    """Azimuthal Fourier decomposition of the deprojected intensity.

    Attributes
    ----------
    r_arcsec : numpy.ndarray
        Ring centres in the disk plane.
    a0 : numpy.ndarray
        Mean intensity per pixel in the ring.
    a2, a4, a6 : numpy.ndarray
        Amplitudes relative to A0.
    phase2_deg : numpy.ndarray
        Disk-plane azimuth of the m = 2 maximum, degrees from the receding
        line of nodes, in (-90, 90].
    n_pixels : numpy.ndarray
    a2_err : numpy.ndarray or None
        1-sigma noise of ``a2`` from the intensity errors,
        ``sqrt(sum sigma_I^2 / 2) / A0`` (derived; None without errors).
    """

    r_arcsec: np.ndarray
    a0: np.ndarray
    a2: np.ndarray
    a4: np.ndarray
    a6: np.ndarray
    phase2_deg: np.ndarray
    n_pixels: np.ndarray
    a2_err: np.ndarray | None = None

    @property
    def bar_interbar(self) -> np.ndarray:
        """``I_b / I_ib`` of Ohta et al. (1990) with relative amplitudes."""
        return ((1 + self.a2 + self.a4 + self.a6)
                / (1 - self.a2 + self.a4 - self.a6))


def fourier_profile(intensity, wcs, geometry: DiskGeometry, *,
                    ring_width_arcsec: float, r_max_arcsec: float | None = None,
                    min_pixels: int = 16, intensity_err=None,
                    min_snr: float = 5.0) -> FourierProfile:
    """Fourier amplitudes and m = 2 phase in rings of the disk plane.

    Every pixel is mapped to the disk plane with the geometry; pixels of
    equal sky area have equal disk area, so plain sums over a ring
    approximate the azimuthal integrals ``A_m = |sum I exp(i m theta)|``;
    the azimuthal-mean profile (interpolated in R) is subtracted from I in
    the m > 0 sums, which removes the pixel-sampling bias of small rings.
    Rings with fewer than ``min_pixels`` pixels, with an empty sector (of
    12) or, when ``intensity_err`` is given, with a mean per-pixel
    signal-to-noise below ``min_snr`` are dropped (noise and field edges
    fake m = 2 power).
    """
    intensity = np.asarray(intensity, dtype=float)
    grid = sky_grid(wcs, intensity.shape, geometry.ra_deg, geometry.dec_deg)
    good = np.isfinite(intensity)
    X, Y = sky_to_lon(grid.east_arcsec[good], grid.north_arcsec[good],
                      geometry.pa_deg)
    R, cos_t, sin_t = lon_to_disk(X, Y, geometry.inc_deg)
    theta = np.arctan2(sin_t, cos_t)
    img = intensity[good]
    noise = None
    if intensity_err is not None:
        noise = np.asarray(intensity_err, dtype=float)[good]
    r_max = r_max_arcsec or float(R.max())
    edges = np.arange(0.0, r_max + 1e-9, ring_width_arcsec)
    # axisymmetric model: the azimuthal mean profile, interpolated in R on
    # a grid of half rings; it is subtracted before the m > 0 sums so that
    # the uneven azimuthal sampling of a ring of pixels across a radial
    # gradient does not create spurious m = 2 power
    fine = np.arange(0.0, r_max + ring_width_arcsec, 0.5 * ring_width_arcsec)
    idx = np.digitize(R, fine) - 1
    counts = np.bincount(idx, minlength=fine.size)
    sums = np.bincount(idx, weights=img, minlength=fine.size)
    have = counts > 0
    r_mean = np.bincount(idx, weights=R, minlength=fine.size)[have] / counts[have]
    axisym = np.interp(R, r_mean, sums[have] / counts[have])
    rows = []
    for r_in, r_out in zip(edges[:-1], edges[1:]):
        sel = (R >= r_in) & (R < r_out)
        if sel.sum() < min_pixels:
            continue
        th = theta[sel]
        sectors = np.unique(((th + np.pi) / (2 * np.pi) * 12).astype(int) % 12)
        if sectors.size < 12:
            continue
        ii = img[sel]
        a0 = ii.sum()
        if not a0 > 0:
            continue
        a2_err = math.nan
        ring_noise = None if noise is None else noise[sel][np.isfinite(noise[sel])]
        if ring_noise is not None and ring_noise.size:
            if a0 / sel.sum() < min_snr * np.median(ring_noise):
                continue
            a2_err = math.sqrt(0.5 * np.sum(ring_noise**2) * sel.sum()
                               / ring_noise.size) / a0
        resid = ii - axisym[sel]
        amps = []
        for m in (2, 4, 6):
            c = np.sum(resid * np.cos(m * th))
            s = np.sum(resid * np.sin(m * th))
            amps.append((math.hypot(c, s) / a0, math.atan2(s, c) / m))
        rows.append((0.5 * (r_in + r_out), a0 / sel.sum(), amps[0][0],
                     amps[1][0], amps[2][0], math.degrees(amps[0][1]),
                     int(sel.sum()), a2_err))
    if len(rows) < 4:
        raise DataContentError("fewer than 4 usable rings for the Fourier "
                               "decomposition of the intensity map")
    cols = [np.array(c) for c in zip(*rows)]
    return FourierProfile(cols[0], cols[1], cols[2], cols[3], cols[4],
                          cols[5], cols[6].astype(int),
                          None if noise is None else cols[7])


@dataclass(frozen=True)
class BarLength:
    """A bar's semi-major axis in the disk plane (deprojected).

    Attributes
    ----------
    length_arcsec, err_arcsec : float
        Adopted deprojected bar semi-length and its 1-sigma error.
    estimates : dict
        Estimator name -> length, arcsec.
    method : str
        How it was obtained, with citations.
    angle_disk_deg : float or None
        Bar azimuth in the disk plane from the receding LON, degrees.
    pa_sky_deg : float or None
        Bar position angle on the sky (N through E, mod 180), degrees.
    """

    length_arcsec: float
    err_arcsec: float
    estimates: dict
    method: str
    angle_disk_deg: float | None = None
    pa_sky_deg: float | None = None


def _wrap90(deg):
    return (np.asarray(deg) + 90.0) % 180.0 - 90.0


def estimate_bar_length(maps, geometry: DiskGeometry, *,
                        ring_width_arcsec: float | None = None,
                        r_max_arcsec: float | None = None,
                        r_min_arcsec: float | None = None,
                        phase_tolerance_deg: float = 10.0) -> BarLength:
    """Estimate the deprojected bar length from the intensity map.

    Parameters
    ----------
    maps : MapSet
        Uses ``intensity``, ``wcs`` and ``psf_fwhm_arcsec``.
    geometry : DiskGeometry
    ring_width_arcsec : float, optional
        Default: the larger of the PSF FWHM and 1.5 pixels.
    r_max_arcsec : float, optional
        Largest radius searched (default: the data's extent).
    r_min_arcsec : float, optional
        Rings inside are ignored (default: the PSF FWHM).
    phase_tolerance_deg : float
        Allowed m = 2 phase change along the bar (common practice: 10).

    Raises
    ------
    FitError
        No m = 2 structure that looks like a bar.
    """
    from .coords import pixel_scale_arcsec

    pix = pixel_scale_arcsec(maps.wcs)
    psf = maps.psf_fwhm_arcsec or 0.0
    width = ring_width_arcsec or max(psf, 1.5 * pix)
    prof = fourier_profile(maps.intensity, maps.wcs, geometry,
                           ring_width_arcsec=width, r_max_arcsec=r_max_arcsec,
                           intensity_err=maps.intensity_err)
    r_min = psf if r_min_arcsec is None else r_min_arcsec
    use = prof.r_arcsec >= r_min
    if use.sum() < 4:
        raise FitError("too few rings outside the PSF to measure a bar")
    r = prof.r_arcsec[use]
    a2 = prof.a2[use]
    ph = prof.phase2_deg[use]
    a2_err = (np.zeros_like(a2) if prof.a2_err is None
              else np.nan_to_num(prof.a2_err[use], nan=0.0))
    # only m = 2 amplitudes well above their noise count as structure
    significant = a2 > np.maximum(0.05, 5.0 * a2_err)
    if not significant.any():
        raise FitError(f"no bar found: A2/A0 peaks at only {a2.max():.3f} "
                       "(needs > 0.05 and 5 sigma)",
                       hint="give the bar length by hand")
    k = int(np.argmax(np.where(significant, a2, -np.inf)))
    estimates = {"A2 peak": float(r[k])}
    # phase constancy (noise-dominated rings end the bar)
    dev = np.abs(_wrap90(ph - ph[k]))
    j = k
    while (j + 1 < r.size and dev[j + 1] <= phase_tolerance_deg
           and a2[j + 1] > 3.0 * a2_err[j + 1]):
        j += 1
    estimates["phase"] = float(r[j] + 0.5 * width) if j + 1 < r.size else float(r[j])
    # bar / interbar
    ratio = prof.bar_interbar[use]
    thresh = 0.5 * (ratio.max() - ratio.min()) + ratio.min()
    j = int(np.argmax(ratio))
    while j + 1 < r.size and ratio[j + 1] > thresh:
        j += 1
    if j + 1 < r.size:  # interpolate the crossing
        x0, x1, y0, y1 = r[j], r[j + 1], ratio[j], ratio[j + 1]
        estimates["bar/interbar"] = float(x0 + (thresh - y0) * (x1 - x0) / (y1 - y0))
    used = [estimates[n] for n in ("phase", "bar/interbar") if n in estimates]
    length = float(np.mean(used))
    err = max(0.5 * (max(used) - min(used)), 0.5 * width)
    angle = float(ph[k])
    X, Y = math.cos(math.radians(angle)), math.sin(math.radians(angle)) * geometry.cos_i
    east, north = lon_to_sky(X, Y, geometry.pa_deg)
    pa_sky = math.degrees(math.atan2(float(east), float(north))) % 180.0
    return BarLength(length, err, estimates,
                     "mean of Fourier phase-constancy and bar/interbar "
                     "(Ohta et al. 1990; Aguerri et al. 2000); error = half "
                     "their difference (Aguerri et al. 2015 practice), at "
                     "least half a ring", angle, pa_sky)


def user_bar_length(length_arcsec: float, err_arcsec: float = 0.0, *,
                    on_sky: bool = False, bar_pa_deg: float | None = None,
                    geometry: DiskGeometry | None = None) -> BarLength:
    """A bar length given by the user, deprojected when measured on the sky.

    With ``on_sky=True`` the bar's sky position angle and the disk geometry
    are needed: ``phi = bar_pa - PA_LON`` and the deprojection of
    :func:`deproject_length` is applied to the length and its error.
    """
    if not (math.isfinite(length_arcsec) and length_arcsec > 0):
        raise GeometryError("the bar length must be positive",
                            keyword="bar_length", value=length_arcsec)
    if not (math.isfinite(err_arcsec) and err_arcsec >= 0):
        raise GeometryError("the bar-length error must be >= 0",
                            keyword="bar_length_err", value=err_arcsec)
    if not on_sky:
        return BarLength(float(length_arcsec), float(err_arcsec),
                         {"user": float(length_arcsec)},
                         "given by the user (deprojected)")
    if bar_pa_deg is None or geometry is None:
        raise GeometryError("a length measured on the sky needs the bar PA "
                            "and the disk geometry to be deprojected",
                            keyword="bar_pa_deg")
    phi = bar_pa_deg - geometry.pa_deg
    factor = float(deproject_length(1.0, phi, geometry.inc_deg))
    return BarLength(length_arcsec * factor, err_arcsec * factor,
                     {"user (sky)": float(length_arcsec)},
                     f"given by the user on the sky, deprojected by "
                     f"{factor:.4f} (phi = {phi % 180:.1f} deg)", None,
                     float(bar_pa_deg) % 180.0)


@dataclass(frozen=True)
class BarRate:
    """Bar rotation rate R = R_CR / R_bar from Monte Carlo draws.

    Attributes
    ----------
    median, p16, p84 : float
    classification : str
        ``"ultrafast"``, ``"fast"`` or ``"slow"`` (of the median).
    p_ultrafast, p_fast, p_slow : float
        Fractions of the draws in each class.
    fraction_cr_found : float
        Fraction of the corotation draws that existed inside the data.
    n_draws : int
    boundaries_source : str
    """

    median: float
    p16: float
    p84: float
    classification: str
    p_ultrafast: float
    p_fast: float
    p_slow: float
    fraction_cr_found: float
    n_draws: int
    boundaries_source: str = RATE_BOUNDARIES_SOURCE


def classify_rate(rate: float) -> str:
    """``"ultrafast"`` (R < 1.0), ``"fast"`` (1.0 <= R <= 1.4) or
    ``"slow"`` (R > 1.4); see :data:`RATE_BOUNDARIES_SOURCE`."""
    lo, hi = RATE_BOUNDARIES
    if rate < lo:
        return "ultrafast"
    return "fast" if rate <= hi else "slow"


def rotation_rate(r_cr_draws_arcsec, bar_length_arcsec: float,
                  bar_err_arcsec: float, rng: np.random.Generator) -> BarRate:
    """Monte Carlo ``R = R_CR / R_bar``.

    Parameters
    ----------
    r_cr_draws_arcsec : array_like
        Corotation radius per draw (NaN where it was not found), e.g.
        ``ResonanceTable.draws_arcsec["CR"]``.
    bar_length_arcsec, bar_err_arcsec : float
        Deprojected bar length and its 1-sigma error (a normal truncated at
        zero is drawn, one per corotation draw).
    rng : numpy.random.Generator

    Raises
    ------
    FitError
        No draw has a corotation radius.
    """
    r_cr = np.asarray(r_cr_draws_arcsec, dtype=float).ravel()
    if not (math.isfinite(bar_length_arcsec) and bar_length_arcsec > 0):
        raise GeometryError("the bar length must be positive",
                            keyword="bar_length", value=bar_length_arcsec)
    if not (math.isfinite(bar_err_arcsec) and bar_err_arcsec >= 0):
        raise GeometryError("the bar-length error must be >= 0",
                            keyword="bar_length_err", value=bar_err_arcsec)
    found = r_cr[np.isfinite(r_cr)]
    if found.size == 0:
        raise FitError("corotation was not found in any draw, so R cannot "
                       "be computed", hint="check the pattern speed and the "
                       "radial range of the rotation curve")
    bars = bar_length_arcsec + bar_err_arcsec * rng.standard_normal(found.size)
    for _ in range(100):
        bad = bars <= 0
        if not bad.any():
            break
        bars[bad] = bar_length_arcsec + bar_err_arcsec * rng.standard_normal(
            int(bad.sum()))
    bars = np.where(bars > 0, bars, bar_length_arcsec)
    rate = found / bars
    p16, med, p84 = np.percentile(rate, [16, 50, 84])
    lo, hi = RATE_BOUNDARIES
    return BarRate(float(med), float(p16), float(p84), classify_rate(med),
                   float(np.mean(rate < lo)),
                   float(np.mean((rate >= lo) & (rate <= hi))),
                   float(np.mean(rate > hi)), found.size / r_cr.size,
                   int(found.size))
