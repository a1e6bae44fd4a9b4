"""Disk geometry estimated from the data, with uncertainties.

Three estimators, each returning a :class:`GeometryEstimate` that the user
can apply to a :class:`~gyrometer.core.geometry.DiskGeometry` while keeping
any value of their own (:meth:`GeometryEstimate.apply_to`):

* :func:`kinematic_geometry` - centre, position angle of the receding line
  of nodes, inclination and systemic velocity from a global thin rotating
  disk fitted to the whole velocity map::

      v_los = V_sys + sin i V(R) cos(theta),
      V(R) = (2/pi) V_c arctan(R / r_t)

  (the first-order term of the tilted-ring / harmonic model, Begeman 1989,
  A&A 223, 47; Schoenmakers, Franx & de Zeeuw 1997, MNRAS 292, 349, with the
  arctan curve of Courteau 1997, AJ 114, 2402). Statistical errors come
  from the least-squares covariance scaled by the reduced chi^2, then by
  ``sqrt(N_pix per beam)`` when the noise is correlated over the beam
  (radio data; common practice). Bars and spiral streaming bias the
  kinematic PA and inclination, which the covariance does not know: a
  systematic error, the excess scatter of the same fit repeated in radial
  rings, is added in quadrature (both parts are reported). Give the bar
  length to leave the bar out; compare with the photometric PA.
  The inclination is poorly constrained kinematically below i ~ 40 degrees
  (it is degenerate with V_c; from memory): prefer the photometric one there.

* :func:`intensity_centroid` - flux-weighted centroid inside a circular
  aperture, iterated until it stops moving.

* :func:`photometric_geometry` - PA and axis ratio q from intensity-weighted
  second moments of the light between two enclosed-light fractions
  (default 50 % and 90 %), iterated with elliptical annuli of the current
  shape; inclination from ``cos^2 i = (q^2 - q0^2) / (1 - q0^2)`` (Hubble
  1926, ApJ 64, 321) with intrinsic thickness ``q0 = 0.2`` (a common choice;
  values 0.13-0.2 are used, from memory). A photometric PA is defined modulo
  180 degrees; the receding side is taken from the velocity map when one is
  available. Errors: photon noise propagated through the moments, plus in
  quadrature the excess scatter of q and PA over four sub-annuli (isophote
  twist and ellipticity gradients usually dominate photon noise).

Every estimate reports the statistical and systematic parts separately
(``pa_err_stat_deg``, ``pa_err_sys_deg``...) and their quadrature sum as
``pa_err_deg`` etc.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord
from scipy.optimize import least_squares
from scipy.stats import chi2

from .coords import lon_to_disk, pixel_scale_arcsec, sky_grid, sky_to_lon
from .errors import DataContentError, FitError, GeometryError
from .geometry import DiskGeometry

__all__ = [
    "GeometryEstimate",
    "kinematic_geometry",
    "intensity_centroid",
    "photometric_geometry",
    "inclination_from_axis_ratio",
]

_BEAM_AREA_PER_FWHM2 = math.pi / (4.0 * math.log(2.0))


@dataclass(frozen=True)
class GeometryEstimate:
    """Geometry values estimated from data; None = not estimated.

    Attributes
    ----------
    ra_deg, dec_deg : float or None
        Centre (ICRS degrees).
    center_err_arcsec : float
    pa_deg, pa_err_deg : float or None, float
        Position angle of the receding line of nodes (or of the major axis
        modulo 180 when ``pa_ambiguous``), N through E, degrees.
    inc_deg, inc_err_deg : float or None, float
    vsys_kms, vsys_err_kms : float or None, float
    method : str
        The estimator with its citation and how errors were obtained.
    pa_ambiguous : bool
        True when the receding side could not be decided (PA mod 180).
    reduced_chi2 : float or None
    n_pixels : int
    extra : dict
        Other fitted numbers (``v_c_kms``, ``r_t_arcsec``, ``axis_ratio``...).
    notes : tuple of str
    center_err_stat_arcsec, pa_err_stat_deg, inc_err_stat_deg, vsys_err_stat_kms : float
        Statistical part of each error (fit covariance or noise
        propagation).
    center_err_sys_arcsec, pa_err_sys_deg, inc_err_sys_deg, vsys_err_sys_kms : float
        Systematic part (model error: the excess scatter of the values over
        radial rings or annuli, see :func:`kinematic_geometry`). The total
        errors above are ``sqrt(stat^2 + sys^2)``.
    """

    ra_deg: float | None = None
    dec_deg: float | None = None
    center_err_arcsec: float = 0.0
    pa_deg: float | None = None
    pa_err_deg: float = 0.0
    inc_deg: float | None = None
    inc_err_deg: float = 0.0
    vsys_kms: float | None = None
    vsys_err_kms: float = 0.0
    method: str = ""
    pa_ambiguous: bool = False
    reduced_chi2: float | None = None
    n_pixels: int = 0
    extra: dict = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    center_err_stat_arcsec: float = 0.0
    center_err_sys_arcsec: float = 0.0
    pa_err_stat_deg: float = 0.0
    pa_err_sys_deg: float = 0.0
    inc_err_stat_deg: float = 0.0
    inc_err_sys_deg: float = 0.0
    vsys_err_stat_kms: float = 0.0
    vsys_err_sys_kms: float = 0.0

    def apply_to(self, geometry: DiskGeometry | None = None, *,
                 keep: tuple[str, ...] = ()) -> DiskGeometry:
        """A geometry with the estimated values, except those in ``keep``.

        Parameters
        ----------
        geometry : DiskGeometry, optional
            Values not estimated (or kept) come from here; without it every
            one of centre, PA and inclination must have been estimated.
        keep : tuple of str
            Any of ``"center"``, ``"pa"``, ``"inc"``, ``"vsys"``: the user's
            values win for these.

        Raises
        ------
        GeometryError
            A needed value is neither estimated nor given.
        """
        for name in keep:
            if name not in ("center", "pa", "inc", "vsys"):
                raise GeometryError(f"unknown geometry item '{name}'",
                                    keyword="keep")
        values = {}
        if geometry is not None:
            values = dict(ra_deg=geometry.ra_deg, dec_deg=geometry.dec_deg,
                          pa_deg=geometry.pa_deg, inc_deg=geometry.inc_deg,
                          vsys_kms=geometry.vsys_kms,
                          distance_mpc=geometry.distance_mpc,
                          center_err_arcsec=geometry.center_err_arcsec,
                          pa_err_deg=geometry.pa_err_deg,
                          inc_err_deg=geometry.inc_err_deg,
                          vsys_err_kms=geometry.vsys_err_kms,
                          distance_err_mpc=geometry.distance_err_mpc)
        used = []
        if self.ra_deg is not None and "center" not in keep:
            values.update(ra_deg=self.ra_deg, dec_deg=self.dec_deg,
                          center_err_arcsec=self.center_err_arcsec)
            used.append("centre")
        if self.pa_deg is not None and "pa" not in keep:
            values.update(pa_deg=self.pa_deg, pa_err_deg=self.pa_err_deg)
            used.append("PA")
        if self.inc_deg is not None and "inc" not in keep:
            values.update(inc_deg=self.inc_deg, inc_err_deg=self.inc_err_deg)
            used.append("inclination")
        if self.vsys_kms is not None and "vsys" not in keep:
            values.update(vsys_kms=self.vsys_kms, vsys_err_kms=self.vsys_err_kms)
            used.append("V_sys")
        for name in ("ra_deg", "dec_deg", "pa_deg", "inc_deg"):
            if name not in values:
                raise GeometryError(f"{name} was neither estimated nor given",
                                    keyword=name,
                                    hint="pass a geometry with that value")
        base = geometry.source if geometry is not None else ""
        source = "; ".join(s for s in (base, f"{', '.join(used)} from "
                                       f"{self.method.split(' (')[0]}"
                                       if used else "") if s)
        return DiskGeometry(source=source or "estimate", **values)


def inclination_from_axis_ratio(q, q0: float = 0.2):
    """``i = arccos sqrt((q^2 - q0^2) / (1 - q0^2))`` in degrees (Hubble 1926).

    ``q <= q0`` gives 90 degrees (edge-on within the assumed thickness).
    """
    q = np.asarray(q, dtype=float)
    if not 0 <= q0 < 1:
        raise GeometryError("intrinsic thickness q0 must be in [0, 1)",
                            keyword="q0", value=q0)
    cos2 = np.clip((q**2 - q0**2) / (1.0 - q0**2), 0.0, 1.0)
    return np.degrees(np.arccos(np.sqrt(cos2)))


def _offset_center(ra_deg, dec_deg, d_east, d_north):
    c = SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="icrs")
    new = c.spherical_offsets_by(d_east * u.arcsec, d_north * u.arcsec)
    return float(new.ra.deg), float(new.dec.deg)


def _reference(maps, center):
    """A reference position: given, or the map's central pixel."""
    if center is not None:
        if isinstance(center, (DiskGeometry, GeometryEstimate)):
            if center.ra_deg is None:
                raise GeometryError("the given estimate has no centre")
            return float(center.ra_deg), float(center.dec_deg)
        return float(center[0]), float(center[1])
    ny, nx = maps.shape
    world = maps.wcs.celestial.pixel_to_world((nx - 1) / 2.0, (ny - 1) / 2.0)
    world = world.icrs
    return float(world.ra.deg), float(world.dec.deg)


def _beam_factor(maps, pix: float, correlated: bool | None) -> float:
    """``sqrt(pixels per beam)`` when the noise is correlated over the PSF
    (default: for radio tracers), else 1."""
    if correlated is None:
        correlated = maps.tracer in ("HI", "CO", "molecular gas")
    psf = maps.psf_fwhm_arcsec
    if not psf or not correlated:
        return 1.0
    return math.sqrt(max(1.0, _BEAM_AREA_PER_FWHM2 * psf**2 / pix**2))


# --------------------------------------------------------------------------
# Centre from the light
# --------------------------------------------------------------------------

def intensity_centroid(maps, *, start=None, aperture_arcsec: float | None = None,
                       n_iter: int = 50) -> GeometryEstimate:
    """Flux-weighted centroid within a Gaussian-windowed aperture, iterated.

    Starts from ``start`` (``(ra, dec)`` or a geometry) or from the
    brightest pixel, and moves the window (Gaussian of sigma = half the
    aperture radius, truncated at twice the radius) to the centroid until
    the shift is below 0.01 pixel; a smooth window avoids the pixelisation
    bias of a hard aperture (common practice). Windows of 4x and 2x the
    radius are iterated first, so a start on an off-centre peak (the two
    density peaks of a bar, a bright knot) is pulled to the centre; a finer
    window that runs off by more than half its radius is left out. The
    error combines the photon noise of the centroid (``sigma_x^2 = sum w^2
    (x - xbar)^2 sigma_I^2 / F^2`` with window w, when the map has errors)
    with the shift between windows of 1x and 1.5x the final radius and a
    floor of 0.1 pixel for the pixel sampling (common practice).

    Parameters
    ----------
    aperture_arcsec : float, optional
        Aperture radius; default the larger of 2 PSF FWHM and 4 pixels.
    """
    img = np.asarray(maps.intensity, dtype=float)
    good = np.isfinite(img)
    if good.sum() < 9:
        raise DataContentError("the intensity map has too few valid pixels")
    pix = pixel_scale_arcsec(maps.wcs)
    if start is None:
        iy, ix = np.unravel_index(np.nanargmax(np.where(good, img, -np.inf)),
                                  img.shape)
        w = maps.wcs.celestial.pixel_to_world(ix, iy).icrs
        ra0, dec0 = float(w.ra.deg), float(w.dec.deg)
    else:
        ra0, dec0 = _reference(maps, start)
    grid = sky_grid(maps.wcs, img.shape, ra0, dec0)
    east, north = grid.east_arcsec[good], grid.north_arcsec[good]
    flux = img[good]
    var = None
    if maps.intensity_err is not None:
        var = np.asarray(maps.intensity_err, dtype=float)[good] ** 2
    aperture = aperture_arcsec or max(2.0 * (maps.psf_fwhm_arcsec or 0.0),
                                      4.0 * pix)

    def centroid(radius, ce=0.0, cn=0.0):
        for _ in range(n_iter):
            d2 = (east - ce) ** 2 + (north - cn) ** 2
            sel = d2 <= (2.0 * radius) ** 2
            # Gaussian window of sigma = radius / 2 (a windowed centroid: a
            # hard-edged aperture on a pixel grid biases the result)
            f = flux[sel] * np.exp(-0.5 * d2[sel] / (0.5 * radius) ** 2)
            total = f.sum()
            if sel.sum() < 3 or not total > 0:
                raise DataContentError("no positive flux in the centring "
                                       "aperture", value=radius)
            ne = float(np.sum(f * east[sel]) / total)
            nn = float(np.sum(f * north[sel]) / total)
            shift = math.hypot(ne - ce, nn - cn)
            ce, cn = ne, nn
            if shift < 0.01 * pix:
                break
        noise = 0.0
        if var is not None:
            win = np.exp(-0.5 * d2[sel] / (0.5 * radius) ** 2)
            v = var[sel] * win**2
            noise = math.sqrt(0.5 * (np.sum((east[sel] - ce) ** 2 * v)
                                     + np.sum((north[sel] - cn) ** 2 * v))) / total
        return ce, cn, noise, int(sel.sum())

    # coarse to fine: a wide window first, so that a start on an off-centre
    # peak (the ends of a bar, a bright knot) is pulled to the centre
    # peak (the ends of a bar, a bright knot) is pulled to the centre; a
    # finer window that runs off by more than half its radius is sitting on
    # a saddle between peaks, and the coarser result is kept
    ce = cn = 0.0
    found = None
    for radius in (4.0 * aperture, 2.0 * aperture, aperture):
        try:
            res = centroid(radius, ce, cn)
        except DataContentError:
            if radius == aperture and found is None:
                raise
            continue
        if found is not None and math.hypot(res[0] - ce, res[1] - cn) > 0.5 * radius:
            break
        found = (radius, *res)
        ce, cn = res[0], res[1]
    used, ce, cn, noise, n = found
    ce2, cn2, _, _ = centroid(1.5 * used, ce, cn)
    # plus 0.1 pixel for the pixel sampling and PSF (a centroid of an
    # undersampled image is not better than ~0.1 pixel; common practice)
    err = math.hypot(math.hypot(noise, math.hypot(ce2 - ce, cn2 - cn)),
                     0.1 * pix)
    ra, dec = _offset_center(ra0, dec0, ce, cn)
    return GeometryEstimate(
        ra_deg=ra, dec_deg=dec, center_err_arcsec=err,
        method=(f"flux-weighted centroid in a {used:.3g} arcsec Gaussian "
                "window, iterated (error: photon noise, the shift between 1x and "
                "1.5x apertures and 0.1 pixel)"), n_pixels=n)


# --------------------------------------------------------------------------
# Systematic errors from the scatter over radial subsets
# --------------------------------------------------------------------------

def _excess_scatter(values, errors, *, confidence: float = 0.90) -> float:
    """Spread of sub-sample values beyond what their own errors explain.

    With K values ``theta_k`` of statistical errors ``sigma_k``, weights
    ``w_k = 1/sigma_k^2``, weighted mean ``theta_w`` and
    ``Q = sum w_k (theta_k - theta_w)^2``, the between-sample variance is
    ``tau^2 = max(0, (Q - (K - 1)) / (S1 - S2/S1))``, ``S1 = sum w_k``,
    ``S2 = sum w_k^2`` (DerSimonian & Laird 1986, Control. Clin. Trials 7,
    177). It is set to 0 unless the values disagree at the given
    ``confidence`` (``Q`` above the chi^2 quantile with K - 1 degrees of
    freedom; Cochran's Q test): with only a few sub-samples, noise alone
    would otherwise give a positive tau half of the time. Values without a
    usable error (0 or not finite) count with the median error. Fewer than
    3 finite values give 0.
    """
    x = np.asarray(values, dtype=float)
    e = np.asarray(errors, dtype=float)
    ok = np.isfinite(x)
    if ok.sum() < 3:
        return 0.0
    x, e = x[ok], e[ok]
    usable = np.isfinite(e) & (e > 0)
    if not usable.any():
        return float(np.std(x, ddof=1))
    e = np.where(usable, e, np.median(e[usable]))
    w = 1.0 / e**2
    s1, s2 = float(w.sum()), float(np.sum(w**2))
    mean = float(np.sum(w * x) / s1)
    q = float(np.sum(w * (x - mean) ** 2))
    dof = x.size - 1
    if q <= chi2.ppf(confidence, dof):
        return 0.0
    return math.sqrt(max(0.0, (q - dof) / (s1 - s2 / s1)))


def _wrap_near(angle_deg: float, ref_deg: float, period: float = 360.0) -> float:
    """``angle`` shifted by whole periods to lie within half a period of ``ref``."""
    half = 0.5 * period
    return ref_deg + ((angle_deg - ref_deg + half) % period - half)


# --------------------------------------------------------------------------
# Kinematic geometry
# --------------------------------------------------------------------------

def _disk_model(p, east, north, fit_center, inc_fixed):
    k = 0
    dx = dy = 0.0
    if fit_center:
        dx, dy = p[0], p[1]
        k = 2
    pa = p[k]
    if inc_fixed is None:
        inc, k = p[k + 1], k + 2
    else:
        inc, k = inc_fixed, k + 1
    vsys, vc, rt = p[k], p[k + 1], p[k + 2]
    X, Y = sky_to_lon(east - dx, north - dy, pa)
    R, cos_t, _ = lon_to_disk(X, Y, inc)
    return vsys + math.sin(math.radians(inc)) * (2 / np.pi) * vc * np.arctan(
        R / rt) * cos_t


def _solve_disk(east, north, v, sig, start, bounds, fit_center, inc_fixed):
    """One weighted least-squares fit of :func:`_disk_model`."""
    fun = lambda p: (_disk_model(p, east, north, fit_center,  # noqa: E731
                                 inc_fixed) - v) / sig
    try:
        return least_squares(fun, start, bounds=bounds, x_scale="jac")
    except (ValueError, np.linalg.LinAlgError) as exc:
        raise FitError(f"kinematic fit failed: {exc}") from exc


def _fit_errors(fit, n: int, weighted: bool, beam: float) -> tuple[np.ndarray, float]:
    """Covariance errors scaled by the reduced chi^2 (at least 1 when the
    data carry errors) and by the correlated-pixel factor; and chi^2_red."""
    dof = max(n - fit.x.size, 1)
    chi2_red = float(fit.fun @ fit.fun) / dof
    try:
        cov = np.linalg.inv(fit.jac.T @ fit.jac)
    except np.linalg.LinAlgError as exc:
        raise FitError("kinematic fit is degenerate (parameters not "
                       "constrained)") from exc
    scale = max(1.0, chi2_red) if weighted else chi2_red
    return np.sqrt(np.clip(np.diag(cov), 0, None) * scale) * beam, chi2_red


def _unpack(p, fit_center: bool, fit_inclination: bool) -> dict:
    """Named parameters of a fit vector; the PA points to the receding side."""
    k = 0
    out = {"dx": 0.0, "dy": 0.0, "inc": math.nan}
    if fit_center:
        out.update(dx=float(p[0]), dy=float(p[1]))
        k = 2
    out["pa"] = float(p[k])
    k += 1
    if fit_inclination:
        out["inc"] = float(p[k])
        k += 1
    out.update(vsys=float(p[k]), vc=float(p[k + 1]), rt=float(p[k + 2]))
    return out


def _ring_scatter(east, north, v, sig, x0, bounds, fit_center, inc_fixed,
                  n_rings: int, weighted: bool, beam: float):
    """Refit the disk in ``n_rings`` annuli of equal pixel count.

    Returns a dict of per-ring values and statistical errors (PA, i, V_sys,
    centre offsets) and the ring radii, or None when the rings are too
    small to fit.
    """
    fit_inc = inc_fixed is None
    ref = _unpack(x0, fit_center, fit_inc)
    dist = np.hypot(east - ref["dx"], north - ref["dy"])
    if v.size < n_rings * 30:
        return None
    edges = np.quantile(dist, np.linspace(0.0, 1.0, n_rings + 1))
    rings = {key: [] for key in ("r", "pa", "pa_err", "inc", "inc_err",
                                 "vsys", "vsys_err", "dx", "dx_err", "dy",
                                 "dy_err")}
    for lo_, hi_ in zip(edges[:-1], edges[1:]):
        s = (dist >= lo_) & (dist <= hi_)
        try:
            fit = _solve_disk(east[s], north[s], v[s], sig[s], x0, bounds,
                              fit_center, inc_fixed)
            perr, _ = _fit_errors(fit, int(s.sum()), weighted, beam)
        except FitError:
            continue
        if not (fit.success and np.all(np.isfinite(perr))):
            continue
        q = _unpack(fit.x, fit_center, fit_inc)
        e = _unpack(perr, fit_center, fit_inc)
        if q["vc"] < 0:
            q["pa"] += 180.0
        rings["r"].append(float(np.median(dist[s])))
        rings["pa"].append(_wrap_near(q["pa"], ref["pa"]))
        for key in ("inc", "vsys", "dx", "dy"):
            rings[key].append(q[key])
        rings["pa_err"].append(e["pa"])
        rings["inc_err"].append(e["inc"] if fit_inc else 0.0)
        rings["vsys_err"].append(e["vsys"])
        rings["dx_err"].append(e["dx"] if fit_center else 0.0)
        rings["dy_err"].append(e["dy"] if fit_center else 0.0)
    if len(rings["r"]) < 3:
        return None
    return rings


def kinematic_geometry(maps, *, initial: DiskGeometry | None = None,
                       center=None, fit_center: bool = True,
                       fit_inclination: bool = True,
                       r_max_arcsec: float | None = None,
                       r_min_arcsec: float | None = None,
                       bar_length_arcsec: float | None = None,
                       n_rings: int = 4,
                       clip_sigma: float = 4.0,
                       pixels_correlated: bool | None = None) -> GeometryEstimate:
    """Fit a thin disk with an arctan rotation curve to the velocity map.

    The errors have two parts, reported separately and added in quadrature
    in ``pa_err_deg``, ``inc_err_deg``, ``vsys_err_kms`` and
    ``center_err_arcsec``:

    * statistical: the least-squares covariance, scaled by the reduced
      chi^2 (at least 1 when the map has errors) and by
      ``sqrt(N_pix per beam)`` for correlated noise;
    * systematic: the same model refitted in ``n_rings`` annuli of equal
      pixel count around the fitted centre; the excess scatter of the ring
      values over their own statistical errors (the between-ring
      standard deviation tau of DerSimonian & Laird 1986, counted only when
      Cochran's Q test finds the rings disagree at 95 %; see
      :func:`_excess_scatter`) is the systematic error of each of PA, i,
      V_sys and the centre.

    Rationale: a pure circular thin disk is the wrong model inside a bar or
    spiral, whose streaming drags the kinematic PA and inclination by
    degrees (the m +- 1 harmonics of an m-armed perturbation, Schoenmakers,
    Franx & de Zeeuw 1997, MNRAS 292, 349), while the covariance only knows
    the noise. Comparing tilted-ring values with radius is the usual check
    of such model errors (Begeman 1989, A&A 223, 47; common practice). A
    disk that is circular everywhere gives ring values that agree within
    their errors and a systematic term near zero. The global value is not
    corrected; the ring scatter (not its standard error: the ring
    deviations share one cause and do not average down) says how far it may
    be off. The PA error is the dominant systematic of the
    Tremaine-Weinberg method (Zou et al. 2019, ApJ 884, 23;
    Garma-Oehmichen et al. 2020, MNRAS 491, 3655), so this term matters.

    Parameters
    ----------
    maps : MapSet
        Needs ``velocity_kms``; uses ``velocity_err_kms`` as weights and
        ``psf_fwhm_arcsec`` for the correlated-pixel error factor.
    initial : DiskGeometry, optional
        Starting values (and the fixed inclination when
        ``fit_inclination=False``).
    center : (ra, dec) or estimate, optional
        Starting centre when ``initial`` is not given (default: map centre).
    fit_center, fit_inclination : bool
        Free the centre / the inclination.
    r_max_arcsec : float, optional
        Only pixels within this radius (arcsec on the sky) of the starting
        centre are used.
    r_min_arcsec : float, optional
        Pixels within this radius of the starting centre are left out, e.g.
        the bar, whose streaming biases the PA by a few degrees.
    bar_length_arcsec : float, optional
        Bar semi-major axis (arcsec, disk plane or sky). When given and
        ``r_min_arcsec`` is not, ``r_min_arcsec`` = the bar length: a pixel
        at sky distance d lies at disk radius >= d, so this removes the
        whole bar. Without either, all pixels are fitted and the ring scatter
        carries the bar's bias into the systematic error.
    n_rings : int
        Number of annuli for the systematic term (default 4; below 3 the
        systematic term is not computed and a note says so).
    clip_sigma : float
        After a first fit, pixels with residuals beyond this many robust
        standard deviations (1.4826 MAD) are dropped and the fit repeated.
    pixels_correlated : bool, optional
        Inflate errors by ``sqrt(N_pix per beam)`` (default: for radio
        tracers, whose noise is correlated over the beam).

    Returns
    -------
    GeometryEstimate
        ``extra`` holds ``v_c_kms``, ``r_t_arcsec`` (with errors) and the
        ring values ``ring_r_arcsec``, ``ring_pa_deg``, ``ring_inc_deg``,
        ``ring_vsys_kms``.

    Raises
    ------
    DataContentError
        Too few valid velocities.
    FitError
        The fit did not converge or is degenerate.
    """
    vel = np.asarray(maps.velocity_kms, dtype=float)
    good = np.isfinite(vel)
    err = None
    if maps.velocity_err_kms is not None:
        err = np.asarray(maps.velocity_err_kms, dtype=float)
        good &= np.isfinite(err) & (err > 0)
    if good.sum() < 20:
        raise DataContentError("too few valid velocity pixels for a "
                               "kinematic fit", value=int(good.sum()))
    if bar_length_arcsec is not None:
        if not (math.isfinite(bar_length_arcsec) and bar_length_arcsec >= 0):
            raise GeometryError("the bar length must be a non-negative "
                                "number of arcsec", keyword="bar_length_arcsec",
                                value=bar_length_arcsec)
        if r_min_arcsec is None:
            r_min_arcsec = float(bar_length_arcsec) or None
    if initial is not None:
        ra0, dec0 = initial.ra_deg, initial.dec_deg
    else:
        ra0, dec0 = _reference(maps, center)
    if not fit_inclination and initial is None:
        raise FitError("a fixed inclination needs an initial geometry",
                       keyword="fit_inclination")
    grid = sky_grid(maps.wcs, maps.shape, ra0, dec0)
    east, north = grid.east_arcsec[good], grid.north_arcsec[good]
    v = vel[good]
    sig = np.ones_like(v) if err is None else err[good]
    if r_max_arcsec or r_min_arcsec:
        dist = np.hypot(east, north)
        inside = ((dist <= r_max_arcsec) if r_max_arcsec else True) & (
            (dist >= r_min_arcsec) if r_min_arcsec else True)
        east, north, v, sig = east[inside], north[inside], v[inside], sig[inside]
        if v.size < 20:
            raise DataContentError("too few velocity pixels between r_min and "
                                   "r_max", value=int(v.size))
    r_ext = float(np.percentile(np.hypot(east, north), 90))

    # starting values: PA from the velocity gradient of a plane fit
    if initial is not None:
        pa0, inc0, vsys0 = initial.pa_deg, initial.inc_deg, initial.vsys_kms
    else:
        A = np.column_stack([np.ones_like(v), east, north])
        coef, *_ = np.linalg.lstsq(A, v, rcond=None)
        pa0 = math.degrees(math.atan2(coef[1], coef[2])) % 360.0
        inc0, vsys0 = 50.0, float(np.median(v))
    amp = 0.5 * float(np.percentile(v, 95) - np.percentile(v, 5))
    p0 = ([0.0, 0.0] if fit_center else []) + [pa0] + (
        [inc0] if fit_inclination else []) + [vsys0,
                                              amp / math.sin(math.radians(inc0)),
                                              0.1 * r_ext]
    lo = ([-r_ext, -r_ext] if fit_center else []) + [-np.inf] + (
        [10.0] if fit_inclination else []) + [-np.inf, -np.inf, 1e-3 * r_ext]
    hi = ([r_ext, r_ext] if fit_center else []) + [np.inf] + (
        [85.0] if fit_inclination else []) + [np.inf, np.inf, 5.0 * r_ext]
    p0 = np.clip(p0, np.array(lo) + 1e-9, np.array(hi) - 1e-9)
    inc_fixed = None if fit_inclination else initial.inc_deg
    bounds = (lo, hi)

    sel = np.ones(v.size, dtype=bool)
    fit = _solve_disk(east, north, v, sig, p0, bounds, fit_center, inc_fixed)
    notes = []
    if clip_sigma:
        resid = fit.fun * sig[sel]
        mad = 1.4826 * np.median(np.abs(resid - np.median(resid)))
        full = (_disk_model(fit.x, east, north, fit_center, inc_fixed) - v)
        keep = np.abs(full) <= clip_sigma * max(mad, 1e-9)
        if (~keep).sum() and keep.sum() > 20:
            notes.append(f"{int((~keep).sum())} pixels clipped beyond "
                         f"{clip_sigma:g} sigma")
            sel = keep
            fit = _solve_disk(east[sel], north[sel], v[sel], sig[sel], fit.x,
                              bounds, fit_center, inc_fixed)
    if not fit.success:
        raise FitError(f"kinematic fit did not converge: {fit.message}")
    n = int(sel.sum())
    beam = _beam_factor(maps, grid.pixel_scale_arcsec, pixels_correlated)
    perr, chi2_red = _fit_errors(fit, n, err is not None, beam)
    best = _unpack(fit.x, fit_center, fit_inclination)
    stat = _unpack(perr, fit_center, fit_inclination)
    pa, vc = best["pa"], best["vc"]
    if vc < 0:  # the PA pointed at the approaching side
        pa, vc = pa + 180.0, -vc
    pa_stat, vsys_stat = stat["pa"], stat["vsys"]
    cstat = (math.sqrt(0.5 * (stat["dx"] ** 2 + stat["dy"] ** 2))
             if fit_center else 0.0)
    if fit_inclination:
        inc, inc_stat = best["inc"], stat["inc"]
    else:
        inc, inc_stat = initial.inc_deg, initial.inc_err_deg

    # systematic term: scatter over radial rings
    pa_sys = inc_sys = vsys_sys = csys = 0.0
    extra_rings = {}
    rings = None
    if n_rings >= 3:
        x0 = np.array(fit.x, dtype=float)
        rings = _ring_scatter(east[sel], north[sel], v[sel], sig[sel], x0,
                              bounds, fit_center, inc_fixed, int(n_rings),
                              err is not None, beam)
    if rings is None:
        notes.append("systematic error not estimated (too few pixels or "
                      "rings): the errors are statistical only")
    else:
        pa_sys = _excess_scatter(rings["pa"], rings["pa_err"])
        vsys_sys = _excess_scatter(rings["vsys"], rings["vsys_err"])
        if fit_inclination:
            inc_sys = _excess_scatter(rings["inc"], rings["inc_err"])
        if fit_center:
            csys = math.sqrt(0.5 * (_excess_scatter(rings["dx"], rings["dx_err"]) ** 2
                                    + _excess_scatter(rings["dy"], rings["dy_err"]) ** 2))
        extra_rings = {"ring_r_arcsec": tuple(rings["r"]),
                       "ring_pa_deg": tuple(p % 360.0 for p in rings["pa"]),
                       "ring_inc_deg": tuple(rings["inc"]),
                       "ring_vsys_kms": tuple(rings["vsys"]),
                       "ring_pa_err_deg": tuple(rings["pa_err"]),
                       "ring_inc_err_deg": tuple(rings["inc_err"])}
        if pa_sys > max(3.0 * pa_stat, 1.0):
            notes.append(f"PA varies with radius (systematic {pa_sys:.1f} deg):"
                         " non-circular motions (bar, spiral) or a warp; "
                         "consider r_min_arcsec beyond the bar")
    ra, dec = (_offset_center(ra0, dec0, best["dx"], best["dy"]) if fit_center
               else (ra0, dec0))
    if fit_inclination and inc < 40:
        notes.append("kinematic inclination below 40 deg is poorly "
                     "constrained (degenerate with V_c); prefer photometry")
    if r_min_arcsec:
        notes.append(f"pixels within {r_min_arcsec:.3g} arcsec of the centre "
                     "left out")
    return GeometryEstimate(
        ra_deg=ra if fit_center else None, dec_deg=dec if fit_center else None,
        center_err_arcsec=math.hypot(cstat, csys), pa_deg=pa % 360.0,
        pa_err_deg=math.hypot(pa_stat, pa_sys),
        inc_deg=inc if fit_inclination else None,
        inc_err_deg=math.hypot(inc_stat, inc_sys) if fit_inclination else 0.0,
        vsys_kms=best["vsys"], vsys_err_kms=math.hypot(vsys_stat, vsys_sys),
        method=("kinematic thin-disk fit (first-order harmonic model, "
                "Begeman 1989; Schoenmakers et al. 1997; arctan curve, "
                "Courteau 1997); errors: covariance x reduced chi^2"
                + (" x sqrt(pixels per beam)" if beam > 1 else "")
                + (f", plus in quadrature the excess scatter over "
                   f"{len(rings['r'])} radial rings" if rings else "")),
        reduced_chi2=chi2_red, n_pixels=n,
        extra={"v_c_kms": abs(vc), "r_t_arcsec": best["rt"],
               "v_c_err_kms": stat["vc"], "r_t_err_arcsec": stat["rt"],
               **extra_rings},
        notes=tuple(notes),
        center_err_stat_arcsec=cstat, center_err_sys_arcsec=csys,
        pa_err_stat_deg=pa_stat, pa_err_sys_deg=pa_sys,
        inc_err_stat_deg=inc_stat if fit_inclination else 0.0,
        inc_err_sys_deg=inc_sys,
        vsys_err_stat_kms=vsys_stat, vsys_err_sys_kms=vsys_sys)


# --------------------------------------------------------------------------
# Photometric geometry
# --------------------------------------------------------------------------

def _shape(cee: float, cnn: float, cen: float) -> tuple[float, float]:
    """Axis ratio and major-axis PA (degrees mod 180, N through E) of a
    second-moment tensor."""
    vals, vecs = np.linalg.eigh(np.array([[cee, cen], [cen, cnn]]))
    major = vecs[:, 1]
    q = math.sqrt(max(vals[0], 0.0) / vals[1]) if vals[1] > 0 else math.nan
    pa = math.degrees(math.atan2(major[0], major[1])) % 180.0
    return q, pa


def _moments(e, n, w, var=None):
    """Axis ratio and PA from intensity-weighted second moments, with their
    photon-noise errors when the pixel variances ``var`` are given.

    Linear propagation: with ``W = sum w``, each moment
    ``M = sum w_j g(e_j, n_j) / W`` about the centroid has
    ``dM/dw_j = (g_j - M) / W`` (the centroid term vanishes at first order),
    so ``Cov(M) = sum_j var_j (g_j - M)(g_j - M)^T / W^2``; the Jacobian of
    (q, PA) with respect to the moments is taken by central differences.
    Returns ``(q, pa_deg, q_err, pa_err_deg)``; the errors are 0 without
    ``var``.
    """
    total = w.sum()
    if not total > 0:
        return math.nan, math.nan, math.nan, math.nan
    me, mn = np.sum(w * e) / total, np.sum(w * n) / total
    de, dn = e - me, n - mn
    g = np.stack([de**2, dn**2, de * dn])
    m = g @ w / total
    q, pa = _shape(*m)
    if var is None:
        return q, pa, 0.0, 0.0
    d = (g - m[:, None]) / total
    cov = (d * var) @ d.T
    h = 1e-6 * float(m[0] + m[1])
    jac = np.empty((2, 3))
    for k in range(3):
        step = np.zeros(3)
        step[k] = h
        qp, pp = _shape(*(m + step))
        qm, pm = _shape(*(m - step))
        jac[0, k] = (qp - qm) / (2 * h)
        jac[1, k] = ((pp - pm + 90.0) % 180.0 - 90.0) / (2 * h)
    c = jac @ cov @ jac.T
    return q, pa, math.sqrt(max(c[0, 0], 0.0)), math.sqrt(max(c[1, 1], 0.0))


def _inc_err(q: float, dq: float, q0: float) -> float:
    """Half the inclination range for ``q -+ dq`` (degrees)."""
    if dq <= 0:
        return 0.0
    return 0.5 * abs(float(inclination_from_axis_ratio(min(q + dq, 1.0), q0))
                     - float(inclination_from_axis_ratio(max(q - dq, 0.0), q0)))


def photometric_geometry(maps, *, center=None,
                         light_fractions: tuple[float, float] = (0.5, 0.9),
                         q0: float = 0.2, n_iter: int = 10,
                         use_velocity: bool = True,
                         bar_length_arcsec: float | None = None,
                         n_annuli: int = 4) -> GeometryEstimate:
    """PA and inclination from second moments of the outer light.

    The errors have two parts, reported separately and added in quadrature
    in ``pa_err_deg`` and ``inc_err_deg``:

    * statistical: the photon noise of the moments propagated linearly
      (needs ``maps.intensity_err``; otherwise 0);
    * systematic: the moments recomputed in ``n_annuli`` equal-width
      elliptical sub-annuli; the excess scatter of their q and PA over their
      own statistical errors (DerSimonian & Laird 1986 tau, as in
      :func:`kinematic_geometry`; the plain standard deviation when the map
      has no intensity errors), plus in quadrature the change of q and PA
      when the centre moves by its 1-sigma error east and north (an
      off-centre annulus tilts the moments). Isophote twists and
      ellipticity gradients - a bar, a lens, spiral arms, a bulge - change
      the shape with radius, and the isophotes inside a bar do not have the
      disk's shape (common practice: fit the outer disk). Give
      ``bar_length_arcsec`` to keep the annulus outside the bar.

    The outer edge of the annulus stops at the first blank or border pixel
    (an annulus cut by the map edge looks rounder), and negative pixels
    count (dropping negative noise leaves a round positive pedestal).

    Limitation: an annulus lying wholly inside a bar has a consistent but
    wrong shape, which the sub-annulus scatter cannot reveal (e.g. light
    fractions 0.3-0.6 of the LBDP-037 sample give a PA 40 degrees off with
    a 3-degree error); keep the default fractions or give the bar length.

    Parameters
    ----------
    maps : MapSet
        Uses ``intensity`` (and ``velocity_kms`` to pick the receding side).
    center : (ra, dec), DiskGeometry or GeometryEstimate, optional
        Default: :func:`intensity_centroid`.
    light_fractions : (float, float)
        Enclosed-light fractions bounding the annulus used.
    q0 : float
        Intrinsic axial ratio of the disk (default 0.2, a common choice).
    n_iter : int
        Iterations of the elliptical annulus.
    use_velocity : bool
        Resolve the 180-degree ambiguity with the velocity map.
    bar_length_arcsec : float, optional
        Bar semi-major axis (arcsec, disk plane): the annulus starts at
        least this far out (in elliptical semi-major axis).
    n_annuli : int
        Sub-annuli for the systematic term (below 3: not computed).
    """
    f_in, f_out = light_fractions
    if not 0 <= f_in < f_out <= 1:
        raise GeometryError("light fractions must satisfy 0 <= f1 < f2 <= 1",
                            keyword="light_fractions", value=light_fractions)
    if bar_length_arcsec is not None and not (
            math.isfinite(bar_length_arcsec) and bar_length_arcsec >= 0):
        raise GeometryError("the bar length must be a non-negative number of "
                            "arcsec", keyword="bar_length_arcsec",
                            value=bar_length_arcsec)
    img = np.asarray(maps.intensity, dtype=float)
    good = np.isfinite(img)
    var_img = None
    if maps.intensity_err is not None:
        ierr = np.asarray(maps.intensity_err, dtype=float)
        good &= np.isfinite(ierr)
        var_img = ierr**2
    if good.sum() < 50:
        raise DataContentError("too few valid intensity pixels for moments")
    if center is None:
        cen = intensity_centroid(maps)
        ra0, dec0, cerr = cen.ra_deg, cen.dec_deg, cen.center_err_arcsec
    else:
        ra0, dec0 = _reference(maps, center)
        cerr = getattr(center, "center_err_arcsec", 0.0) or 0.0
    grid = sky_grid(maps.wcs, img.shape, ra0, dec0)
    east, north, w = grid.east_arcsec[good], grid.north_arcsec[good], img[good]
    var = var_img[good] if var_img is not None else None
    # every valid pixel counts, negative ones too: dropping the negative
    # noise leaves a positive, round pedestal that biases q towards 1
    pos = np.isfinite(w)
    east, north, w = east[pos], north[pos], w[pos]
    if var is not None:
        var = var[pos]
    notes = []
    # pixels beyond the data (map border, blanks): an annulus that crosses
    # them is cut along its major axis and looks rounder than it is
    edge = ~np.isfinite(img)
    edge[0, :] = edge[-1, :] = edge[:, 0] = edge[:, -1] = True
    east_edge, north_edge = grid.east_arcsec[edge], grid.north_arcsec[edge]
    truncated = False
    q, pa = 1.0, 0.0
    for _ in range(n_iter):
        X, Y = sky_to_lon(east, north, pa)
        a = np.hypot(X, Y / q)
        order = np.argsort(a)
        cum = np.cumsum(w[order]) / w.sum()
        a_in = a[order][np.searchsorted(cum, f_in)] if f_in > 0 else 0.0
        a_out = a[order][min(np.searchsorted(cum, f_out), a.size - 1)]
        Xe, Ye = sky_to_lon(east_edge, north_edge, pa)
        a_edge = float(np.min(np.hypot(Xe, Ye / q)))
        truncated = a_edge < a_out
        if truncated and a_edge > 1.25 * a_in:
            a_out = a_edge
        if bar_length_arcsec:
            a_in = max(a_in, float(bar_length_arcsec))
        sel = (a >= a_in) & (a <= a_out)
        if sel.sum() < 20:
            raise DataContentError("too few pixels in the moment annulus"
                                   + (" outside the bar" if bar_length_arcsec
                                      else ""))
        q_new, pa_new, _, _ = _moments(east[sel], north[sel], w[sel])
        done = abs(q_new - q) < 1e-5 and abs((pa_new - pa + 90) % 180 - 90) < 1e-3
        q, pa = q_new, pa_new
        if done:
            break
    if bar_length_arcsec and a_in > a_out:
        raise DataContentError("the bar fills the light annulus: raise the "
                               "outer light fraction", value=light_fractions)
    X, Y = sky_to_lon(east, north, pa)
    a = np.hypot(X, Y / q)
    sel = (a >= a_in) & (a <= a_out)
    _, _, q_stat, pa_stat = _moments(east[sel], north[sel], w[sel],
                                     None if var is None else var[sel])
    # systematic: excess scatter over equal-width sub-annuli
    q_sys = pa_sys = 0.0
    qs, pas = [], []
    if n_annuli >= 3:
        edges = np.linspace(a_in, a_out, int(n_annuli) + 1)
        q_errs, pa_errs = [], []
        for lo_, hi_ in zip(edges[:-1], edges[1:]):
            s = (a >= lo_) & (a <= hi_)
            if s.sum() >= 20:
                qk, pk, qe, pe = _moments(east[s], north[s], w[s],
                                          None if var is None else var[s])
                qs.append(qk)
                pas.append(_wrap_near(pk, pa, 180.0))
                q_errs.append(qe)
                pa_errs.append(pe)
        q_sys = _excess_scatter(qs, q_errs)
        pa_sys = _excess_scatter(pas, pa_errs)
    if len(qs) < 3:
        notes.append("systematic error not estimated (too few pixels in the "
                     "sub-annuli)")
    # the centre's own error moves the annulus: half the change of q and PA
    # for shifts of +-1 sigma east and north, added in quadrature
    q_cen = pa_cen = 0.0
    if cerr > 0:
        dq2 = dpa2 = 0.0
        for de_, dn_ in ((cerr, 0.0), (0.0, cerr)):
            shifted = []
            for sign in (1.0, -1.0):
                Xs, Ys = sky_to_lon(east - sign * de_, north - sign * dn_, pa)
                s_ = ((np.hypot(Xs, Ys / q) >= a_in)
                      & (np.hypot(Xs, Ys / q) <= a_out))
                shifted.append(_moments(east[s_], north[s_], w[s_])[:2])
            dq2 += (0.5 * (shifted[0][0] - shifted[1][0])) ** 2
            dpa2 += (0.5 * ((shifted[0][1] - shifted[1][1] + 90.0) % 180.0
                            - 90.0)) ** 2
        q_cen, pa_cen = math.sqrt(dq2), math.sqrt(dpa2)
    q_sys = math.hypot(q_sys, q_cen)
    pa_sys = math.hypot(pa_sys, pa_cen)
    inc = float(inclination_from_axis_ratio(q, q0))
    inc_stat = _inc_err(q, q_stat, q0)
    inc_sys = _inc_err(q, q_sys, q0)
    q_err = math.hypot(q_stat, q_sys)
    if inc >= 89.0:
        inc = 89.0
        notes.append(f"axis ratio {q:.3f} <= q0 = {q0:g}: inclination set to 89")
    if inc < 1.0:
        inc = 1.0
        notes.append("the isophotes are round: inclination set to 1 degree")
    ambiguous = True
    if use_velocity and maps.velocity_kms is not None:
        vel = np.asarray(maps.velocity_kms, dtype=float)[good][pos]
        ok = np.isfinite(vel) & (a <= a_out)
        if ok.sum() > 10:
            Xv, _ = sky_to_lon(east[ok], north[ok], pa)
            side = np.sum((vel[ok] - np.median(vel[ok])) * Xv)
            if side < 0:
                pa = (pa + 180.0) % 360.0
            ambiguous = False
    if ambiguous:
        notes.append("PA defined modulo 180 deg: the receding side is unknown")
    if truncated:
        notes.append("the light annulus reaches the edge of the data"
                     + (f": cut at a = {a_out:.3g} arcsec" if a_out <= a_edge
                        else ": the isophotes may look rounder than they are"))
    if bar_length_arcsec:
        notes.append(f"annulus kept outside the bar (a >= {a_in:.3g} arcsec)")
    estimated_center = center is None
    return GeometryEstimate(
        ra_deg=ra0 if estimated_center else None,
        dec_deg=dec0 if estimated_center else None, center_err_arcsec=cerr,
        pa_deg=pa, pa_err_deg=math.hypot(pa_stat, pa_sys), inc_deg=inc,
        inc_err_deg=math.hypot(inc_stat, inc_sys),
        method=(f"photometric second moments between {f_in:g} and {f_out:g} "
                f"of the light; cos^2 i = (q^2 - q0^2)/(1 - q0^2), q0 = {q0:g} "
                "(Hubble 1926); errors: photon noise plus in quadrature the "
                f"excess scatter over {len(qs)} sub-annuli and the centre "
                "error"),
        pa_ambiguous=ambiguous, n_pixels=int(sel.sum()),
        extra={"axis_ratio": q, "axis_ratio_err": q_err,
               "axis_ratio_err_stat": q_stat, "axis_ratio_err_sys": q_sys,
               "a_inner_arcsec": float(a_in), "a_outer_arcsec": float(a_out),
               "axis_ratio_err_center": q_cen, "pa_err_center_deg": pa_cen,
               "annulus_axis_ratio": tuple(qs),
               "annulus_pa_deg": tuple(p % 180.0 for p in pas)},
        notes=tuple(notes),
        center_err_stat_arcsec=cerr,
        pa_err_stat_deg=pa_stat, pa_err_sys_deg=pa_sys,
        inc_err_stat_deg=inc_stat, inc_err_sys_deg=inc_sys)
